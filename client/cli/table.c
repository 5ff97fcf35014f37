/*
 * table.c - aligned text tables for the CLI's terminal output.
 *
 * Owns copies of every cell until table_free.  A column is as wide as its
 * widest cell; cells that read as numbers are right-aligned so that digits
 * line up, everything else is left-aligned.  Widths count bytes, so a cell
 * with multi-byte UTF-8 text may shift its row (XXX: names are ASCII in
 * protocol v1, labels may not be).  table_list starts the table of a
 * reply's list, or prints the list's "no ..." line when it is empty.
 * Single-threaded, like the whole CLI.
 */
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "cli.h"

struct table {
    size_t ncols;
    int left; /* table_left: no right alignment */
    size_t nrows, cap;
    char **cells; /* nrows * ncols, owned */
};

struct table *table_new(size_t ncols)
{
    struct table *t = calloc(1, sizeof *t);
    if (t)
        t->ncols = ncols;
    return t;
}

int table_row(struct table *t, const char *const *cells)
{
    if (t->nrows == t->cap) {
        size_t cap = t->cap ? 2 * t->cap : 16;
        char **n = realloc(t->cells, cap * t->ncols * sizeof *n);
        if (!n)
            return -1;
        t->cells = n;
        t->cap = cap;
    }
    char **row = t->cells + t->nrows * t->ncols;
    for (size_t i = 0; i < t->ncols; i++) {
        row[i] = strdup(cells[i] ? cells[i] : "");
        if (!row[i]) {
            while (i--)
                free(row[i]);
            return -1;
        }
    }
    t->nrows++;
    return 0;
}

int table_rowv(struct table *t, ...)
{
    const char *cells[32];
    va_list ap;
    va_start(ap, t);
    for (size_t i = 0; i < t->ncols && i < 32; i++)
        cells[i] = va_arg(ap, const char *);
    va_end(ap);
    return table_row(t, cells);
}

static int is_number(const char *s)
{
    double v;
    return *s && (parse_double(s, &v) == 0 || strcmp(s, "-") == 0);
}

void table_print(const struct table *t, FILE *f)
{
    size_t *w = calloc(t->ncols ? t->ncols : 1, sizeof *w);
    if (!w)
        return;
    for (size_t r = 0; r < t->nrows; r++)
        for (size_t c = 0; c < t->ncols; c++) {
            size_t n = strlen(t->cells[r * t->ncols + c]);
            if (n > w[c])
                w[c] = n;
        }
    for (size_t r = 0; r < t->nrows; r++) {
        /* The last column is not padded on the right (no trailing blanks). */
        size_t last = t->ncols;
        while (last > 0 && !*t->cells[r * t->ncols + last - 1])
            last--;
        for (size_t c = 0; c < last; c++) {
            const char *s = t->cells[r * t->ncols + c];
            int right = !t->left && r > 0 && is_number(s);
            int width = (int)w[c];
            if (right)
                fprintf(f, "%*s", width, s);
            else if (c + 1 == last)
                fputs(s, f);
            else
                fprintf(f, "%-*s", width, s);
            if (c + 1 < last)
                fputs("  ", f);
        }
        fputc('\n', f);
    }
    free(w);
}

struct table *table_list(const cJSON *list, const char *empty, size_t ncols, int *ex)
{
    *ex = EXIT_OK;
    if (!cJSON_GetArraySize(list)) {
        printf("%s\n", empty);
        return NULL;
    }
    struct table *t = table_new(ncols);
    if (!t)
        *ex = cli_error(EXIT_USAGE, "out of memory");
    return t;
}

void table_left(struct table *t)
{
    t->left = 1;
}

void table_free(struct table *t)
{
    if (!t)
        return;
    for (size_t i = 0; i < t->nrows * t->ncols; i++)
        free(t->cells[i]);
    free(t->cells);
    free(t);
}
