/*
 * csv.c - splits one CSV line into cells, in place.
 *
 * Used by `feed` and `value --file`.  RFC 4180 quoting within one line: a
 * quoted cell may hold commas and doubled quotes, but not a newline (XXX: a
 * quoted cell spanning lines is reported as an unterminated quote; numeric
 * data never needs one).  Owns nothing but the pointer array it grows.
 */
#include <stdlib.h>
#include <string.h>

#include "cli.h"

static int is_blank(char ch)
{
    return ch == ' ' || ch == '\t';
}

long csv_split(char *line, char ***cells, size_t *cap)
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
        while (is_blank(*p))
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
            while (is_blank(*p))
                p++;
            /* Text after the closing quote and before the comma is kept out of the cell. */
            while (*p && *p != ',')
                p++;
        } else {
            while (*p && *p != ',')
                p++;
            end = p;
            while (end > cell && is_blank(end[-1]))
                end--;
        }
        char sep = *p;
        *end = 0;
        (*cells)[n++] = cell;
        if (sep != ',')
            break;
        p++;
    }
    return (long)n;
}
