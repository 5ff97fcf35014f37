/*
 * diag.h - is the value estimate any good, and did the plant change?
 *
 * Two checks that a model runs beside its estimators, on the same stream.
 *
 * Realised return: every state's discounted return G is known once its
 * episode ends, or, for plants that never end, after a horizon H with
 * gamma^H < 1e-3 (the tail beyond H weighs less than a thousandth).  Each
 * estimator's prediction V(x) at the time the state was seen is compared
 * with G: per estimator the mean error (bias) and the RMS error, over the
 * whole run and over a sliding (exponentially weighted) window.
 *
 * Coverage and the 95% interval, per estimator over the same window: the share
 * of realised returns inside V(x) +- 1 and 2 of the estimator's own sd at the
 * time (rls_td), and the 95% interval from the realised errors: each error's
 * size |V(x) - G| in units of the windowed RMS just before it goes into a
 * histogram (DIAG_BINS bins of DIAG_BIN_WIDTH); k95 is its 95% quantile
 * (linear inside a bin), and the interval is V(x) +- k95 * rms_window.  The
 * share of returns inside the interval as it stood before each return (out of
 * sample) is cover_95; inside V +- 2 RMS (what a Gaussian error would give),
 * cover_rms2.
 *
 * Drift: every estimator has a drift detector (drift.h) on its own TD error,
 * owned and saved here.  The model's drift alarm follows the detector of the
 * headline estimator (health.h): it is raised when that detector is active
 * and the alarm is not, and cleared in the opposite case, so a change of
 * headline moves the alarm to a detector that has been warm all along
 * instead of starting a new reference on another scale.
 *
 * Owned by a model; updated on its learner thread; allocates a source's
 * buffer when the source is first seen, nothing per transition afterwards.
 * Its state is part of the model's saved state, so a replay rebuilds it.
 */
#ifndef WORTH_DIAG_H
#define WORTH_DIAG_H

#include <stddef.h>
#include <stdint.h>

#include "learn/drift.h"

/* Most estimators a model has (model.h's MODEL_MAX_EST). */
#define DIAG_MAX_EST 16
#include "learn/ser.h"

struct diag;

/* Bins of the histogram of |V - G| / RMS, and their width (the last bin holds the tail). */
#define DIAG_BINS      80
#define DIAG_BIN_WIDTH 0.1
/* Weight of returns (exponentially weighted) before k95 is given. */
#define DIAG_MIN_WEIGHT 30.0

/* Plain data: parameters (documented defaults in diag_params_default). */
typedef struct diag_params_t {
    double gamma;         /* the model's per-step discount (sets the default horizon) */
    unsigned horizon;     /* steps after which a continuing return counts as known; 0 = auto */
    unsigned window;      /* length of the sliding window, in returns; 1000 */
    drift_params_t drift; /* the drift detector (drift.h) */
} diag_params_t;

/* Plain data: one estimator's realised-return figures. */
typedef struct diag_est_t {
    uint64_t n;         /* returns compared */
    double bias;        /* mean of V(x) - G over the run */
    double rms;         /* RMS of V(x) - G over the run */
    double bias_window; /* the same over the sliding window */
    double rms_window;
    double sd_n;       /* weight of the window's returns that had an own sd */
    double cover_sd1;  /* share of those within V +- 1 sd; NAN without any */
    double cover_sd2;  /* within V +- 2 sd */
    double cover_n;    /* weight of the window's returns scored against the interval */
    double cover_rms2; /* share within V +- 2 windowed RMS; NAN without any */
    double cover_95;   /* share within the 95% interval, out of sample; NAN without any */
    double k95;        /* 95% quantile of |V - G| / RMS; NAN before DIAG_MIN_WEIGHT returns */
    double half95;     /* k95 * rms_window: the 95% interval is V +- half95 */
} diag_est_t;

void diag_params_default(double gamma, diag_params_t *p);
/*
 * Builds the diagnostics for n_est estimators and `sources` source slots.
 * Returns 0, or WORTH_E_BAD_PARAM with a message in err.
 */
/* Returns the most bytes the diagnostics of p can hold (every source's return buffer full). */
double diag_footprint(const diag_params_t *p, size_t n_est, size_t sources);
int diag_new(const diag_params_t *p, size_t n_est, size_t sources, struct diag **out, char *err,
             size_t errlen);
void diag_free(struct diag *d);
void diag_reset(struct diag *d);

/*
 * One transition of source src: pred holds each estimator's V(x) before the
 * update, r and g the reward and discount, td the followed estimator's TD
 * error.  A NAN in pred marks an estimator that has diverged (est_last_value):
 * it is left out of the spread and its realised figures freeze; a NAN td
 * leaves the drift test alone.  Returns 1 when the drift alarm fired on this
 * transition.
 */
int diag_observe(struct diag *d, size_t src, const double *pred, double r, double g, int terminal,
                 double td);
/* diag_observe, with sd[k] estimator k's own sd at x (NAN: none; sd NULL: none at all), td[k]
 * estimator k's TD error (NAN: none; td NULL: none at all), and the drift alarm following the
 * detector of estimator `head` (the headline before this transition). */
int diag_observe_sd(struct diag *d, size_t src, const double *pred, const double *sd, double r,
                    double g, int terminal, const double *td, size_t head);

/* Query */
const diag_params_t *diag_params(const struct diag *d);
unsigned diag_horizon(const struct diag *d);
void diag_est(const struct diag *d, size_t i, diag_est_t *out);
/* The drift alarm: the followed detector's statistic, the alarm's own counters and state. */
void diag_drift(const struct diag *d, diag_drift_t *out);
/* Estimator i's own detector (its counters are its own, not the alarm's). */
void diag_drift_est(const struct diag *d, size_t i, diag_drift_t *out);
/* The estimator whose detector the alarm follows now. */
size_t diag_drift_followed(const struct diag *d);
/* The estimator followed from the start and after a reset (the model's first headline). */
void diag_drift_home(struct diag *d, size_t i);
/* Running mean of the spread (max - min) of the predictions of the estimators not
 * diverged (steps where every one had diverged are left out). */
double diag_spread(const struct diag *d);
/* RMS of the realised returns themselves over the window (their scale); 0 before any. */
double diag_returns_rms(const struct diag *d);

/* Persistence (inside the model's saved state). */
void diag_save(const struct diag *d, ser_w *w);
/* Reads what diag_save wrote under model state format `version` (1, 2 or 3; 3 adds each entry's sd,
 * coverage and the histogram). Returns 0, or -1 when the bytes do not fit (r->err is set). */
int diag_load(struct diag *d, ser_r *r, unsigned version);

#endif /* WORTH_DIAG_H */
