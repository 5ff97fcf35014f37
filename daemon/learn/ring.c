/*
 * ring.c - the per-source ring of waiting steps shared by tdn.c and mc.c.
 *
 * Owns nothing but the three buffers of each ring it is handed; the ring
 * itself lives in its estimator's per-source table.  Runs on the thread that
 * owns the estimator.  It must never allocate outside ring_grow and
 * ring_load: ring_push is on the hot path and only writes into room the
 * caller made.  Its returns fold the steps newest first in one fixed order,
 * so a replay, or a ring saved and loaded, gives the same bits.
 */
#include "learn/ring.h"

#include <assert.h>
#include <string.h>

#include "common/mem.h"

/* Index in the buffers of step i, oldest first. */
static size_t at(const struct ring *q, size_t i)
{
    return (q->head + i) % q->cap;
}

void ring_grow(struct ring *q, size_t cap, size_t n)
{
    assert(cap >= q->count && cap > 0);
    double *phi = mem_alloc(cap * n * sizeof *phi);
    double *r = mem_alloc(cap * sizeof *r), *g = mem_alloc(cap * sizeof *g);
    for (size_t i = 0; i < q->count; i++) {
        size_t j = at(q, i);
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

void ring_close(struct ring *q)
{
    mem_free(q->phi);
    mem_free(q->r);
    mem_free(q->g);
    memset(q, 0, sizeof *q);
}

void ring_push(struct ring *q, size_t n, const double *phi, double r, double g)
{
    assert(q->count < q->cap);
    size_t j = at(q, q->count);
    memcpy(q->phi + j * n, phi, n * sizeof *phi);
    q->r[j] = r;
    q->g[j] = g;
    q->count++;
}

void ring_pop(struct ring *q)
{
    assert(q->count > 0);
    q->head = (q->head + 1) % q->cap;
    q->count--;
}

void ring_clear(struct ring *q)
{
    q->head = q->count = 0;
}

void ring_returns(struct ring *q)
{
    double G = 0.0;
    for (size_t i = q->count; i-- > 0;) {
        size_t j = at(q, i);
        G = q->r[j] + q->g[j] * G;
        q->r[j] = G;
    }
}

double *ring_phi(const struct ring *q, size_t i, size_t n)
{
    return q->phi + at(q, i) * n;
}

double ring_r(const struct ring *q, size_t i)
{
    return q->r[at(q, i)];
}

double ring_return(const struct ring *q, double tail)
{
    double G = tail;
    for (size_t i = q->count; i-- > 0;) {
        size_t j = at(q, i);
        G = q->r[j] + q->g[j] * G;
    }
    return G;
}

void ring_save(const struct ring *q, size_t n, ser_w *w)
{
    ser_put_u64(w, q->count);
    for (size_t i = 0; i < q->count; i++) {
        size_t j = at(q, i);
        ser_put_f64v(w, q->phi + j * n, n);
        ser_put_f64(w, q->r[j]);
        ser_put_f64(w, q->g[j]);
    }
}

void ring_load(struct ring *q, size_t n, size_t limit, size_t cap, ser_r *r)
{
    ring_close(q);
    uint64_t count = ser_get_u64(r);
    if (r->err)
        return;
    /* A count that cannot be right is refused before anything is allocated. */
    if (count >= limit || count > (r->len - r->pos) / ((n + 2) * 8)) {
        r->err = 1;
        return;
    }
    if (cap == 0 && count == 0)
        return;
    ring_grow(q, cap ? cap : (size_t)count, n);
    q->count = (size_t)count;
    for (size_t i = 0; i < q->count; i++) {
        ser_get_f64v(r, q->phi + i * n, n);
        q->r[i] = ser_get_f64(r);
        q->g[i] = ser_get_f64(r);
    }
}
