/*
 * mc.c - gradient Monte Carlo: w += alpha * (G - w.phi) * phi.
 *
 * Episodic (horizon 0): the states of an episode wait, per source, until its
 * terminal transition; then the returns are computed backwards and the states
 * updated oldest first with the weights changing along the sweep (Sutton &
 * Barto 2nd ed., section 9.3).  An episode longer than max_episode is cut:
 * its oldest state is updated with the return observed so far and counted as
 * guarded.  The buffer grows by doubling up to its high-water mark, so after
 * the first long episode no transition allocates.
 *
 * Truncated (horizon H > 0), for plants that never terminate: a state is
 * updated once the H rewards after it are known, towards
 *   G = r_0 + g_0 r_1 + ... + (g_0...g_{H-2}) r_{H-1}
 * (no bootstrap: an unbiased target of the H-step discounted return).  A
 * terminal transition flushes the waiting states with returns to the end.
 * O(n + H) per transition.  Owning thread only.
 */
#include <string.h>

#include "learn/est_impl.h"
#include "common/mem.h"

struct ring {
    size_t head, count, cap;
    double *phi, *r, *g;
};

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

static void ring_free(struct ring *q)
{
    mem_free(q->phi);
    mem_free(q->r);
    mem_free(q->g);
    memset(q, 0, sizeof *q);
}

static void mc_reset(struct est *e)
{
    struct mc *m = e->k;
    for (size_t s = 0; s < e->nsrc; s++)
        ring_free(&m->q[s]);
}

static void mc_free(struct est *e)
{
    mc_reset(e);
    struct mc *m = e->k;
    mem_free(m->q);
    mem_free(m);
}

/* Grows q to cap entries, unwrapping it so that the oldest entry is at 0. */
static void ring_grow(struct ring *q, size_t cap, size_t n)
{
    double *phi = mem_alloc(cap * n * sizeof *phi);
    double *r = mem_alloc(cap * sizeof *r), *g = mem_alloc(cap * sizeof *g);
    for (size_t i = 0; i < q->count; i++) {
        size_t j = (q->head + i) % q->cap;
        memcpy(phi + i * n, q->phi + j * n, n * sizeof *phi);
        r[i] = q->r[j];
        g[i] = q->g[j];
    }
    mem_free(q->phi);
    mem_free(q->r);
    mem_free(q->g);
    q->phi = phi;
    q->r = r;
    q->g = g;
    q->cap = cap;
    q->head = 0;
}

static void update(struct est *e, const double *phi, double target)
{
    double v = est_dot(e->n, e->w, phi);
    est_axpy(e->n, e->p.alpha * (target - v), phi, e->w);
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
    int guarded = 0;

    if (q->count == q->cap) {
        size_t want = q->cap ? q->cap * 2 : (e->p.horizon ? m->limit : 64);
        if (want > m->limit)
            want = m->limit;
        ring_grow(q, want, n);
    }
    size_t at = (q->head + q->count) % q->cap;
    memcpy(q->phi + at * n, phi, n * sizeof *phi);
    q->r[at] = r;
    q->g[at] = g;
    q->count++;

    if (terminal) {
        /* Returns backwards, in place of the rewards; then updates oldest first. */
        double G = 0.0;
        for (size_t i = q->count; i-- > 0;) {
            size_t j = (q->head + i) % q->cap;
            G = q->r[j] + q->g[j] * G;
            q->r[j] = G;
        }
        for (size_t i = 0; i < q->count; i++) {
            size_t j = (q->head + i) % q->cap;
            update(e, q->phi + j * n, q->r[j]);
        }
        q->head = q->count = 0;
        return 0;
    }
    if (q->count == m->limit) {
        double G = 0.0;
        for (size_t i = q->count; i-- > 0;) {
            size_t j = (q->head + i) % q->cap;
            G = q->r[j] + q->g[j] * G;
        }
        update(e, q->phi + q->head * n, G);
        q->head = (q->head + 1) % q->cap;
        q->count--;
        guarded = e->p.horizon == 0; /* an episode cut short is worth counting */
    }
    return guarded;
}

static void mc_save(const struct est *e, ser_w *w)
{
    const struct mc *m = e->k;
    for (size_t s = 0; s < e->nsrc; s++) {
        const struct ring *q = &m->q[s];
        ser_put_u64(w, q->count);
        for (size_t i = 0; i < q->count; i++) {
            size_t j = (q->head + i) % q->cap;
            ser_put_f64v(w, q->phi + j * e->n, e->n);
            ser_put_f64(w, q->r[j]);
            ser_put_f64(w, q->g[j]);
        }
    }
}

static void mc_load(struct est *e, ser_r *r, unsigned version)
{
    (void)version; /* no change between formats 1 and 2 */
    struct mc *m = e->k;
    for (size_t s = 0; s < e->nsrc && !r->err; s++) {
        struct ring *q = &m->q[s];
        uint64_t count = ser_get_u64(r);
        ring_free(q);
        if (r->err)
            return;
        if (count == 0)
            continue;
        /* A count that cannot be right is refused before anything is allocated. */
        if (count >= m->limit || count > (r->len - r->pos) / ((e->n + 2) * 8)) {
            r->err = 1;
            return;
        }
        ring_grow(q, count, e->n);
        q->count = count;
        for (size_t i = 0; i < count; i++) {
            ser_get_f64v(r, q->phi + i * e->n, e->n);
            q->r[i] = ser_get_f64(r);
            q->g[i] = ser_get_f64(r);
        }
    }
}

const struct est_ops est_mc_ops = {
    .init = mc_init,
    .free = mc_free,
    .reset = mc_reset,
    .observe = mc_observe,
    .save = mc_save,
    .load = mc_load,
};
