/*
 * arena.c - the cJSON bump allocator (see arena.h).
 *
 * Loop thread only.  Each allocation is rounded up to 16 bytes.  Spilled
 * allocations are recognised in free() by their address lying outside the
 * block.
 */
#include "core/arena.h"

#include <cjson/cJSON.h>
#include <stdint.h>
#include <stdlib.h>

#include "common/mem.h"

static unsigned char *block;
static size_t cap, used, spills;

static void *arena_malloc(size_t n)
{
    size_t need = (n + 15) & ~(size_t)15;
    if (need >= n && need <= cap - used) {
        void *p = block + used;
        used += need;
        return p;
    }
    spills++;
    return malloc(n); /* cJSON handles NULL as its own out-of-memory */
}

static void arena_free(void *p)
{
    uintptr_t a = (uintptr_t)p, lo = (uintptr_t)block;
    if (p && (a < lo || a >= lo + cap))
        free(p);
}

void arena_install(size_t bytes)
{
    block = mem_alloc(bytes);
    cap = bytes;
    used = 0;
    cJSON_Hooks hooks = {arena_malloc, arena_free};
    cJSON_InitHooks(&hooks);
}

void arena_reset(void)
{
    used = 0;
}

void arena_uninstall(void)
{
    cJSON_InitHooks(NULL);
    mem_free(block);
    block = NULL;
    cap = used = 0;
}

size_t arena_spills(void)
{
    return spills;
}
