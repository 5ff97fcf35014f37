/*
 * arena.h - a bump allocator behind cJSON on the loop thread.
 *
 * cJSON allocates a node per value.  With arena_install(), those allocations
 * come from a block reused for every request and released all at once by
 * arena_reset() after the request is answered, so parsing a request costs no
 * malloc in the steady state.  A request larger than the block spills to
 * malloc (freed normally), so nothing is ever refused for size here; limits
 * on line length bound the spill.
 *
 * cJSON's hooks are process-wide: only the loop thread may use cJSON once the
 * arena is installed.
 */
#ifndef WORTH_ARENA_H
#define WORTH_ARENA_H

#include <stddef.h>

/* Installs the arena (block of bytes) as cJSON's allocator. */
void arena_install(size_t bytes);
/* Releases everything allocated since the last reset.  No cJSON object may outlive it. */
void arena_reset(void);
/* Restores cJSON's default allocator and frees the block. */
void arena_uninstall(void);
/* Returns how many allocations spilled to malloc since install (for tests). */
size_t arena_spills(void);

#endif /* WORTH_ARENA_H */
