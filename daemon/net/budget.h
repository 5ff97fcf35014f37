/*
 * budget.h - the daemon-wide budget of connection buffers (--max-buffer-mb).
 *
 * Every byte a connection holds in memory on worthd's side is counted here:
 * its input buffer, the payload of a bulk request it has announced (reserved
 * whole when the header is accepted, allocated as the bytes arrive) and the
 * replies the socket has not taken yet.  Input that would go over the cap is
 * refused (over_budget); replies are never dropped, so they may take the
 * count over the cap, and while it is over, connections with unsent replies
 * stop handling requests until theirs drain.  So a thousand clients that each
 * hold a partial line, an unfinished bulk or unread replies cannot take
 * worthd's memory past the cap by more than the replies in flight.
 *
 * Plain counters, loop thread only (the fuzz target drives the same code on
 * its one thread): no locks.
 */
#ifndef WORTH_BUDGET_H
#define WORTH_BUDGET_H

#include <stddef.h>

/* Plain data: the cap and what is taken (bytes).  cap 0 means no cap. */
typedef struct budget_t {
    size_t cap;
    size_t used;
    size_t peak;    /* the most used at once */
    size_t refused; /* requests for bytes refused */
} budget_t;

/* Takes n bytes if they fit under the cap; returns 0, or -1 (nothing taken).  b may be NULL. */
static inline int budget_take(budget_t *b, size_t n)
{
    if (!b)
        return 0;
    if (b->cap && (b->used > b->cap || n > b->cap - b->used)) {
        b->refused++;
        return -1;
    }
    b->used += n;
    if (b->used > b->peak)
        b->peak = b->used;
    return 0;
}

/* Takes n bytes even beyond the cap (replies, which are never dropped).  b may be NULL. */
static inline void budget_force(budget_t *b, size_t n)
{
    if (!b)
        return;
    b->used += n;
    if (b->used > b->peak)
        b->peak = b->used;
}

/* Gives back n bytes taken earlier.  b may be NULL. */
static inline void budget_give(budget_t *b, size_t n)
{
    if (b)
        b->used = n > b->used ? 0 : b->used - n;
}

/* Returns 1 when more than the cap is taken (only replies can cause it). */
static inline int budget_over(const budget_t *b)
{
    return b && b->cap && b->used > b->cap;
}

#endif /* WORTH_BUDGET_H */
