/*
 * fleet_impl.h - what the fleet node's modules share: the node, its shards and
 * the models of a shard.  Internal to daemon/fleet.
 *
 * node.c runs one thread (the fleet thread) that owns every shard and every
 * model: it takes and renews leases, fetches, learns, checkpoints and answers
 * questions.  nats.c calls back on its own threads; those callbacks only put a
 * message on the ask queue (a mutex and a condition variable) or forward a
 * request, and never touch a shard.  shard.c learns and checkpoints; ask.c
 * answers.
 */
#ifndef WORTH_FLEET_IMPL_H
#define WORTH_FLEET_IMPL_H

#include <cjson/cJSON.h>
#include <nats/nats.h>
#include <netinet/in.h>
#include <pthread.h>
#include <stdint.h>
#include <string.h>
#include <time.h>

#include "core/spec.h"
#include "fleet/fleet.h"
#include "learn/feat.h"
#include "learn/model.h"

/* The stream that holds every transition, and its subjects. */
#define FLEET_STREAM   "WORTH"
#define FLEET_SUBJECTS "worth.t.>"
/* Key-value buckets: leases and node heartbeats, checkpoints. */
#define FLEET_KV_LEASE "worth_lease"
#define FLEET_KV_CKPT  "worth_ckpt"
/* Checkpoints are stored in chunks of this many bytes (the server's payload limit is 1 MiB). */
#define FLEET_CHUNK (256u * 1024u)
/* Messages one fetch asks for. */
#define FLEET_BATCH 256
/* The most requests waiting for the fleet thread. */
#define FLEET_ASKS 1024

/* Most windows a model's rollbacks exclude, all told. */
#define FLEET_MAX_WINDOWS 64

/* An excluded window: stream sequences lo..hi, or plant times lo..hi (the transitions' "t"). */
struct fwin {
    int by_time;
    double lo, hi;
};

/* One model of a shard (owned by the shard). */
struct fmodel {
    char name[MODEL_NAME_MAX + 1];
    spec_t *spec;        /* parsed from the model.create message */
    struct model *m;     /* built from spec */
    uint64_t applied;    /* transitions learnt */
    uint64_t rejected;   /* messages refused (bad dimension, bad number, ...) */
    uint64_t last_seq;   /* stream sequence of its newest message taken */
    uint64_t create_seq; /* stream sequence of its model.create */
    uint64_t excluded;   /* transitions left out by the windows */
    uint64_t rollbacks;  /* model.rollback messages applied */
    struct fwin excl[FLEET_MAX_WINDOWS];
    size_t n_excl;
    double *work; /* model_work_size doubles, for value */
};

struct shard {
    unsigned id;
    /* lease */
    int owned;
    uint64_t lease_rev; /* revision of our lease entry */
    int64_t renewed_ms; /* monotonic time the last successful renewal was sent */
    uint64_t seen_rev;  /* a foreign lease: the revision last seen ... */
    int64_t seen_ms;    /* ... and when it was first seen */
    /* consuming */
    char consumer[96];
    natsSubscription *pull;
    natsSubscription *asks;
    int64_t fetch_fail_ms; /* first failed fetch of a run of failures, 0 when none */
    uint64_t seq;          /* newest stream sequence applied */
    uint64_t ck_seq;       /* sequence the newest stored checkpoint covers */
    int64_t ck_ms;         /* when it was stored */
    uint64_t pending;      /* messages of the shard not yet fetched (last fetch's figure) */
    uint64_t since_ck;     /* messages learnt since the newest checkpoint */
    /* models */
    struct fmodel *models;
    size_t n_models, cap_models;
};

/* Requests waiting for the fleet thread (filled on nats.c's threads). */
struct askq {
    pthread_mutex_t mu;
    pthread_cond_t cv;
    natsMsg *msg[FLEET_ASKS];
    size_t head, n;
};

struct node {
    fleet_opts_t o;
    natsConnection *nc;
    jsCtx *js;
    jsOptions jo;
    kvStore *lease, *ckpt;
    struct shard *sh;
    struct askq q;
    natsSubscription *via;  /* worth.via.<node>.> : questions forwarded to the owner */
    natsSubscription *self; /* worth.node.<node>: the node's own figures (ask.c) */
    int owned;              /* shards owned */
    unsigned nodes_alive;   /* nodes whose heartbeat moved within a lease time */
    /* observed heartbeats of the other nodes */
    struct {
        char id[64];
        uint64_t rev;
        int64_t seen_ms;
    } peers[64];
    size_t n_peers;
    uint64_t hb_rev;
    /* --metrics (http.c) */
    int http_fd; /* -1 when off */
    _Atomic int http_stop;
    pthread_t http_thread;
    /* per-transition scratch (no allocation per transition besides nats.c's and cJSON's) */
    double x[FEAT_MAX_DIMS], xn[FEAT_MAX_DIMS];
};

/* The token after the third dot of subj, or NULL: the model of worth.t.<shard>.<model>,
 * worth.q.<shard>.<model> and worth.via.<node>.<model>. */
static inline const char *fleet_subject_model(const char *subj)
{
    const char *p = subj;
    for (int dots = 0; dots < 3 && p; dots++) {
        p = strchr(p, '.');
        if (p)
            p++;
    }
    return p;
}

/* Monotonic milliseconds. */
static inline int64_t fleet_now_ms(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (int64_t)ts.tv_sec * 1000 + ts.tv_nsec / 1000000;
}

/* http.c */
/* Reads a numeric IPv4 HOST:PORT into sa; 0 or -1. */
int fleet_http_parse(const char *hostport, struct sockaddr_in *sa);
/* Listens on hostport (numeric IPv4 HOST:PORT) and serves GET /metrics on a thread of its
 * own.  Returns 0 or -1 (logged). */
int fleet_http_start(struct node *nd, const char *hostport);
/* Stops that thread (before the connection is destroyed: it asks through it). */
void fleet_http_stop(struct node *nd);

/* shard.c */
/* Takes shard s over: restores its newest checkpoint and subscribes from the sequence after
 * it.  Returns 0, or -1 (logged) with the shard left unowned. */
int shard_open(struct node *nd, struct shard *s);
/* Stops consuming s and frees its models (after a lost lease, or on release). */
void shard_close(struct node *nd, struct shard *s, int delete_consumer);
/* Fetches and learns one batch of s; returns the messages taken, or -1 on a fetch error. */
int shard_pump(struct node *nd, struct shard *s);
/* Stores a checkpoint of s (every model, and the sequence it covers).  Returns 0 or -1. */
int shard_checkpoint(struct node *nd, struct shard *s);

/* models.c */
/* Returns the model of s named name, or NULL. */
struct fmodel *fmodel_find(struct shard *s, const char *name);
/* Builds a model from a parsed spec into a new slot of s.  Takes sp.  Returns the slot, or
 * NULL (err filled). */
struct fmodel *fmodel_add(struct shard *s, spec_t *sp, char *err, size_t errlen);
void fmodel_free(struct fmodel *f);
/* Applies a model.create at seq: builds the model (f must be NULL: a second create is
 * counted against the model as rejected). */
void fmodel_create(struct shard *s, struct fmodel *f, const char *name, const cJSON *root,
                   uint64_t seq);
/* Learns the transitions of one message (an object, or {"batch":[...]}) at stream sequence
 * seq into f, leaving out what f's windows exclude; counts applied, rejected, excluded. */
void fmodel_learn(struct node *nd, struct fmodel *f, const cJSON *root, uint64_t seq);
/* Builds f's model afresh from its spec (counts to 0).  Returns 0 or -1 (f unchanged). */
int fmodel_rebuild(struct fmodel *f);

/* relearn.c */
/*
 * Reads a rollback's windows ("exclude": [{"seq":[lo,hi]} | {"t":[lo,hi]}, ...]) into w (at
 * most room).  Returns how many, or -1 with the reason in err.
 */
int relearn_windows(const cJSON *exclude, struct fwin *w, size_t room, char *err, size_t errlen);
/*
 * Applies a model.rollback message at seq: f is built afresh and re-learns its messages
 * after its model.create and before seq from the stream, without its windows old and new.
 * A rollback that cannot be read (or a stream that cannot be read back) is counted as
 * rejected and leaves f as it was.
 */
void relearn_apply(struct node *nd, struct shard *s, struct fmodel *f, const cJSON *root,
                   uint64_t seq);

/* ask.c */
/* Answers one request (fleet thread); destroys msg. */
void ask_answer(struct node *nd, natsMsg *msg);
/* natsMsgHandler of worth.q.<shard>.>: queues msg for the fleet thread. */
void ask_queue(natsConnection *nc, natsSubscription *sub, natsMsg *msg, void *closure);
/* natsMsgHandler of worth.via.<node>.<model>: forwards to the model's owner. */
void ask_forward(natsConnection *nc, natsSubscription *sub, natsMsg *msg, void *closure);
/* Publishes a JSON error reply {"ok":false,"error":{"code","message"}} to reply. */
void ask_error(natsConnection *nc, const char *reply, int code, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));

#endif /* WORTH_FLEET_IMPL_H */
