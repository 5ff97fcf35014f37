/*
 * recover.h - bringing every model back at start-up.
 *
 * Runs on the main thread before worthd accepts connections: for each live
 * model in the database it rebuilds the model from its spec, restores the
 * newest valid checkpoint and replays the log after it, then hands the model
 * to the protocol registry and the writer (or, when its own rows are damaged,
 * quarantines it).
 */
#ifndef WORTH_RECOVER_H
#define WORTH_RECOVER_H

#include <sqlite3.h>
#include <stddef.h>

#include "store/db.h"
#include "live/learner.h"
#include "store/writer.h"

/* Where recovered models go (the protocol's registry, through the composition root). */
typedef struct recover_sink_t {
    void *ctx;
    const learner_opts_t *opts; /* the learner options of every model (seq etc. are filled) */
    /* A model rebuilt and started (l transferred). */
    void (*model)(void *ctx, struct learner *l);
    /* A model quarantined: its database id, name, the offending seq (0: none), why. */
    void (*damaged)(void *ctx, int64_t id, const char *name, uint64_t seq, const char *reason);
    /*
     * May be NULL.  How far recovery is: model `name` (borrowed), the index-th (from 0) of
     * n, has replayed `done` of its `total` transitions.  Called as each model begins and
     * ends, and during its replay at most every RECOVER_PROGRESS_S seconds.
     */
    void (*progress)(void *ctx, const char *name, size_t index, size_t n, uint64_t done,
                     uint64_t total);
} recover_sink_t;

/* Least time between two progress calls within one model's replay, in seconds. */
#define RECOVER_PROGRESS_S 0.25

/*
 * Recovers every live model of db (borrowed; the writer must not run yet)
 * into sink, registering each with w.  A model that fails for a reason of its
 * own (its spec, a damaged row, corrupt pages of its rows while other models
 * read) is quarantined: handed to sink->damaged, a `quarantined`
 * event queued, an error logged.  Returns 0, or -1 with err when the failure
 * is the database's (the daemon then refuses to start rather than serve a
 * partial state), or -2 with err when stop_asked (may be NULL; called with
 * actx between models and every DB_ABANDON_EVERY transitions of a replay)
 * said worthd is to stop: models recovered so far stay registered, the one
 * being replayed is dropped from memory, its log untouched.
 */
int recover_models(sqlite3 *db, const recover_sink_t *sink, struct writer *w, event_post_fn post,
                   event_wake_fn wake, void *ctx, db_abandon_fn stop_asked, void *actx, char *err,
                   size_t errlen);

#endif /* WORTH_RECOVER_H */
