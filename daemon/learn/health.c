/*
 * health.c - each estimator's verdict and the headline (see health.h).
 *
 * Owns only the headline's choice: which estimator answers, the challenger
 * and how long it has led.  The verdicts themselves are recomputed from the
 * estimators' counters and the diagnostics' realised figures whenever asked,
 * so they cannot go stale and need no saving.  Runs on the model's learner
 * thread; allocates nothing after health_new.  The reason text is written
 * only when a verdict is asked for (publishing), never per transition.
 */
#include "learn/health.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "common/mem.h"

struct health {
    size_t n_est, n;
    est_params_t p[HEALTH_MAX_EST]; /* each estimator's parameters (copied) */
    int automatic;
    size_t fixed;
    size_t head;       /* the estimator that answers */
    size_t challenger; /* the estimator leading by the margin; n_est for none */
    uint64_t lead;     /* consecutive transitions it has led */
    uint64_t switches; /* times the headline moved */
    /* lstd: its guarded count as last seen, and its update count when that last grew (a
     * solve that fell back to least squares: near-singular), 0 for never. */
    uint64_t guard_seen[HEALTH_MAX_EST], guard_at[HEALTH_MAX_EST];
};

/* Why an estimator is where it is; the numbers a and b fill the text. */
enum reason {
    R_OK,
    R_DIVERGED,
    R_GUARD,
    R_SINGULAR,
    R_LSTD,
    R_REPLAY,
    R_RLS,
    R_RETURNS,
    R_RUNAWAY,
    R_WORSE,
};

typedef struct verdict_t {
    int state;
    enum reason why;
    double a, b;
    size_t best; /* R_WORSE: the best ready estimator */
} verdict_t;

struct health *health_new(size_t n_est, size_t n, int automatic, size_t fixed,
                          const est_params_t *p)
{
    struct health *h = mem_calloc(1, sizeof *h);
    CHECK(n_est >= 1 && n_est <= HEALTH_MAX_EST);
    memcpy(h->p, p, n_est * sizeof *p);
    h->n_est = n_est;
    h->n = n;
    h->automatic = automatic;
    h->fixed = fixed < n_est ? fixed : 0;
    health_reset(h);
    return h;
}

void health_free(struct health *h)
{
    mem_free(h);
}

void health_reset(struct health *h)
{
    h->head = h->fixed;
    h->challenger = h->n_est;
    h->lead = 0;
    h->switches = 0;
    memset(h->guard_seen, 0, sizeof h->guard_seen);
    memset(h->guard_at, 0, sizeof h->guard_at);
}

/* The verdict from the estimator's own data, before comparing it with the others. */
static verdict_t own(const struct health *h, size_t i, const est_stats_t *s, const diag_est_t *r)
{
    const est_params_t *p = &h->p[i];
    verdict_t v = {HEALTH_OK, R_OK, 0, 0, 0};
    est_stats_t st = *s;
    if (st.health == EST_HEALTH_DIVERGED)
        return (verdict_t){HEALTH_DIVERGED, R_DIVERGED, (double)st.diverged_at, 0, 0};
    if (st.health == EST_HEALTH_UNHEALTHY)
        return (verdict_t){HEALTH_UNHEALTHY, R_GUARD, (double)st.p_resets, 0, 0};
    if (p->kind == EST_LSTD && h->guard_at[i] &&
        st.updates - h->guard_at[i] < 2ull * p->refit_every)
        return (verdict_t){HEALTH_UNHEALTHY, R_SINGULAR, (double)h->guard_at[i], 0, 0};
    if (p->kind == EST_LSTD && st.refits == 0)
        return (verdict_t){HEALTH_WARMING, R_LSTD, (double)st.updates, p->refit_every, 0};
    if ((p->kind == EST_REPLAY || p->kind == EST_MLP || p->kind == EST_ENSEMBLE) && st.refits == 0)
        return (verdict_t){HEALTH_WARMING, R_REPLAY, 0, p->batch, 0};
    if (p->kind == EST_RLS_TD) {
        double need = 3.0 * (double)h->n;
        if (p->forget < 1.0 && 3.0 / (1.0 - p->forget) > need)
            need = ceil(3.0 / (1.0 - p->forget));
        if ((double)st.updates < need)
            return (verdict_t){HEALTH_WARMING, R_RLS, (double)st.updates, need, 0};
    }
    if (r->n < HEALTH_MIN_RETURNS)
        return (verdict_t){HEALTH_WARMING, R_RETURNS, (double)r->n, HEALTH_MIN_RETURNS, 0};
    return v;
}

/* Every estimator's verdict into v (n_est of them), the comparison with the best included;
 * r gets their realised errors (diag_est), when not NULL. */
static void judge(const struct health *h, const est_stats_t *st, const struct diag *d, verdict_t *v,
                  diag_est_t *r_out)
{
    diag_est_t mine[HEALTH_MAX_EST], *r = r_out ? r_out : mine;
    size_t best = h->n_est;
    for (size_t i = 0; i < h->n_est; i++) {
        diag_est(d, i, &r[i]);
        v[i] = own(h, i, &st[i], &r[i]);
        if (v[i].state == HEALTH_OK && (best == h->n_est || r[i].rms_window < r[best].rms_window))
            best = i;
    }
    double ret = diag_returns_rms(d);
    for (size_t i = 0; i < h->n_est; i++) {
        if (v[i].state != HEALTH_OK)
            continue;
        double x = r[i].rms_window;
        if (ret > 0 && x > HEALTH_RUNAWAY * ret) {
            v[i] = (verdict_t){HEALTH_UNHEALTHY, R_RUNAWAY, x, ret, 0};
            continue;
        }
        double b = r[best].rms_window;
        if (i != best && x > HEALTH_WORSE * b && x - b > HEALTH_FLOOR * ret)
            v[i] = (verdict_t){HEALTH_UNHEALTHY, R_WORSE, x, b, best};
    }
}

/* Returns 1 when the estimator's weights are an estimate (not still its initial ones). */
static int has_estimate(const verdict_t *v)
{
    return !(v->why == R_LSTD || v->why == R_REPLAY || v->why == R_DIVERGED);
}

void health_update(struct health *h, const est_stats_t *st, const struct diag *d)
{
    for (size_t i = 0; i < h->n_est; i++)
        if (h->p[i].kind == EST_LSTD && st[i].guarded > h->guard_seen[i]) {
            h->guard_seen[i] = st[i].guarded;
            h->guard_at[i] = st[i].updates;
        }
    if (!h->automatic)
        return;
    verdict_t v[HEALTH_MAX_EST];
    diag_est_t r[HEALTH_MAX_EST]; /* once per transition: judge's, not computed again */
    judge(h, st, d, v, r);
    size_t best = h->n_est;
    for (size_t i = 0; i < h->n_est; i++)
        if (v[i].state == HEALTH_OK && (best == h->n_est || r[i].rms_window < r[best].rms_window))
            best = i;
    if (best == h->n_est) { /* none is ok: stay, unless it has no estimate and another has */
        h->challenger = h->n_est;
        h->lead = 0;
        if (has_estimate(&v[h->head]))
            return;
        for (size_t i = 0; i < h->n_est; i++)
            if (has_estimate(&v[i])) {
                h->head = i;
                h->switches++;
                return;
            }
        return;
    }
    if (v[h->head].state != HEALTH_OK) { /* the headline lost its standing: move at once */
        h->head = best;
        h->switches++;
        h->challenger = h->n_est;
        h->lead = 0;
        return;
    }
    if (best == h->head || !(r[best].rms_window < (1.0 - HEALTH_MARGIN) * r[h->head].rms_window)) {
        h->challenger = h->n_est;
        h->lead = 0;
        return;
    }
    if (best != h->challenger) {
        h->challenger = best;
        h->lead = 0;
    }
    if (++h->lead >= HEALTH_HOLD) {
        h->head = best;
        h->switches++;
        h->challenger = h->n_est;
        h->lead = 0;
    }
}

void health_seen(struct health *h, const est_stats_t *st)
{
    for (size_t i = 0; i < h->n_est; i++)
        h->guard_seen[i] = st[i].guarded;
}

size_t health_headline(const struct health *h)
{
    return h->head;
}

int health_automatic(const struct health *h)
{
    return h->automatic;
}

const char *health_state_name(int state)
{
    static const char *const names[] = {"warming", "ok", "unhealthy", "diverged"};
    return state >= 0 && state <= HEALTH_DIVERGED ? names[state] : "?";
}

void health_est(const struct health *h, size_t i, const est_stats_t *st, const struct diag *d,
                const char *const *names, health_est_t *out)
{
    verdict_t v[HEALTH_MAX_EST];
    judge(h, st, d, v, NULL);
    const verdict_t *x = &v[i];
    out->state = x->state;
    out->estimate = has_estimate(x);
    char *w = out->why;
    size_t n = sizeof out->why;
    switch (x->why) {
    case R_OK:
        w[0] = 0;
        break;
    case R_DIVERGED:
        snprintf(w, n, "diverged at update %.0f; it learns nothing until rolled back", x->a);
        break;
    case R_GUARD:
        snprintf(w, n,
                 "its covariance was reset recently (%.0f resets): the data do not excite "
                 "every feature",
                 x->a);
        break;
    case R_SINGULAR:
        snprintf(w, n,
                 "its solve at update %.0f was near-singular (reciprocal condition number "
                 "below 1e-13): the data do not determine every weight",
                 x->a);
        break;
    case R_LSTD:
        snprintf(w, n, "no solve yet: %.0f transitions, the first solve comes at %.0f", x->a, x->b);
        break;
    case R_REPLAY:
        snprintf(w, n, "no mini-batch step yet: its buffer holds fewer than a batch (%.0f)", x->b);
        break;
    case R_RLS:
        snprintf(w, n,
                 "its prior has not washed out: %.0f of %.0f updates (3 x features, "
                 "3 / (1 - forget))",
                 x->a, x->b);
        break;
    case R_RETURNS:
        snprintf(w, n, "%.0f of %.0f realised returns needed to judge it", x->a, x->b);
        break;
    case R_RUNAWAY:
        snprintf(w, n,
                 "realised-return RMS %.3g is over %.0f x the returns' own RMS %.3g: its "
                 "weights are running away",
                 x->a, HEALTH_RUNAWAY, x->b);
        break;
    case R_WORSE:
        snprintf(w, n,
                 "realised-return RMS %.3g over the window is %.1f x that of %s (%.3g), the "
                 "best; the limit is %.0f x",
                 x->a, x->b > 0 ? x->a / x->b : INFINITY, names[x->best], x->b, HEALTH_WORSE);
        break;
    }
}

void health_head(const struct health *h, const est_stats_t *st, const struct diag *d,
                 const char *const *names, health_head_t *out)
{
    verdict_t v[HEALTH_MAX_EST];
    judge(h, st, d, v, NULL);
    out->index = h->head;
    out->automatic = h->automatic;
    out->switches = h->switches;
    diag_est_t r;
    diag_est(d, h->head, &r);
    const char *nm = names[h->head];
    if (!h->automatic)
        snprintf(out->why, sizeof out->why, "the model's spec names %s as primary (%s)", nm,
                 health_state_name(v[h->head].state));
    else if (v[h->head].state != HEALTH_OK)
        snprintf(out->why, sizeof out->why,
                 "auto: no estimator is ok yet; %s answers until one is (%s)", nm,
                 health_state_name(v[h->head].state));
    else
        snprintf(out->why, sizeof out->why,
                 "auto: ok, windowed realised-return RMS %.3g, the lowest when chosen; it "
                 "answers until another ok estimator is %.0f%% lower for %d transitions running",
                 r.rms_window, 100 * HEALTH_MARGIN, HEALTH_HOLD);
}

void health_save(const struct health *h, ser_w *w)
{
    ser_put_u64(w, h->head);
    ser_put_u64(w, h->challenger);
    ser_put_u64(w, h->lead);
    ser_put_u64(w, h->switches);
    for (size_t i = 0; i < h->n_est; i++) {
        ser_put_u64(w, h->guard_seen[i]);
        ser_put_u64(w, h->guard_at[i]);
    }
}

int health_load(struct health *h, ser_r *r)
{
    uint64_t head = ser_get_u64(r), ch = ser_get_u64(r), lead = ser_get_u64(r);
    uint64_t sw = ser_get_u64(r);
    if (r->err || head >= h->n_est || ch > h->n_est) {
        r->err = 1;
        return -1;
    }
    h->head = (size_t)head;
    h->challenger = (size_t)ch;
    h->lead = lead;
    h->switches = sw;
    for (size_t i = 0; i < h->n_est; i++) {
        h->guard_seen[i] = ser_get_u64(r);
        h->guard_at[i] = ser_get_u64(r);
    }
    return r->err ? -1 : 0;
}
