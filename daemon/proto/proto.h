/*
 * proto.h - the request protocol of worthd (schema/protocol.md), version 1.
 *
 * Runs on the loop thread: parses each request line with cJSON (allocating
 * from the per-request arena), validates it completely, and either answers at
 * once, commits transitions to a model's queue, or hands a train request to
 * the model's learner and answers when the learner reports back.  Owns the
 * model registry.  It never blocks: when a model's queue has no room, the
 * request is parked (PROTO_PARK) and handled again when the learner frees
 * space.
 */
#ifndef WORTH_PROTO_H
#define WORTH_PROTO_H

#include <stddef.h>
#include <stdint.h>

#include "learner.h"
#include "learn/model.h"
#include "net/server.h"
#include "store/writer.h"

struct proto;

/* Protocol version spoken. */
#define PROTO_VERSION 1
/* Longest request id, printed as JSON. */
#define PROTO_ID_MAX 256

/* Results of proto_line and proto_bulk. */
enum { PROTO_DONE = 0, PROTO_PARK = 1 };

/* Plain data: per-connection protocol state, embedded in each connection. */
/* One reply waiting its turn on a connection (the transitions it acknowledges, or earlier ones,
 * are not durable yet). */
struct proto_ack {
    struct slot *slot; /* NULL: ready now */
    uint64_t seq;      /* ready once slot's durable seq reaches it */
    size_t off, len;   /* the reply's text in the connection's ack buffer */
    size_t id_off, id_len;
};

typedef struct proto_conn {
    int needs_auth; /* TCP listener with a token */
    int authed;
    int bulk_applied;         /* pending bulk: "ack":"applied" */
    struct learner *creating; /* a model.create awaiting the database */
    struct proto_ack *acks;   /* replies in order; [ack_head, n_acks) wait */
    size_t n_acks, ack_head, cap_acks;
    char *ackbuf;
    size_t ack_len, ack_cap;
    char model[MODEL_NAME_MAX + 1];  /* pending bulk: target model */
    size_t count;                    /* pending bulk: records */
    char source[MODEL_NAME_MAX + 1]; /* pending bulk: source ("" = default) */
    double dt_s;                     /* pending bulk: NAN when absent */
    char id[PROTO_ID_MAX + 1];       /* id of the pending bulk or train request */
    int has_id;
} proto_conn_t;

/* Lifecycle */

/*
 * Returns the protocol state for a daemon with opts (borrowed for its life),
 * writing through w (borrowed).
 */
struct proto *proto_new(const server_opts_t *opts, struct writer *w, learner_post_fn post,
                        learner_wake_fn wake, void *ctx);
/* Registers a model recovered at start-up (l transferred). */
void proto_add_recovered(struct proto *p, struct learner *l);
/* Returns how many models are registered. */
size_t proto_n_models(const struct proto *p);
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

/* Operate (loop thread) */

void proto_conn_init(proto_conn_t *pc, int needs_auth);
/* Releases what the connection's state holds (it is closing). */
void proto_conn_free(struct proto *p, proto_conn_t *pc);
/*
 * Returns 1 when no reply waits on this connection (every answer so far has
 * gone to conn_send), 0 while one waits for its transitions to be durable.
 */
int proto_conn_quiet(const proto_conn_t *pc);
/* Handles one request line (len bytes without the newline, borrowed). */
int proto_line(struct proto *p, struct conn *c, const char *line, size_t len);
/* Handles the complete payload of the pending bulk request of c. */
int proto_bulk(struct proto *p, struct conn *c, const unsigned char *data, size_t len);
/* The connection ended inside a bulk payload: nothing of it is applied. */
void proto_bulk_truncated(struct proto *p, struct conn *c, size_t got);
/* A line exceeded max_line: answers line_too_long (the server then closes). */
void proto_line_too_long(struct proto *p, struct conn *c);
/*
 * The Prometheus exposition text of every model's figures and the writer's
 * commit latencies (malloc'd, the caller frees); *len gets its length.
 */
char *proto_metrics_text(struct proto *p, size_t *len);
/* Handles an event a learner posted (delivered on the loop thread). */
void proto_event(struct proto *p, struct server *s, const learner_event_t *ev);

#endif /* WORTH_PROTO_H */
