/*
 * jw.c - the JSON writer (jw.h).
 *
 * Grows the buffer by doubling (from 256 bytes), so a writer reused for each
 * reply reaches its high-water mark and then allocates nothing.  Runs on
 * whichever thread owns the jw_t; it must never print a number that does not
 * read back as itself, or a string byte below 0x20 raw.
 */
#include "common/jw.h"

#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <string.h>

#include "common/mem.h"

void jw_init(jw_t *j)
{
    j->b = NULL;
    j->len = j->cap = 0;
}

void jw_close(jw_t *j)
{
    mem_free(j->b);
    jw_init(j);
}

void jw_reset(jw_t *j)
{
    j->len = 0;
    if (j->b)
        j->b[0] = 0;
}

void jw_reserve(jw_t *j, size_t more)
{
    if (j->len + more + 1 <= j->cap)
        return;
    size_t cap = j->cap ? j->cap : 256;
    while (cap < j->len + more + 1)
        cap *= 2;
    j->b = mem_realloc(j->b, cap);
    j->cap = cap;
}

char *jw_take(jw_t *j)
{
    jw_reserve(j, 0);
    char *b = j->b;
    b[j->len] = 0;
    jw_init(j);
    return b;
}

void jw_raw(jw_t *j, const char *s, size_t n)
{
    jw_reserve(j, n);
    memcpy(j->b + j->len, s, n);
    j->len += n;
    j->b[j->len] = 0;
}

void jw_lit(jw_t *j, const char *s)
{
    jw_raw(j, s, strlen(s));
}

void jw_fmt(jw_t *j, const char *fmt, ...)
{
    va_list ap;
    jw_reserve(j, 64);
    va_start(ap, fmt);
    int n = vsnprintf(j->b + j->len, j->cap - j->len, fmt, ap);
    va_end(ap);
    if (n < 0)
        return;
    if ((size_t)n >= j->cap - j->len) {
        jw_reserve(j, (size_t)n);
        va_start(ap, fmt);
        vsnprintf(j->b + j->len, j->cap - j->len, fmt, ap);
        va_end(ap);
    }
    j->len += (size_t)n;
}

void jw_num(jw_t *j, double v)
{
    if (isfinite(v))
        jw_fmt(j, "%.17g", v);
    else
        jw_lit(j, "null");
}

void jw_str(jw_t *j, const char *s)
{
    jw_reserve(j, strlen(s) + 2);
    jw_raw(j, "\"", 1);
    for (const unsigned char *p = (const unsigned char *)s; *p; p++) {
        if (*p == '"' || *p == '\\') {
            char esc[2] = {'\\', (char)*p};
            jw_raw(j, esc, 2);
        } else if (*p < 0x20) {
            jw_fmt(j, "\\u%04x", *p);
        } else {
            const unsigned char *run = p;
            while (p[1] && p[1] != '"' && p[1] != '\\' && p[1] >= 0x20)
                p++;
            jw_raw(j, (const char *)run, (size_t)(p - run) + 1);
        }
    }
    jw_raw(j, "\"", 1);
}
