/*
 * mem.c - allocation that aborts on OOM, and the panic used by CHECK().
 *
 * Thread-safe (it only calls the C library).  Never used on the per-transition
 * hot path: estimators allocate everything they need when they are built.
 */
#include "common/mem.h"

#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

_Noreturn void mem_panic(const char *file, int line, const char *what)
{
    fprintf(stderr, "worth: fatal: %s:%d: %s\n", file, line, what);
    fflush(stderr);
    abort();
}

void *mem_alloc(size_t n)
{
    void *p = malloc(n ? n : 1);
    if (!p)
        mem_panic(__FILE__, __LINE__, "out of memory");
    return p;
}

void *mem_calloc(size_t count, size_t size)
{
    if (size && count > SIZE_MAX / size)
        mem_panic(__FILE__, __LINE__, "allocation size overflows");
    void *p = calloc(count ? count : 1, size ? size : 1);
    if (!p)
        mem_panic(__FILE__, __LINE__, "out of memory");
    return p;
}

void *mem_realloc(void *p, size_t n)
{
    void *q = realloc(p, n ? n : 1);
    if (!q)
        mem_panic(__FILE__, __LINE__, "out of memory");
    return q;
}

void mem_free(void *p)
{
    free(p);
}

char *mem_strdup(const char *s)
{
    size_t n = strlen(s) + 1;
    char *d = mem_alloc(n);
    memcpy(d, s, n);
    return d;
}
