/*
 * tdn.c - n-step semi-gradient TD with a ring buffer per source (learn/ring.c).
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
#include "learn/est_impl.h"
#include "learn/ring.h"
#include "common/mem.h"

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

static void tdn_reset(struct est *e)
{
    struct tdn *t = e->k;
    for (size_t s = 0; s < e->nsrc; s++)
        ring_close(&t->rings[s]);
}

static void tdn_free(struct est *e)
{
    tdn_reset(e);
    struct tdn *t = e->k;
    mem_free(t->rings);
    mem_free(t);
}

static int tdn_observe(struct est *e, size_t src, const double *phi, double r, const double *phin,
                       double g, int terminal, double v, double vn)
{
    (void)v;
    (void)vn;
    struct tdn *t = e->k;
    struct ring *q = &t->rings[src];
    size_t n = e->n;
    if (!q->phi)
        ring_grow(q, t->cap, n);
    ring_push(q, n, phi, r, g);

    if (terminal) {
        /* Flush: each waiting state gets its return to the episode end. */
        est_ring_flush(e, q);
        return 0;
    }
    if (q->count == t->cap) {
        /* Bootstrap with the current weights. */
        est_step(e, ring_phi(q, 0, n), ring_return(q, est_dot(n, e->w, phin)));
        ring_pop(q);
    }
    return 0;
}

static void tdn_save(const struct est *e, ser_w *w)
{
    const struct tdn *t = e->k;
    for (size_t s = 0; s < e->nsrc; s++) {
        const struct ring *q = &t->rings[s];
        ser_put_u32(w, q->phi != NULL);
        if (q->phi)
            ring_save(q, e->n, w); /* oldest first, so the loaded ring starts at head 0 */
    }
}

static void tdn_load(struct est *e, ser_r *r, unsigned version)
{
    (void)version; /* no change between formats 1 and 2 */
    struct tdn *t = e->k;
    for (size_t s = 0; s < e->nsrc && !r->err; s++) {
        struct ring *q = &t->rings[s];
        uint32_t present = ser_get_u32(r);
        ring_close(q);
        if (!present)
            continue;
        if (present != 1) {
            r->err = 1;
            return;
        }
        ring_load(q, e->n, t->cap, t->cap, r);
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
