/*
 * writer.h - the one thread that writes worthd's database.
 *
 * It owns the read-write connection.  It appends every model's accepted
 * records to the log in arrival order, a group of them per transaction, and
 * only after COMMIT marks them durable: that releases them to the model's
 * learner and lets the loop acknowledge them.  It also runs the jobs that
 * need the database: creating and dropping models, storing checkpoints,
 * listing them, backups and events.  Results go back to the loop as learner
 * events (EV_REPLY, EV_DURABLE, EV_RELEASED) through the same post
 * callback the learners use.
 */
#ifndef WORTH_WRITER_H
#define WORTH_WRITER_H

#include <sqlite3.h>
#include <stddef.h>
#include <stdint.h>

#include "core/event.h"
#include "core/queue.h"

struct writer;

struct backup_dir;

/* Plain data: the writer's configuration. */
typedef struct writer_opts_t {
    unsigned keep;              /* unlabelled checkpoints kept per model */
    size_t group_max;           /* most records in one transaction */
    struct backup_dir *backups; /* where backups go (borrowed; NULL: backups refused) */
} writer_opts_t;

/*
 * Builds the writer on db (transferred: the writer closes it).  Jobs queue up
 * until writer_start; until then the caller may still use db on its thread.
 */
struct writer *writer_new(sqlite3 *db, const writer_opts_t *o, event_post_fn post, void *ctx);
/* Starts the thread; from now on only the writer uses the database connection. */
void writer_start(struct writer *w);
/* Finishes every queued job and record, stops the thread, closes the database. */
void writer_free(struct writer *w);

/* Wakes the writer: records were committed to some model's ring.  Any thread. */
void writer_kick(struct writer *w);

/* Jobs, queued in order; any thread.  Strings and blobs are copied or transferred as noted. */

/* Registers a model recovered at start-up (already in the database as model_id). */
void writer_add_model(struct writer *w, struct queue *q, int64_t model_id);
/*
 * Inserts a new model row (name and spec borrowed, copied) and registers q;
 * replies to conn_id {"model":..,"features":..} or an error.
 */
void writer_create_model(struct writer *w, struct queue *q, const char *name, const char *spec,
                         size_t features, uint64_t conn_id);
/*
 * Marks the model dropped, forgets q, replies to conn_id (0: nobody)
 * {"persisted":true} or, when the database could not take it,
 * {"persisted":false,"warning":...}, then posts EV_RELEASED for l.
 */
void writer_drop_model(struct writer *w, struct queue *q, uint64_t conn_id);
/*
 * Stores a checkpoint of q (blob transferred, from mem_alloc) at seq and
 * training and plant time plant_t (the t of the last transition learnt, NAN
 * when none had one), in which `diverged` estimators had diverged; label may
 * be NULL.
 * Replies to conn_id when it is not 0.  Retention never deletes the newest
 * valid checkpoint in which none had.
 */
void writer_store_checkpoint(struct writer *w, struct queue *q, uint64_t seq, uint64_t training,
                             double plant_t, unsigned diverged, const char *label, uint8_t *blob,
                             size_t len, uint64_t conn_id);
/*
 * Records in the log that training `ordinal` of q was cut short after
 * `steps` mini-batch steps, so that a replay runs exactly those; returns once
 * that is committed (or has failed, logged).  For the learner thread, which
 * learns nothing more until then.
 */
void writer_cut_training(struct writer *w, struct queue *q, uint64_t ordinal, uint64_t steps);
/* Replies to conn_id with the model's valid checkpoints, newest first. */
void writer_list_checkpoints(struct writer *w, struct queue *q, uint64_t conn_id);
/*
 * Writes a consistent copy of the database into the backup directory as name
 * (copied; NULL: a new name of worthd's, see backup.h); replies to conn_id
 * {"name":..,"path":..,"bytes":..} or an error.
 */
void writer_backup(struct writer *w, const char *name, uint64_t conn_id);
/* Records an event (kind and JSON detail copied); q may be NULL for daemon-wide events. */
void writer_event(struct writer *w, struct queue *q, const char *kind, const char *detail);
/*
 * Records a drift alarm of q (alarm at seq, change from onset_seq; steps as the
 * detector counts them).  With pre_drift, first stores a checkpoint labelled
 * "pre-drift" holding the state of the newest valid checkpoint taken before
 * onset_seq, and names it in the event.
 */
void writer_drift(struct writer *w, struct queue *q, uint64_t seq, uint64_t onset_seq,
                  uint64_t step, uint64_t onset_step, uint64_t alarms, int pre_drift,
                  double plant_t);
/*
 * Replies to conn_id with the events of q (NULL: the daemon-wide ones) at or
 * after since, oldest first, at most limit.
 */
void writer_list_events(struct writer *w, struct queue *q, double since, size_t limit,
                        uint64_t conn_id);

/*
 * Jobs for a model quarantined at start-up (recover.c): it has no learner, so it is named by
 * its database id (and name, copied).
 */

/* Records an event of the model (kind and JSON detail copied). */
void writer_model_event(struct writer *w, int64_t model_id, const char *kind, const char *detail);
/* Marks the model dropped and records a drop event; nothing is posted back. */
void writer_drop_damaged(struct writer *w, int64_t model_id, const char *name, uint64_t conn_id);
/* As writer_list_events, for the model. */
void writer_list_model_events(struct writer *w, int64_t model_id, const char *name, double since,
                              size_t limit, uint64_t conn_id);

/* Buckets of the commit-latency histogram, seconds (the last is +Inf). */
#define WRITER_HIST_N 12
extern const double writer_hist_le[WRITER_HIST_N];
/* Copies the cumulative commit-latency histogram; any thread. */
void writer_commit_hist(struct writer *w, uint64_t counts[WRITER_HIST_N], double *sum,
                        uint64_t *count);

#endif /* WORTH_WRITER_H */
