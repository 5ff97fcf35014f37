/*
 * proto.h - the request protocol of worthd (schema/protocol.md), version 1.
 *
 * Runs on the loop thread: parses each request line with cJSON (allocating
 * from the per-request arena), validates it completely, and either answers at
 * once, commits transitions to a model's queue, or hands the request to the
 * model's learner or the writer and answers when it reports back (an event,
 * core/event.h).  Owns the model registry and every connection's protocol
 * state.  It never blocks: when a model's queue has no room, the request is
 * parked (PROTO_PARK) and handled again when the learner frees space.
 *
 * The network layer reaches it only through the handler proto_handler fills
 * (net/conn.h); the functions behind the handler are declared here too, for
 * the fuzz target, which drives them without a network.
 */
#ifndef WORTH_PROTO_H
#define WORTH_PROTO_H

#include <stddef.h>
#include <stdint.h>

#include "config.h"
#include "worth/protocol.h"
#include "core/event.h"
#include "live/learner.h"
#include "net/conn.h"

struct proto;
struct writer;

/* Protocol version spoken: the one the client library checks (include/worth/protocol.h). */
#define PROTO_VERSION WORTH_PROTOCOL_VERSION
/* Longest request id, printed as JSON. */
#define PROTO_ID_MAX 256

/* Results of proto_line and proto_bulk (the same as conn.h's). */
enum { PROTO_DONE = CONN_DONE, PROTO_PARK = CONN_PARK };

/* Lifecycle */

/*
 * Returns the protocol state for a daemon configured by cfg (borrowed for its
 * life), writing through w and answering on the connections of conns (both
 * borrowed); post and wake (with ctx) go to every learner it starts.
 */
struct proto *proto_new(const config_t *cfg, struct writer *w, struct conns *conns,
                        event_post_fn post, event_wake_fn wake, void *ctx);
/* Fills *h with the callbacks through which the connections reach p. */
void proto_handler(struct proto *p, conn_handler_t *h);
/* Registers a model recovered at start-up (l transferred). */
void proto_add_recovered(struct proto *p, struct learner *l);
/*
 * Registers a model quarantined at start-up (recover.c): database id, name and reason
 * (borrowed, copied), the seq of the offending transition (0: none).  Requests naming it
 * answer damaged; model.list and model.get show it, model.drop drops it.
 */
void proto_add_damaged(struct proto *p, int64_t id, const char *name, uint64_t seq,
                       const char *reason);
/* Fills *o with the learner options for a model of this daemon. */
void proto_learner_opts(const struct proto *p, learner_opts_t *o);
/* Stops every learner after it has applied its queue, joins them and logs their counts. */
void proto_shutdown(struct proto *p);
void proto_free(struct proto *p);

/* The registry, read (loop thread) */

/* Returns how many models are served; proto_model(p, i) for i below it (borrowed). */
size_t proto_n_models(const struct proto *p);
struct learner *proto_model(const struct proto *p, size_t i);
/* Returns how many models are quarantined, and the name of the i-th (borrowed). */
size_t proto_n_damaged(const struct proto *p);
const char *proto_damaged_name(const struct proto *p, size_t i);

/* Counters for the metrics (loop thread; ops.c) */

/* The ops of the protocol; op i's name ("none" for i == proto_op_count(): before any op). */
size_t proto_op_count(void);
const char *proto_op(size_t i);
/* Requests of op i received, and errors of code answered to them. */
uint64_t proto_requests(const struct proto *p, size_t op);
uint64_t proto_errors(const struct proto *p, size_t op, int code);
/* The wall clock when p was made (seconds since 1970). */
double proto_started_at(const struct proto *p);

/* Operate (loop thread): what the handler calls */

/* A connection opened: returns its protocol state (owned until proto_conn_close). */
void *proto_conn_open(struct proto *p, struct conn *c, int needs_auth);
void proto_conn_close(struct proto *p, struct conn *c, void *state);
/* Returns 1 when no reply waits on c (every answer so far has gone to conn_send). */
int proto_conn_quiet(struct proto *p, struct conn *c);
/* Handles one request line (len bytes without the newline, borrowed). */
int proto_line(struct proto *p, struct conn *c, const char *line, size_t len);
/* Handles the complete payload of the pending bulk request of c. */
int proto_bulk(struct proto *p, struct conn *c, const unsigned char *data, size_t len);
/* The connection ended inside a bulk payload: nothing of it is applied. */
void proto_bulk_truncated(struct proto *p, struct conn *c, size_t got);
/* A line exceeded max_line: answers line_too_long (the server then closes). */
void proto_line_too_long(struct proto *p, struct conn *c);
/* Handles an event a learner or the writer posted (delivered on the loop thread). */
void proto_event(struct proto *p, const event_t *ev);

#endif /* WORTH_PROTO_H */
