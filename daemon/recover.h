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
#include "proto/proto.h"
#include "store/writer.h"

/*
 * Recovers every live model of db (borrowed; the writer must not run yet)
 * into p, registering each with w.  A model that fails for a reason of its
 * own (its spec, a damaged row, corrupt pages of its rows while other models
 * read) is quarantined: registered with proto_add_damaged, a `quarantined`
 * event queued, an error logged.  Returns 0, or -1 with err when the failure
 * is the database's (the daemon then refuses to start rather than serve a
 * partial state), or -2 with err when stop_asked (may be NULL; called with
 * actx between models and every DB_ABANDON_EVERY transitions of a replay)
 * said worthd is to stop: models recovered so far stay registered, the one
 * being replayed is dropped from memory, its log untouched.
 */
int recover_models(sqlite3 *db, struct proto *p, struct writer *w, learner_post_fn post,
                   learner_wake_fn wake, void *ctx, db_abandon_fn stop_asked, void *actx, char *err,
                   size_t errlen);

#endif /* WORTH_RECOVER_H */
