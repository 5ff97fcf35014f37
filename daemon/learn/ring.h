/*
 * ring.h - the steps (phi, r, g) that wait, per source, for their return.
 *
 * n-step TD (tdn.c) and gradient Monte Carlo (mc.c) both hold, for each
 * source, the last steps whose target is not yet known: the features of the
 * state, the reward and the discount that followed it.  A ring keeps them
 * oldest first, folds their discounted return and writes them to a saved
 * state.  The caller provides the storage (a zeroed ring is empty and holds
 * no buffers) and decides how large the ring may grow; only ring_grow and
 * ring_load allocate.  Not thread-safe: it belongs to its estimator.
 *
 * Saved form (ring_save): u64 count, then per step, oldest first, n f64
 * features, f64 r, f64 g.  Both estimators' formats 1 and 2 use it as is.
 */
#ifndef WORTH_RING_H
#define WORTH_RING_H

#include <stddef.h>

#include "learn/ser.h"

/* Plain data: a ring of cap steps of n features; zeroed = empty, nothing allocated. */
struct ring {
    size_t head;  /* index of the oldest step */
    size_t count; /* steps waiting */
    size_t cap;   /* steps the buffers hold */
    double *phi;  /* cap x n features, owned */
    double *r;    /* cap rewards, owned */
    double *g;    /* cap discounts, owned */
};

/* ---- lifecycle ---- */

/* Resizes q to cap >= q->count steps of n features, keeping them, the oldest moved to 0. */
void ring_grow(struct ring *q, size_t cap, size_t n);
/* Frees q's buffers and zeroes it (empty, nothing allocated). */
void ring_close(struct ring *q);

/* ---- operate ---- */

/* Appends a step (phi borrowed, n features); q must have room (count < cap). */
void ring_push(struct ring *q, size_t n, const double *phi, double r, double g);
/* Drops the oldest step; q must not be empty. */
void ring_pop(struct ring *q);
/* Drops every step, keeping the buffers. */
void ring_clear(struct ring *q);
/*
 * Replaces each step's reward by its return to the newest step,
 *   G_i = r_i + g_i G_{i+1}, with G = 0 after the newest,
 * the return truncated at an episode's end.  The bits of G_i are those
 * ring_return gives for the steps from i on.
 */
void ring_returns(struct ring *q);

/* ---- query ---- */

/* Returns the features of step i (oldest first, i < count), borrowed from q. */
double *ring_phi(const struct ring *q, size_t i, size_t n);
/* Returns the reward of step i (oldest first), or its return after ring_returns. */
double ring_r(const struct ring *q, size_t i);
/* Returns the discounted return of all steps, newest folded first onto tail:
 * r_0 + g_0 (r_1 + g_1 (... (r_k + g_k tail))). */
double ring_return(const struct ring *q, double tail);

/* ---- state ---- */

/* Writes q's steps (n features each) in the saved form above. */
void ring_save(const struct ring *q, size_t n, ser_w *w);
/*
 * Closes q and reads what ring_save wrote into it, oldest at 0.  Sets r->err,
 * allocating nothing, when the count is limit or more or exceeds the bytes
 * left.  Allocates cap steps (cap must exceed the count; 0 means exactly the
 * count, and then an empty ring allocates nothing).
 */
void ring_load(struct ring *q, size_t n, size_t limit, size_t cap, ser_r *r);

#endif /* WORTH_RING_H */
