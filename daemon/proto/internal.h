/*
 * internal.h - what the files of proto/ share: the registry's and a request's
 * structures, and the helpers each file gives the others.  Not for use
 * outside daemon/proto/.
 */
#ifndef WORTH_PROTO_INTERNAL_H
#define WORTH_PROTO_INTERNAL_H

#include <cjson/cJSON.h>
#include <stddef.h>
#include <stdint.h>

#include "common/jw.h"
#include "core/spec.h"
#include "live/learner.h"
#include "roles.h"
#include "net/conn.h"
#include "proto/proto.h"
#include "store/writer.h"

struct slot;

/* One source that a request names (samples.c), and what the request does to it. */
struct req_src {
    char name[MODEL_NAME_MAX + 1];
    double req_t;  /* the t of its last sample so far in the request; -INFINITY before one */
    double last_t; /* the t of its last sample logged or taken so far */
    uint64_t pseq; /* its last pseq logged or taken so far */
    int changed;   /* the request changes its state: a record of it is logged */
};

/* One reply waiting its turn on a connection (the transitions it acknowledges, or earlier
 * ones, are not durable yet). */
/* One reply waiting its turn on a connection (the transitions it acknowledges, or earlier ones,
 * are not durable yet). */
struct proto_ack {
    struct slot *slot; /* NULL: ready now */
    uint64_t seq;      /* ready once slot's durable queue position reaches it (0: failed) */
    size_t off, len;   /* the reply's text in the connection's ack buffer */
    size_t id_off, id_len;
};

/* Plain data: a connection's protocol state (conn_state). */
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
    int bulk_samples;                /* pending bulk: of form samples */
    uint64_t pseq;                   /* pending bulk: the first record's pseq, 0: none */
    char id[PROTO_ID_MAX + 1];       /* id of the pending bulk or train request */
    int has_id;
    int role;                /* what it may do (roles.h; ops.c checks it) */
    int op;                  /* index of its last request's op (-1: none yet) */
    char who[ROLES_WHO_MAX]; /* who it is, for the log and audit events */
} proto_conn_t;

/*
 * A model as the loop sees it: its learner and how far its log is durable.
 * A dropped model's slot lives on until its learner has exited, the writer
 * has released it and no waiting reply refers to it.
 */
struct slot {
    struct learner *l;
    uint64_t durable; /* queue position up to which its records are committed */
    uint64_t failed;  /* queue position up to which a commit failed */
    int fail_code;    /* and its error code */
    char why[200];    /* the reason of the last failure */
    int gone;         /* dropped */
    int exited, released;
    unsigned refs; /* waiting replies that refer to it */
};

/*
 * A model that start-up could not rebuild from its own rows (recover.c): quarantined.  It
 * has no learner; it keeps its name taken (model.create answers model_exists) until
 * model.drop, and every other request naming it answers damaged.
 */
struct quarantined {
    char *name;   /* owned */
    int64_t id;   /* its row in the models table */
    uint64_t seq; /* the offending transition, 0 when no single row is to blame */
    char *reason; /* owned */
};

struct proto {
    const config_t *o;
    struct writer *w;
    struct conns *conns;  /* every connection, for replies that come later */
    struct slot **models; /* registry, o->max_models entries, first n used */
    size_t n;
    struct slot **dropped; /* dropped, not yet freed */
    size_t n_dropped, cap_dropped;
    struct quarantined *damaged; /* quarantined at start-up, first n_damaged used */
    size_t n_damaged;
    event_post_fn post;
    event_wake_fn wake;
    void *ctx;
    jw_t out; /* the reply being written (reused: no allocation at its high-water mark) */
    /* Per-request scratch, sized for the largest model (grown on create). */
    double *vals, *sds;
    const char **srcs;      /* max_batch source names of a batch */
    struct req_src *rsrc;   /* EST_MAX_SOURCES + 1: the sources one request names (samples.c) */
    size_t n_rsrc;
    char err[512];
    /* A value request's figures: health, headline, realised (too big for the loop's stack). */
    learner_stats_t qstats;
    /* ops.c: requests and errors answered, by op (the last row: before any op was known). */
    uint64_t *n_requests;
    uint64_t *n_errors; /* [op][-code], PROTO_CODES per op */
    double started_at;  /* wall clock at proto_new, seconds */
};

/* Error codes counted per op (their negated values index n_errors). */
#define PROTO_CODES 64

/* A request being handled: its tree, id text and connection. */
struct req {
    struct proto *p;
    struct conn *c;
    cJSON *root;
    const char *id; /* printed id, or NULL */
};

#define FAIL(rq, code, ...) reply_error((rq)->p, (rq)->c, (rq)->id, (code), -1, __VA_ARGS__)
/* FAIL, then the value a request handler returns when it has answered. */
#define fail_done(rq, code, ...) (FAIL(rq, code, __VA_ARGS__), PROTO_DONE)

/* What reply_fail_one marks failed: sl's replies waiting for seqs up to upto. */ struct fail_ctx {
    struct proto *p;
    struct slot *sl;
    uint64_t upto;
};

/* The member name of obj, or NULL (cJSON's case-sensitive lookup). */
static inline const cJSON *field(const cJSON *obj, const char *name)
{
    return cJSON_GetObjectItemCaseSensitive(obj, name);
}

/* The protocol state of connection c. */
static inline proto_conn_t *pconn(struct conn *c)
{
    return (proto_conn_t *)conn_state(c);
}

/* reply.c: the frame of reply lines, their order, durable acknowledgements */
void reply_begin(jw_t *o, int ok, const char *id);
void reply_end(jw_t *o, struct conn *c);
void reply_format_error(struct proto *p, const char *id, int code, long index, const char *msg);
/* The same with more members (raw JSON, e.g. ",\"seq\":4") after message and index. */
void reply_format_error_with(struct proto *p, const char *id, int code, long index, const char *msg,
                             const char *more);
void reply_error(struct proto *p, struct conn *c, const char *id, int code, long index,
                 const char *fmt, ...) __attribute__((format(printf, 6, 7)));

void reply_send(struct conn *c, const char *b, size_t n);
void reply_flush_one(struct conn *c, void *ctx);
void reply_fail_one(struct conn *c, void *ctx);
/* Queues p->out to be sent once sl's records before queue position pos are durable. */
void reply_durable(struct proto *p, struct conn *c, struct slot *sl, uint64_t pos, const char *id);
/* A connection's reply state: new, with nothing waiting (quiet), and freed (its waiting
 * replies' slot references dropped: reg_sweep then frees what they held). */
proto_conn_t *reply_conn_new(int needs_auth);
int reply_conn_quiet(const proto_conn_t *pc);
void reply_conn_free(proto_conn_t *pc);

/* registry.c: live, dropped and quarantined models */
struct slot *reg_find_slot(struct proto *p, const char *name, size_t *at);
struct learner *reg_find_model(struct proto *p, const char *name, size_t *at);
struct quarantined *reg_find_damaged(struct proto *p, const char *name, size_t *at);
void reg_reply_damaged(struct proto *p, struct conn *c, const char *id,
                       const struct quarantined *dm);
struct slot *reg_slot_of(struct proto *p, const struct queue *q);
struct slot *reg_new_slot(struct learner *l, uint64_t durable);
void reg_maybe_free(struct proto *p, struct slot *sl);
/* Frees every dropped slot nothing refers to any more (after replies were flushed). */
void reg_sweep(struct proto *p);
void reg_unregister(struct proto *p, size_t at, int tell_writer, uint64_t conn_id);
void reg_forget_damaged(struct proto *p, size_t at, uint64_t conn_id);
void proto_learner_opts(const struct proto *p, learner_opts_t *o);

/* fields.c: a request's members */
int fld_dup_key(const cJSON *obj, const char **which);
int fld_only_keys(const cJSON *obj, const char *const *allowed, const char **bad);
const char *fld_string(struct req *rq, const char *name);
struct learner *fld_model(struct req *rq);
const struct quarantined *fld_damaged(struct req *rq);
int fld_number(const cJSON *obj, const char *name, double *v, int *code, char *err, size_t errlen,
               const char *where);
int fld_vector(const cJSON *arr, size_t n, double *out, const char *name, int *code, char *err,
               size_t errlen, const char *where);
/*
 * A state: an array of meta->dims finite numbers, or (a model with named
 * dimensions) an object naming each dimension once.  Returns 1 with out
 * filled, or 0 with code and message set.
 */
int fld_state(const cJSON *v, const spec_meta_t *meta, double *out, const char *name, int *code,
              char *err, size_t errlen, const char *where);
void fld_ensure_scratch(struct proto *p, size_t n_est);
void fld_keep_id(struct req *rq);
int fld_park(struct learner *l);

/* ingest.c */
int do_observe(struct req *rq);
int do_bulk_header(struct req *rq);
/* Replies to an accepted observe (more: the members after seq, e.g. ",\"count\":3"): now with
 * applied, else once everything committed so far is durable. */
void ingest_ack(struct proto *p, struct conn *c, const char *id, struct learner *l, uint64_t seq,
                const char *more, int applied);

/* Largest |r| accepted.  Squares of TD errors must stay finite in a double for the estimators
 * and their running statistics; 1e12 leaves them room (1e24 each) and is far beyond any reward
 * a plant reports in its own units. */
#define PROTO_MAX_ABS_R 1e12

/* samples.c: samples paired into transitions, producer sequences, the sources op */
/* observe with "sample" or "samples" (rq's model is l). */
int smp_observe(struct req *rq, struct learner *l, int applied);
/* The records of an observe.bulk of form samples: count records of dims + 3 doubles. */
int smp_bulk(struct proto *p, struct conn *c, const char *id, struct learner *l,
             const unsigned char *data, size_t count, int applied);
/* Reads an optional "pseq" of o (an integer 1..2^53) into *pseq (0 when absent); 1, or 0 with
 * code and message. */
int smp_pseq(const cJSON *o, uint64_t *pseq, int *code, char *err, size_t errlen,
             const char *where);
/*
 * The k transitions parsed into the queue's first slots, some with a pseq: drops those
 * already logged (at or below their source's last pseq), moves the rest together and adds
 * the records of the sources' new pseqs.  Returns the slots to commit (*skipped gets how many
 * were dropped), -1 when it answered the request (an error), or -2 to park it.  Changes
 * nothing when it does not return slots.
 */
long smp_dedup(struct proto *p, struct conn *c, const char *id, struct learner *l, size_t k,
               size_t *skipped);
int do_sources(struct req *rq);

/* query.c */
int do_list(struct req *rq);
int do_get(struct req *rq);
int do_value(struct req *rq);
int do_stats(struct req *rq);
int do_history(struct req *rq);

/* proto.c: the ops table, read */
size_t proto_n_ops(void);
const char *proto_op_name(size_t i);

/* ops.c: roles, counts, audit; status, retention, model.purge */
/* A request of op i (named op) arrived on rq's connection: counts it and checks the
 * connection's role.  Returns 0 to go on, or 1 when it was answered (forbidden). */
int ops_admit(struct req *rq, size_t i, const char *op);
/* An error reply of code on c: counted under c's last op. */
void ops_count_error(struct proto *p, struct conn *c, int code);
/* A new connection's role and name (needs_auth: TCP with tokens, no role until auth). */
void ops_conn_init(struct proto *p, struct conn *c, proto_conn_t *pc, int needs_auth);
/* The Unix peer of c has these credentials (net/conn.h): its role by the peer rules. */
void ops_peer(struct proto *p, struct conn *c, const conn_peer_t *peer);
/* auth with token: returns 1 and sets the connection's role when it is one of worthd's. */
int ops_auth(struct req *rq, const char *token);
int do_status(struct req *rq);
int do_retention(struct req *rq);
int do_purge(struct req *rq);

/* admin.c */
int do_hello(struct req *rq);
int do_auth(struct req *rq);
int do_create(struct req *rq);
int do_drop(struct req *rq);
int do_train(struct req *rq);
int do_events(struct req *rq);
int do_checkpoint(struct req *rq);
int do_checkpoints(struct req *rq);
int do_rollback(struct req *rq);
int do_backup(struct req *rq);

#endif /* WORTH_PROTO_INTERNAL_H */
