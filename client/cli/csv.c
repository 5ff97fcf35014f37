/*
 * csv.c - splits one CSV line into cells, in place.
 *
 * Used by `feed` and `value --file`; the separator is ',' or one the user
 * names (`feed --delimiter ';'`).  RFC 4180 quoting within one line: a
 * quoted cell may hold commas and doubled quotes, but not a newline (XXX: a
 * quoted cell spanning lines is reported as an unterminated quote; numeric
 * data never needs one).  Owns nothing but the pointer array it grows.
 */
#include <stdlib.h>
#include <string.h>

#include "cli.h"

/* A blank around a cell: a space, or a tab unless tabs separate the cells. */
static int is_blank(char ch, char sep)
{
    return ch == ' ' || (ch == '\t' && sep != '\t');
}

long csv_split(char *line, char ***cells, size_t *cap)
{
    return csv_split_sep(line, ',', cells, cap);
}

long csv_split_sep(char *line, char sep_ch, char ***cells, size_t *cap)
{
    size_t len = strlen(line);
    while (len > 0 && (line[len - 1] == '\n' || line[len - 1] == '\r'))
        line[--len] = 0;
    size_t n = 0;
    char *p = line;
    for (;;) {
        if (n == *cap) {
            size_t nc = *cap ? 2 * *cap : 16;
            char **g = realloc(*cells, nc * sizeof *g);
            if (!g)
                return -2;
            *cells = g;
            *cap = nc;
        }
        while (is_blank(*p, sep_ch))
            p++;
        char *cell = p, *end;
        if (*p == '"') {
            /* Quoted: copy down over the doubled quotes. */
            char *w = ++p;
            cell = w;
            for (;;) {
                if (!*p)
                    return -1;
                if (*p == '"') {
                    if (p[1] == '"') {
                        *w++ = '"';
                        p += 2;
                        continue;
                    }
                    p++;
                    break;
                }
                *w++ = *p++;
            }
            end = w;
            while (is_blank(*p, sep_ch))
                p++;
            /* Text after the closing quote and before the separator is kept out of the cell. */
            while (*p && *p != sep_ch)
                p++;
        } else {
            while (*p && *p != sep_ch)
                p++;
            end = p;
            while (end > cell && is_blank(end[-1], sep_ch))
                end--;
        }
        char sep = *p;
        *end = 0;
        (*cells)[n++] = cell;
        if (sep != sep_ch || !sep)
            break;
        p++;
    }
    return (long)n;
}
