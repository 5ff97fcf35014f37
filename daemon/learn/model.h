/*
 * model.h - one value model: a feature map, a discount and several estimators
 * fed from the same transitions.
 *
 * The daemon's unit of work.  model_observe validates a transition completely
 * before anything is changed (so a rejected transition leaves the model
 * bit-identical), evaluates phi(x) and phi(x_next) once into workspaces
 * allocated at creation, and feeds every estimator.  Not thread-safe: one
 * learner thread owns a model.  model_value is const and takes the caller's
 * workspace, so queries on other threads only need a consistent copy.
 */
#ifndef WORTH_MODEL_H
#define WORTH_MODEL_H

#include <stddef.h>
#include <stdint.h>

#include "learn/diag.h"
#include "learn/est.h"
#include "learn/feat.h"
#include "learn/health.h"

struct model;

/* Longest estimator or source name, in bytes, without the NUL. */
#define MODEL_NAME_MAX 63
/* Most estimators one model runs side by side. */
#define MODEL_MAX_EST DIAG_MAX_EST /* 16 */
/* Source slots when the spec gives none. */
#define MODEL_DEFAULT_SOURCES 16
/* Version of the byte format written by model_save (2: the diagnostics save each
 * source's front count). */
/* --- model state format 3 (one format for two changes made side by side): the drift
 * detector is a CUSUM (drift_save, in place of the Page-Hinkley state); the diagnostics add
 * each pending step's sd, the coverage figures and the error histogram; the headline's
 * choice (health_save) follows them.  Formats 1 and 2 still load: the old detector's state
 * is read and restarted as the CUSUM (drift_load), no sd, no coverage, headline reset.
 * Format 4: every estimator has its drift detector, the alarm follows the headline's
 * (diag.h); a format-3 detector is the primary's, the others start again. --- */
#define MODEL_FORMAT_VERSION 4
/* Oldest format model_load still reads. */
#define MODEL_FORMAT_OLDEST 1

/* Plain data: a model's configuration.  Pointers are borrowed during model_new. */
typedef struct model_spec_t {
    feat_spec_t feat;
    double gamma;            /* discount per step, in [0, 1] */
    double gamma_per_s;      /* discount per second in (0, 1] for transitions with dt; 0 = none */
    size_t n_est;            /* 1..MODEL_MAX_EST */
    const est_params_t *est; /* n_est parameter sets */
    const char *const *est_names; /* n_est unique names, 1..MODEL_NAME_MAX bytes */
    size_t primary;               /* index of the primary estimator (also the drift test's) */
    int primary_auto;             /* 1: the headline is chosen ("auto", health.h) */
    size_t max_sources;           /* source slots, 0 = MODEL_DEFAULT_SOURCES */
    const diag_params_t *diag;    /* diagnostics; NULL = diag_params_default(gamma) */
    double max_bytes;  /* refuse (too_large) a model whose footprint exceeds this; 0 = no limit */
    double base_bytes; /* bytes the caller holds per model besides it (e.g. its queue) */
} model_spec_t;

/*
 * Plain data: one transition as received.  Pointers are borrowed.  Set dt_s
 * to NAN when the transition has no interval: 0 is a valid interval (g = 1
 * with a per-second discount).  A terminal transition's x_next is ignored for
 * learning, but when given it must still be well-formed: a malformed field is
 * refused, never silently dropped.
 */
typedef struct model_obs_t {
    const double *x;
    size_t x_len;
    double r;
    const double *x_next; /* may be NULL when terminal */
    size_t x_next_len;
    int terminal;
    const char *source; /* NULL: the default source */
    double dt_s;        /* sample interval in seconds; NAN when absent */
} model_obs_t;

/* Plain data: model-wide counters. */
typedef struct model_counts_t {
    uint64_t applied; /* transitions applied */
    uint64_t clipped; /* input components clipped to their declared range */
    size_t sources;   /* source slots in use */
} model_counts_t;

/* Lifecycle */

/*
 * Builds a model into *out (owned, free with model_free).  Returns 0, or
 * WORTH_E_BAD_PARAM / WORTH_E_TOO_LARGE with a message in err.  When
 * spec->max_bytes is set, the model's footprint (model_footprint, plus
 * spec->base_bytes) is checked against it before any estimator is allocated.
 */
int model_new(const model_spec_t *spec, struct model **out, char *err, size_t errlen);
/*
 * Returns the most bytes a model of spec with n features can come to hold: its
 * estimators (est_footprint), diagnostics and workspaces, with every source
 * slot in use; base_bytes not included.
 */
double model_footprint(const model_spec_t *spec, size_t n);
void model_free(struct model *m);
/* Every estimator and counter back to its initial state; sources forgotten. */
void model_reset(struct model *m);

/* Operate */

/*
 * Checks t without changing anything.  Returns 0, WORTH_E_BAD_DIMENSION,
 * WORTH_E_BAD_NUMBER, WORTH_E_BAD_PARAM or WORTH_E_TOO_MANY_SOURCES with a
 * message in err.
 */
int model_check(const struct model *m, const model_obs_t *t, char *err, size_t errlen);
/* model_check, then learns from t in every estimator.  Same returns. */
int model_observe(struct model *m, const model_obs_t *t, char *err, size_t errlen);
/*
 * Runs est_train on estimator i with options o (borrowed); returns as est_train
 * (WORTH_E_CANCELLED, WORTH_E_DIVERGED, ...), or WORTH_E_BAD_PARAM for a bad i.
 */
int model_train(struct model *m, size_t i, const est_train_opts_t *o, est_train_t *rep);

/*
 * Replay: a long run of transitions (recovery, rollback with replay) learnt
 * with the estimators spread over worker threads.  Each estimator still sees
 * every transition in order, and the diagnostics are fed in order after the
 * estimators, so the result is bit-identical to model_observe on each
 * transition.  The pushing thread validates and evaluates features for one
 * chunk while the workers learn the ones before it (a ring of a few chunks).
 *
 * Between model_replay_new and model_replay_end the model belongs to the
 * replay: no other model_* call until model_replay_flush or _end returns
 * (they wait for every pushed transition).  threads is the number of
 * workers; 0 picks one per core up to one per estimator, fewer while one
 * would carry under a quarter of the busiest one's load, or none when the
 * estimators are too cheap to gain from threads (then every transition is
 * learnt on the pushing thread when its chunk is full or flushed).
 */
struct model_replay;
/* The most bytes a replay of a model of dims inputs, n features and n_est estimators holds. */
double model_replay_footprint(size_t dims, size_t n, size_t n_est);
/* Returns a replay of m (owned; end it with model_replay_end).  Each worker
 * thread adds nice (0..19) to its own nice value when it starts, so that a
 * latency-sensitive thread of the caller's wins the CPU from learning. */
struct model_replay *model_replay_new(struct model *m, unsigned threads, int nice);
/*
 * model_check, then queues t for learning (x, x_next and source are copied).
 * Returns 0, or model_check's error with every earlier transition learnt and
 * t not.
 */
int model_replay_push(struct model_replay *r, const model_obs_t *t, char *err, size_t errlen);
/*
 * Called on the pushing thread once per pushed transition, in push order,
 * right after the diagnostics took it (diag state exact for that
 * transition; the estimators may be some chunks further on, so it must not
 * read them).
 */
typedef void (*model_replay_fn)(void *ctx);
/* Sets r's callback (NULL for none); ctx is borrowed. */
void model_replay_set_after(struct model_replay *r, model_replay_fn fn, void *ctx);
/*
 * Learns every queued transition (their callbacks run before it returns).
 * The model may then be used by the pushing thread until the next push.
 */
void model_replay_flush(struct model_replay *r);
/* model_replay_flush, then stops the workers and frees r. */
void model_replay_end(struct model_replay *r);

/* Query */

size_t model_dims(const struct model *m);
size_t model_features(const struct model *m);
size_t model_n_est(const struct model *m);
size_t model_primary(const struct model *m);
/* Returns the estimator that answers the headline now (the primary unless "auto"). */
size_t model_headline(const struct model *m);
/* The verdicts and the headline (borrowed). */
const struct health *model_health(const struct model *m);
/* Fills out with estimator i's verdict (learner thread). */
void model_est_health(const struct model *m, size_t i, health_est_t *out);
/* Fills out with the headline and why (learner thread). */
void model_head(const struct model *m, health_head_t *out);
/* Returns the name of source slot i (< counts.sources; borrowed), "" for the default. */
const char *model_source_name(const struct model *m, size_t i);
/* Returns the number of source slots. */
size_t model_max_sources(const struct model *m);
/* Returns the name of estimator i (borrowed). */
const char *model_est_name(const struct model *m, size_t i);
/* Returns the index of the estimator named name, or -1. */
int model_est_find(const struct model *m, const char *name);
/* Returns how many of the estimators have diverged (see est.h). */
size_t model_diverged(const struct model *m);
/* Returns 1 when estimator i has diverged, 0 when not (or i is out of range). */
int model_est_diverged(const struct model *m, size_t i);
/* Returns estimator i (borrowed; the model keeps ownership). */
const struct est *model_est(const struct model *m, size_t i);
const struct feat *model_feat(const struct model *m);
/* The model's diagnostics (realised returns, drift), borrowed. */
const struct diag *model_diag(const struct model *m);
/* Its parameters (borrowed). */
const diag_params_t *model_diag_params(const struct model *m);
void model_counts(const struct model *m, model_counts_t *out);
/* Doubles of workspace model_value needs. */
size_t model_work_size(const struct model *m);
/*
 * Evaluates x (len doubles) under every estimator: values[i] for estimator i
 * (n_est doubles, caller's), sd[i] its standard deviation or NAN when it has
 * none (may be NULL); both NAN for an estimator that has diverged.  work:
 * model_work_size doubles.  Returns 0, WORTH_E_BAD_DIMENSION or
 * WORTH_E_BAD_NUMBER.
 */
int model_value(const struct model *m, const double *x, size_t len, double *values, double *sd,
                double *work);

/* Published snapshots (see est_snap) */

/* Returns the doubles a snapshot of every estimator's query state takes. */
size_t model_snap_size(const struct model *m);
/* Writes that snapshot into out (borrowed). Owner thread only. */
void model_snap(const struct model *m, double *out);
/*
 * model_value, answered from snap (a model_snap of m) instead of the live
 * estimators.  Reads only m's immutable parts (feature map, sizes), so a query
 * thread may call it while the learner updates m.
 */
int model_snap_value(const struct model *m, const double *snap, const double *x, size_t len,
                     double *values, double *sd, double *work);

/* Persistence */

/*
 * Serialises every estimator, the source table and the counters into buf
 * (cap bytes); *len gets the size.  Returns 0 or WORTH_E_TOO_LARGE (call with
 * buf NULL to size).  Carries a header and a CRC-32.
 */
int model_save(const struct model *m, uint8_t *buf, size_t cap, size_t *len);
/*
 * Checks saved model state without loading it: magic, format version and
 * CRC-32.  Returns 0 or WORTH_E_CORRUPT with a message in err.
 */
int model_state_check(const uint8_t *buf, size_t len, char *err, size_t errlen);

/*
 * Restores what model_save wrote, into a model built from the same spec.
 * Returns 0, WORTH_E_CORRUPT or WORTH_E_MISMATCH with m unchanged.
 */
int model_load(struct model *m, const uint8_t *buf, size_t len, char *err, size_t errlen);

#endif /* WORTH_MODEL_H */
