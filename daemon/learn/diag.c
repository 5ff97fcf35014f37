/*
 * diag.c - realised-return checks, and the home of the drift alarm (see diag.h).
 *
 * Owns, per source, a ring of the steps whose return is not yet known: each
 * estimator's prediction, the reward and the discount.  A continuing return
 * is complete after `horizon` rewards; a terminal transition completes all of
 * its source's pending returns.  The ring grows by doubling up to the
 * horizon, so after warm-up nothing is allocated.  Learner thread only.
 *
 * A truncated return over the window of the last `horizon` steps is the
 * composition of the steps' affine maps G -> r + g G, applied to 0.  It is
 * kept in O(1) amortised per transition with the two-stack queue: the
 * oldest `front` entries carry their suffix composition up to the front's
 * end (computed backwards in one pass when the front runs empty), and the
 * newer entries are folded forwards into one running composition (bR, bG).
 * The window's return is then sR + sG * bR.  Both parts are pure functions
 * of the ring's contents and `front`, so a saved ring with its `front`
 * count reloads to the same bits.
 *
 * A diverged estimator (NAN prediction) must not poison the figures: it is
 * left out of the spread, its realised figures freeze (a return completed
 * while it is out is not scored for it; divergence lasts until the model is
 * reset or loaded, which resets or loads these diagnostics too), its ring
 * slot holds 0 so that no NaN is saved, and a NAN TD error (a diverged
 * primary) leaves the drift test where it was.
 */
#include "learn/diag.h"

#include <math.h>
#include <string.h>

#include "common/fail.h"
#include "common/mem.h"
#include "worth/errors.h"

/* Longest horizon, also for gamma = 1 where the auto rule never stops. */
#define MAX_HORIZON 100000u

struct ring {
    size_t head, count, cap;
    size_t front;  /* the oldest entries, whose suffix compositions are valid */
    double bR, bG; /* composition of the entries after the front, oldest first */
    double *e; /* cap entries of stride: n_est predictions, n_est sds, r, g, suffix r, suffix g */
};

struct stat {
    uint64_t n;
    double sum, sumsq;     /* over the run */
    double ew, ewsq, ew_w; /* exponentially weighted, for the window */
    /* Coverage (all exponentially weighted like ew): hits of V +- 1 and 2 own sd over sd_w
     * returns that had one; hits of V +- 2 RMS and of the 95% interval over cw returns. */
    double sd1, sd2, sd_w, rms2, in95, cw;
    /* |V - G| / (windowed RMS before it), binned, exponentially weighted without touching
     * every bin per return: each return adds hs, which grows by 1/keep per return, and the
     * true weights are the stored ones / hs (rescaled to hs = 1 before it grows large). */
    double hist[DIAG_BINS];
    double hw, hs; /* stored total weight; the scale (hs 0 before the first return) */
};

/* The alarm as the model reports it (diag_drift): the followed detector's view. */
struct alarm {
    uint64_t alarms, clears, last_alarm, last_onset, last_clear;
    int active, side;
};

struct diag {
    diag_params_t p;
    size_t n_est, nsrc, stride; /* stride: 2 n_est + 4; 2 n_est + 2 of them saved */
    size_t ri;                  /* offset of r in an entry: 2 n_est */
    unsigned horizon;
    double keep; /* 1 - 1/window */
    struct ring *q;
    struct stat *st;
    double spread_ew, spread_w;
    double ret_ewsq, ret_w; /* the realised returns' own mean square, over the window */
    uint64_t step;          /* transitions seen */
    /* One drift detector per estimator, each on its own TD error; the alarm follows one of
     * them (the headline's), `at`, and keeps its own counters so that a change of headline
     * raises or clears it as the new headline's detector says. */
    struct drift **drift;
    size_t at, home; /* the detector followed; the one followed after a reset */
    struct alarm al;
};

void diag_params_default(double gamma, diag_params_t *p)
{
    memset(p, 0, sizeof *p);
    p->gamma = gamma;
    p->horizon = 0;
    p->window = 1000;
    drift_params_default(&p->drift);
}

static unsigned auto_horizon(double gamma)
{
    if (!(gamma < 1.0))
        return MAX_HORIZON;
    if (gamma <= 0.0)
        return 1;
    double h = ceil(log(1e-3) / log(gamma));
    return h > MAX_HORIZON ? MAX_HORIZON : (unsigned)(h < 1 ? 1 : h);
}

double diag_footprint(const diag_params_t *p, size_t n_est, size_t sources)
{
    double h = p->horizon ? (double)p->horizon : (double)auto_horizon(p->gamma);
    return (double)sources * h * (double)(2 * n_est + 2) * sizeof(double);
}

int diag_new(const diag_params_t *p, size_t n_est, size_t sources, struct diag **out, char *err,
             size_t errlen)
{
    if (p->horizon > MAX_HORIZON)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "diagnostics horizon must be 0..%u",
                        MAX_HORIZON);
    if (p->window < 1)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "diagnostics window must be >= 1");
    if (n_est < 1 || n_est > DIAG_MAX_EST) /* diag_observe's TD errors are on the stack */
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "diagnostics take 1..%d estimators",
                        DIAG_MAX_EST);
    int rc = drift_check(&p->drift, err, errlen);
    if (rc)
        return rc;
    struct diag *d = mem_calloc(1, sizeof *d);
    d->p = *p;
    d->n_est = n_est;
    d->nsrc = sources;
    d->stride = 2 * n_est + 4;
    d->ri = 2 * n_est;
    d->horizon = p->horizon ? p->horizon : auto_horizon(p->gamma);
    d->keep = 1.0 - 1.0 / p->window;
    d->q = mem_calloc(sources, sizeof *d->q);
    d->st = mem_calloc(n_est, sizeof *d->st);
    d->drift = mem_calloc(n_est, sizeof *d->drift);
    for (size_t k = 0; k < n_est; k++)
        d->drift[k] = drift_new(&p->drift);
    *out = d;
    diag_reset(d);
    return 0;
}

void diag_reset(struct diag *d)
{
    for (size_t s = 0; s < d->nsrc; s++) {
        mem_free(d->q[s].e);
        memset(&d->q[s], 0, sizeof d->q[s]);
        d->q[s].bG = 1.0;
    }
    memset(d->st, 0, d->n_est * sizeof *d->st);
    d->spread_ew = d->spread_w = 0;
    d->ret_ewsq = d->ret_w = 0;
    d->step = 0;
    for (size_t k = 0; k < d->n_est; k++)
        drift_reset(d->drift[k]);
    d->at = d->home;
    memset(&d->al, 0, sizeof d->al);
}

void diag_drift_home(struct diag *d, size_t i)
{
    if (i < d->n_est)
        d->home = d->at = i;
}

void diag_free(struct diag *d)
{
    if (!d)
        return;
    for (size_t s = 0; s < d->nsrc; s++)
        mem_free(d->q[s].e);
    mem_free(d->q);
    mem_free(d->st);
    for (size_t k = 0; k < d->n_est; k++)
        drift_free(d->drift[k]);
    mem_free(d->drift);
    mem_free(d);
}

/* Entry i of ring q, oldest first. */
static double *entry(const struct diag *d, const struct ring *q, size_t i)
{
    return q->e + ((q->head + i) % q->cap) * d->stride;
}

static void grow(struct diag *d, struct ring *q)
{
    size_t cap = q->cap ? 2 * q->cap : 64;
    if (cap > d->horizon)
        cap = d->horizon;
    double *e = mem_alloc(cap * d->stride * sizeof *e);
    for (size_t i = 0; i < q->count; i++)
        memcpy(e + i * d->stride, entry(d, q, i), d->stride * sizeof *e);
    mem_free(q->e);
    q->e = e;
    q->cap = cap;
    q->head = 0;
}

/* Folds entry i (the newest after the front) into the back composition. */
static void fold_back(const struct diag *d, struct ring *q, size_t i)
{
    const double *x = entry(d, q, i);
    q->bR += q->bG * x[d->ri];
    q->bG *= x[d->ri + 1];
}

/* Makes the first `front` entries the front (their suffix compositions, newest
 * first) and empties the back; the caller folds any later entries into it. */
static void build_front(const struct diag *d, struct ring *q, size_t front)
{
    q->bR = 0.0;
    q->bG = 1.0;
    double R = 0.0, G = 1.0;
    for (size_t i = front; i-- > 0;) {
        double *x = entry(d, q, i);
        R = x[d->ri] + x[d->ri + 1] * R;
        G = x[d->ri + 1] * G;
        x[d->ri + 2] = R;
        x[d->ri + 3] = G;
    }
    q->front = front;
}

/* Returns the 95% quantile of s's binned |z|, NAN before DIAG_MIN_WEIGHT returns. */
static double q95(const struct stat *s)
{
    if (!(s->hs > 0) || s->hw / s->hs < DIAG_MIN_WEIGHT)
        return NAN;
    double want = 0.95 * s->hw, c = 0.0;
    for (size_t b = 0; b < DIAG_BINS; b++) {
        if (c + s->hist[b] >= want && s->hist[b] > 0)
            return (b + (want - c) / s->hist[b]) * DIAG_BIN_WIDTH;
        c += s->hist[b];
    }
    return DIAG_BINS * DIAG_BIN_WIDTH; /* XXX: rounding only; the last bin holds the tail */
}

/*
 * Coverage of return G by prediction v: its own sd at the time (sd, NAN or < 0 for
 * none) and the interval from the realised errors as they stood before this return
 * (out of sample), then the error joins the histogram in units of the windowed RMS.
 */
static void cover(struct diag *d, struct stat *s, double err, double sd)
{
    double a = fabs(err), k = d->keep;
    if (isfinite(sd) && sd > 0) {
        s->sd1 = k * s->sd1 + (a <= sd);
        s->sd2 = k * s->sd2 + (a <= 2 * sd);
        s->sd_w = k * s->sd_w + 1.0;
    }
    double rms = s->ew_w > 0 ? sqrt(s->ewsq / s->ew_w) : 0.0;
    if (!(rms > 0))
        return;
    double q = q95(s);
    if (!isnan(q)) {
        s->rms2 = k * s->rms2 + (a <= 2 * rms);
        s->in95 = k * s->in95 + (a <= q * rms);
        s->cw = k * s->cw + 1.0;
    }
    double z = a / rms / DIAG_BIN_WIDTH;
    size_t b = z < DIAG_BINS - 1 ? (size_t)z : DIAG_BINS - 1;
    if (!(k > 0)) { /* a window of 1: only this return counts */
        memset(s->hist, 0, sizeof s->hist);
        s->hw = s->hs = 0.0;
    }
    s->hs = s->hs > 0 ? s->hs / k : 1.0;
    s->hist[b] += s->hs;
    s->hw += s->hs;
    if (s->hs > 1e100) { /* rare: once in some 230 windows */
        for (size_t i = 0; i < DIAG_BINS; i++)
            s->hist[i] /= s->hs;
        s->hw /= s->hs;
        s->hs = 1.0;
    }
}

/* Scores the predictions of entry e against its realised return G, for the estimators
 * still in (a number in pred, the predictions of the current transition). */
static void score(struct diag *d, const double *e, double G, const double *pred)
{
    d->ret_ewsq = d->keep * d->ret_ewsq + G * G;
    d->ret_w = d->keep * d->ret_w + 1.0;
    for (size_t k = 0; k < d->n_est; k++) {
        if (isnan(pred[k]))
            continue;
        struct stat *s = &d->st[k];
        double err = e[k] - G;
        cover(d, s, err, e[d->n_est + k]);
        s->n++;
        s->sum += err;
        s->sumsq += err * err;
        s->ew = d->keep * s->ew + err;
        s->ewsq = d->keep * s->ewsq + err * err;
        s->ew_w = d->keep * s->ew_w + 1.0;
    }
}

int diag_observe(struct diag *d, size_t src, const double *pred, double r, double g, int terminal,
                 double td)
{
    double tds[DIAG_MAX_EST];
    for (size_t k = 0; k < d->n_est; k++)
        tds[k] = k == d->at ? td : NAN;
    return diag_observe_sd(d, src, pred, NULL, r, g, terminal, tds, d->at);
}

/* Every detector takes its estimator's TD error; the alarm then follows detector `head`: it is
 * raised when that one is active and the alarm is not, cleared in the opposite case (whether
 * the detector changed state or the headline changed detector).  Returns 1 raised, 2 cleared. */
static int follow(struct diag *d, const double *td, size_t head)
{
    for (size_t k = 0; td && k < d->n_est; k++)
        drift_observe(d->drift[k], d->step, td[k]);
    if (head < d->n_est)
        d->at = head;
    diag_drift_t now;
    drift_get(d->drift[d->at], &now);
    struct alarm *a = &d->al;
    if (now.active && !a->active) {
        a->active = 1;
        a->side = now.side;
        a->alarms++;
        a->last_alarm = d->step;
        a->last_onset = now.last_onset;
        return 1;
    }
    if (!now.active && a->active) {
        a->active = 0;
        a->clears++;
        a->last_clear = d->step;
        return 2;
    }
    return 0;
}

int diag_observe_sd(struct diag *d, size_t src, const double *pred, const double *sd, double r,
                    double g, int terminal, const double *td, size_t head)
{
    d->step++;
    double lo = INFINITY, hi = -INFINITY;
    size_t in = 0;
    for (size_t k = 0; k < d->n_est; k++) {
        if (isnan(pred[k]))
            continue;
        lo = fmin(lo, pred[k]);
        hi = fmax(hi, pred[k]);
        in++;
    }
    if (in) {
        d->spread_ew = d->keep * d->spread_ew + (hi - lo);
        d->spread_w = d->keep * d->spread_w + 1.0;
    }

    struct ring *q = &d->q[src];
    if (q->count == q->cap)
        grow(d, q);
    double *e = q->e + ((q->head + q->count) % q->cap) * d->stride;
    for (size_t k = 0; k < d->n_est; k++) {
        e[k] = isnan(pred[k]) ? 0.0 : pred[k];
        /* -1 marks "no sd": nothing non-finite goes into the saved ring. */
        e[d->n_est + k] = sd && isfinite(sd[k]) && sd[k] >= 0 ? sd[k] : -1.0;
    }
    e[d->ri] = r;
    e[d->ri + 1] = g;
    q->count++;
    fold_back(d, q, q->count - 1);

    if (terminal) {
        /* Every pending return is complete: walk back once, then score oldest first. */
        double G = 0;
        for (size_t i = q->count; i-- > 0;) {
            double *x = entry(d, q, i);
            G = x[d->ri] + x[d->ri + 1] * G;
            x[d->ri] = G; /* the reward slot now holds the return */
        }
        for (size_t i = 0; i < q->count; i++) {
            double *x = entry(d, q, i);
            score(d, x, x[d->ri], pred);
        }
        q->head = q->count = 0;
        build_front(d, q, 0);
    } else if (q->count == d->horizon) {
        /* The window is full: score its oldest entry, then drop it from the front. */
        if (q->front == 0)
            build_front(d, q, q->count);
        const double *x = entry(d, q, 0);
        score(d, x, x[d->ri + 2] + x[d->ri + 3] * q->bR, pred);
        q->head = (q->head + 1) % q->cap;
        q->count--;
        q->front--;
    }
    return follow(d, td, head);
}

const diag_params_t *diag_params(const struct diag *d)
{
    return &d->p;
}

unsigned diag_horizon(const struct diag *d)
{
    return d->horizon;
}

void diag_est(const struct diag *d, size_t i, diag_est_t *out)
{
    const struct stat *s = &d->st[i];
    memset(out, 0, sizeof *out);
    out->n = s->n;
    if (s->n) {
        out->bias = s->sum / (double)s->n;
        out->rms = sqrt(s->sumsq / (double)s->n);
    }
    if (s->ew_w > 0) {
        out->bias_window = s->ew / s->ew_w;
        out->rms_window = sqrt(s->ewsq / s->ew_w);
    }
    out->sd_n = s->sd_w;
    out->cover_sd1 = s->sd_w > 0 ? s->sd1 / s->sd_w : NAN;
    out->cover_sd2 = s->sd_w > 0 ? s->sd2 / s->sd_w : NAN;
    out->cover_n = s->cw;
    out->cover_rms2 = s->cw > 0 ? s->rms2 / s->cw : NAN;
    out->cover_95 = s->cw > 0 ? s->in95 / s->cw : NAN;
    out->k95 = q95(s);
    out->half95 = isnan(out->k95) ? NAN : out->k95 * out->rms_window;
}

double diag_returns_rms(const struct diag *d)
{
    return d->ret_w > 0 ? sqrt(d->ret_ewsq / d->ret_w) : 0.0;
}

void diag_drift(const struct diag *d, diag_drift_t *out)
{
    drift_get(d->drift[d->at], out);
    const struct alarm *a = &d->al;
    out->alarms = a->alarms;
    out->clears = a->clears;
    out->last_alarm = a->last_alarm;
    out->last_onset = a->last_onset;
    out->last_clear = a->last_clear;
    out->active = a->active;
    out->side = a->side;
}

void diag_drift_est(const struct diag *d, size_t i, diag_drift_t *out)
{
    drift_get(d->drift[i < d->n_est ? i : d->at], out);
}

size_t diag_drift_followed(const struct diag *d)
{
    return d->at;
}

double diag_spread(const struct diag *d)
{
    return d->spread_w > 0 ? d->spread_ew / d->spread_w : 0.0;
}

void diag_save(const struct diag *d, ser_w *w)
{
    ser_put_u64(w, d->step);
    for (size_t s = 0; s < d->nsrc; s++) {
        const struct ring *q = &d->q[s];
        ser_put_u64(w, q->count);
        ser_put_u64(w, q->front);
        for (size_t i = 0; i < q->count; i++)
            ser_put_f64v(w, entry(d, q, i), d->ri + 2);
    }
    for (size_t k = 0; k < d->n_est; k++) {
        const struct stat *s = &d->st[k];
        ser_put_u64(w, s->n);
        ser_put_f64(w, s->sum);
        ser_put_f64(w, s->sumsq);
        ser_put_f64(w, s->ew);
        ser_put_f64(w, s->ewsq);
        ser_put_f64(w, s->ew_w);
    }
    ser_put_f64(w, d->spread_ew);
    ser_put_f64(w, d->spread_w);
    drift_save(d->drift[0], w);
    /* Format 3: coverage and the error histogram. */
    for (size_t k = 0; k < d->n_est; k++) {
        const struct stat *s = &d->st[k];
        double c[6] = {s->sd1, s->sd2, s->sd_w, s->rms2, s->in95, s->cw};
        ser_put_f64v(w, c, 6);
        ser_put_f64v(w, s->hist, DIAG_BINS);
        ser_put_f64(w, s->hw);
        ser_put_f64(w, s->hs);
    }
    ser_put_f64(w, d->ret_ewsq);
    ser_put_f64(w, d->ret_w);
    /* Format 4: the other estimators' detectors, the one followed and the alarm's counters. */
    for (size_t k = 1; k < d->n_est; k++)
        drift_save(d->drift[k], w);
    const struct alarm *a = &d->al;
    uint64_t v[8] = {d->at,         a->alarms,     a->clears,           a->last_alarm,
                     a->last_onset, a->last_clear, (uint64_t)a->active, (uint64_t)(a->side + 1)};
    for (size_t i = 0; i < 8; i++)
        ser_put_u64(w, v[i]);
}

/* Formats 1-3 kept one detector, the primary's: it was read into slot 0; it belongs to the
 * home slot, the others start again, and the alarm takes its counters. */
static int old_drift(struct diag *d, ser_r *r)
{
    struct drift *t = d->drift[0];
    d->drift[0] = d->drift[d->home];
    d->drift[d->home] = t;
    d->at = d->home;
    diag_drift_t o;
    drift_get(t, &o);
    d->al = (struct alarm){o.alarms,     o.clears, o.last_alarm, o.last_onset,
                           o.last_clear, o.active, o.side};
    return r->err ? -1 : 0;
}

int diag_load(struct diag *d, ser_r *r, unsigned version)
{
    diag_reset(d);
    d->step = ser_get_u64(r);
    for (size_t s = 0; s < d->nsrc && !r->err; s++) {
        struct ring *q = &d->q[s];
        uint64_t count = ser_get_u64(r);
        /* Format 1 kept no front: every entry is then folded into the back. */
        uint64_t front = version >= 2 ? ser_get_u64(r) : 0;
        if (r->err)
            break;
        if (count == 0 && front == 0)
            continue;
        /* A count that cannot be right is refused before anything is allocated. */
        /* Formats 1 and 2 kept no sd: an entry was n_est + 2 doubles. */
        size_t saved = version >= 3 ? d->ri + 2 : d->n_est + 2;
        if (count >= d->horizon || front > count ||
            count > (r->len - r->pos) / (saved * sizeof(double))) {
            r->err = 1;
            break;
        }
        while (q->cap < count)
            grow(d, q);
        for (size_t i = 0; i < count; i++) {
            double *x = q->e + i * d->stride;
            if (version >= 3) {
                ser_get_f64v(r, x, saved);
                continue;
            }
            ser_get_f64v(r, x, d->n_est);
            for (size_t k = 0; k < d->n_est; k++)
                x[d->n_est + k] = -1.0;
            ser_get_f64v(r, x + d->ri, 2);
        }
        q->count = count;
        build_front(d, q, (size_t)front);
        for (size_t i = (size_t)front; i < count; i++)
            fold_back(d, q, i);
    }
    for (size_t k = 0; k < d->n_est && !r->err; k++) {
        struct stat *s = &d->st[k];
        s->n = ser_get_u64(r);
        s->sum = ser_get_f64(r);
        s->sumsq = ser_get_f64(r);
        s->ew = ser_get_f64(r);
        s->ewsq = ser_get_f64(r);
        s->ew_w = ser_get_f64(r);
    }
    d->spread_ew = ser_get_f64(r);
    d->spread_w = ser_get_f64(r);
    if (drift_load(d->drift[0], r, version))
        return -1;
    for (size_t k = 0; version >= 3 && k < d->n_est && !r->err; k++) {
        struct stat *s = &d->st[k];
        double c[6];
        ser_get_f64v(r, c, 6);
        s->sd1 = c[0], s->sd2 = c[1], s->sd_w = c[2], s->rms2 = c[3], s->in95 = c[4], s->cw = c[5];
        ser_get_f64v(r, s->hist, DIAG_BINS);
        s->hw = ser_get_f64(r);
        s->hs = ser_get_f64(r);
    }
    if (version >= 3) {
        d->ret_ewsq = ser_get_f64(r);
        d->ret_w = ser_get_f64(r);
    }
    if (version < 4)
        return old_drift(d, r);
    for (size_t k = 1; k < d->n_est && !r->err; k++)
        if (drift_load(d->drift[k], r, version))
            return -1;
    uint64_t v[8];
    for (size_t i = 0; i < 8; i++)
        v[i] = ser_get_u64(r);
    struct alarm *a = &d->al;
    if (v[0] >= d->n_est || v[7] > 2)
        r->err = 1;
    d->at = r->err ? d->home : (size_t)v[0];
    a->alarms = v[1], a->clears = v[2], a->last_alarm = v[3], a->last_onset = v[4];
    a->last_clear = v[5], a->active = v[6] != 0, a->side = r->err ? 0 : (int)v[7] - 1;
    return r->err ? -1 : 0;
}
