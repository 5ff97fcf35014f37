/*
 * drift.h - did the plant change?  A CUSUM alarm with a stated false-alarm rate.
 *
 * The statistic: one estimator's TD error (diag.c runs one detector per
 * estimator and follows the headline's), averaged over batches of
 * `batch` transitions (a batch mean is nearly normal and far less
 * autocorrelated than the errors it averages), standardised by a running
 * reference: its mean, a winsorised variance (deviations clipped at 4 sd, so
 * one wild error cannot inflate it) and its lag-1 autocorrelation rho, which
 * turns the variance into a long-run one, var * (1 + rho) / (1 - rho) (rho
 * clipped to [0, 0.8]).  The reference is the plain average of the first
 * batches (the burn-in: no alarm before it is over) and an exponentially
 * weighted one, of memory DRIFT_REF_BATCHES batches, afterwards; it is
 * frozen while an alarm is active.  So the statistic has mean 0 and sd 1
 * whatever the reward's scale or offset.
 *
 * The test: a two-sided CUSUM (Page 1954) with reference value k on that
 * statistic, S+ = max(0, S+ + z - k), S- = max(0, S- - z - k), alarming when
 * either passes h.  h follows from the in-control average run length the
 * model states (its false-alarm rate: ARL0 transitions, ARL0 / batch
 * batches) through Siegmund's approximation (drift_arl).  The alarm dates the
 * change at the alarming sum's last zero (the first transition after it),
 * not at the alarm.  The alarm stays active, with the sums running on the
 * frozen reference (capped at 2h), until the alarming sum is back at zero:
 * then it clears, the sums restart and the reference learns again.
 *
 * Owned by the model's diagnostics (diag.c); updated on its learner thread;
 * allocates nothing after drift_new.  Its state is part of the model's saved
 * state (inside diag_save), so a replay rebuilds it.
 */
#ifndef WORTH_DRIFT_H
#define WORTH_DRIFT_H

#include <stddef.h>
#include <stdint.h>

#include "learn/ser.h"

struct drift;

/* Memory of the running reference after the burn-in, in batches. */
#define DRIFT_REF_BATCHES 2000
/* Fewest batches in the burn-in, and in the stated run length. */
#define DRIFT_MIN_BATCHES 10

/* Plain data: parameters (documented defaults in drift_params_default). */
typedef struct drift_params_t {
    double arl0;      /* stated mean transitions between false alarms; 1e6 */
    double k;         /* CUSUM reference value, in sd of the batch mean; 0.5 */
    unsigned batch;   /* TD errors per batch mean; 10 */
    unsigned burn_in; /* TD errors that set the first reference (>= 10 batches); 1000 */
    int on_drift;     /* 1: keep a "pre-drift" checkpoint at each alarm (the daemon does); 0 */
    /* As the model's spec states the rate (the spec turns it into arl0): */
    double false_alarm_days;        /* plant days between false alarms; 0: not given */
    double false_alarm_transitions; /* transitions between false alarms; 0: not given */
} drift_params_t;

/* Plain data: the drift detector's state, for stats. */
typedef struct diag_drift_t {
    uint64_t alarms;     /* alarms raised so far */
    uint64_t clears;     /* alarms cleared so far */
    uint64_t last_alarm; /* step (1-based count of transitions) of the last alarm, 0 for none */
    uint64_t last_onset; /* first step of the change the last alarm dates */
    uint64_t last_clear; /* step the last alarm cleared, 0 for none */
    double statistic;    /* max(S+, S-) now, in sd of the batch mean */
    double threshold;    /* h */
    int armed;           /* 1 once the burn-in is over */
    int active;          /* 1 while an alarm is raised and not cleared */
    int side;            /* of the active (else the last) alarm: +1 the error rose, -1 fell */
} diag_drift_t;

/* Lifecycle */
void drift_params_default(drift_params_t *p);
/* Returns 0 when p is usable, else WORTH_E_BAD_PARAM with a message in err. */
int drift_check(const drift_params_t *p, char *err, size_t errlen);
/* Returns a new detector (owned; drift_free) for p (checked by drift_check). */
struct drift *drift_new(const drift_params_t *p);
void drift_free(struct drift *d);
void drift_reset(struct drift *d);

/*
 * Operate: one TD error at transition `step` (1-based); NAN is ignored.
 * Returns 1 when an alarm is raised on it, 2 when the active one clears, else 0.
 */
int drift_observe(struct drift *d, uint64_t step, double td);

/* Query */
const drift_params_t *drift_params(const struct drift *d);
void drift_get(const struct drift *d, diag_drift_t *out);

/*
 * Siegmund's approximation (D. Siegmund, Sequential Analysis: Tests and
 * Confidence Intervals, Springer 1985; in the form Montgomery's Introduction
 * to Statistical Quality Control quotes for the CUSUM, from memory) of the mean run length of a
 * one-sided CUSUM with reference k and threshold h on unit-variance normal increments of mean mu:
 * (exp(-2 D b) + 2 D b - 1) / (2 D^2), D = mu - k, b = h + 1.166 (b^2 at D = 0).
 */
double drift_arl1(double h, double k, double mu);
/* In control (mu = 0), the two-sided test: 1/ARL = 1/ARL+ + 1/ARL- = 2/ARL+. */
double drift_arl(double h, double k);
/* The h whose drift_arl(h, k) is arl (bisection; arl in batches, >= 1). */
double drift_threshold(double arl, double k);

/* Persistence (inside the diagnostics' saved state). */
void drift_save(const struct drift *d, ser_w *w);
/* Reads what drift_save wrote under model state format `version` (a format before 3 held a
 * Page-Hinkley test: its alarm count is kept, the rest starts again).  Returns 0, or -1. */
int drift_load(struct drift *d, ser_r *r, unsigned version);

#endif /* WORTH_DRIFT_H */
