/*
 * health.h - is each estimator ready and sound, and which one answers?
 *
 * A verdict per estimator from its own evidence, on the learner thread after
 * the diagnostics took a transition:
 *
 *   diverged   est.h's divergence rule fired: it answers NAN and learns nothing.
 *   unhealthy  a numerical guard acted recently (rls_td: covariance reset; lstd: a
 *              near-singular solve, rcond < 1e-13, within 2 x refit_every updates), or
 *              its windowed realised-return RMS is more than HEALTH_WORSE times
 *              the best of the model's ready estimators and more than
 *              HEALTH_FLOOR times the returns' own RMS above it (both with at
 *              least HEALTH_MIN_RETURNS returns), or it is more than
 *              HEALTH_RUNAWAY times the returns' RMS (weights running away).
 *   warming    not enough data yet: lstd before its first solve, replay before
 *              its first mini-batch step (its buffer holds fewer than a
 *              batch), rls_td before max(3 n, 3 / (1 - forget)) updates (the
 *              prior's weight is then below e^-3 of what it was; n features),
 *              any estimator before HEALTH_MIN_RETURNS realised returns.
 *   ok         none of the above.
 *
 * The headline ("primary"): a fixed estimator when the spec names one, or
 * "auto": the ok estimator with the lowest windowed realised-return RMS (an
 * out-of-sample figure: each prediction was made before its return was known).
 * Hysteresis: the headline stays while it is ok; another takes over only
 * when its RMS has been below (1 - HEALTH_MARGIN) times the headline's for
 * HEALTH_HOLD consecutive transitions (the best such challenger; the count
 * starts again whenever the challenger changes or the margin is lost).  When
 * the headline stops being ok it moves at once to the best ok estimator; when
 * none is ok it stays where it is (the answer says so), unless it has no
 * estimate yet (lstd before its solve, replay before its first step) and
 * another has: then the first such one answers.  Ties go to the lower
 * index, so the choice is deterministic, and it is part of the model's saved
 * state, so a replay rebuilds it.
 *
 * Owned by a model; nothing allocated after health_new; O(estimators) per transition.
 */
#ifndef WORTH_HEALTH_H
#define WORTH_HEALTH_H

#include <stddef.h>
#include <stdint.h>

#include "learn/diag.h"
#include "learn/est.h"
#include "learn/ser.h"

struct health;

/* Most estimators (MODEL_MAX_EST). */
#define HEALTH_MAX_EST 16
/* Realised returns before an estimator's realised error counts. */
#define HEALTH_MIN_RETURNS 50
/* unhealthy: windowed RMS above this many times the best ready estimator's. */
#define HEALTH_WORSE 3.0
/* ... and above the best by more than this share of the returns' RMS. */
#define HEALTH_FLOOR 0.05
/* unhealthy: windowed RMS above this many times the returns' own RMS. */
#define HEALTH_RUNAWAY 100.0
/* auto: a challenger must be better by this share of the headline's RMS ... */
#define HEALTH_MARGIN 0.1
/* ... for this many consecutive transitions. */
#define HEALTH_HOLD 500

enum health_state { HEALTH_WARMING, HEALTH_OK, HEALTH_UNHEALTHY, HEALTH_DIVERGED };

/* Plain data: one estimator's verdict, with its reason in words. */
typedef struct health_est_t {
    int state;     /* enum health_state */
    int estimate;  /* 0 while its weights are still the initial ones (lstd, replay warming) */
    char why[160]; /* the reason, "" for ok */
} health_est_t;

/* Plain data: the headline. */
typedef struct health_head_t {
    size_t index;  /* the estimator that answers */
    int automatic; /* 1: chosen by "auto" */
    uint64_t switches;
    char why[200];
} health_head_t;

/* Lifecycle */

/*
 * Builds the verdicts for n_est estimators over n features.  automatic: 1 for
 * "auto", 0 for a fixed headline `fixed` (< n_est); p: the n_est estimators'
 * parameters (copied).  Returns it (owned).
 */
struct health *health_new(size_t n_est, size_t n, int automatic, size_t fixed,
                          const est_params_t *p);
void health_free(struct health *h);
void health_reset(struct health *h);

/* Operate */

/*
 * Takes the estimators' counters right after a transition (st: n_est est_stats,
 * borrowed) and the diagnostics' state once they took it.  Callers pass the
 * counters as they were at that transition, so a replay over worker threads
 * (estimators a chunk ahead) decides exactly as learning one at a time.
 */
void health_update(struct health *h, const est_stats_t *st, const struct diag *d);

/* Takes st's guarded counts as already seen (after loading a state from before format 3,
 * so that old guards are not taken for new ones). */
void health_seen(struct health *h, const est_stats_t *st);

/* Query */

/* Returns the estimator that answers the headline now. */
size_t health_headline(const struct health *h);
int health_automatic(const struct health *h);
/* Fills out with estimator i's verdict; st and d as for health_update, names the n_est
 * estimator names (all borrowed). */
void health_est(const struct health *h, size_t i, const est_stats_t *st, const struct diag *d,
                const char *const *names, health_est_t *out);
/* Fills out with the headline and why; names: the n_est estimator names (borrowed). */
void health_head(const struct health *h, const est_stats_t *st, const struct diag *d,
                 const char *const *names, health_head_t *out);
/* Returns the wire name of a state ("warming", "ok", "unhealthy", "diverged"). */
const char *health_state_name(int state);

/* Persistence (inside the model's saved state, format 3 on). */
void health_save(const struct health *h, ser_w *w);
/* Returns 0, or -1 when the bytes do not fit (r->err set). */
int health_load(struct health *h, ser_r *r);

#endif /* WORTH_HEALTH_H */
