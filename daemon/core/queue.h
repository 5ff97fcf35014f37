/*
 * queue.h - one model's record queue, shared by the loop, the writer and the
 * learner without any of them knowing the others.
 *
 * The loop thread is the only producer: it validates requests, fills record
 * slots beyond head and commits them in arrival order, numbering the
 * transitions.  The writer thread appends committed records to the log and,
 * after COMMIT, marks them durable.  The learner thread is the only consumer:
 * it takes durable records in order and releases them when applied.  A full
 * queue never drops anything: the producer is told there is no space and
 * parks the request until the consumer frees some.
 *
 * The queue also carries what the writer needs of its model (name, dims, the
 * database id, its checkpoint count) and the flag that cuts a training short
 * (queue_cut): set while the consumer is asked to stop, or while a rollback
 * waits behind the record being applied.
 *
 * Thread rules: [loop], [writer] and [learner] functions are for that thread
 * only; the others take the queue's lock and may be called from any thread.
 */
#ifndef WORTH_QUEUE_H
#define WORTH_QUEUE_H

#include <stdatomic.h>
#include <stddef.h>
#include <stdint.h>

#include "learn/model.h"

struct queue;

/* Record types. */
enum {
    QREC_OBS = 1,        /* a transition */
    QREC_TRAIN = 2,      /* a train request (estimator name in src) */
    QREC_CHECKPOINT = 3, /* a checkpoint request (label in src when est = 1) */
    QREC_ROLLBACK = 4,   /* a rollback request (plan in job) */
    QREC_DEAD = 5,       /* a record whose commit failed: skipped */
    QREC_SOURCE = 6      /* a source's pairing state after a request (live/pairing.h): its last
                            sample (t_s, x in v, r, terminal; est = 1 when it has one) and
                            pseq, for the sources table; not learnt */
};

/* Plain data: a rollback, filled by the loop, then the writer, then used by the learner. */
typedef struct queue_plan_t {
    int64_t checkpoint; /* requested id */
    int replay;         /* re-learn the log after it */
    int by_t;           /* window on t, not seq */
    double lo, hi;      /* the excluded window, inclusive; empty when lo > hi */
    /* filled by the writer */
    int rc; /* 0, or the error to reply */
    char err[200];
    uint64_t cp_seq, cp_training, undone;
    double cp_plant_t; /* the checkpoint's plant t, NAN when none */
    uint64_t untimed;  /* by_t: transitions in range without a t, so in no window */
    uint8_t *blob;     /* the checkpoint's state (mem_alloc, owned by the plan) */
    size_t blob_len;
} queue_plan_t;

/* One queue slot; x and x_next follow in v (2 * dims doubles). */
typedef struct queue_rec_t {
    uint32_t type;
    uint32_t terminal;
    uint64_t seq;     /* OBS: its seq; others: the last transition's seq before it */
    uint64_t ordinal; /* TRAIN: the training's number */
    double r;
    double dt_s;       /* NAN when absent */
    double t_s;        /* NAN when absent */
    uint32_t est;      /* TRAIN: estimator index; CHECKPOINT: 1 when labelled */
    uint32_t passes;   /* TRAIN */
    uint32_t last;     /* 1 on the last record of a request (a commit never splits one) */
    uint64_t conn_id;  /* TRAIN, CHECKPOINT, ROLLBACK: who gets the reply */
    uint64_t pseq;     /* SOURCE: the last producer sequence of the source's transitions */
    queue_plan_t *job; /* ROLLBACK */
    char src[MODEL_NAME_MAX + 1]; /* OBS: source; TRAIN: estimator; CHECKPOINT: label */
    double v[];
} queue_rec_t;

/* What queue_stop adds to the cut flag (rollbacks add one each, far below it). */
#define QUEUE_CUT_STOP (1 << 24)

/* Lifecycle */

/*
 * Returns a queue of cap records for model `name` (copied) of dims inputs,
 * whose last transition so far is seq (0 for a new model).  Owned by the
 * caller: queue_free once nobody uses it.
 */
struct queue *queue_new(const char *name, size_t dims, size_t cap, uint64_t seq);
/* Frees the queue and the rollback plans of records never applied. */
void queue_free(struct queue *q);
/* Returns the bytes queue_new allocates for cap records of dims inputs. */
double queue_footprint(size_t dims, size_t cap);

/* Producer side [loop] */

/* Returns how many record slots are free now. */
size_t queue_space(struct queue *q);
/* Returns the i-th free slot (i < queue_space) to fill before committing. */
queue_rec_t *queue_slot(struct queue *q, size_t i);
/* Copies free slot `from` over free slot `to` (record and both vectors). */
void queue_slot_copy(struct queue *q, size_t to, size_t from);
/*
 * Commits the first k filled slots, numbering their transitions (rollbacks
 * raise the cut flag).  Returns the seq of the last transition accepted so
 * far.  The caller then wakes the writer.
 */
uint64_t queue_commit(struct queue *q, size_t k);
/* Asks to be told (queue_release returns 1) when space is freed. */
void queue_want_space(struct queue *q);
/* Returns the seq of the last accepted transition. */
uint64_t queue_last_seq(const struct queue *q);
/*
 * Returns the queue position after the last committed record: a request's
 * records are durable once the writer's EV_DURABLE position reaches it.
 */
uint64_t queue_position(const struct queue *q);

/*
 * The pairing of samples (live/pairing.h) runs ahead of the log: when a commit
 * holding a source's state fails, what the loop paired since no longer
 * matches the log.  The writer then marks the queue (queue_mark_unpaired) and
 * fails every record of it still to be written, until the loop has reloaded
 * the pairing from the log and cleared the mark (queue_unmark_unpaired).
 */
/* Returns 1 while the queue is marked; *unwritten gets the records committed, not yet
 * written (the loop reloads once it is 0). */
int queue_unpaired(struct queue *q, uint64_t *unwritten);
void queue_unmark_unpaired(struct queue *q);

/* Writer side [writer] */

void queue_mark_unpaired(struct queue *q);

/* Sets *from and *to to the records committed but not yet durable. */
void queue_pending(struct queue *q, uint64_t *from, uint64_t *to);
/* Returns record k (from <= k < to of queue_pending; or any not yet released). */
queue_rec_t *queue_rec(struct queue *q, uint64_t k);
/* Releases records before `to` to the consumer. */
void queue_set_durable(struct queue *q, uint64_t to);
/* A rollback record will never be applied (its commit failed): it no longer cuts. */
void queue_rollback_gone(struct queue *q);

/* Consumer side [learner] */

/*
 * Waits until durable records not yet taken are there or the queue is
 * stopped.  Returns 1 with [*from, *to) taken, to apply (at most max of
 * them), or 0 when stopped and nothing more is to be applied: then
 * [*from, *to) are the records left (discarded, or never durable), for their
 * requests' replies.
 */
int queue_take(struct queue *q, size_t max, uint64_t *from, uint64_t *to);
/* 1 when every durable record has been taken. */
int queue_idle(struct queue *q);
/*
 * The records before `to` (at most those taken) are applied: their slots may
 * be filled again.  Returns 1 when the producer asked for space (it is to be
 * woken), and *empty = 1 when nothing durable waits to be applied.
 */
int queue_release(struct queue *q, uint64_t to, int *empty);
/* A rollback taken from the queue has been applied: it no longer cuts. */
void queue_rollback_done(struct queue *q);
/* Asks the consumer to stop: after the records queued, or (discard) at once. */
void queue_stop(struct queue *q, int discard);
/* 1 once queue_stop(q, 1) was called, or queue_discard. */
int queue_discarding(struct queue *q);
/* Stops applying what is queued (it is in the log: the next start learns it). */
void queue_discard(struct queue *q);

/* Any thread */

/* The flag est_train reads before every step: nonzero cuts a training short. */
const atomic_int *queue_cut(const struct queue *q);
/* 1 when the cut comes from a stop (worthd stopping or the model dropped). */
int queue_stopping(const struct queue *q);
const char *queue_name(const struct queue *q);
size_t queue_dims(const struct queue *q);
/* Records waiting (committed, not yet applied). */
size_t queue_depth(struct queue *q);
/* The model's id in the database (set by the writer before any record is written). */
int64_t queue_db_id(const struct queue *q);
void queue_set_db_id(struct queue *q, int64_t id);
/* The writer's count of valid checkpoints and the newest one's time. */
void queue_set_checkpoint_info(struct queue *q, uint64_t count, double newest_at);
void queue_checkpoint_info(struct queue *q, uint64_t *count, double *newest_at);

#endif /* WORTH_QUEUE_H */
