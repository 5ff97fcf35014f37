/*
 * rls.c - RLS-TD(lambda) with a forgetting factor (Bradtke & Barto 1996;
 * Xu, He & Hu 2002), instrumental-variable form.
 *
 * With d = phi - g*phi' (phi' = 0 when terminal) and instrument z, the trace
 * of the source (z = g_prev*lambda*z + phi):
 *   k = P z / (mu + d'P z);  w += k (r - d'w);  P = (P - k d'P) / mu.
 * This is Sherman-Morrison applied to A = sum z d' (+ I/delta), so with mu = 1
 * and w0 = 0 the weights equal ridge LSTD(lambda) with eps = 1/delta after
 * every step, and they converge to the TD fixed point, not to the
 * Bellman-residual minimiser.  P is not symmetric: it is stored in full,
 * row-major, and updated by two fused passes over it (rlsk.h: P z with P'd,
 * then P - k d'P), the maths of dgemv, dgemv (transposed) and dger.
 *
 * Guards.
 * 1. Wind-up.  With mu < 1, directions of P that the data does not excite grow
 *    like mu^-t until they overflow.  Two remedies, chosen by `guard`:
 *    - "regularise" (the default): regularised forgetting (Gunnarsson 1996,
 *      "Combining tracking and regularization in recursive least squares
 *      identification", IEEE CDC).  The information matrix R = P^-1 evolves
 *      as R = mu R + (1-mu) R0 + z d' with R0 = I/delta, so the prior is never
 *      forgotten and unexcited directions of P settle near delta instead of
 *      growing, while excited directions still forget at rate mu (the
 *      estimator keeps tracking).  (1-mu) R0 is full rank; it is spread over
 *      the coordinates one per step, c = n(1-mu)/delta on e_i, i = t mod n,
 *      each a rank-1 pseudo-measurement "w_i = init" applied by
 *      Sherman-Morrison.  O(n^2) extra per step.
 *    - "trace": forget only as far as trace(P) stays under trace_cap (default
 *      n*delta, the prior's trace): mu_t = clamp(trace(P)/trace_cap, mu, 1).
 *      Cheap, but once unexcited directions fill the cap it stops forgetting
 *      everywhere, so tracking is lost; kept for comparison.
 *    Neither acts when mu = 1, which keeps the LSTD identity exact.  Steps a
 *    guard damps are counted as guarded.
 * 2. Gain denominator.  The step is Sherman-Morrison on A + z d', valid for
 *    any mu_t + d'P z != 0.  With the instrument (z != d) the denominator can
 *    legitimately be negative (A passes through a singular matrix on its way
 *    to the data's A), so a sign change is applied, not skipped: skipping it
 *    would lose the transition and break the LSTD identity.  Only a
 *    denominator within 1e-6*mu_t of zero (the update would be unbounded) or
 *    not finite leaves w and P alone (the trace still advances) and is
 *    counted as guarded.  The pseudo-measurement of the regularised guard has
 *    the same check on 1 + c P_ii.
 * 3. Re-regularisation.  After each update, if any diagonal entry of P is not
 *    finite or exceeds delta / DBL_EPSILON (2^52 times the prior's) in
 *    size, P is set back to delta*I, its prior.  Such a P has wound up
 *    (guard none with mu < 1 and an unexcited direction: P_ii grows like
 *    mu^-t, see tests/reference/test_windup.c) or overflowed: the information
 *    left in that direction is below the rounding error of the prior's, the
 *    rounding soon turns the sign of such entries to noise (seen there near
 *    1e178), and then the gains are NaN or point anywhere.  The weights are
 *    kept (the divergence rule of est.h resets non-finite ones); the reset is
 *    counted (p_resets) and its update remembered (p_reset_at), both saved.
 *    Not a rule on the sign: the instrumental P is not positive definite,
 *    and a diagonal entry <= 0 is a legitimate state of the exact recursion
 *    while A + I/delta passes through singular (Boyan's chain does it at
 *    steps 2 to 5); resetting it would break the LSTD identity.  Where such
 *    a P gives phi'P phi < 0, sd is NAN instead (below).
 *    For EST_RLS_RESET_WINDOW * n updates from a reset on, the estimator
 *    reports itself unhealthy ("covariance reset"): until some multiple of n
 *    transitions have excited every direction again, P and so sd(x) speak
 *    for the prior delta, not for the data; 10 n is the usual rule of thumb
 *    for an n-parameter least-squares fit to have seen enough data.  The
 *    check only reads P, so when no reset happens the bits are those without
 *    it (the RLS = ridge LSTD identity stays exact).
 *
 * Uncertainty: sd(x) = sqrt(s2 * phi'P phi), s2 the mu-weighted mean of the
 * squared a-priori residual r - d'w (the TD error).  The instrumental P need
 * not be positive definite: when phi'P phi is negative or not finite, sd is
 * NAN (null on the wire), never 0, which would claim full certainty.
 *
 * O(n^2) per transition, workspaces allocated at creation; owning thread only.
 */
#include <cblas.h>
#include <float.h>
#include <math.h>
#include <stdint.h>
#include <string.h>

#include "learn/est_impl.h"
#include "learn/rlsk.h"
#include "common/mem.h"

struct rls {
    double *P;          /* n x n, row-major, row i at P + i * ld */
    double *pz, *u, *d; /* workspaces, n each */
    /*
     * The last step's downdate, not yet applied (pend): P stands for
     * (P - kp up') * pend_inv.  The next step applies it in the same pass as
     * its own products (rlsk fused), which halves the passes over P; every
     * other reader of P settles it first.  Guard 3 and the trace read the
     * diagonal it would leave (dg), so what anyone sees is the
     * eager update's, bit for bit.  Only when no wind-up guard acts between
     * steps (forget 1, or guard none).
     */
    double *kp, *up, *dg;
    int pend;
    double pend_inv;
    size_t ld;           /* RLSK_LD(n): rows and workspaces start on 64 bytes */
    void *block;         /* the allocation P and the workspaces are carved from */
    double cap;          /* trace cap of the guard */
    double s2_sum, s2_w; /* running residual variance: sum of mu-weighted e^2 and weights */
    uint64_t reg_i;      /* regularised guard: next coordinate to regularise */
    uint64_t p_resets;   /* re-regularisations of P (guard 3) */
    uint64_t p_reset_at; /* e->updates of the last one */
    struct est_trace *s; /* nsrc */
    const rlsk_t *k;     /* the O(n^2) kernels (rlsk.h) */
};

static void init_p(struct est *e, struct rls *m)
{
    size_t n = e->n;
    m->pend = 0;
    memset(m->P, 0, n * m->ld * sizeof *m->P);
    for (size_t i = 0; i < n; i++)
        m->P[i * m->ld + i] = e->p.delta;
}

static void rls_init(struct est *e)
{
    size_t n = e->n;
    struct rls *m = mem_calloc(1, sizeof *m);
    /* One block: P (n rows of ld), then pz, u, d, kp, up, dg (ld each), from a 64-byte boundary. */
    size_t ld = m->ld = RLSK_LD(n);
    m->block = mem_calloc((n + 6) * ld + 8, sizeof(double));
    m->P = (double *)(((uintptr_t)m->block + 63) & ~(uintptr_t)63);
    m->pz = m->P + n * ld;
    m->u = m->pz + ld;
    m->d = m->u + ld;
    m->kp = m->d + ld;
    m->up = m->kp + ld;
    m->dg = m->up + ld;
    m->cap = e->p.trace_cap > 0 ? e->p.trace_cap : (double)n * e->p.delta;
    m->s = mem_calloc(e->nsrc, sizeof *m->s);
    m->k = rlsk();
    e->k = m;
    init_p(e, m);
}

static void rls_reset(struct est *e)
{
    struct rls *m = e->k;
    init_p(e, m);
    m->s2_sum = m->s2_w = 0.0;
    m->reg_i = 0;
    m->p_resets = m->p_reset_at = 0;
    est_traces_reset(m->s, e->nsrc);
}

static void rls_free(struct est *e)
{
    rls_reset(e);
    struct rls *m = e->k;
    mem_free(m->block);
    mem_free(m->s);
    mem_free(m);
}

static double trace(const double *P, size_t n, size_t ld)
{
    double t = 0.0;
    for (size_t i = 0; i < n; i++)
        t += P[i * ld + i];
    return t;
}

/* Applies the pending downdate, if any: P is then what it stands for. */
static void settle(const struct est *e)
{
    struct rls *m = e->k; /* the value of P does not change, only its representation */
    if (!m->pend)
        return;
    m->k->downdate(e->n, m->ld, m->P, m->kp, m->up, m->pend_inv);
    m->pend = 0;
}

/* 1 when the downdate may wait for the next step: no wind-up guard acts between steps. */
static int lazy(const struct est *e)
{
    return !(e->p.forget < 1.0 && e->p.guard != EST_GUARD_NONE);
}

/*
 * Regularised forgetting: one pseudo-measurement w_i = init with weight
 * c = n(1-mu)/delta on coordinate i = t mod n.  Returns 1 when skipped.
 */
static int regularise(struct est *e, struct rls *m)
{
    size_t n = e->n, i = (size_t)(m->reg_i++ % n);
    int ni = (int)n, ld = (int)m->ld;
    double c = (double)n * (1.0 - e->p.forget) / e->p.delta;
    double den = 1.0 + c * m->P[i * m->ld + i];
    if (!(fabs(den) > 1e-6) || !isfinite(den))
        return 1;
    cblas_dcopy(ni, m->P + i, ld, m->pz, 1);       /* column i */
    cblas_dcopy(ni, m->P + i * m->ld, 1, m->u, 1); /* row i */
    double gain = c / den;
    est_axpy(n, gain * (e->p.init - e->w[i]), m->pz, e->w);
    cblas_dger(CblasRowMajor, ni, ni, -gain, m->pz, 1, m->u, 1, m->P, ld);
    return 0;
}

/*
 * sd from a residual variance s2 and a row-major P: sqrt(s2 * phi'P phi), or
 * NAN when phi'P phi is negative or not finite.
 */
static double sd_of(size_t n, size_t ld, double s2, const double *P, const double *phi)
{
    double q = 0.0;
    for (size_t i = 0; i < n; i++) {
        if (phi[i] == 0.0)
            continue;
        q += phi[i] * est_dot(n, P + i * ld, phi);
    }
    if (!(q >= 0.0) || !isfinite(q))
        return NAN;
    return sqrt(s2 * q);
}

static double s2_of(const struct rls *m)
{
    return m->s2_w > 0 ? m->s2_sum / m->s2_w : 0.0;
}

static int rls_observe(struct est *e, size_t src, const double *phi, double r, const double *phin,
                       double g, int terminal, double v, double vn)
{
    struct rls *m = e->k;
    struct est_trace *s = &m->s[src];
    size_t n = e->n;
    int guarded = 0;
    double mu = e->p.forget;

    /* Instrument (eligibility trace) and regressor. */
    est_trace_step(s, n, e->p.lambda, phi, phin, g, terminal, m->d);

    double mu_t = mu;
    if (e->p.guard == EST_GUARD_TRACE && mu < 1.0) {
        double q = trace(m->P, n, m->ld) / m->cap;
        mu_t = q > 1.0 ? 1.0 : (q > mu ? q : mu);
        guarded = mu_t != mu;
    }

    /*
     * The sd of V(x) before this update, which the diagnostics score: with z = phi (lambda 0,
     * or the first step of an episode) phi'P phi is phi . (P z) from the pass over P that the
     * update makes anyway; otherwise it takes a pass of its own.
     */
    double s2 = s2_of(m);
    int z_is_phi = memcmp(s->z, phi, n * sizeof *phi) == 0;
    if (!z_is_phi) {
        settle(e);
        e->sd_last = sd_of(n, m->ld, s2, m->P, phi);
    }
    if (m->pend) { /* the last step's downdate, in the pass of this step's products */
        m->k->fused(n, m->ld, m->P, m->kp, m->up, m->pend_inv, s->z, m->d, m->pz, m->u);
        m->pend = 0;
    } else {
        m->k->products(n, m->ld, m->P, s->z, m->d, m->pz, m->u);
    }
    if (z_is_phi) {
        double q = est_dot(n, phi, m->pz);
        e->sd_last = q >= 0.0 && isfinite(q) ? sqrt(s2 * q) : NAN;
    }
    double den = mu_t + est_dot(n, m->d, m->pz);
    double err = r - (v - g * vn); /* r - d'w: the TD error under the current weights */
    if (!(fabs(den) > 1e-6 * mu_t) || !isfinite(den)) {
        guarded = 1;
    } else {
        for (size_t i = 0; i < n; i++)
            m->pz[i] /= den; /* pz is now the gain k */
        est_axpy(n, err, m->pz, e->w);
        if (lazy(e)) { /* kept for the next step: the gain and u swap with kp and up */
            double *t = m->kp;
            m->kp = m->pz;
            m->pz = t;
            t = m->up;
            m->up = m->u;
            m->u = t;
            m->pend = 1;
            m->pend_inv = 1.0 / mu_t;
        } else {
            m->k->downdate(n, m->ld, m->P, m->pz, m->u, 1.0 / mu_t);
        }
    }
    if (e->p.guard == EST_GUARD_REGULARISE && mu < 1.0)
        guarded |= regularise(e, m);
    m->s2_sum = mu * m->s2_sum + err * err;
    m->s2_w = mu * m->s2_w + 1.0;

    /* Guard 3: a wound-up or overflowed diagonal sends P back to its prior. */
    double ceil_p = e->p.delta / DBL_EPSILON;
    if (m->pend) {
        m->k->diag(n, m->ld, m->P, m->kp, m->up, m->pend_inv, m->dg);
    } else {
        for (size_t i = 0; i < n; i++)
            m->dg[i] = m->P[i * m->ld + i];
    }
    for (size_t i = 0; i < n; i++) {
        if (!(fabs(m->dg[i]) <= ceil_p)) {
            init_p(e, m);
            m->p_resets++;
            m->p_reset_at = e->updates + 1; /* est.c counts this update after us */
            break;
        }
    }

    est_trace_end(s, n, g, terminal);
    return guarded;
}

static int rls_sd(const struct est *e, const double *phi, double *sd)
{
    const struct rls *m = e->k;
    settle(e);
    *sd = sd_of(e->n, m->ld, s2_of(m), m->P, phi);
    return 0;
}

/* Snapshot after w: s2, then P. */
static size_t rls_snap_size(const struct est *e)
{
    return 1 + e->n * e->n;
}

static void rls_snap(const struct est *e, double *out)
{
    const struct rls *m = e->k;
    settle(e);
    out[0] = s2_of(m);
    for (size_t i = 0; i < e->n; i++) /* packed: n x n */
        memcpy(out + 1 + i * e->n, m->P + i * m->ld, e->n * sizeof *out);
}

static double rls_snap_sd(const struct est *e, const double *extra, const double *phi)
{
    return sd_of(e->n, e->n, extra[0], extra + 1, phi);
}

static void rls_stats(const struct est *e, est_stats_t *st)
{
    const struct rls *m = e->k;
    /* Pending: the diagonal the downdate will leave, summed in trace()'s order (ld 0: dg is
     * a plain vector). */
    st->trace_p = m->pend ? trace(m->dg, e->n, 0) : trace(m->P, e->n, m->ld);
    st->p_resets = m->p_resets;
    if (m->p_resets && e->updates - m->p_reset_at < (uint64_t)EST_RLS_RESET_WINDOW * e->n) {
        st->health = EST_HEALTH_UNHEALTHY;
        st->why = EST_WHY_P_RESET;
    }
}

static void rls_save(const struct est *e, ser_w *w)
{
    const struct rls *m = e->k;
    settle(e);
    for (size_t i = 0; i < e->n; i++) /* packed: n x n */
        ser_put_f64v(w, m->P + i * m->ld, e->n);
    ser_put_f64(w, m->s2_sum);
    ser_put_f64(w, m->s2_w);
    ser_put_u64(w, m->reg_i);
    ser_put_u64(w, m->p_resets);
    ser_put_u64(w, m->p_reset_at);
    est_traces_save(m->s, e->nsrc, e->n, w);
}

static void rls_load(struct est *e, ser_r *r, unsigned version)
{
    struct rls *m = e->k;
    m->pend = 0;
    for (size_t i = 0; i < e->n; i++)
        ser_get_f64v(r, m->P + i * m->ld, e->n);
    m->s2_sum = ser_get_f64(r);
    m->s2_w = ser_get_f64(r);
    m->reg_i = ser_get_u64(r);
    m->p_resets = m->p_reset_at = 0; /* format 1 had no guard 3 */
    if (version >= 2) {
        m->p_resets = ser_get_u64(r);
        m->p_reset_at = ser_get_u64(r);
    }
    est_traces_load(m->s, e->nsrc, e->n, r);
}

const struct est_ops est_rls_ops = {
    .init = rls_init,
    .free = rls_free,
    .reset = rls_reset,
    .observe = rls_observe,
    .sd = rls_sd,
    .snap_size = rls_snap_size,
    .snap = rls_snap,
    .snap_sd = rls_snap_sd,
    .save = rls_save,
    .load = rls_load,
    .stats = rls_stats,
};
