/*
 * lstd.c - batch LSTD(lambda) with ridge (Bradtke & Barto 1996; Boyan 2002).
 *
 * Accumulates, over every transition seen,
 *   A = sum z (phi - g phi')',   b = sum z r,
 * with z the source's trace (z = g_prev*lambda*z + phi, reset at terminal) and,
 * when forget < 1, exponential forgetting of both (A = beta A + ..., b = beta b
 * + ...).  Every refit_every transitions, and on est_train, it solves
 *   (A + eps I) w = b
 * with the ridge eps added undecayed at solve time.  A is not symmetric, so
 * the solve is LU (dgetrf/dgetrs), not Cholesky.  When the LU factor is
 * singular or its reciprocal condition number (dgecon) is below 1e-13, it
 * falls back to a minimum-norm least-squares solve (dgelss, SVD) and counts
 * the step as guarded.  A is stored column-major for LAPACK.  A refit inside
 * est_observe is followed by est.c's divergence check like any update, and
 * so is the one of est_train.
 *
 * O(n^2) per transition plus O(n^3) per refit; all workspaces (including
 * LAPACK's, sized by a workspace query) are allocated at creation, so no
 * transition allocates.  Owning thread only.
 */
#include <cblas.h>
#include <lapacke.h>
#include <math.h>
#include <string.h>

#include "learn/est_impl.h"
#include "common/mem.h"

struct lstd {
    double *A, *b;     /* accumulators: n x n column-major, n */
    double *M, *x;     /* solve workspaces: n x n, n */
    double *d;         /* regressor workspace */
    lapack_int *ipiv;  /* n */
    lapack_int *iwork; /* n, for dgecon */
    double *work;      /* max(4n, dgelss's optimum) */
    size_t lwork;
    double *sv;     /* n singular values for dgelss */
    uint64_t since; /* transitions since the last refit */
    uint64_t refits;
    struct est_trace *s; /* nsrc */
};

static void lstd_init(struct est *e)
{
    size_t n = e->n;
    struct lstd *m = mem_calloc(1, sizeof *m);
    m->A = mem_calloc(n * n, sizeof *m->A);
    m->b = mem_calloc(n, sizeof *m->b);
    m->M = mem_calloc(n * n, sizeof *m->M);
    m->x = mem_calloc(n, sizeof *m->x);
    m->d = mem_calloc(n, sizeof *m->d);
    m->ipiv = mem_calloc(n, sizeof *m->ipiv);
    m->iwork = mem_calloc(n, sizeof *m->iwork);
    m->sv = mem_calloc(n, sizeof *m->sv);
    double q = 0.0;
    lapack_int rank = 0, ni = (lapack_int)n;
    lapack_int info = LAPACKE_dgelss_work(LAPACK_COL_MAJOR, ni, ni, 1, m->M, ni, m->x, ni, m->sv,
                                          -1.0, &rank, &q, -1);
    CHECK(info == 0);
    m->lwork = (size_t)q > 4 * n ? (size_t)q : 4 * n;
    m->work = mem_calloc(m->lwork, sizeof *m->work);
    m->s = mem_calloc(e->nsrc, sizeof *m->s);
    e->k = m;
}

static void lstd_reset(struct est *e)
{
    struct lstd *m = e->k;
    size_t n = e->n;
    memset(m->A, 0, n * n * sizeof *m->A);
    memset(m->b, 0, n * sizeof *m->b);
    m->since = m->refits = 0;
    est_traces_reset(m->s, e->nsrc);
}

static void lstd_free(struct est *e)
{
    lstd_reset(e);
    struct lstd *m = e->k;
    mem_free(m->A);
    mem_free(m->b);
    mem_free(m->M);
    mem_free(m->x);
    mem_free(m->d);
    mem_free(m->ipiv);
    mem_free(m->iwork);
    mem_free(m->sv);
    mem_free(m->work);
    mem_free(m->s);
    mem_free(m);
}

static void load_system(struct est *e, struct lstd *m)
{
    size_t n = e->n;
    memcpy(m->M, m->A, n * n * sizeof *m->M);
    for (size_t i = 0; i < n; i++)
        m->M[i * n + i] += e->p.ridge;
    memcpy(m->x, m->b, n * sizeof *m->x);
}

/*
 * Solves (A + eps I) w = b into e->w.  Returns 1 when the least-squares
 * fallback was used (or no finite solution was found and w was kept), else 0.
 */
static int refit(struct est *e)
{
    struct lstd *m = e->k;
    size_t n = e->n;
    lapack_int ni = (lapack_int)n, info, rank = 0;
    int fallback = 0;
    m->refits++;
    m->since = 0;

    load_system(e, m);
    double anorm = LAPACKE_dlange_work(LAPACK_COL_MAJOR, '1', ni, ni, m->M, ni, m->work);
    info = LAPACKE_dgetrf_work(LAPACK_COL_MAJOR, ni, ni, m->M, ni, m->ipiv);
    CHECK(info >= 0);
    double rcond = 0.0;
    if (info == 0 && anorm > 0) {
        info = LAPACKE_dgecon_work(LAPACK_COL_MAJOR, '1', ni, m->M, ni, anorm, &rcond, m->work,
                                   m->iwork);
        CHECK(info == 0);
    }
    if (info == 0 && rcond >= 1e-13) {
        info = LAPACKE_dgetrs_work(LAPACK_COL_MAJOR, 'N', ni, 1, m->M, ni, m->ipiv, m->x, ni);
        CHECK(info == 0);
    } else {
        fallback = 1;
        load_system(e, m);
        info = LAPACKE_dgelss_work(LAPACK_COL_MAJOR, ni, ni, 1, m->M, ni, m->x, ni, m->sv, 1e-12,
                                   &rank, m->work, (lapack_int)m->lwork);
        if (info != 0)
            return 1; /* SVD did not converge: keep the previous weights */
    }
    for (size_t i = 0; i < n; i++)
        if (!isfinite(m->x[i]))
            return 1;
    memcpy(e->w, m->x, n * sizeof *e->w);
    return fallback;
}

static int lstd_observe(struct est *e, size_t src, const double *phi, double r, const double *phin,
                        double g, int terminal, double v, double vn)
{
    (void)v;
    (void)vn;
    struct lstd *m = e->k;
    struct est_trace *s = &m->s[src];
    size_t n = e->n;
    int ni = (int)n;
    double beta = e->p.forget;

    /* Instrument (eligibility trace) and regressor. */
    est_trace_step(s, n, e->p.lambda, phi, phin, g, terminal, m->d);
    if (beta != 1.0) {
        cblas_dscal(ni * ni, beta, m->A, 1);
        cblas_dscal(ni, beta, m->b, 1);
    }
    cblas_dger(CblasColMajor, ni, ni, 1.0, s->z, 1, m->d, 1, m->A, ni);
    est_axpy(n, r, s->z, m->b);

    est_trace_end(s, n, g, terminal);
    if (++m->since >= e->p.refit_every)
        return refit(e);
    return 0;
}

/*
 * One solve, which cannot be cut: est_train has read the cancel flag just
 * before, so a cancelled lstd training takes no step and changes nothing.
 */
static int lstd_train(struct est *e, const est_train_opts_t *o, est_train_t *rep)
{
    size_t n = e->n;
    double before = sqrt(est_dot(n, e->w, e->w)), diff = 0.0;
    struct lstd *m = e->k;
    memcpy(m->d, e->w, n * sizeof *m->d);
    e->guarded += (uint64_t)refit(e);
    for (size_t i = 0; i < n; i++)
        diff += (e->w[i] - m->d[i]) * (e->w[i] - m->d[i]);
    rep->passes = 1;
    rep->steps = 1;
    rep->change = sqrt(diff) / (before > 0 ? before : 1.0);
    rep->converged = 1;
    if (o->progress)
        o->progress(o->ctx, 1, 1, rep->change);
    return 0;
}

static void lstd_stats(const struct est *e, est_stats_t *st)
{
    const struct lstd *m = e->k;
    st->refits = m->refits;
}

static void lstd_save(const struct est *e, ser_w *w)
{
    const struct lstd *m = e->k;
    ser_put_f64v(w, m->A, e->n * e->n);
    ser_put_f64v(w, m->b, e->n);
    ser_put_u64(w, m->since);
    ser_put_u64(w, m->refits);
    est_traces_save(m->s, e->nsrc, e->n, w);
}

static void lstd_load(struct est *e, ser_r *r, unsigned version)
{
    (void)version; /* no change between formats 1 and 2 */
    struct lstd *m = e->k;
    ser_get_f64v(r, m->A, e->n * e->n);
    ser_get_f64v(r, m->b, e->n);
    m->since = ser_get_u64(r);
    m->refits = ser_get_u64(r);
    est_traces_load(m->s, e->nsrc, e->n, r);
}

const struct est_ops est_lstd_ops = {
    .init = lstd_init,
    .free = lstd_free,
    .reset = lstd_reset,
    .observe = lstd_observe,
    .train = lstd_train,
    .save = lstd_save,
    .load = lstd_load,
    .stats = lstd_stats,
};
