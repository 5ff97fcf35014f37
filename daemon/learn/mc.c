/*
 * mc.c - gradient Monte Carlo: w += alpha * (G - w.phi) * phi.
 *
 * Episodic (horizon 0): the states of an episode wait, per source, until its
 * terminal transition; then the returns are computed backwards and the states
 * updated oldest first with the weights changing along the sweep (Sutton &
 * Barto 2nd ed., section 9.3).  An episode longer than max_episode is cut:
 * its oldest state is updated with the return observed so far and counted as
 * guarded.  The buffer grows by doubling up to its high-water mark, so after
 * the first long episode no transition allocates (the ring is learn/ring.c).
 *
 * Truncated (horizon H > 0), for plants that never terminate: a state is
 * updated once the H rewards after it are known, towards
 *   G = r_0 + g_0 r_1 + ... + (g_0...g_{H-2}) r_{H-1}
 * (no bootstrap: an unbiased target of the H-step discounted return).  A
 * terminal transition flushes the waiting states with returns to the end.
 * O(n + H) per transition.  Owning thread only.
 */
#include "learn/est_impl.h"
#include "learn/ring.h"
#include "common/mem.h"

struct mc {
    size_t limit;   /* H, or max_episode */
    struct ring *q; /* nsrc */
};

static void mc_init(struct est *e)
{
    struct mc *m = mem_calloc(1, sizeof *m);
    m->limit = e->p.horizon ? e->p.horizon : e->p.max_episode;
    m->q = mem_calloc(e->nsrc, sizeof *m->q);
    e->k = m;
}

static void mc_reset(struct est *e)
{
    struct mc *m = e->k;
    for (size_t s = 0; s < e->nsrc; s++)
        ring_close(&m->q[s]);
}

static void mc_free(struct est *e)
{
    mc_reset(e);
    struct mc *m = e->k;
    mem_free(m->q);
    mem_free(m);
}

static int mc_observe(struct est *e, size_t src, const double *phi, double r, const double *phin,
                      double g, int terminal, double v, double vn)
{
    (void)phin;
    (void)v;
    (void)vn;
    struct mc *m = e->k;
    struct ring *q = &m->q[src];
    size_t n = e->n;

    if (q->count == q->cap) {
        size_t want = q->cap ? q->cap * 2 : (e->p.horizon ? m->limit : 64);
        if (want > m->limit)
            want = m->limit;
        ring_grow(q, want, n);
    }
    ring_push(q, n, phi, r, g);

    if (terminal) {
        est_ring_flush(e, q);
        return 0;
    }
    if (q->count == m->limit) {
        est_step(e, ring_phi(q, 0, n), ring_return(q, 0.0));
        ring_pop(q);
        return e->p.horizon == 0; /* an episode cut short is worth counting */
    }
    return 0;
}

static void mc_save(const struct est *e, ser_w *w)
{
    const struct mc *m = e->k;
    for (size_t s = 0; s < e->nsrc; s++)
        ring_save(&m->q[s], e->n, w);
}

static void mc_load(struct est *e, ser_r *r, unsigned version)
{
    (void)version; /* no change between formats 1 and 2 */
    struct mc *m = e->k;
    /* Each ring is loaded at its exact size; it grows again by doubling. */
    for (size_t s = 0; s < e->nsrc && !r->err; s++)
        ring_load(&m->q[s], e->n, m->limit, 0, r);
}

const struct est_ops est_mc_ops = {
    .init = mc_init,
    .free = mc_free,
    .reset = mc_reset,
    .observe = mc_observe,
    .save = mc_save,
    .load = mc_load,
};
