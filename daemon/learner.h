/*
 * learner.h - one model at run time: its queue, its learner thread and the
 * snapshot that queries read.
 *
 * The loop thread is the only producer: it validates transitions, reserves
 * record slots, fills them and commits them in arrival order.  The learner
 * thread is the only consumer: it applies records to the model in that order
 * and publishes a snapshot of every estimator's weights (and what sd needs)
 * at most every millisecond and whenever its queue runs dry.  Queries take
 * the snapshot under a short lock and never wait for a batch.  A full queue
 * never drops anything: the producer is told there is no space and parks.
 *
 * Thread rules: functions marked [loop] are for the loop thread only; the
 * callbacks passed to learner_new are called from the learner thread.
 */
#ifndef WORTH_LEARNER_H
#define WORTH_LEARNER_H

#include <stddef.h>
#include <stdint.h>

#include "model.h"

struct learner;

/* Record types in the queue. */
enum { LREC_OBS = 1, LREC_TRAIN = 2 };

/* One queue slot; x and x_next follow in v (2 * dims doubles). */
typedef struct learner_rec_t {
    uint32_t type;
    uint32_t terminal;
    double r;
    double dt_s;      /* NAN when absent */
    uint32_t est;     /* LREC_TRAIN: estimator index */
    uint32_t passes;  /* LREC_TRAIN */
    uint64_t conn_id; /* LREC_TRAIN: who gets the progress and the reply */
    char src[MODEL_NAME_MAX + 1];
    double v[];
} learner_rec_t;

enum learner_event_kind {
    LEV_PROGRESS, /* a training pass finished */
    LEV_TRAINED,  /* a train request finished (rc, passes, change, converged) */
    LEV_EXITED    /* the learner thread has ended; join it */
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
} learner_event_t;

/* Called on the learner thread; must not block for long. */
typedef void (*learner_post_fn)(void *ctx, const learner_event_t *ev);
/* Called on the learner thread when it frees queue space a producer waits for. */
typedef void (*learner_wake_fn)(void *ctx);

/* Plain data: counters and per-estimator figures from the latest snapshot. */
typedef struct learner_stats_t {
    uint64_t received; /* accepted (committed) transitions */
    uint64_t applied;  /* transitions learnt */
    size_t queued;     /* records waiting */
    model_counts_t counts;
    est_stats_t est[MODEL_MAX_EST];
    double last_update; /* wall clock, seconds; 0 before the first update */
} learner_stats_t;

/* Lifecycle */

/*
 * Starts a learner for model m (transferred) named name, with canonical spec
 * text spec_json (transferred, from mem_alloc), and a queue of queue_cap
 * records.  Returns the learner (owned by the caller; stop, then
 * learner_free after its LEV_EXITED or learner_join).
 */
struct learner *learner_new(const char *name, char *spec_json, struct model *m, size_t queue_cap,
                            learner_post_fn post, learner_wake_fn wake, void *ctx);
/* Asks the thread to end: after applying the queue, or (discard) at once. */
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
 * Commits the first k filled slots.  Returns the seq of the last transition
 * in them (transitions are numbered from 1 per model).
 */
uint64_t learner_commit(struct learner *l, size_t k);
/* Asks to be woken (the wake callback) when space is freed. */
void learner_want_space(struct learner *l);

/* Queries [loop] */

const char *learner_name(const struct learner *l);
const char *learner_spec(const struct learner *l);
/* The model, for its immutable parts only (names, sizes, feature map). */
const struct model *learner_model(const struct learner *l);
/* Values of x under the latest snapshot; *seq gets the last applied seq.  As model_value. */
int learner_value(struct learner *l, const double *x, size_t len, double *values, double *sd,
                  uint64_t *seq);
void learner_stats(struct learner *l, learner_stats_t *out);

#endif /* WORTH_LEARNER_H */
