/*
 * drift.c - the drift alarm on the primary estimator's TD error (see drift.h).
 *
 * Owns only scalars: the burn-in sums, the reference mean and sd, the two
 * cumulative sums and where each last turned.  Learner thread only; nothing
 * is allocated after drift_new.  A NAN TD error (a diverged primary) leaves
 * the test where it was.
 */
#include "learn/drift.h"

#include <math.h>
#include <string.h>

#include "common/fail.h"
#include "common/mem.h"
#include "worth/errors.h"

struct drift {
    drift_params_t p;
    uint64_t step, k;      /* the last step seen; TD errors since the last (re)start */
    double b_sum, b_sumsq; /* burn-in sums */
    double mu, sd;
    double up, up_min, dn, dn_max;
    uint64_t up_min_at, dn_max_at;
    uint64_t alarms, last_alarm, last_onset;
};

void drift_params_default(drift_params_t *p)
{
    memset(p, 0, sizeof *p);
    p->delta = 0.5;
    p->lambda = 50.0;
    p->burn_in = 500;
}

int drift_check(const drift_params_t *p, char *err, size_t errlen)
{
    if (!(p->delta >= 0) || !isfinite(p->delta) || !(p->lambda > 0) || !isfinite(p->lambda))
        return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                        "drift delta must be >= 0 and lambda > 0, both finite");
    if (p->burn_in < 2)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "drift burn_in must be >= 2");
    return 0;
}

struct drift *drift_new(const drift_params_t *p)
{
    struct drift *d = mem_calloc(1, sizeof *d);
    d->p = *p;
    drift_reset(d);
    return d;
}

void drift_free(struct drift *d)
{
    mem_free(d);
}

static void restart(struct drift *d)
{
    d->k = 0;
    d->b_sum = d->b_sumsq = 0;
    d->mu = 0;
    d->sd = 1;
    d->up = d->up_min = d->dn = d->dn_max = 0;
    d->up_min_at = d->dn_max_at = d->step;
}

void drift_reset(struct drift *d)
{
    d->step = 0;
    d->alarms = d->last_alarm = d->last_onset = 0;
    restart(d);
}

int drift_observe(struct drift *d, uint64_t step, double td)
{
    d->step = step;
    if (isnan(td))
        return 0;
    d->k++;
    if (d->k <= d->p.burn_in) {
        d->b_sum += td;
        d->b_sumsq += td * td;
        if (d->k == d->p.burn_in) {
            double n = (double)d->k;
            d->mu = d->b_sum / n;
            double var = (d->b_sumsq - n * d->mu * d->mu) / (n - 1);
            d->sd = sqrt(var > 0 ? var : 0);
            double floor_sd = 1e-9 * (1.0 + fabs(d->mu));
            if (d->sd < floor_sd)
                d->sd = floor_sd;
            d->up_min_at = d->dn_max_at = d->step;
        }
        return 0;
    }
    double z = (td - d->mu) / d->sd;
    d->up += z - d->p.delta; /* rises when the error grows */
    d->dn += z + d->p.delta; /* falls when it shrinks */
    if (d->up < d->up_min) {
        d->up_min = d->up;
        d->up_min_at = d->step;
    }
    if (d->dn > d->dn_max) {
        d->dn_max = d->dn;
        d->dn_max_at = d->step;
    }
    int rise = d->up - d->up_min > d->p.lambda, fall = d->dn_max - d->dn > d->p.lambda;
    if (!rise && !fall)
        return 0;
    d->alarms++;
    d->last_alarm = d->step;
    d->last_onset = (rise ? d->up_min_at : d->dn_max_at) + 1;
    restart(d);
    return 1;
}

const drift_params_t *drift_params(const struct drift *d)
{
    return &d->p;
}

void drift_get(const struct drift *d, diag_drift_t *out)
{
    out->alarms = d->alarms;
    out->last_alarm = d->last_alarm;
    out->last_onset = d->last_onset;
    out->armed = d->k > d->p.burn_in;
    double a = d->up - d->up_min, b = d->dn_max - d->dn;
    out->statistic = out->armed ? (a > b ? a : b) : 0.0;
}

void drift_save(const struct drift *d, ser_w *w)
{
    ser_put_u64(w, d->k);
    double v[8] = {d->b_sum, d->b_sumsq, d->mu, d->sd, d->up, d->up_min, d->dn, d->dn_max};
    ser_put_f64v(w, v, 8);
    ser_put_u64(w, d->up_min_at);
    ser_put_u64(w, d->dn_max_at);
    ser_put_u64(w, d->alarms);
    ser_put_u64(w, d->last_alarm);
    ser_put_u64(w, d->last_onset);
}

int drift_load(struct drift *d, ser_r *r, unsigned version)
{
    (void)version;
    d->k = ser_get_u64(r);
    double v[8];
    ser_get_f64v(r, v, 8);
    d->b_sum = v[0];
    d->b_sumsq = v[1];
    d->mu = v[2];
    d->sd = v[3];
    d->up = v[4];
    d->up_min = v[5];
    d->dn = v[6];
    d->dn_max = v[7];
    d->up_min_at = ser_get_u64(r);
    d->dn_max_at = ser_get_u64(r);
    d->alarms = ser_get_u64(r);
    d->last_alarm = ser_get_u64(r);
    d->last_onset = ser_get_u64(r);
    return r->err ? -1 : 0;
}
