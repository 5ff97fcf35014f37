/*
 * model_impl.h - what model.c shares with model_replay.c; not a public header.
 *
 * model.c builds, feeds, saves and loads a model; model_replay.c learns long
 * runs of transitions with its estimators on worker threads.  Both reach into
 * the same struct and take a transition's source slot and discount the same
 * way, so that a replay learns exactly what model_observe would.
 */
#ifndef WORTH_MODEL_IMPL_H
#define WORTH_MODEL_IMPL_H

#include <stddef.h>
#include <stdint.h>

#include "learn/health.h"
#include "learn/model.h"

struct model {
    struct feat *feat;
    size_t dims, n;
    double gamma, gamma_per_s;
    size_t n_est, primary;
    struct est *est[MODEL_MAX_EST];
    char names[MODEL_MAX_EST][MODEL_NAME_MAX + 1];
    size_t max_sources, n_sources;
    char (*sources)[MODEL_NAME_MAX + 1];
    double *phi, *phin, *work; /* learner workspaces */
    double *pred;              /* each estimator's V(x) before an update */
    double *sd;                /* and its own sd there (NAN: none) */
    double *td;                /* and its TD error (the drift detectors') */
    est_stats_t *st;           /* and its counters after the update (health_update) */
    struct diag *diag;
    struct health *health; /* the verdicts and the headline */
    uint64_t applied, clipped;
};

/* Returns t's source slot, taking a new one for a new source (model_check passed). */
long model_source_slot(struct model *m, const model_obs_t *t);
/* Returns the discount of t: gamma_per_s^dt when both are there, else gamma. */
double model_discount(const struct model *m, const model_obs_t *t);
/* Writes estimator e's own sd at phi (weights before the update) to *sd, NAN when it has none. */
void model_pred_sd(const struct est *e, const double *phi, double *sd);
/* After est_observe: the sd the estimator gave while it learnt, where it gives one (rls_td). */
void model_learnt_sd(const struct est *e, double *sd);

#endif /* WORTH_MODEL_IMPL_H */
