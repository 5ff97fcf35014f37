/*
 * drift.h - did the plant change?  The drift alarm on the primary estimator's TD error.
 *
 * A two-sided Page-Hinkley test (Page 1954; Hinkley 1971) on the primary
 * estimator's TD error, standardised by the mean and sd of its first
 * `burn_in` values after each (re)start: it raises an alarm when the
 * cumulative deviation beyond `delta` (in sd units) exceeds `lambda`, reports
 * the step where the change began (the last extreme of the cumulative sum),
 * and starts again.
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

/* Plain data: parameters (documented defaults in drift_params_default). */
typedef struct drift_params_t {
    double delta;     /* Page-Hinkley tolerance, in sd of the TD error; 0.5 */
    double lambda;    /* Page-Hinkley threshold, in sd of the TD error; 50 */
    unsigned burn_in; /* TD errors that set the reference mean and sd; 500 */
    int on_drift;     /* 1: keep a "pre-drift" checkpoint at each alarm (the daemon does); 0 */
} drift_params_t;

/* Plain data: the drift detector's state, for stats. */
typedef struct diag_drift_t {
    uint64_t alarms;     /* alarms raised so far */
    uint64_t last_alarm; /* step (1-based count of transitions) of the last alarm, 0 for none */
    uint64_t last_onset; /* step where the last detected change began */
    double statistic;    /* the larger of the two cumulative deviations now, in sd */
    int armed;           /* 1 once the burn-in is over */
} diag_drift_t;

/* Lifecycle */
void drift_params_default(drift_params_t *p);
/* Returns 0 when p is usable, else WORTH_E_BAD_PARAM with a message in err. */
int drift_check(const drift_params_t *p, char *err, size_t errlen);
/* Returns a new detector (owned; drift_free) for p (checked by drift_check). */
struct drift *drift_new(const drift_params_t *p);
void drift_free(struct drift *d);
void drift_reset(struct drift *d);

/* Operate: one TD error at transition `step` (1-based); NAN is ignored.  Returns 1 on an alarm. */
int drift_observe(struct drift *d, uint64_t step, double td);

/* Query */
const drift_params_t *drift_params(const struct drift *d);
void drift_get(const struct drift *d, diag_drift_t *out);

/* Persistence (inside the diagnostics' saved state). */
void drift_save(const struct drift *d, ser_w *w);
/* Reads what drift_save wrote under model state format `version`.  Returns 0, or -1 (r->err). */
int drift_load(struct drift *d, ser_r *r, unsigned version);

#endif /* WORTH_DRIFT_H */
