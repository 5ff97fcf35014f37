/*
 * writer.c - the writer thread: its job queue, its turn, and the API the
 * loop and the learners post jobs through (writer.h).
 *
 * Owns the thread, the job queue and the list of models it writes for.  Each
 * turn it runs the queued jobs in order (model rows, checkpoints, listings,
 * backups, events: ckpt.c, events.c, backup.c), then appends every model's
 * pending records (log.c).  It never touches a model's mutable state and
 * never blocks the loop: it waits only on its own condition variable.
 * Before any write it asks whether the database file is still the one it
 * writes (rescue.c).
 */
#include "store/writer.h"

#include <errno.h>
#include <fcntl.h>
#include <math.h>
#include <pthread.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "common/jw.h"
#include "common/mem.h"
#include "core/event.h"
#include "core/queue.h"
#include "learn/feat.h"
#include "common/say.h"
#include "store/backup.h"
#include "store/db.h"
#include "store/fileguard.h"
#include "store/wr.h"
#include "worth/errors.h"

void wr_reply(struct writer *w, struct queue *q, uint64_t conn_id, int rc, const char *fmt, ...)
    __attribute__((format(printf, 5, 6)));

static void wr_add_model(struct writer *w, struct queue *q)
{
    if (w->n == w->cap) {
        w->cap = w->cap ? 2 * w->cap : 16;
        w->models = mem_realloc(w->models, w->cap * sizeof *w->models);
        w->from = mem_realloc(w->from, w->cap * sizeof *w->from);
        w->upto = mem_realloc(w->upto, w->cap * sizeof *w->upto);
    }
    w->models[w->n++] = q;
}

/* ---- jobs -------------------------------------------------------------------------------- */

static void job_create(struct writer *w, struct job *j)
{
    char why[256];
    int code = rescue_may_write(w, FILEGUARD_ALL, why, sizeof why);
    if (code) {
        wr_reply(w, j->q, j->conn_id, code, "cannot store the model: %s", why);
        return;
    }
    sqlite3_stmt *st = NULL;
    int ok = sqlite3_prepare_v2(w->db, "INSERT INTO models(name, spec, created_at) VALUES(?,?,?)",
                                -1, &st, NULL) == SQLITE_OK;
    if (ok) {
        sqlite3_bind_text(st, 1, j->s1, -1, SQLITE_STATIC);
        sqlite3_bind_text(st, 2, j->s2, -1, SQLITE_STATIC);
        sqlite3_bind_double(st, 3, db_now());
        ok = sqlite3_step(st) == SQLITE_DONE;
    }
    sqlite3_finalize(st);
    if (!ok) {
        say_error("model %s: cannot store it: %s", j->s1, sqlite3_errmsg(w->db));
        wr_reply(w, j->q, j->conn_id, db_error_code(w->db), "cannot store the model: %s",
                 sqlite3_errmsg(w->db));
        return;
    }
    queue_set_db_id(j->q, sqlite3_last_insert_rowid(w->db));
    wr_add_model(w, j->q);
    events_insert(w, j->q, "create", "{}");
    jw_t jb;
    jw_init(&jb);
    jw_fmt(&jb, ",\"model\":");
    jw_str(&jb, j->s1);
    jw_fmt(&jb, ",\"features\":%zu", j->features);
    wr_reply(w, j->q, j->conn_id, 0, "%s", jb.b);
    jw_close(&jb);
}

static void job_drop(struct writer *w, struct job *j)
{
    for (size_t i = 0; j->q && i < w->n; i++)
        if (w->models[i] == j->q) {
            w->models[i] = w->models[--w->n];
            break;
        }
    /* A quarantined model has no learner: its id and name came with the job. */
    int64_t id = j->q ? queue_db_id(j->q) : j->id;
    const char *name = j->q ? queue_name(j->q) : j->s1;
    char why[256] = "";
    int stored = 0;
    if (!id) {
        stored = 1; /* never stored: nothing to mark */
    } else if (!w->db || rescue_may_write(w, FILEGUARD_ALL, why, sizeof why) != 0) {
        if (!w->db)
            snprintf(why, sizeof why, "%s", w->lost_why);
    } else {
        sqlite3_stmt *st = NULL;
        if (sqlite3_prepare_v2(w->db, "UPDATE models SET dropped_at = ? WHERE id = ?", -1, &st,
                               NULL) == SQLITE_OK) {
            sqlite3_bind_double(st, 1, db_now());
            sqlite3_bind_int64(st, 2, id);
            stored = sqlite3_step(st) == SQLITE_DONE;
        }
        if (!stored)
            snprintf(why, sizeof why, "%s: %s", worth_err_name(db_error_code(w->db)),
                     sqlite3_errmsg(w->db));
        sqlite3_finalize(st);
        if (stored)
            events_insert_id(w, id, "drop", "{}");
    }
    if (stored) {
        wr_reply(w, j->q, j->conn_id, 0, ",\"persisted\":true");
    } else {
        say_error("model %s: dropped in memory, but the drop could not be stored: %s; it comes "
                  "back at the next start unless dropped again",
                  name, why);
        jw_t jb;
        jw_init(&jb);
        jw_fmt(&jb, ",\"persisted\":false,\"warning\":");
        char msg[512];
        snprintf(msg, sizeof msg,
                 "dropped in memory only: the database could not store the drop (%s); the model "
                 "comes back at the next start unless it is dropped again",
                 why);
        jw_str(&jb, msg);
        wr_reply(w, j->q, j->conn_id, 0, "%s", jb.b);
        jw_close(&jb);
    }
    if (!j->q)
        return;
    event_t ev = {.kind = EV_RELEASED, .q = j->q};
    w->post(w->ctx, &ev);
}

static void job_backup(struct writer *w, struct job *j)
{
    char why[1024], name[BACKUP_NAME_MAX + 1];
    uint64_t bytes = 0;
    int code = WORTH_E_STORAGE_ERROR;
    if (!w->o.backups)
        snprintf(why, sizeof why, "worthd has no backup directory");
    else if (!w->db) /* lost, and not reopened: the data is in the file lost_why names */
        snprintf(why, sizeof why, "%s", w->lost_why);
    else
        code = backup_write(w->o.backups, w->db, j->s1, name, sizeof name, &bytes, why, sizeof why);
    if (code) {
        say_warn("backup%s%s failed: %s", j->s1 ? " " : "", j->s1 ? j->s1 : "", why);
        wr_reply(w, NULL, j->conn_id, code, "backup failed: %s", why);
        return;
    }
    const char *dir = backup_dir_path(w->o.backups);
    say_info("backup written to %s/%s (%llu bytes)", dir, name, (unsigned long long)bytes);
    jw_t jb;
    jw_init(&jb);
    char path[PATH_MAX + sizeof name + 2];
    snprintf(path, sizeof path, "%s/%s", dir, name);
    jw_fmt(&jb, ",\"name\":");
    jw_str(&jb, name);
    jw_fmt(&jb, ",\"path\":");
    jw_str(&jb, path);
    jw_fmt(&jb, ",\"bytes\":%llu", (unsigned long long)bytes);
    if (!j->conn_id) {
        jw_close(&jb);
        return;
    }
    /* Posted whole: a long path must not be cut by post_reply's buffer. */
    event_t ev = {.kind = EV_REPLY, .conn_id = j->conn_id, .rc = 0};
    ev.text = jw_take(&jb);
    w->post(w->ctx, &ev);
}

static void run_job(struct writer *w, struct job *j)
{
    char why[256];
    if (j->kind == J_OPS) {
        j->fn(w, j);
        return;
    }
    if (!w->db) { /* lost after a failed write-back: answer from memory what needs no file */
        snprintf(why, sizeof why, "%s", w->lost_why);
        if (j->kind == J_ADD) {
            queue_set_db_id(j->q, j->id);
            wr_add_model(w, j->q);
        } else if (j->kind == J_DROP) {
            job_drop(w, j);
        } else {
            wr_reply(w, j->q, j->conn_id, WORTH_E_STORAGE_ERROR, "the database is unusable: %s",
                     why);
        }
        return;
    }
    switch (j->kind) {
    case J_ADD:
        queue_set_db_id(j->q, j->id);
        wr_add_model(w, j->q);
        ckpt_refresh_info(w, j->q);
        break;
    case J_DRIFT:
        if (rescue_may_write(w, FILEGUARD_ALL, why, sizeof why) == 0)
            ckpt_job_drift(w, j);
        else
            say_error("model %s: drift alarm not recorded: %s", queue_name(j->q), why);
        break;
    case J_EVENTS:
        events_job_list(w, j);
        break;
    case J_CUT:
        ckpt_job_cut(w, j);
        break;
    case J_CREATE:
        job_create(w, j);
        break;
    case J_DROP:
        job_drop(w, j);
        break;
    case J_CHECKPOINT:
        ckpt_job_store(w, j);
        break;
    case J_LIST:
        ckpt_job_list(w, j);
        break;
    case J_BACKUP:
        job_backup(w, j);
        break;
    case J_EVENT:
        if (rescue_may_write(w, FILEGUARD_ALL, why, sizeof why) == 0)
            events_insert_id(w, j->q ? queue_db_id(j->q) : j->id, j->s1, j->s2);
        else
            say_warn("event %s not recorded: %s", j->s1, why);
        break;
    case J_OPS: /* run above */
        break;
    }
}

/* ---- thread ------------------------------------------------------------------------------ */

static void free_job(struct job *j)
{
    if (j->done) {
        pthread_mutex_lock(&j->done->mu);
        j->done->done = 1;
        pthread_cond_signal(&j->done->cond);
        pthread_mutex_unlock(&j->done->mu);
    }
    mem_free(j->s1);
    mem_free(j->s2);
    mem_free(j->blob);
    mem_free(j);
}

static void *run(void *arg)
{
    struct writer *w = arg;
    for (;;) {
        pthread_mutex_lock(&w->mu);
        while (!w->head && !w->kicked && !w->stop)
            pthread_cond_wait(&w->cond, &w->mu);
        struct job *jobs = w->head;
        w->head = w->tail = NULL;
        w->kicked = 0;
        int stopping = w->stop;
        pthread_mutex_unlock(&w->mu);

        while (jobs) {
            struct job *next = jobs->next;
            run_job(w, jobs);
            free_job(jobs);
            jobs = next;
        }
        while (log_write_group(w))
            ;
        if (stopping) {
            pthread_mutex_lock(&w->mu);
            int idle = !w->head && !w->kicked;
            pthread_mutex_unlock(&w->mu);
            if (idle)
                break;
        }
    }
    return NULL;
}

struct writer *writer_new(sqlite3 *db, const writer_opts_t *o, event_post_fn post, void *ctx)
{
    struct writer *w = mem_calloc(1, sizeof *w);
    w->db = db;
    w->o = *o;
    if (w->o.group_max == 0)
        w->o.group_max = 4096;
    w->post = post;
    w->ctx = ctx;
    pthread_mutex_init(&w->mu, NULL);
    pthread_cond_init(&w->cond, NULL);
    CHECK(wr_prepare(w) == 0);
    logblk_enc_init(&w->enc, FEAT_MAX_DIMS);
    const char *file = sqlite3_db_filename(db, "main");
    if (file && *file && fileguard_init(&w->guard, file) == 0)
        w->guarded = 1;
    else
        say_warn("cannot watch the database file %s: %s", file ? file : "?", strerror(errno));
    return w;
}

void writer_start(struct writer *w)
{
    CHECK(pthread_create(&w->thread, NULL, run, w) == 0);
    w->started = 1;
}

void writer_free(struct writer *w)
{
    if (!w)
        return;
    pthread_mutex_lock(&w->mu);
    w->stop = 1;
    pthread_cond_signal(&w->cond);
    pthread_mutex_unlock(&w->mu);
    if (w->started)
        pthread_join(w->thread, NULL);
    else
        run(w); /* never started: run the queued jobs here, then stop */
    wr_finalize(w);
    if (sqlite3_close(w->db) != SQLITE_OK)
        say_error("database did not close cleanly: %s", sqlite3_errmsg(w->db));
    pthread_mutex_destroy(&w->mu);
    pthread_cond_destroy(&w->cond);
    mem_free(w->models);
    mem_free(w->from);
    mem_free(w->upto);
    logblk_enc_free(&w->enc);
    mem_free(w);
}

void writer_kick(struct writer *w)
{
    pthread_mutex_lock(&w->mu);
    w->kicked = 1;
    pthread_cond_signal(&w->cond);
    pthread_mutex_unlock(&w->mu);
}

static void push(struct writer *w, struct job *j)
{
    pthread_mutex_lock(&w->mu);
    if (w->tail)
        w->tail->next = j;
    else
        w->head = j;
    w->tail = j;
    pthread_cond_signal(&w->cond);
    pthread_mutex_unlock(&w->mu);
}

void wr_push(struct writer *w, struct job *j)
{
    push(w, j);
}

void writer_add_model(struct writer *w, struct queue *q, int64_t model_id)
{
    struct job *j = wr_job(J_ADD, q, 0);
    j->id = model_id;
    push(w, j);
}

void writer_create_model(struct writer *w, struct queue *q, const char *name, const char *spec,
                         size_t features, uint64_t conn_id)
{
    struct job *j = wr_job(J_CREATE, q, conn_id);
    j->s1 = mem_strdup(name);
    j->s2 = mem_strdup(spec);
    j->features = features;
    push(w, j);
}

void writer_drop_model(struct writer *w, struct queue *q, uint64_t conn_id)
{
    push(w, wr_job(J_DROP, q, conn_id));
}

void writer_store_checkpoint(struct writer *w, struct queue *q, uint64_t seq, uint64_t training,
                             double plant_t, unsigned diverged, const char *label, uint8_t *blob,
                             size_t len, uint64_t conn_id)
{
    struct job *j = wr_job(J_CHECKPOINT, q, conn_id);
    j->seq = seq;
    j->training = training;
    j->plant_t = plant_t;
    j->diverged = diverged;
    j->s1 = label ? mem_strdup(label) : NULL;
    j->blob = blob;
    j->len = len;
    push(w, j);
}

void writer_cut_training(struct writer *w, struct queue *q, uint64_t ordinal, uint64_t steps)
{
    struct job_done done = {.done = 0};
    pthread_mutex_init(&done.mu, NULL);
    pthread_cond_init(&done.cond, NULL);
    struct job *j = wr_job(J_CUT, q, 0);
    j->seq = ordinal;
    j->training = steps;
    j->done = &done;
    push(w, j);
    pthread_mutex_lock(&done.mu);
    while (!done.done)
        pthread_cond_wait(&done.cond, &done.mu);
    pthread_mutex_unlock(&done.mu);
    pthread_mutex_destroy(&done.mu);
    pthread_cond_destroy(&done.cond);
}

void writer_list_checkpoints(struct writer *w, struct queue *q, uint64_t conn_id)
{
    push(w, wr_job(J_LIST, q, conn_id));
}

void writer_backup(struct writer *w, const char *name, uint64_t conn_id)
{
    struct job *j = wr_job(J_BACKUP, NULL, conn_id);
    j->s1 = name ? mem_strdup(name) : NULL;
    push(w, j);
}

void writer_event(struct writer *w, struct queue *q, const char *kind, const char *detail)
{
    struct job *j = wr_job(J_EVENT, q, 0);
    j->s1 = mem_strdup(kind);
    j->s2 = mem_strdup(detail);
    push(w, j);
}

void writer_model_event(struct writer *w, int64_t model_id, const char *kind, const char *detail)
{
    struct job *j = wr_job(J_EVENT, NULL, 0);
    j->id = model_id;
    j->s1 = mem_strdup(kind);
    j->s2 = mem_strdup(detail);
    push(w, j);
}

void writer_drop_damaged(struct writer *w, int64_t model_id, const char *name, uint64_t conn_id)
{
    struct job *j = wr_job(J_DROP, NULL, conn_id);
    j->id = model_id;
    j->s1 = mem_strdup(name);
    push(w, j);
}

void writer_drift(struct writer *w, struct queue *q, uint64_t seq, uint64_t onset_seq,
                  uint64_t step, uint64_t onset_step, uint64_t alarms, int pre_drift,
                  double plant_t)
{
    struct job *j = wr_job(J_DRIFT, q, 0);
    j->plant_t = plant_t;
    j->seq = seq;
    j->a = onset_seq;
    j->b = step;
    j->c = onset_step;
    j->training = alarms;
    j->id = pre_drift;
    push(w, j);
}

void writer_list_events(struct writer *w, struct queue *q, double since, size_t limit,
                        uint64_t conn_id)
{
    struct job *j = wr_job(J_EVENTS, q, conn_id);
    j->since = since;
    j->len = limit;
    push(w, j);
}

void writer_list_model_events(struct writer *w, int64_t model_id, const char *name, double since,
                              size_t limit, uint64_t conn_id)
{
    struct job *j = wr_job(J_EVENTS, NULL, conn_id);
    j->id = model_id;
    j->s1 = mem_strdup(name);
    j->since = since;
    j->len = limit;
    push(w, j);
}
