/*
 * drift.c - the CUSUM drift alarm on one estimator's TD error (see drift.h).
 *
 * Owns only scalars: the batch being filled, the running reference (mean,
 * winsorised variance, lag-1 covariance of the batch means), the two sums
 * and the step of each one's last zero, and the alarm's state.  Learner
 * thread only; nothing is allocated after drift_new.  A NAN TD error (a
 * diverged primary) leaves the test where it was.
 *
 * Why batch means and a long-run variance: the TD errors of a plant are
 * autocorrelated (the state moves slowly, the estimator's error at one
 * state is much like its error at the next), and a CUSUM fed positively
 * correlated increments as if they were independent alarms far more often
 * than its ARL says.  Averaging `batch` errors removes most of the short
 * correlation; the lag-1 factor (1 + rho) / (1 - rho) scales what is left,
 * the long-run variance of an AR(1) series.  tests/unit/test_drift.c holds
 * the measured false-alarm rate to the stated one, within a factor of 2,
 * for independent errors and for errors with lag-1 correlation 0.6.
 */
#include "learn/drift.h"

#include <math.h>
#include <string.h>

#include "common/fail.h"
#include "common/mem.h"
#include "worth/errors.h"

/* Siegmund's correction of the threshold for the overshoot (drift.h). */
#define OVERSHOOT 1.166
/* Winsorising: a batch mean further than this many sd from the reference counts as this far. */
#define CLIP_SD 4.0
/* Largest lag-1 autocorrelation of batch means the long-run factor believes. */
#define RHO_MAX 0.8

struct drift {
    drift_params_t p;
    double h; /* the threshold, from p.arl0 */
    uint64_t step;
    /* the batch being filled */
    unsigned nb;
    double bsum;
    /* the reference */
    uint64_t nref; /* batch means it has taken */
    double mu, var, cov, prev_dev;
    /* the sums */
    double up, dn;
    uint64_t up_zero, dn_zero; /* the step of the last batch after which each was 0 */
    /* alarms */
    int active, side;
    uint64_t alarms, clears, last_alarm, last_onset, last_clear;
};

void drift_params_default(drift_params_t *p)
{
    memset(p, 0, sizeof *p);
    p->arl0 = 1e6;
    p->k = 0.5;
    p->batch = 10;
    p->burn_in = 1000;
}

double drift_arl1(double h, double k, double mu)
{
    double D = mu - k, b = h + OVERSHOOT;
    if (fabs(D) < 1e-9)
        return b * b;
    return (exp(-2.0 * D * b) + 2.0 * D * b - 1.0) / (2.0 * D * D);
}

double drift_arl(double h, double k)
{
    return drift_arl1(h, k, 0.0) / 2.0;
}

double drift_threshold(double arl, double k)
{
    /* drift_arl grows with h; it is below 1 at h = -OVERSHOOT + tiny, and huge at h = 200. */
    double lo = 0.0, hi = 200.0;
    if (drift_arl(lo, k) >= arl)
        return lo;
    for (int i = 0; i < 200 && hi - lo > 1e-12; i++) {
        double mid = 0.5 * (lo + hi);
        if (drift_arl(mid, k) < arl)
            lo = mid;
        else
            hi = mid;
    }
    return 0.5 * (lo + hi);
}

int drift_check(const drift_params_t *p, char *err, size_t errlen)
{
    if (p->batch < 1 || p->batch > 10000)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "drift batch must be 1..10000");
    if (!(p->k > 0 && p->k <= 3))
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "drift k must be in (0, 3]");
    if (p->burn_in < (uint64_t)DRIFT_MIN_BATCHES * p->batch)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                        "drift burn_in must be at least %d batches (%u transitions)",
                        DRIFT_MIN_BATCHES, DRIFT_MIN_BATCHES * p->batch);
    if (!(p->arl0 >= (double)DRIFT_MIN_BATCHES * p->batch) || !isfinite(p->arl0) || p->arl0 > 1e15)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                        "the stated false-alarm interval must be %u..1e15 transitions (it is %g)",
                        DRIFT_MIN_BATCHES * p->batch, p->arl0);
    /* Drift_threshold needs at least an ARL of h = 0; at k <= 3 that is below 10 batches. */
    return 0;
}

struct drift *drift_new(const drift_params_t *p)
{
    struct drift *d = mem_calloc(1, sizeof *d);
    d->p = *p;
    d->h = drift_threshold(p->arl0 / p->batch, p->k);
    drift_reset(d);
    return d;
}

void drift_free(struct drift *d)
{
    mem_free(d);
}

/* The sums start again from zero after the current step. */
static void restart_sums(struct drift *d)
{
    d->up = d->dn = 0;
    d->up_zero = d->dn_zero = d->step;
}

void drift_reset(struct drift *d)
{
    d->step = 0;
    d->nb = 0;
    d->bsum = 0;
    d->nref = 0;
    d->mu = d->var = d->cov = d->prev_dev = 0;
    d->active = d->side = 0;
    d->alarms = d->clears = d->last_alarm = d->last_onset = d->last_clear = 0;
    restart_sums(d);
}

static int armed(const struct drift *d)
{
    return d->nref >= d->p.burn_in / d->p.batch;
}

/* The reference takes batch mean m: a plain average during the burn-in, then exponential. */
static void learn_reference(struct drift *d, double m)
{
    double n = (double)(d->nref < DRIFT_REF_BATCHES ? d->nref + 1 : DRIFT_REF_BATCHES);
    double w = 1.0 / n;
    double dev = m - d->mu;
    if (d->nref >= 2) { /* winsorised: a wild batch counts as CLIP_SD sd away */
        double lim = CLIP_SD * sqrt(d->var);
        dev = dev > lim ? lim : (dev < -lim ? -lim : dev);
    }
    d->mu += w * dev;
    if (d->nref == 0) {
        d->var = d->cov = 0;
    } else {
        d->var = (1.0 - w) * (d->var + w * dev * dev);
        d->cov = (1.0 - w) * d->cov + w * dev * d->prev_dev;
    }
    d->prev_dev = d->nref == 0 ? 0.0 : dev; /* the first batch has no deviation yet */
    d->nref++;
}

/* The long-run sd of a batch mean. */
static double scale(const struct drift *d)
{
    double rho = d->var > 0 ? d->cov / d->var : 0.0;
    rho = rho < 0 ? 0 : (rho > RHO_MAX ? RHO_MAX : rho);
    double s = sqrt(d->var * (1.0 + rho) / (1.0 - rho));
    double floor_sd = 1e-9 * (1.0 + fabs(d->mu));
    return s > floor_sd ? s : floor_sd;
}

/* A batch mean m ends at d->step.  Returns drift_observe's answer. */
static int batch(struct drift *d, double m)
{
    if (!armed(d)) {
        learn_reference(d, m);
        if (armed(d))
            restart_sums(d);
        return 0;
    }
    double z = (m - d->mu) / scale(d);
    double cap = 2.0 * d->h;
    d->up = fmin(cap, fmax(0.0, d->up + z - d->p.k));
    d->dn = fmin(cap, fmax(0.0, d->dn - z - d->p.k));
    if (d->up == 0)
        d->up_zero = d->step;
    if (d->dn == 0)
        d->dn_zero = d->step;
    if (d->active) {
        if ((d->side > 0 ? d->up : d->dn) > 0)
            return 0;
        d->active = 0;
        d->clears++;
        d->last_clear = d->step;
        restart_sums(d);
        return 2;
    }
    if (d->up <= d->h && d->dn <= d->h) {
        learn_reference(d, m);
        return 0;
    }
    d->active = 1;
    d->side = d->up > d->h ? 1 : -1;
    d->alarms++;
    d->last_alarm = d->step;
    d->last_onset = (d->side > 0 ? d->up_zero : d->dn_zero) + 1;
    /* The other sum starts again: it answers for the other direction only once this clears. */
    if (d->side > 0)
        d->dn = 0;
    else
        d->up = 0;
    return 1;
}

int drift_observe(struct drift *d, uint64_t step, double td)
{
    d->step = step;
    if (isnan(td))
        return 0;
    d->bsum += td;
    if (++d->nb < d->p.batch)
        return 0;
    double m = d->bsum / d->nb;
    d->nb = 0;
    d->bsum = 0;
    return batch(d, m);
}

const drift_params_t *drift_params(const struct drift *d)
{
    return &d->p;
}

void drift_get(const struct drift *d, diag_drift_t *out)
{
    memset(out, 0, sizeof *out);
    out->alarms = d->alarms;
    out->clears = d->clears;
    out->last_alarm = d->last_alarm;
    out->last_onset = d->last_onset;
    out->last_clear = d->last_clear;
    out->armed = armed(d);
    out->statistic = out->armed ? fmax(d->up, d->dn) : 0.0;
    out->threshold = d->h;
    out->active = d->active;
    out->side = d->side;
}

void drift_save(const struct drift *d, ser_w *w)
{
    ser_put_u64(w, d->step);
    ser_put_u64(w, d->nb);
    ser_put_u64(w, d->nref);
    double v[7] = {d->bsum, d->mu, d->var, d->cov, d->prev_dev, d->up, d->dn};
    ser_put_f64v(w, v, 7);
    ser_put_u64(w, d->up_zero);
    ser_put_u64(w, d->dn_zero);
    ser_put_u64(w, (uint64_t)d->active);
    ser_put_u64(w, (uint64_t)(d->side + 1));
    ser_put_u64(w, d->alarms);
    ser_put_u64(w, d->clears);
    ser_put_u64(w, d->last_alarm);
    ser_put_u64(w, d->last_onset);
    ser_put_u64(w, d->last_clear);
}

int drift_load(struct drift *d, ser_r *r, unsigned version)
{
    drift_reset(d);
    if (version < 3) {
        /* Page-Hinkley: k, 8 doubles, the two extremes' steps, then alarms, last alarm, onset. */
        double v[8];
        ser_get_u64(r);
        ser_get_f64v(r, v, 8);
        ser_get_u64(r);
        ser_get_u64(r);
        d->alarms = d->clears = ser_get_u64(r);
        d->last_alarm = ser_get_u64(r);
        d->last_onset = ser_get_u64(r);
        return r->err ? -1 : 0;
    }
    d->step = ser_get_u64(r);
    uint64_t nb = ser_get_u64(r);
    d->nb = nb < d->p.batch ? (unsigned)nb : d->p.batch;
    d->nref = ser_get_u64(r);
    double v[7];
    ser_get_f64v(r, v, 7);
    d->bsum = v[0];
    d->mu = v[1];
    d->var = v[2];
    d->cov = v[3];
    d->prev_dev = v[4];
    d->up = v[5];
    d->dn = v[6];
    d->up_zero = ser_get_u64(r);
    d->dn_zero = ser_get_u64(r);
    d->active = ser_get_u64(r) != 0;
    uint64_t side = ser_get_u64(r);
    d->side = side <= 2 ? (int)side - 1 : 0;
    d->alarms = ser_get_u64(r);
    d->clears = ser_get_u64(r);
    d->last_alarm = ser_get_u64(r);
    d->last_onset = ser_get_u64(r);
    d->last_clear = ser_get_u64(r);
    if (nb >= d->p.batch || side > 2)
        r->err = 1;
    return r->err ? -1 : 0;
}
