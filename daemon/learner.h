/*
 * learner.h - one model at run time: its queue, its learner thread and the
 * snapshot that queries read.
 *
 * The loop thread is the only producer: it validates requests, fills record
 * slots and commits them in arrival order, numbering transitions.  The writer
 * thread appends committed records to the log and marks them durable.  The
 * learner thread is the only consumer: it applies durable records to the
 * model in order and publishes a snapshot of every estimator's weights (and
 * what sd needs) at most every millisecond and whenever its queue runs dry.
 * Queries take the snapshot under a short lock and never wait for a batch.  A
 * full queue never drops anything: the producer is told there is no space and
 * parks the request.
 *
 * Thread rules: [loop] functions are for the loop thread only, [writer] for
 * the writer thread; the callbacks passed to learner_new are called from the
 * learner thread.
 */
#ifndef WORTH_LEARNER_H
#define WORTH_LEARNER_H

#include <stddef.h>
#include <stdint.h>

#include "learn/model.h"

struct learner;
struct writer;

/* Record types in the queue. */
enum {
    LREC_OBS = 1,        /* a transition */
    LREC_TRAIN = 2,      /* a train request */
    LREC_CHECKPOINT = 3, /* a checkpoint request (label in src when est = 1) */
    LREC_ROLLBACK = 4,   /* a rollback request (plan in job) */
    LREC_DEAD = 5        /* a record whose commit failed: skipped */
};

/* Plain data: a rollback, filled by the loop, then the writer, then used by the learner. */
typedef struct learner_plan_t {
    int64_t checkpoint; /* requested id */
    int replay;         /* re-learn the log after it */
    int by_t;           /* window on t, not seq */
    double lo, hi;      /* the excluded window, inclusive; empty when lo > hi */
    /* filled by the writer */
    int rc; /* 0, or the error to reply */
    char err[200];
    uint64_t cp_seq, cp_training, undone;
    uint8_t *blob; /* the checkpoint's state (mem_alloc, owned by the plan) */
    size_t blob_len;
} learner_plan_t;

/* One queue slot; x and x_next follow in v (2 * dims doubles). */
typedef struct learner_rec_t {
    uint32_t type;
    uint32_t terminal;
    uint64_t seq;     /* OBS: its seq; others: the last transition's seq before it */
    uint64_t ordinal; /* TRAIN: the training's number */
    double r;
    double dt_s;         /* NAN when absent */
    double t_s;          /* NAN when absent */
    uint32_t est;        /* TRAIN: estimator index; CHECKPOINT: 1 when labelled */
    uint32_t passes;     /* TRAIN */
    uint32_t last;       /* 1 on the last record of a request (a commit never splits one) */
    uint64_t conn_id;    /* TRAIN, CHECKPOINT, ROLLBACK: who gets the reply */
    learner_plan_t *job; /* ROLLBACK */
    char src[MODEL_NAME_MAX + 1]; /* OBS: source; CHECKPOINT: label */
    double v[];
} learner_rec_t;

enum learner_event_kind {
    LEV_PROGRESS, /* a training pass finished */
    LEV_TRAINED,  /* a train request finished (rc, passes, change, converged; seq: the
                     mini-batch steps; text: why it was cut short, or NULL; owned) */
    LEV_EXITED,   /* the learner thread has ended; join it */
    LEV_REPLY,    /* a reply for conn_id: rc, and text (owned by the event) */
    LEV_DURABLE,  /* the model's records up to seq are committed */
    LEV_FAILED,   /* the model's records up to seq failed to commit (text: why, owned) */
    LEV_RELEASED  /* the writer has forgotten the model */
};

/* Plain data, passed by pointer to the post callback, which must copy it. */
typedef struct learner_event_t {
    enum learner_event_kind kind;
    struct learner *l;
    uint64_t conn_id;
    int rc;
    unsigned pass, of;
    double change;
    int converged;
    uint64_t seq;
    char *text; /* LEV_REPLY: the fields after "ok":true, or the error message */
} learner_event_t;

/* Called on the learner (or writer) thread; must not block for long. */
typedef void (*learner_post_fn)(void *ctx, const learner_event_t *ev);
/* Called on the learner thread when it frees queue space a producer waits for. */
typedef void (*learner_wake_fn)(void *ctx);

/* Plain data: counters and per-estimator figures from the latest snapshot. */
typedef struct learner_stats_t {
    uint64_t received; /* seq of the last accepted transition */
    uint64_t applied;  /* seq of the last transition learnt (or passed by a rollback) */
    size_t queued;     /* records waiting */
    model_counts_t counts;
    est_stats_t est[MODEL_MAX_EST];
    diag_est_t realised[MODEL_MAX_EST]; /* realised-return figures per estimator */
    diag_drift_t drift;                 /* the drift detector */
    double spread;                      /* running spread of the estimators' predictions */
    unsigned horizon;                   /* steps after which a continuing return is known */
    uint64_t checkpoints;               /* valid checkpoints stored (as the writer last saw) */
    double newest_checkpoint_at;        /* created_at of the newest, 0 for none */
    double last_update;                 /* wall clock, seconds; 0 before the first update */
} learner_stats_t;

/* Plain data: one sample of the learning history. */
typedef struct learner_sample_t {
    double t;                           /* wall clock, seconds */
    uint64_t seq;                       /* last transition learnt */
    double td_rms[MODEL_MAX_EST];       /* each estimator's RMS TD error then */
    double realised_rms[MODEL_MAX_EST]; /* and its realised-return RMS (window); NAN before any */
} learner_sample_t;

/* Most samples learner_history returns. */
#define LEARNER_HISTORY_MAX 1024

/* Plain data: how a learner starts. */
typedef struct learner_opts_t {
    size_t queue_cap;          /* records in the queue */
    uint64_t checkpoint_every; /* automatic checkpoint after this many transitions; 0 = never */
    const char *db_path;       /* for replays after a rollback (borrowed for the life) */
    struct writer *writer;     /* where records and checkpoints go (borrowed) */
    uint64_t seq;              /* last seq in the log (recovered), 0 for a new model */
    uint64_t training;         /* last training ordinal in the log */
    uint64_t model_training;   /* last training ordinal the recovered model includes */
} learner_opts_t;

/* Lifecycle */

/*
 * Starts a learner for model m (transferred) named name, with canonical spec
 * text spec_json (transferred, from mem_alloc).  Returns the learner (owned by
 * the caller; stop, then learner_free after its LEV_EXITED or learner_join).
 */
struct learner *learner_new(const char *name, char *spec_json, struct model *m,
                            const learner_opts_t *o, learner_post_fn post, learner_wake_fn wake,
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

/* Producer side [loop] */

/* Returns how many record slots are free now. */
size_t learner_space(struct learner *l);
/* Returns the i-th free slot (i < learner_space) to fill before committing. */
learner_rec_t *learner_slot(struct learner *l, size_t i);
/*
 * Checks that the k source names (borrowed; NULL means the default source)
 * would fit in the model's source slots.  Returns 0 or WORTH_E_TOO_MANY_SOURCES
 * with a message in err and the index of the first name that does not fit in
 * *bad (may be NULL).
 */
int learner_sources_fit(struct learner *l, const char *const *names, size_t k, size_t *bad,
                        char *err, size_t errlen);
/*
 * Commits the first k filled slots, numbering their transitions, and wakes
 * the writer.  Returns the seq of the last transition accepted so far.
 */
uint64_t learner_commit(struct learner *l, size_t k);
/* Asks to be woken (the wake callback) when space is freed. */
void learner_want_space(struct learner *l);
/* Returns the seq of the last accepted transition. */
uint64_t learner_last_seq(const struct learner *l);
/* Returns the ordinal the next train request gets. */
uint64_t learner_next_training(struct learner *l);

/* Writer side [writer] */

/* Sets *from and *to to the records committed by the loop but not yet durable. */
void learner_pending(struct learner *l, uint64_t *from, uint64_t *to);
/* Returns record k (from <= k < to of learner_pending). */
learner_rec_t *learner_rec(struct learner *l, uint64_t k);
/* Releases records before `to` to the learner thread. */
void learner_set_durable(struct learner *l, uint64_t to);
/* A rollback record will never be applied (its commit failed): it no longer cuts a training. */
void learner_rollback_gone(struct learner *l);
/* The model's id in the database (set by the writer before any record is written). */
int64_t learner_db_id(const struct learner *l);
void learner_set_db_id(struct learner *l, int64_t id);
/* The writer's count of valid checkpoints and the newest one's time (any thread). */
void learner_set_checkpoint_info(struct learner *l, uint64_t count, double newest_at);

/* Queries [loop] */

const char *learner_name(const struct learner *l);
const char *learner_spec(const struct learner *l);
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
/*
 * Copies up to max samples of the RMS TD error history (oldest first) into
 * out; returns how many.  The history lives in memory: it starts again at a
 * restart.  It spans the whole run, thinned as it grows.
 */
size_t learner_history(struct learner *l, learner_sample_t *out, size_t max);

#endif /* WORTH_LEARNER_H */
