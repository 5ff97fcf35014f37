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

/* Sizes of model_replay.c's chunks and ring; model.c counts them in model_footprint. */
/* Bytes of features a chunk holds at most (phi and phi' of every transition). */
#define REPLAY_CHUNK_BYTES (1u << 20)
/* Most transitions a chunk holds: small enough to pipeline a learner's blocks of records. */
#define REPLAY_CHUNK_MAX 128
/*
 * Chunks in the ring: the pusher may hand out all but one ahead of the one it
 * fills, so a worker that finishes one finds the next waiting instead of
 * sleeping until the pusher wakes, runs stage C and hands it over (two
 * wake-ups per chunk, some tens of microseconds each on a virtual machine),
 * and short stalls of either side (the pusher yields the CPU to the loop and
 * the writer) do not stop the other.  As many chunks as REPLAY_RING_BYTES
 * hold, REPLAY_RING_MIN to REPLAY_RING_MAX of them: 15 at 65 features, 2 from
 * about 500 on.  Measured at 65 features, 2 cores: 4 chunks 580k transitions/s of durable
 * ingest, 8 chunks 650k, 16 chunks 700k.
 */
#define REPLAY_RING_BYTES (2u << 20)
#define REPLAY_RING_MIN   2
#define REPLAY_RING_MAX   16
/* Transitions a replay chunk holds at n features. */
static inline size_t replay_cap_of(size_t n)
{
    size_t cap = REPLAY_CHUNK_BYTES / (2 * sizeof(double) * n);
    return cap < 16 ? 16 : cap > REPLAY_CHUNK_MAX ? REPLAY_CHUNK_MAX : cap;
}

/* Bytes of one chunk (model_replay.c's chunk_init). */
static inline double replay_chunk_bytes(size_t cap, size_t n, size_t n_est)
{
    return (double)cap * ((2.0 * (double)n + 2.0) * sizeof(double) + sizeof(int) + sizeof(size_t) +
                          (double)n_est * (3.0 * sizeof(double) + sizeof(est_stats_t)));
}

/* Chunks in a replay's ring at n features (REPLAY_RING_BYTES). */
static inline size_t replay_ring_of(size_t n, size_t n_est)
{
    double k = REPLAY_RING_BYTES / replay_chunk_bytes(replay_cap_of(n), n, n_est);
    return k < REPLAY_RING_MIN   ? REPLAY_RING_MIN
           : k > REPLAY_RING_MAX ? REPLAY_RING_MAX
                                 : (size_t)k;
}

#endif /* WORTH_MODEL_IMPL_H */
