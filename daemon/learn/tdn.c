/*
 * tdn.c - n-step semi-gradient TD with a ring buffer per source.
 *
 * For source s the last n transitions (phi, r, g) wait in a ring.  When the
 * ring is full, its oldest state is updated towards the n-step target
 *   G = r_0 + g_0 r_1 + ... + (g_0...g_{n-2}) r_{n-1} + (g_0...g_{n-1}) w.phi'
 * where phi' is phi(x_next) of the newest transition.  A terminal transition
 * flushes the ring: each waiting state gets the return truncated at the
 * episode end (V(terminal) = 0).  A stream that merely stops is not flushed.
 *
 * Rings are allocated the first time a source is seen.  O(n_features + n)
 * per transition; no allocation afterwards.  Owning thread only.
 */
#include <string.h>

#include "learn/est_impl.h"
#include "common/mem.h"

struct ring {
    size_t head;  /* index of the oldest entry */
    size_t count; /* entries waiting */
    double *phi;  /* cap x n features */
    double *r;    /* cap rewards */
    double *g;    /* cap discounts */
};

struct tdn {
    size_t cap;         /* n of n-step */
    struct ring *rings; /* nsrc, lazily filled */
};

static void tdn_init(struct est *e)
{
    struct tdn *t = mem_calloc(1, sizeof *t);
    t->cap = e->p.nstep;
    t->rings = mem_calloc(e->nsrc, sizeof *t->rings);
    e->k = t;
}

static void ring_free(struct ring *q)
{
    mem_free(q->phi);
    mem_free(q->r);
    mem_free(q->g);
    memset(q, 0, sizeof *q);
}

static void ring_alloc(struct ring *q, size_t cap, size_t n)
{
    q->phi = mem_calloc(cap * n, sizeof *q->phi);
    q->r = mem_calloc(cap, sizeof *q->r);
    q->g = mem_calloc(cap, sizeof *q->g);
    q->head = q->count = 0;
}

static void tdn_free(struct est *e)
{
    struct tdn *t = e->k;
    for (size_t s = 0; s < e->nsrc; s++)
        ring_free(&t->rings[s]);
    mem_free(t->rings);
    mem_free(t);
}

static void tdn_reset(struct est *e)
{
    struct tdn *t = e->k;
    for (size_t s = 0; s < e->nsrc; s++)
        ring_free(&t->rings[s]);
}

/* Updates the oldest waiting state towards target and drops it from the ring. */
static void pop_update(struct est *e, struct tdn *t, struct ring *q, double target)
{
    const double *phi = q->phi + q->head * e->n;
    double v = est_dot(e->n, e->w, phi);
    est_axpy(e->n, e->p.alpha * (target - v), phi, e->w);
    q->head = (q->head + 1) % t->cap;
    q->count--;
}

static int tdn_observe(struct est *e, size_t src, const double *phi, double r, const double *phin,
                       double g, int terminal, double v, double vn)
{
    (void)v;
    (void)vn;
    struct tdn *t = e->k;
    struct ring *q = &t->rings[src];
    size_t cap = t->cap, n = e->n;
    if (!q->phi)
        ring_alloc(q, cap, n);

    size_t at = (q->head + q->count) % cap;
    memcpy(q->phi + at * n, phi, n * sizeof *phi);
    q->r[at] = r;
    q->g[at] = g;
    q->count++;

    if (terminal) {
        /* Flush: returns to the episode end, newest first, then update oldest first. */
        while (q->count > 0) {
            double G = 0.0;
            for (size_t i = q->count; i-- > 0;) {
                size_t j = (q->head + i) % cap;
                G = q->r[j] + q->g[j] * G;
            }
            pop_update(e, t, q, G);
        }
        q->head = 0;
        return 0;
    }
    if (q->count == cap) {
        double G = est_dot(n, e->w, phin); /* bootstrap with the current weights */
        for (size_t i = cap; i-- > 0;) {
            size_t j = (q->head + i) % cap;
            G = q->r[j] + q->g[j] * G;
        }
        pop_update(e, t, q, G);
    }
    return 0;
}

static void tdn_save(const struct est *e, ser_w *w)
{
    const struct tdn *t = e->k;
    for (size_t s = 0; s < e->nsrc; s++) {
        const struct ring *q = &t->rings[s];
        ser_put_u32(w, q->phi != NULL);
        if (!q->phi)
            continue;
        /* Oldest first, so the loaded ring starts at head 0. */
        ser_put_u64(w, q->count);
        for (size_t i = 0; i < q->count; i++) {
            size_t j = (q->head + i) % t->cap;
            ser_put_f64v(w, q->phi + j * e->n, e->n);
            ser_put_f64(w, q->r[j]);
            ser_put_f64(w, q->g[j]);
        }
    }
}

static void tdn_load(struct est *e, ser_r *r, unsigned version)
{
    (void)version; /* no change between formats 1 and 2 */
    struct tdn *t = e->k;
    for (size_t s = 0; s < e->nsrc && !r->err; s++) {
        struct ring *q = &t->rings[s];
        uint32_t present = ser_get_u32(r);
        ring_free(q);
        if (!present)
            continue;
        uint64_t count = ser_get_u64(r);
        if (r->err || present != 1 || count >= t->cap) {
            r->err = 1;
            return;
        }
        ring_alloc(q, t->cap, e->n);
        q->count = count;
        for (size_t i = 0; i < count; i++) {
            ser_get_f64v(r, q->phi + i * e->n, e->n);
            q->r[i] = ser_get_f64(r);
            q->g[i] = ser_get_f64(r);
        }
    }
}

const struct est_ops est_tdn_ops = {
    .init = tdn_init,
    .free = tdn_free,
    .reset = tdn_reset,
    .observe = tdn_observe,
    .save = tdn_save,
    .load = tdn_load,
};
