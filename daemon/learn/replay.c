/*
 * replay.c - semi-gradient TD(0) over mini-batches drawn from a replay buffer.
 *
 * Every transition goes into a bounded ring of `capacity` entries (phi,
 * g*phi' with phi' = 0 when terminal, r), the oldest overwritten.  After each
 * transition the trainer takes steps_per_obs mini-batch steps: `batch`
 * entries drawn uniformly with replacement from a seeded xoshiro256**
 * generator, and
 *   w += alpha_k / B * sum_i delta_i phi_i,   delta_i = r_i + w.(g phi')_i - w.phi_i,
 * with alpha_k = alpha / (1 + k/decay) (constant when decay = 0), k the number
 * of steps taken so far.  est_train runs whole passes of ceil(size/batch)
 * steps and stops as soon as a pass changes w by less than tol relative to
 * |w| (converged), after max_steps steps when a cap is given, or before the
 * next step once the caller's cancel flag is set (it may run for tens of
 * seconds on a large buffer).
 *
 * The buffer (capacity * (2n+1) doubles) and the gradient workspace are
 * allocated at creation; no transition allocates.  O(B n * steps_per_obs)
 * per transition.  Owning thread only.  The buffer contents and the RNG state
 * are part of the saved state, so a restore draws the same batches.
 */
#include <math.h>
#include <string.h>

#include "learn/est_impl.h"
#include "common/mem.h"
#include "learn/rng.h"
#include "worth/errors.h"

struct replay {
    size_t cap, size, next; /* ring of cap entries; size filled; next write position */
    double *phi;            /* cap x n */
    double *gphin;          /* cap x n: g * phi' */
    double *r;              /* cap */
    double *grad, *w0;      /* workspaces, n each */
    size_t *idx;            /* workspace: the entries of one mini-batch */
    uint64_t steps;         /* mini-batch steps taken */
    rng_t rng;
};

static void replay_init(struct est *e)
{
    size_t n = e->n;
    struct replay *m = mem_calloc(1, sizeof *m);
    m->cap = e->p.capacity;
    m->phi = mem_calloc(m->cap * n, sizeof *m->phi);
    m->gphin = mem_calloc(m->cap * n, sizeof *m->gphin);
    m->r = mem_calloc(m->cap, sizeof *m->r);
    m->grad = mem_calloc(n, sizeof *m->grad);
    m->w0 = mem_calloc(n, sizeof *m->w0);
    m->idx = mem_calloc(e->p.batch, sizeof *m->idx);
    rng_init(&m->rng, e->p.seed);
    e->k = m;
}

static void replay_reset(struct est *e)
{
    struct replay *m = e->k;
    m->size = m->next = 0;
    m->steps = 0;
    rng_init(&m->rng, e->p.seed);
}

static void replay_free(struct est *e)
{
    struct replay *m = e->k;
    mem_free(m->phi);
    mem_free(m->gphin);
    mem_free(m->r);
    mem_free(m->grad);
    mem_free(m->w0);
    mem_free(m->idx);
    mem_free(m);
}

/*
 * One pass over a drawn entry: delta = r + w.(g phi') - w.phi, both dot
 * products in one loop, then grad += delta * phi.  Inline loops rather than
 * ddot, ddot and daxpy: at the usual n (tens of features) a BLAS call's fixed
 * cost outweighs its arithmetic, and the entry is read once instead of twice.
 * The summation order is fixed per build, so results stay deterministic.
 */
#if defined(__x86_64__) && defined(__GNUC__) && !defined(__clang__)
#define KERNEL __attribute__((target_clones("arch=x86-64-v3", "default")))
#else
#define KERNEL
#endif

KERNEL static void accumulate(size_t n, const double *w, const double *phi, const double *gpn,
                              double r, double *grad)
{
    double vn = 0.0, v = 0.0;
#pragma omp simd reduction(+ : vn, v)
    for (size_t j = 0; j < n; j++) {
        vn += w[j] * gpn[j];
        v += w[j] * phi[j];
    }
    double delta = r + vn - v;
#pragma omp simd
    for (size_t j = 0; j < n; j++)
        grad[j] += delta * phi[j];
}

static void step(struct est *e, struct replay *m)
{
    size_t n = e->n, B = e->p.batch;
    memset(m->grad, 0, n * sizeof *m->grad);
    /*
     * Draw the batch first (the same draws in the same order), so that the
     * entries two ahead can be prefetched: the buffer is larger than the
     * caches and each draw lands anywhere in it.
     */
    for (size_t b = 0; b < B; b++)
        m->idx[b] = (size_t)rng_below(&m->rng, m->size);
    for (size_t b = 0; b < B; b++) {
        if (b + 2 < B) {
            const double *p = m->phi + m->idx[b + 2] * n, *q = m->gphin + m->idx[b + 2] * n;
            for (size_t j = 0; j < n; j += 8) {
                __builtin_prefetch(p + j);
                __builtin_prefetch(q + j);
            }
        }
        size_t i = m->idx[b];
        accumulate(n, e->w, m->phi + i * n, m->gphin + i * n, m->r[i], m->grad);
    }
    double a = e->p.alpha;
    if (e->p.decay > 0)
        a /= 1.0 + (double)m->steps / e->p.decay;
    est_axpy(n, a / (double)B, m->grad, e->w);
    m->steps++;
}

static int replay_observe(struct est *e, size_t src, const double *phi, double r,
                          const double *phin, double g, int terminal, double v, double vn)
{
    (void)src;
    (void)v;
    (void)vn;
    struct replay *m = e->k;
    size_t n = e->n;
    memcpy(m->phi + m->next * n, phi, n * sizeof *phi);
    double *gpn = m->gphin + m->next * n;
    if (terminal)
        memset(gpn, 0, n * sizeof *gpn);
    else
        for (size_t i = 0; i < n; i++)
            gpn[i] = g * phin[i];
    m->r[m->next] = r;
    m->next = (m->next + 1) % m->cap;
    if (m->size < m->cap)
        m->size++;
    for (unsigned k = 0; k < e->p.steps_per_obs; k++)
        step(e, m);
    return 0;
}

/*
 * Passes of ceil(size/batch) steps.  o->cancel is read and o->max_steps
 * counted before every step, and nothing but the steps changes the saved
 * state (w0 is a workspace), so a training stopped after k steps by either
 * leaves the same bits.  A pass cut short reports its change but is not
 * judged for convergence, and gets no progress call.
 */
static int replay_train(struct est *e, const est_train_opts_t *o, est_train_t *rep)
{
    struct replay *m = e->k;
    size_t n = e->n;
    if (m->size == 0)
        return 0;
    size_t per_pass = (m->size + e->p.batch - 1) / e->p.batch;
    int rc = 0;
    for (unsigned p = 1; p <= o->passes; p++) {
        memcpy(m->w0, e->w, n * sizeof *m->w0);
        size_t k = 0;
        for (; k < per_pass; k++) {
            if (o->max_steps && rep->steps == o->max_steps)
                break;
            if (est_train_cancelled(o)) {
                rc = WORTH_E_CANCELLED;
                break;
            }
            step(e, m);
            rep->steps++;
        }
        if (k == 0)
            break;
        double diff = 0.0, norm = 0.0;
        int finite = 1;
        for (size_t i = 0; i < n; i++) {
            diff += (e->w[i] - m->w0[i]) * (e->w[i] - m->w0[i]);
            norm += m->w0[i] * m->w0[i];
            finite &= isfinite(e->w[i]) != 0;
        }
        rep->passes = p;
        rep->change = sqrt(diff) / (norm > 0 ? sqrt(norm) : 1.0);
        if (k < per_pass)
            break;
        rep->converged = rep->change < e->p.tol;
        if (o->progress)
            o->progress(o->ctx, p, o->passes, rep->change);
        /* Weights gone non-finite: est_train resets them; more passes would only spin. */
        if (rep->converged || !finite)
            break;
    }
    return rc;
}

static void replay_stats(const struct est *e, est_stats_t *st)
{
    const struct replay *m = e->k;
    st->refits = m->steps;
}

static void replay_save(const struct est *e, ser_w *w)
{
    const struct replay *m = e->k;
    size_t n = e->n;
    ser_put_u64(w, m->size);
    ser_put_u64(w, m->next);
    ser_put_u64(w, m->steps);
    for (int i = 0; i < 4; i++)
        ser_put_u64(w, m->rng.s[i]);
    /* Only the filled part of the ring, in storage order. */
    for (size_t i = 0; i < m->size; i++) {
        ser_put_f64v(w, m->phi + i * n, n);
        ser_put_f64v(w, m->gphin + i * n, n);
        ser_put_f64(w, m->r[i]);
    }
}

static void replay_load(struct est *e, ser_r *r, unsigned version)
{
    (void)version; /* no change between formats 1 and 2 */
    struct replay *m = e->k;
    size_t n = e->n;
    uint64_t size = ser_get_u64(r), next = ser_get_u64(r);
    m->steps = ser_get_u64(r);
    for (int i = 0; i < 4; i++)
        m->rng.s[i] = ser_get_u64(r);
    if (r->err || size > m->cap || next >= m->cap || (size < m->cap && next != size)) {
        r->err = 1;
        return;
    }
    m->size = size;
    m->next = next;
    for (size_t i = 0; i < size; i++) {
        ser_get_f64v(r, m->phi + i * n, n);
        ser_get_f64v(r, m->gphin + i * n, n);
        m->r[i] = ser_get_f64(r);
    }
}

const struct est_ops est_replay_ops = {
    .init = replay_init,
    .free = replay_free,
    .reset = replay_reset,
    .observe = replay_observe,
    .train = replay_train,
    .save = replay_save,
    .load = replay_load,
    .stats = replay_stats,
};
