/*
 * wr.h - what the files of the writer share (writer.c, log.c, ckpt.c,
 * rescue.c, events.c, wr.c): the writer's state, its jobs and wr.c's helpers.  Not for use
 * outside daemon/store/.
 */
#ifndef WORTH_WR_H
#define WORTH_WR_H

#include <pthread.h>
#include <sqlite3.h>
#include <stddef.h>
#include <stdint.h>

#include "core/event.h"
#include "store/fileguard.h"
#include "store/logblk.h"
#include "store/writer.h"

struct queue;

enum job_kind {
    J_ADD,
    J_CREATE,
    J_DROP,
    J_CHECKPOINT,
    J_LIST,
    J_BACKUP,
    J_EVENT,
    J_DRIFT,
    J_EVENTS,
    J_CUT,
    J_OPS /* fn runs it (retain.c, status.c): also without a database, to answer */
};

struct job {
    enum job_kind kind;
    struct queue *q;
    uint64_t conn_id;
    char *s1, *s2; /* name/spec, label, path, kind/detail */
    uint8_t *blob;
    size_t len, features;
    uint64_t seq, training;
    uint64_t a, b, c; /* J_DRIFT: onset seq, step, onset step */
    double since;     /* J_EVENTS */
    double plant_t;   /* J_CHECKPOINT, J_DRIFT: the plant's t then, NAN when unknown */
    int64_t id;
    unsigned diverged;                           /* J_CHECKPOINT */
    struct job_done *done;                       /* set: the poster waits for the job (J_CUT) */
    void (*fn)(struct writer *w, struct job *j); /* J_OPS: runs it, frees arg */
    void *arg;                                   /* J_OPS: the job's own data */
    struct job *next;
};

/* A poster waiting for its job: signalled once the job has run, whatever came of it. */
struct job_done {
    pthread_mutex_t mu;
    pthread_cond_t cond;
    int done;
};

struct writer {
    sqlite3 *db;
    writer_opts_t o;
    pthread_t thread;
    pthread_mutex_t mu;
    pthread_cond_t cond;
    struct job *head, *tail;
    int kicked, stop, started;
    struct queue **models;
    size_t n, cap;
    uint64_t *from, *upto; /* per model: records [from, upto) taken into the open transaction */
    sqlite3_stmt *ins_blk, *ins_tr, *ins_src;
    logblk_enc_t enc; /* the block being built (log.c); sized for FEAT_MAX_DIMS */
    /* Commit-latency histogram (under mu). */
    uint64_t hist[WRITER_HIST_N], hist_count;
    double hist_sum;
    event_post_fn post;
    void *ctx;
    /* The database file's health (writer thread only). */
    fileguard_t guard;
    int guarded;        /* guard holds the identities of the open file */
    int readonly;       /* the last check found the file not writable */
    int lost;           /* 0, FILEGUARD_REMOVED (a copy back is retried) or _REPLACED */
    double next_rescue; /* db_now() after which a failed copy back is tried again */
    char lost_why[200]; /* why writes are refused while lost or without a connection */
};

/* wr.c: replies, SQL, jobs, the log's statements */
void wr_reply(struct writer *w, struct queue *q, uint64_t conn_id, int rc, const char *fmt, ...)
    __attribute__((format(printf, 5, 6)));
int wr_exec(struct writer *w, const char *sql);
struct job *wr_job(enum job_kind kind, struct queue *q, uint64_t conn_id);
/* Queues j (transferred) behind every job posted before it; any thread. */
void wr_push(struct writer *w, struct job *j);
/* Prepares the log's insert statements on w->db; 0 or -1 (none left prepared). */
int wr_prepare(struct writer *w);
/* Finalizes them (each NULL after). */
void wr_finalize(struct writer *w);

/* log.c: the transition log */
int log_write_group(struct writer *w);

/* ckpt.c: checkpoints */
void ckpt_refresh_info(struct writer *w, struct queue *q);
void ckpt_job_store(struct writer *w, struct job *j);
void ckpt_job_list(struct writer *w, struct job *j);
void ckpt_job_drift(struct writer *w, struct job *j);
void ckpt_job_cut(struct writer *w, struct job *j);

/* rescue.c: the database file's health */
int rescue_health(struct writer *w, int what, char *why, size_t len);
int rescue_may_write(struct writer *w, int what, char *why, size_t len);

/* events.c */
int64_t events_insert_id(struct writer *w, int64_t model, const char *kind, const char *detail);
int64_t events_insert(struct writer *w, struct queue *q, const char *kind, const char *detail);
void events_job_list(struct writer *w, struct job *j);

#endif /* WORTH_WR_H */
