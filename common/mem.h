/*
 * mem.h - the one allocation wrapper and the always-on internal check.
 *
 * Every allocation in worth goes through mem_alloc/mem_calloc/mem_realloc,
 * which print a message and abort on out-of-memory: an estimator half-built
 * for lack of memory is worse than a clean restart that recovers from the log.
 * Sizes that come from clients must be checked against configured limits
 * before they reach these functions.
 */
#ifndef WORTH_MEM_H
#define WORTH_MEM_H

#include <stddef.h>

/* Returns owned memory of n bytes (at least 1); never NULL. */
void *mem_alloc(size_t n);
/* Returns owned zeroed memory for count * size bytes, overflow-checked; never NULL. */
void *mem_calloc(size_t count, size_t size);
/* Returns p (transferred back) resized to n bytes; never NULL. */
void *mem_realloc(void *p, size_t n);
/* Frees p (transferred); NULL is fine. */
void mem_free(void *p);
/* Returns an owned copy of s; never NULL. */
char *mem_strdup(const char *s);

/* Aborts with file:line when called: internal state is corrupt. */
_Noreturn void mem_panic(const char *file, int line, const char *what);

/*
 * CHECK(cond): always on, in release builds too.  For invariants whose failure
 * means our own state is corrupt.  Never use it on network input.
 */
#define CHECK(cond)                                                                                \
    do {                                                                                           \
        if (!(cond))                                                                               \
            mem_panic(__FILE__, __LINE__, #cond);                                                  \
    } while (0)

#endif /* WORTH_MEM_H */
