/*
 * est.c - the estimator interface: validation, dispatch, counters, format.
 *
 * Owns each estimator's weights and common counters; the kind's own state
 * hangs off e->k.  Runs on the thread that owns the estimator (a model's
 * learner).  It must never let an invalid input reach a kind's update: every
 * check happens here, before anything is modified, so a rejected call leaves
 * the estimator bit-identical.
 *
 * It also applies the divergence rule of est.h after every update and
 * training: the check only reads, so a healthy estimator's bits are those it
 * would have without it; a diverged one is reset here, by the kind's own
 * reset, before anything can save or publish a non-finite number.
 *
 * Saved state layout (all little-endian):
 *   u32 magic "WEST", u32 format version, u32 kind, u32 reserved,
 *   u64 n, u64 sources, the parameters, the common counters, (format 2:)
 *   f64 R_max, u32 divergence reason (0 = none), u64 diverged_at, the
 *   weights, the kind's state, and last a u32 CRC-32 of everything before it.
 */
#include "learn/est.h"

#include <cblas.h>
#include <math.h>
#include <stdarg.h>
#include <stdint.h>
#include <stdio.h>
#include <string.h>

#include "learn/est_impl.h"
#include "learn/mlpnet.h"
#include "learn/ring.h"
#include "common/fail.h"
#include "common/mem.h"
#include "worth/errors.h"

#define EST_MAGIC 0x54534557u /* "WEST" */
/* Weight of the exponentially weighted TD error: about 1000 transitions. */
#define TD_EW_KEEP (1.0 - 1.0 / 1000.0)

/* Reasons of divergence, by e->diverged. */
enum { WHY_NONE, WHY_NONFINITE, WHY_BOUND, WHY_COUNT };
static const char *const why_text[WHY_COUNT] = {NULL, EST_WHY_NONFINITE, EST_WHY_BOUND};

static const char *const kind_names[EST_KIND_COUNT] = {
    "td", "td_n", "td_lambda", "mc", "rls_td", "lstd", "replay", "mlp", "ensemble",
};

static const struct est_ops *const kind_ops[EST_KIND_COUNT] = {
    &est_td_ops,   &est_tdn_ops,    &est_tdlambda_ops, &est_mc_ops,       &est_rls_ops,
    &est_lstd_ops, &est_replay_ops, &est_mlp_ops,      &est_ensemble_ops,
};

const char *est_kind_name(enum est_kind kind)
{
    return (unsigned)kind < EST_KIND_COUNT ? kind_names[kind] : NULL;
}

int est_kind_parse(const char *name)
{
    for (int i = 0; i < EST_KIND_COUNT; i++)
        if (strcmp(name, kind_names[i]) == 0)
            return i;
    return -1;
}

void est_params_default(enum est_kind kind, est_params_t *p)
{
    memset(p, 0, sizeof *p);
    p->kind = kind;
    p->alpha = 0.01;
    p->init = 0.0;
    p->lambda = kind == EST_TD_LAMBDA ? 0.9 : 0.0;
    p->nstep = 4;
    p->horizon = 0;
    p->max_episode = 100000;
    p->forget = 1.0;
    p->delta = 100.0;
    p->guard = EST_GUARD_REGULARISE;
    p->trace_cap = 0.0;
    p->ridge = 1e-6;
    p->refit_every = 100;
    p->capacity = 10000;
    p->batch = 32;
    p->steps_per_obs = 1;
    p->decay = 0.0;
    p->tol = 1e-4;
    p->seed = 1;
    p->hidden.count = 2;
    for (int i = 0; i < EST_MLP_MAX_LAYERS; i++)
        p->hidden.width[i] = i < 2 ? 32 : 0;
    p->act = EST_ACT_TANH;
    p->target_every = 0;
    p->clip = 0.0;
    p->members = kind == EST_ENSEMBLE ? 5 : 1;
    if (kind == EST_MLP || kind == EST_ENSEMBLE) {
        p->alpha = 0.001;
        p->nstep = 1;
    }
}

static int is_net(enum est_kind kind)
{
    return kind == EST_MLP || kind == EST_ENSEMBLE;
}

static int check_params(const est_params_t *p, size_t n, size_t sources, char *err, size_t len)
{
    if ((unsigned)p->kind >= EST_KIND_COUNT)
        return err_fail(err, len, WORTH_E_BAD_PARAM, "unknown estimator kind");
    if (n < 1)
        return err_fail(err, len, WORTH_E_BAD_PARAM, "feature count must be >= 1");
    if (sources < 1 || sources > EST_MAX_SOURCES)
        return err_fail(err, len, WORTH_E_BAD_PARAM, "sources must be 1..%d", EST_MAX_SOURCES);
    if (!isfinite(p->init))
        return err_fail(err, len, WORTH_E_BAD_PARAM, "init must be finite");
    switch (p->kind) {
    case EST_TD:
    case EST_TD_N:
    case EST_TD_LAMBDA:
    case EST_MC:
    case EST_REPLAY:
    case EST_MLP:
    case EST_ENSEMBLE:
        if (!(p->alpha > 0) || !isfinite(p->alpha))
            return err_fail(err, len, WORTH_E_BAD_PARAM, "alpha must be a finite number > 0");
        break;
    default:
        break;
    }
    if ((p->kind == EST_TD_LAMBDA || p->kind == EST_RLS_TD || p->kind == EST_LSTD) &&
        !(p->lambda >= 0 && p->lambda <= 1))
        return err_fail(err, len, WORTH_E_BAD_PARAM, "lambda must be in [0, 1]");
    if (p->kind == EST_TD_N && (p->nstep < 1 || p->nstep > 100000))
        return err_fail(err, len, WORTH_E_BAD_PARAM, "n must be 1..100000");
    if (p->kind == EST_MC) {
        if (p->horizon > 1000000)
            return err_fail(err, len, WORTH_E_BAD_PARAM, "horizon must be 0..1000000");
        if (p->horizon == 0 && (p->max_episode < 1 || p->max_episode > 10000000))
            return err_fail(err, len, WORTH_E_BAD_PARAM, "max_episode must be 1..10000000");
    }
    if (p->kind == EST_RLS_TD || p->kind == EST_LSTD) {
        if (!(p->forget > 0 && p->forget <= 1))
            return err_fail(err, len, WORTH_E_BAD_PARAM, "forget (mu) must be in (0, 1]");
    }
    if (p->kind == EST_RLS_TD) {
        if (!(p->delta > 0) || !isfinite(p->delta))
            return err_fail(err, len, WORTH_E_BAD_PARAM, "delta must be a finite number > 0");
        if (p->guard != EST_GUARD_REGULARISE && p->guard != EST_GUARD_TRACE &&
            p->guard != EST_GUARD_NONE)
            return err_fail(err, len, WORTH_E_BAD_PARAM, "guard must be regularise, trace or none");
        if (!(p->trace_cap >= 0) || !isfinite(p->trace_cap))
            return err_fail(err, len, WORTH_E_BAD_PARAM, "trace_cap must be finite and >= 0");
    }
    if (p->kind == EST_LSTD) {
        if (!(p->ridge >= 0) || !isfinite(p->ridge))
            return err_fail(err, len, WORTH_E_BAD_PARAM, "ridge must be finite and >= 0");
        if (p->refit_every < 1)
            return err_fail(err, len, WORTH_E_BAD_PARAM, "refit_every must be >= 1");
    }
    if (is_net(p->kind)) {
        int rc = mlp_check(p, n, err, len);
        if (rc)
            return rc;
    }
    if (p->kind == EST_REPLAY || is_net(p->kind)) {
        if (p->capacity < 1 || p->capacity > 100000000)
            return err_fail(err, len, WORTH_E_BAD_PARAM, "capacity must be 1..100000000");
        if (p->batch < 1 || p->batch > p->capacity)
            return err_fail(err, len, WORTH_E_BAD_PARAM, "batch must be 1..capacity");
        if (p->steps_per_obs > 1000)
            return err_fail(err, len, WORTH_E_BAD_PARAM, "steps_per_obs must be 0..1000");
        if (!(p->decay >= 0) || !isfinite(p->decay))
            return err_fail(err, len, WORTH_E_BAD_PARAM, "decay must be finite and >= 0");
        if (!(p->tol > 0) || !isfinite(p->tol))
            return err_fail(err, len, WORTH_E_BAD_PARAM, "tol must be a finite number > 0");
    }
    /* Memory the dense matrices imply, checked before anything is allocated. */
    if ((p->kind == EST_RLS_TD || p->kind == EST_LSTD) && n > 8192)
        return err_fail(err, len, WORTH_E_TOO_LARGE,
                        "%s keeps an n x n matrix: n = %zu exceeds its limit 8192",
                        kind_names[p->kind], n);
    if (p->kind == EST_REPLAY && (double)p->capacity * (2.0 * n + 1) * 8 > 4e9)
        return err_fail(err, len, WORTH_E_TOO_LARGE, "replay buffer would exceed 4 GB");
    return 0;
}

double est_footprint(const est_params_t *p, size_t n, size_t sources)
{
    double nn = (double)n, S = (double)sources, d = sizeof(double);
    double state = nn, snap = nn + 1; /* weights, and w and the diverged flag in each snapshot */
    switch (p->kind) {
    case EST_TD:
        break;
    case EST_TD_N: /* a ring of n steps per source: phi, r, g */
        state += S * (double)p->nstep * (nn + 2);
        break;
    case EST_TD_LAMBDA: /* a dutch trace per source */
        state += S * (nn + 2);
        break;
    case EST_MC: { /* the episode (or horizon) buffer per source */
        double cap = p->horizon ? (double)p->horizon : (double)p->max_episode;
        state += S * cap * (nn + 2);
        break;
    }
    case EST_RLS_TD: /* P, three work vectors, a trace per source; P in each snapshot */
        state += nn * nn + 3 * nn + S * (nn + 2);
        snap += nn * nn + 1;
        break;
    case EST_LSTD: /* A, its LU copy M, work vectors, a trace per source */
        state += 2 * nn * nn + 10 * nn + S * (nn + 2);
        break;
    case EST_REPLAY: /* capacity records of phi and g*phi', r; gradient and start weights */
        state += (double)p->capacity * (2 * nn + 1) + 2 * nn;
        break;
    case EST_MLP:
    case EST_ENSEMBLE: { /* everything the networks hold; their weights in each snapshot too */
        double nw = (double)mlp_weight_count(p, n);
        state = mlp_footprint(p, n, sources) / d;
        snap = nw + 1;
        break;
    }
    default:
        break;
    }
    return (state + 2 * snap) * d;
}

/* The weights of a fresh estimator: the kind's own start (a network's seeded draw), or init. */
static void init_weights(struct est *e)
{
    if (e->ops->init_w) {
        e->ops->init_w(e);
        return;
    }
    for (size_t i = 0; i < e->nw; i++)
        e->w[i] = e->p.init;
}

/* V(phi) under the weights w (e->w or a snapshot's), and the kind's sd when sd is not NULL. */
static double value_at(const struct est *e, const double *w, const double *phi, double *sd)
{
    if (e->ops->value)
        return e->ops->value(e, w, phi, sd);
    if (sd)
        *sd = NAN;
    return est_dot(e->n, w, phi);
}

int est_new(const est_params_t *p, size_t n, size_t sources, struct est **out, char *err,
            size_t errlen)
{
    int rc = check_params(p, n, sources, err, errlen);
    if (rc)
        return rc;
    struct est *e = mem_calloc(1, sizeof *e);
    e->p = *p;
    e->ops = kind_ops[p->kind];
    e->n = n;
    e->nsrc = sources;
    e->nw = is_net(p->kind) ? mlp_weight_count(p, n) : n;
    e->w = mem_alloc(e->nw * sizeof *e->w);
    init_weights(e);
    e->ops->init(e);
    *out = e;
    return 0;
}

void est_free(struct est *e)
{
    if (!e)
        return;
    e->ops->free(e);
    mem_free(e->w);
    mem_free(e);
}

void est_reset(struct est *e)
{
    init_weights(e);
    e->updates = e->guarded = 0;
    e->td_last = e->td_ms = e->td_wsum = e->v_last = 0.0;
    e->sd_last = NAN;
    e->r_max = 0.0;
    e->diverged = WHY_NONE;
    e->diverged_at = 0;
    e->ops->reset(e);
}

double est_dot(size_t n, const double *a, const double *b)
{
    return cblas_ddot((int)n, a, 1, b, 1);
}

void est_axpy(size_t n, double a, const double *x, double *y)
{
    cblas_daxpy((int)n, a, x, 1, y, 1);
}

void est_step(struct est *e, const double *phi, double target)
{
    double v = est_dot(e->n, e->w, phi);
    est_axpy(e->n, e->p.alpha * (target - v), phi, e->w);
}

/* The returns do not depend on the weights, so computing them all first gives the bits of
 * taking each in turn while the weights move. */
void est_ring_flush(struct est *e, struct ring *q)
{
    ring_returns(q);
    for (size_t i = 0; i < q->count; i++)
        est_step(e, ring_phi(q, i, e->n), ring_r(q, i));
    ring_clear(q);
}

/*
 * 1 when all n doubles are finite, that is none has every exponent bit set.
 * Adding 1 to the exponent field carries into the sign bit exactly when the
 * field is all ones, so or-ing those sums and reading the top bit tells: a
 * reduction of integer ands, adds and ors the compiler vectorises with no
 * latency chain of floating-point additions (an earlier form summed x * 0,
 * which cost as much as a TD update's dot products).  This runs three times
 * per update (phi, phi', and the weights for the divergence rule), so it
 * must cost little beside the update itself.
 */
#if defined(__x86_64__) && defined(__GNUC__) && !defined(__clang__)
/* Its result is a yes or no, the same in every clone: let the loader pick the widest. */
__attribute__((target_clones("arch=x86-64-v4", "arch=x86-64-v3", "default")))
#endif
static int
finite_vec(const double *v, size_t n)
{
    const uint64_t exp = 0x7ffull << 52, one = 1ull << 52;
    uint64_t bad = 0;
#pragma omp simd reduction(| : bad)
    for (size_t i = 0; i < n; i++) {
        uint64_t x;
        memcpy(&x, v + i, sizeof x);
        bad |= (x & exp) + one;
    }
    return (bad >> 63) == 0;
}

int est_train_cancelled(const est_train_opts_t *o)
{
    return o->cancel && atomic_load(o->cancel) != 0;
}

/* Returns the reason e has diverged by (WHY_*), given v and vn of the last transition. */
static int divergence(const struct est *e, double v, double vn)
{
    if (!finite_vec(e->w, e->nw))
        return WHY_NONFINITE;
    double bound = EST_DIVERGE_FACTOR * (e->r_max > 1.0 ? e->r_max : 1.0);
    if (!(fabs(v) <= bound) || !(fabs(vn) <= bound))
        return WHY_BOUND;
    return WHY_NONE;
}

/* Records the divergence and puts the weights and the kind's state back to their initial
 * values; the common counters stay. */
static void diverge(struct est *e, int why)
{
    e->diverged = why;
    e->diverged_at = e->updates;
    init_weights(e);
    e->ops->reset(e);
    e->v_last = NAN;
}

int est_observe(struct est *e, size_t src, const double *phi, double r, const double *phi_next,
                double g, int terminal)
{
    if (src >= e->nsrc)
        return WORTH_E_BAD_PARAM;
    if (!(g >= 0 && g <= 1))
        return WORTH_E_BAD_PARAM;
    if (!isfinite(r) || !finite_vec(phi, e->n))
        return WORTH_E_BAD_NUMBER;
    if (!terminal && (!phi_next || !finite_vec(phi_next, e->n)))
        return phi_next ? WORTH_E_BAD_NUMBER : WORTH_E_BAD_PARAM;

    if (e->diverged) { /* counted, not learnt */
        e->updates++;
        return 0;
    }

    double v = value_at(e, e->w, phi, NULL);
    double vn = terminal ? 0.0 : value_at(e, e->w, phi_next, NULL);
    double delta = r + g * vn - v;
    e->sd_last = NAN;
    e->guarded += (uint64_t)e->ops->observe(e, src, phi, r, terminal ? NULL : phi_next, g,
                                            terminal != 0, v, vn);
    e->updates++;
    if (fabs(r) > e->r_max)
        e->r_max = fabs(r);
    int why = divergence(e, v, vn);
    if (why) {
        /* The TD statistics keep what they had: this delta may not even be finite. */
        diverge(e, why);
        return 0;
    }
    e->td_last = delta;
    e->v_last = v;
    e->td_ms = TD_EW_KEEP * e->td_ms + delta * delta;
    e->td_wsum = TD_EW_KEEP * e->td_wsum + 1.0;
    return 0;
}

int est_train(struct est *e, const est_train_opts_t *o, est_train_t *rep)
{
    memset(rep, 0, sizeof *rep);
    if (!e->ops->train)
        return WORTH_E_UNSUPPORTED;
    if (e->diverged)
        return WORTH_E_DIVERGED;
    if (est_train_cancelled(o)) {
        rep->cancelled = 1;
        return WORTH_E_CANCELLED;
    }
    int rc = e->ops->train(e, o, rep);
    /* A training computes no values of states, so only rule 1 applies here. */
    if (!finite_vec(e->w, e->nw)) {
        diverge(e, WHY_NONFINITE);
        return WORTH_E_DIVERGED;
    }
    rep->cancelled = rc == WORTH_E_CANCELLED;
    return rc;
}

double est_value(const struct est *e, const double *phi)
{
    return e->diverged ? NAN : value_at(e, e->w, phi, NULL);
}

int est_sd(const struct est *e, const double *phi, double *sd)
{
    if (!e->ops->sd)
        return WORTH_E_UNSUPPORTED;
    if (e->diverged) {
        *sd = NAN;
        return 0;
    }
    return e->ops->sd(e, phi, sd);
}

double est_last_value(const struct est *e)
{
    return e->diverged ? NAN : e->v_last;
}

double est_last_sd(const struct est *e)
{
    return e->sd_last;
}

double est_last_td(const struct est *e)
{
    return e->diverged ? NAN : e->td_last;
}

int est_diverged(const struct est *e)
{
    return e->diverged != WHY_NONE;
}

const double *est_weights(const struct est *e)
{
    return e->w;
}

size_t est_weight_count(const struct est *e)
{
    return e->nw;
}

size_t est_features(const struct est *e)
{
    return e->n;
}

const est_params_t *est_params(const struct est *e)
{
    return &e->p;
}

void est_stats(const struct est *e, est_stats_t *out)
{
    memset(out, 0, sizeof *out);
    out->updates = e->updates;
    out->guarded = e->guarded;
    out->td_last = e->td_last;
    out->td_rms = e->td_wsum > 0 ? sqrt(e->td_ms / e->td_wsum) : 0.0;
    out->health = EST_HEALTH_OK;
    if (e->ops->stats)
        e->ops->stats(e, out);
    if (e->diverged) {
        out->health = EST_HEALTH_DIVERGED;
        out->why = why_text[e->diverged];
        out->diverged_at = e->diverged_at;
    }
}

/* Snapshot: w (nw), the diverged flag (1 double, 0 or 1), then the kind's extra doubles. */
size_t est_snap_size(const struct est *e)
{
    return e->nw + 1 + (e->ops->snap_size ? e->ops->snap_size(e) : 0);
}

void est_snap(const struct est *e, double *out)
{
    memcpy(out, e->w, e->nw * sizeof *out);
    out[e->nw] = e->diverged ? 1.0 : 0.0;
    if (e->ops->snap)
        e->ops->snap(e, out + e->nw + 1);
}

double est_snap_value(const struct est *e, const double *snap, const double *phi, double *sd)
{
    if (snap[e->nw] != 0.0) {
        *sd = NAN;
        return NAN;
    }
    if (e->ops->value)
        return e->ops->value(e, snap, phi, sd);
    *sd = e->ops->snap_sd ? e->ops->snap_sd(e, snap + e->nw + 1, phi) : NAN;
    return est_dot(e->n, snap, phi);
}

/* Parameters go into the header so that a checkpoint cannot be loaded into a differently
 * configured estimator; those of the network kinds from format 3 on (a format 1 or 2 state
 * holds none, and is compared without them). */
static void put_params(ser_w *w, const est_params_t *p, unsigned version)
{
    ser_put_f64(w, p->alpha);
    ser_put_f64(w, p->init);
    ser_put_f64(w, p->lambda);
    ser_put_u32(w, p->nstep);
    ser_put_u32(w, p->horizon);
    ser_put_u32(w, p->max_episode);
    ser_put_f64(w, p->forget);
    ser_put_f64(w, p->delta);
    ser_put_u32(w, (uint32_t)p->guard);
    ser_put_f64(w, p->trace_cap);
    ser_put_f64(w, p->ridge);
    ser_put_u32(w, p->refit_every);
    ser_put_u32(w, p->capacity);
    ser_put_u32(w, p->batch);
    ser_put_u32(w, p->steps_per_obs);
    ser_put_f64(w, p->decay);
    ser_put_f64(w, p->tol);
    ser_put_u64(w, p->seed);
    if (version < 3)
        return;
    ser_put_u32(w, p->hidden.count);
    for (int i = 0; i < EST_MLP_MAX_LAYERS; i++)
        ser_put_u32(w, p->hidden.width[i]);
    ser_put_u32(w, (uint32_t)p->act);
    ser_put_u32(w, p->target_every);
    ser_put_f64(w, p->clip);
    ser_put_u32(w, p->members);
}

static void save_all(const struct est *e, ser_w *w)
{
    ser_put_u32(w, EST_MAGIC);
    ser_put_u32(w, EST_FORMAT_VERSION);
    ser_put_u32(w, (uint32_t)e->p.kind);
    ser_put_u32(w, 0);
    ser_put_u64(w, e->n);
    ser_put_u64(w, e->nsrc);
    put_params(w, &e->p, EST_FORMAT_VERSION);
    ser_put_u64(w, e->updates);
    ser_put_u64(w, e->guarded);
    ser_put_f64(w, e->td_last);
    ser_put_f64(w, e->td_ms);
    ser_put_f64(w, e->td_wsum);
    ser_put_f64(w, e->r_max);
    ser_put_u32(w, (uint32_t)e->diverged);
    ser_put_u64(w, e->diverged_at);
    ser_put_f64v(w, e->w, e->nw);
    e->ops->save(e, w);
}

int est_save(const struct est *e, uint8_t *buf, size_t cap, size_t *len)
{
    ser_w w = {buf, cap, 0};
    save_all(e, &w);
    size_t body = w.len;
    *len = body + 4;
    if (!buf || *len > cap)
        return WORTH_E_TOO_LARGE;
    uint32_t crc = ser_crc32(buf, body);
    ser_put_u32(&w, crc);
    return 0;
}

static int load_body(struct est *e, const uint8_t *buf, size_t len, char *err, size_t errlen)
{
    ser_r r = {buf, len - 4, 0, 0};
    ser_get_u32(&r); /* magic and version were checked by the caller */
    unsigned version = ser_get_u32(&r);
    ser_get_u32(&r);
    ser_get_u32(&r);
    ser_get_u64(&r);
    ser_get_u64(&r);
    /* Compare the parameters byte for byte with ours. */
    uint8_t mine[256], theirs[256];
    ser_w pw = {mine, sizeof mine, 0};
    put_params(&pw, &e->p, version);
    CHECK(ser_fits(&pw));
    ser_get_bytes(&r, theirs, pw.len);
    if (r.err)
        return err_fail(err, errlen, WORTH_E_CORRUPT, "state is shorter than its header");
    if (memcmp(mine, theirs, pw.len) != 0)
        return err_fail(err, errlen, WORTH_E_MISMATCH, "state was saved with other parameters");
    e->updates = ser_get_u64(&r);
    e->guarded = ser_get_u64(&r);
    e->td_last = ser_get_f64(&r);
    e->td_ms = ser_get_f64(&r);
    e->td_wsum = ser_get_f64(&r);
    e->r_max = 0.0; /* format 1: nothing diverged, no reward on record */
    e->diverged = WHY_NONE;
    e->diverged_at = 0;
    if (version >= 2) {
        e->r_max = ser_get_f64(&r);
        uint32_t why = ser_get_u32(&r);
        e->diverged_at = ser_get_u64(&r);
        if (why >= WHY_COUNT || !(e->r_max >= 0) || !isfinite(e->r_max))
            return err_fail(err, errlen, WORTH_E_CORRUPT, "state has a bad divergence record");
        e->diverged = (int)why;
    }
    ser_get_f64v(&r, e->w, e->nw);
    e->ops->load(e, &r, version);
    if (r.err || r.pos != r.len)
        return err_fail(err, errlen, WORTH_E_CORRUPT, "state has the wrong length for its kind");
    return 0;
}

int est_load(struct est *e, const uint8_t *buf, size_t len, char *err, size_t errlen)
{
    if (len < 40 + 4)
        return err_fail(err, errlen, WORTH_E_CORRUPT, "state too short (%zu bytes)", len);
    ser_r h = {buf, len, 0, 0};
    uint32_t magic = ser_get_u32(&h), version = ser_get_u32(&h), kind = ser_get_u32(&h);
    ser_get_u32(&h);
    uint64_t n = ser_get_u64(&h), nsrc = ser_get_u64(&h);
    if (magic != EST_MAGIC)
        return err_fail(err, errlen, WORTH_E_CORRUPT, "not an estimator state (bad magic)");
    ser_r t = {buf + len - 4, 4, 0, 0};
    if (ser_get_u32(&t) != ser_crc32(buf, len - 4))
        return err_fail(err, errlen, WORTH_E_CORRUPT, "estimator state fails its checksum");
    if (version < EST_FORMAT_OLDEST || version > EST_FORMAT_VERSION)
        return err_fail(err, errlen, WORTH_E_CORRUPT,
                        "state format version %u, this build reads %d to %d", version,
                        EST_FORMAT_OLDEST, EST_FORMAT_VERSION);
    if (kind != (uint32_t)e->p.kind)
        return err_fail(err, errlen, WORTH_E_MISMATCH, "state is of kind %s, estimator is %s",
                        kind < EST_KIND_COUNT ? kind_names[kind] : "?", kind_names[e->p.kind]);
    if (n != e->n || nsrc != e->nsrc)
        return err_fail(err, errlen, WORTH_E_MISMATCH,
                        "state has %llu features and %llu sources, estimator %zu and %zu",
                        (unsigned long long)n, (unsigned long long)nsrc, e->n, e->nsrc);

    /* Keep a copy of the current state so that a failure leaves e unchanged. */
    size_t blen = 0;
    est_save(e, NULL, 0, &blen);
    uint8_t *backup = mem_alloc(blen);
    CHECK(est_save(e, backup, blen, &blen) == 0);
    int rc = load_body(e, buf, len, err, errlen);
    if (rc) {
        est_reset(e);
        CHECK(load_body(e, backup, blen, NULL, 0) == 0);
    }
    mem_free(backup);
    return rc;
}

void est_put_opt(ser_w *w, const double *v, size_t n)
{
    ser_put_u32(w, v != NULL);
    if (v)
        ser_put_f64v(w, v, n);
}

void est_get_opt(ser_r *r, double **v, size_t n)
{
    uint32_t present = ser_get_u32(r);
    if (r->err)
        return;
    if (present > 1) {
        r->err = 1;
        return;
    }
    if (!present) {
        mem_free(*v);
        *v = NULL;
        return;
    }
    if (n * 8 > r->len - r->pos) { /* refuse before allocating for a lying length */
        r->err = 1;
        return;
    }
    if (!*v)
        *v = mem_alloc(n * sizeof **v);
    ser_get_f64v(r, *v, n);
}

void est_trace_step(struct est_trace *t, size_t n, double lambda, const double *phi,
                    const double *phin, double g, int terminal, double *d)
{
    if (!t->z)
        t->z = mem_calloc(n, sizeof *t->z);
    double gl = t->g_prev * lambda;
    for (size_t i = 0; i < n; i++)
        t->z[i] = gl * t->z[i] + phi[i];
    if (terminal)
        memcpy(d, phi, n * sizeof *d);
    else
        for (size_t i = 0; i < n; i++)
            d[i] = phi[i] - g * phin[i];
}

void est_trace_end(struct est_trace *t, size_t n, double g, int terminal)
{
    if (terminal) {
        memset(t->z, 0, n * sizeof *t->z);
        t->g_prev = 0.0;
    } else {
        t->g_prev = g;
    }
}

void est_traces_reset(struct est_trace *t, size_t nsrc)
{
    for (size_t i = 0; i < nsrc; i++) {
        mem_free(t[i].z);
        t[i].z = NULL;
        t[i].g_prev = 0.0;
    }
}

void est_traces_save(const struct est_trace *t, size_t nsrc, size_t n, ser_w *w)
{
    for (size_t i = 0; i < nsrc; i++) {
        est_put_opt(w, t[i].z, n);
        ser_put_f64(w, t[i].g_prev);
    }
}

void est_traces_load(struct est_trace *t, size_t nsrc, size_t n, ser_r *r)
{
    for (size_t i = 0; i < nsrc && !r->err; i++) {
        est_get_opt(r, &t[i].z, n);
        t[i].g_prev = ser_get_f64(r);
    }
}
