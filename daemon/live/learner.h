/*
 * learner.h - one model at run time: its learner thread and the snapshot
 * that queries read.
 *
 * The learner owns the model and its record queue (core/queue.h): the loop
 * thread fills the queue (through learner_commit, which also keeps the
 * source table's mirror in the pairing, live/pairing.h), the writer thread logs it, and the learner
 * thread applies what is durable, in order, and publishes a snapshot of every estimator's weights
 * (and what sd needs) at most every 10 ms and whenever its queue runs dry.  Queries take the
 * snapshot under a short lock and never wait for a batch.
 *
 * Thread rules: [loop] functions are for the loop thread only; the callbacks
 * passed to learner_new are called from the learner thread.
 */
#ifndef WORTH_LEARNER_H
#define WORTH_LEARNER_H

#include <stddef.h>
#include <stdint.h>

#include <sqlite3.h>

#include "core/event.h"
#include "core/spec.h"
#include "learn/model.h"

struct learner;
struct pairing;
struct queue;
struct writer;

/* Plain data: an input check raised now (learn/inputs.h). */
typedef struct learner_input_t {
    int kind;                     /* enum inputs_kind */
    char src[MODEL_NAME_MAX + 1]; /* the source */
    int dim;                      /* the dimension; -1 for silent */
    double since;                 /* plant time the condition began */
} learner_input_t;

/* Most input checks a snapshot lists. */
#define LEARNER_INPUTS_MAX 32

/* Plain data: counters and per-estimator figures from the latest snapshot. */
typedef struct learner_stats_t {
    uint64_t received; /* seq of the last accepted transition */
    uint64_t applied;  /* seq of the last transition learnt (or passed by a rollback) */
    size_t queued;     /* records waiting */
    model_counts_t counts;
    est_stats_t est[MODEL_MAX_EST];
    diag_est_t realised[MODEL_MAX_EST]; /* realised-return figures per estimator */
    health_est_t health[MODEL_MAX_EST]; /* each estimator's verdict (learn/health.h) */
    health_head_t head;                 /* the headline estimator and why */
    double returns_rms;                 /* RMS of the realised returns over the window */
    diag_drift_t drift;                 /* the drift alarm (it follows the headline's detector) */
    size_t drift_follows;               /* the estimator whose detector it follows */
    diag_drift_t drift_est[MODEL_MAX_EST]; /* each estimator's own detector */
    double spread;                         /* running spread of the estimators' predictions */
    unsigned horizon;                      /* steps after which a continuing return is known */
    uint64_t checkpoints;                  /* valid checkpoints stored (as the writer last saw) */
    double newest_checkpoint_at;           /* created_at of the newest, 0 for none */
    double last_update;                    /* wall clock, seconds; 0 before the first update */
    double plant_t;  /* the t of the last transition learnt that had one; NAN: none */
    size_t n_inputs; /* input checks raised now (the first LEARNER_INPUTS_MAX listed) */
    learner_input_t inputs[LEARNER_INPUTS_MAX];
} learner_stats_t;

/* Plain data: how a learner starts. */
typedef struct learner_opts_t {
    size_t queue_cap;          /* records in the queue */
    uint64_t checkpoint_every; /* automatic checkpoint after this many transitions; 0 = never */
    const char *db_path;       /* for replays after a rollback (borrowed for the life) */
    struct writer *writer;     /* where records and checkpoints go (borrowed) */
    uint64_t seq;              /* last seq in the log (recovered), 0 for a new model */
    uint64_t training;         /* last training ordinal in the log */
    uint64_t model_training;   /* last training ordinal the recovered model includes */
    double plant_t;            /* the t of the last transition the recovered model learnt, or NAN
                                  (a new model: set it NAN too) */
} learner_opts_t;

/* Lifecycle */

/*
 * Starts a learner for model m (transferred) named name, with canonical spec
 * text spec_json (transferred, from mem_alloc).  Returns the learner (owned by
 * the caller; stop, then learner_free after its LEV_EXITED or learner_join).
 */
struct learner *learner_new(const char *name, char *spec_json, struct model *m,
                            const learner_opts_t *o, event_post_fn post, event_wake_fn wake,
                            void *ctx);
/* Returns the bytes learner_new allocates for a model of dims inputs besides the model itself
 * (its queue of o->queue_cap records and its history), for a limit checked before it. */
double learner_footprint(size_t dims, const learner_opts_t *o);
/*
 * Asks the thread to end: after applying the queue and taking a checkpoint
 * of what it learnt since the last one, or (discard) at once.
 */
void learner_stop(struct learner *l, int discard);
/* Waits for the thread to end (it must have been stopped). */
void learner_join(struct learner *l);
/* Joins if needed and frees everything.  [loop] */
void learner_free(struct learner *l);
/*
 * The model's names, units and sample rules (copied; the default is unnamed
 * dimensions, the reward of the next sample, no gap limit), and its sources'
 * pairing state loaded from db for model_id (recovery: db is worthd's
 * connection; NULL for a new model).  Before anything is committed.  Returns
 * 0 or a worth code with err (pairing_load).  [loop]
 */
int learner_set_meta(struct learner *l, const spec_meta_t *meta, sqlite3 *db, int64_t model_id,
                     char *err, size_t errlen);

/* Producer side [loop] */

/* Returns the model's queue (owned by the learner): queue_space and queue_slot to fill it. */
struct queue *learner_queue(const struct learner *l);
/*
 * Commits the first k filled slots of the queue (queue_commit), remembering
 * new sources, and wakes the writer.  Returns the seq of the last transition
 * accepted so far.
 */
uint64_t learner_commit(struct learner *l, size_t k);
/* Returns the ordinal the next train request gets. */
uint64_t learner_next_training(struct learner *l);
/* The pairing of the model's samples (owned by the learner). */
struct pairing *learner_pairing(const struct learner *l);
/*
 * Returns 0 when the pairing matches the log; after a failed commit of a
 * source's state (queue_mark_unpaired) it is reloaded from the log once every
 * record committed before is answered, and until then this returns
 * storage_error with err.
 */
int learner_pairing_check(struct learner *l, char *err, size_t errlen);

/* Queries [loop] */

const char *learner_name(const struct learner *l);
const char *learner_spec(const struct learner *l);
const spec_meta_t *learner_meta(const struct learner *l);
/* The model, for its immutable parts only (names, sizes, feature map). */
const struct model *learner_model(const struct learner *l);
/* Values of x under the latest snapshot; *seq gets the last applied seq.  As model_value. */
int learner_value(struct learner *l, const double *x, size_t len, double *values, double *sd,
                  uint64_t *seq);
/*
 * Several values from one snapshot: learner_read_begin holds the snapshot
 * (returning its last applied seq) until learner_read_end, and every
 * learner_read_value between them answers from it, so one request never mixes
 * weights of different moments.  The learner cannot publish meanwhile: keep
 * the work between the two bounded (the protocol caps it per request).
 */
uint64_t learner_read_begin(struct learner *l);
int learner_read_value(struct learner *l, const double *x, size_t len, double *values, double *sd);
void learner_read_end(struct learner *l);
void learner_stats(struct learner *l, learner_stats_t *out);
/* The width of the model's history buckets in plant time, seconds (store/history.h). */
double learner_history_width(const struct learner *l);

#endif /* WORTH_LEARNER_H */
