/*
 * writer.c - the writer thread: the transition log, checkpoints, backups.
 *
 * Owns the read-write SQLite connection and its prepared statements, the job
 * queue and the list of models it writes for.  Each turn it runs the queued
 * jobs in order, then appends every registered model's pending records in
 * arrival order, up to group_max records per transaction (group commit: under
 * load a turn finds many records waiting, so the fsync of one COMMIT covers
 * them all).  It never touches a model's mutable state and never blocks the
 * loop: it waits only on its own condition variable.
 *
 * Invariants.
 * 1. A record is marked durable (released to the learner, acknowledged to the
 *    client) only after the transaction holding it has committed.
 * 2. A failed COMMIT is never reported as success: its records become
 *    LREC_DEAD (never learnt) and their requests are answered with io.
 * 3. A checkpoint is one transaction: its row, its event and the retention
 *    that follows commit together or not at all.
 * 4. A rollback marks the log and invalidates later checkpoints in the same
 *    transaction as the records before it, so a crash either keeps all of it
 *    or none.
 */
#include "writer.h"

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

#include "db.h"
#include "mem.h"
#include "say.h"
#include "worth/errors.h"

enum job_kind {
    J_ADD,
    J_CREATE,
    J_DROP,
    J_CHECKPOINT,
    J_LIST,
    J_BACKUP,
    J_EVENT,
    J_DRIFT,
    J_EVENTS
};

struct job {
    enum job_kind kind;
    struct learner *l;
    uint64_t conn_id;
    char *s1, *s2; /* name/spec, label, path, kind/detail */
    uint8_t *blob;
    size_t len, features;
    uint64_t seq, training;
    uint64_t a, b, c; /* J_DRIFT: onset seq, step, onset step */
    double since;     /* J_EVENTS */
    int64_t id;
    struct job *next;
};

struct writer {
    sqlite3 *db;
    writer_opts_t o;
    pthread_t thread;
    pthread_mutex_t mu;
    pthread_cond_t cond;
    struct job *head, *tail;
    int kicked, stop, started;
    struct learner **models;
    size_t n, cap;
    uint64_t *from, *upto; /* per model: records [from, upto) taken into the open transaction */
    sqlite3_stmt *ins_tx, *ins_tr;
    /* Commit-latency histogram (under mu). */
    uint64_t hist[WRITER_HIST_N], hist_count;
    double hist_sum;
    learner_post_fn post;
    void *ctx;
};

static void post_reply(struct writer *w, struct learner *l, uint64_t conn_id, int rc,
                       const char *fmt, ...) __attribute__((format(printf, 5, 6)));
static void post_reply(struct writer *w, struct learner *l, uint64_t conn_id, int rc,
                       const char *fmt, ...)
{
    if (!conn_id)
        return;
    char buf[1024];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(buf, sizeof buf, fmt, ap);
    va_end(ap);
    learner_event_t ev = {.kind = LEV_REPLY, .l = l, .conn_id = conn_id, .rc = rc};
    ev.text = mem_strdup(buf);
    w->post(w->ctx, &ev);
}

/* Appends s to a growable string as a JSON string literal. */
static void json_str(char **buf, size_t *len, size_t *cap, const char *s)
{
    size_t need = *len + 6 * strlen(s) + 3;
    if (need > *cap) {
        *cap = need * 2;
        *buf = mem_realloc(*buf, *cap);
    }
    char *p = *buf + *len;
    *p++ = '"';
    for (const unsigned char *q = (const unsigned char *)s; *q; q++) {
        if (*q == '"' || *q == '\\') {
            *p++ = '\\';
            *p++ = (char)*q;
        } else if (*q < 0x20) {
            p += sprintf(p, "\\u%04x", *q);
        } else {
            *p++ = (char)*q;
        }
    }
    *p++ = '"';
    *p = 0;
    *len = (size_t)(p - *buf);
}

static void appendf(char **buf, size_t *len, size_t *cap, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));
static void appendf(char **buf, size_t *len, size_t *cap, const char *fmt, ...)
{
    va_list ap;
    for (;;) {
        va_start(ap, fmt);
        int n = vsnprintf(*buf + *len, *cap - *len, fmt, ap);
        va_end(ap);
        if (n >= 0 && (size_t)n < *cap - *len) {
            *len += (size_t)n;
            return;
        }
        *cap = *cap * 2 + (size_t)(n > 0 ? n : 64);
        *buf = mem_realloc(*buf, *cap);
    }
}

static int exec(struct writer *w, const char *sql)
{
    return sqlite3_exec(w->db, sql, NULL, NULL, NULL) == SQLITE_OK ? 0 : -1;
}

static int64_t insert_event(struct writer *w, struct learner *l, const char *kind,
                            const char *detail)
{
    sqlite3_stmt *st = NULL;
    int64_t id = 0;
    if (sqlite3_prepare_v2(w->db, "INSERT INTO events(model, at, kind, detail) VALUES(?,?,?,?)", -1,
                           &st, NULL) == SQLITE_OK) {
        if (l)
            sqlite3_bind_int64(st, 1, learner_db_id(l));
        else
            sqlite3_bind_null(st, 1);
        sqlite3_bind_double(st, 2, db_now());
        sqlite3_bind_text(st, 3, kind, -1, SQLITE_TRANSIENT);
        sqlite3_bind_text(st, 4, detail, -1, SQLITE_TRANSIENT);
        if (sqlite3_step(st) == SQLITE_DONE)
            id = sqlite3_last_insert_rowid(w->db);
    }
    sqlite3_finalize(st);
    return id;
}

static void add_model(struct writer *w, struct learner *l)
{
    if (w->n == w->cap) {
        w->cap = w->cap ? 2 * w->cap : 16;
        w->models = mem_realloc(w->models, w->cap * sizeof *w->models);
        w->from = mem_realloc(w->from, w->cap * sizeof *w->from);
        w->upto = mem_realloc(w->upto, w->cap * sizeof *w->upto);
    }
    w->models[w->n++] = l;
}

const double writer_hist_le[WRITER_HIST_N] = {0.0005, 0.001, 0.002, 0.005, 0.01, 0.02,
                                              0.05,   0.1,   0.25,  0.5,   1.0,  INFINITY};

/* Tells l how many valid checkpoints it has and when the newest was taken. */
static void refresh_checkpoint_info(struct writer *w, struct learner *l)
{
    sqlite3_stmt *st = NULL;
    if (sqlite3_prepare_v2(w->db,
                           "SELECT count(*), COALESCE(max(created_at), 0) FROM checkpoints"
                           " WHERE model = ? AND invalid = 0",
                           -1, &st, NULL) == SQLITE_OK) {
        sqlite3_bind_int64(st, 1, learner_db_id(l));
        if (sqlite3_step(st) == SQLITE_ROW)
            learner_set_checkpoint_info(l, (uint64_t)sqlite3_column_int64(st, 0),
                                        sqlite3_column_double(st, 1));
    }
    sqlite3_finalize(st);
}

/* ---- jobs -------------------------------------------------------------------------------- */

static void job_create(struct writer *w, struct job *j)
{
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
        post_reply(w, j->l, j->conn_id, db_error_code(w->db), "cannot store the model: %s",
                   sqlite3_errmsg(w->db));
        return;
    }
    learner_set_db_id(j->l, sqlite3_last_insert_rowid(w->db));
    add_model(w, j->l);
    insert_event(w, j->l, "create", "{}");
    char *buf = mem_alloc(256);
    size_t len = 0, cap = 256;
    buf[0] = 0;
    appendf(&buf, &len, &cap, ",\"model\":");
    json_str(&buf, &len, &cap, j->s1);
    appendf(&buf, &len, &cap, ",\"features\":%zu", j->features);
    post_reply(w, j->l, j->conn_id, 0, "%s", buf);
    mem_free(buf);
}

static void job_drop(struct writer *w, struct job *j)
{
    for (size_t i = 0; i < w->n; i++)
        if (w->models[i] == j->l) {
            w->models[i] = w->models[--w->n];
            break;
        }
    if (learner_db_id(j->l)) {
        sqlite3_stmt *st = NULL;
        if (sqlite3_prepare_v2(w->db, "UPDATE models SET dropped_at = ? WHERE id = ?", -1, &st,
                               NULL) == SQLITE_OK) {
            sqlite3_bind_double(st, 1, db_now());
            sqlite3_bind_int64(st, 2, learner_db_id(j->l));
            if (sqlite3_step(st) != SQLITE_DONE)
                say_error("model %s: cannot mark it dropped: %s", learner_name(j->l),
                          sqlite3_errmsg(w->db));
        }
        sqlite3_finalize(st);
        insert_event(w, j->l, "drop", "{}");
    }
    learner_event_t ev = {.kind = LEV_RELEASED, .l = j->l};
    w->post(w->ctx, &ev);
}

/* Deletes unlabelled checkpoints beyond the newest `keep` valid ones; never the newest. */
static int retain(struct writer *w, int64_t model)
{
    sqlite3_stmt *st = NULL;
    int ok = sqlite3_prepare_v2(
                 w->db,
                 "DELETE FROM checkpoints WHERE model = ?1 AND label IS NULL AND id NOT IN"
                 " (SELECT id FROM checkpoints WHERE model = ?1 AND label IS NULL AND invalid = 0"
                 "  ORDER BY seq DESC, id DESC LIMIT ?2)"
                 " AND id NOT IN (SELECT id FROM checkpoints WHERE model = ?1 AND invalid = 0"
                 "  ORDER BY seq DESC, id DESC LIMIT 1)",
                 -1, &st, NULL) == SQLITE_OK;
    if (ok) {
        sqlite3_bind_int64(st, 1, model);
        sqlite3_bind_int64(st, 2, w->o.keep);
        ok = sqlite3_step(st) == SQLITE_DONE;
    }
    sqlite3_finalize(st);
    return ok ? 0 : -1;
}

static void job_checkpoint(struct writer *w, struct job *j)
{
    int64_t model = learner_db_id(j->l), id = 0;
    sqlite3_stmt *st = NULL;
    int ok = exec(w, "BEGIN IMMEDIATE") == 0;
    if (ok)
        ok = sqlite3_prepare_v2(w->db,
                                "INSERT INTO checkpoints(model, seq, training, label, created_at,"
                                " size, state) VALUES(?,?,?,?,?,?,?)",
                                -1, &st, NULL) == SQLITE_OK;
    if (ok) {
        sqlite3_bind_int64(st, 1, model);
        sqlite3_bind_int64(st, 2, (sqlite3_int64)j->seq);
        sqlite3_bind_int64(st, 3, (sqlite3_int64)j->training);
        if (j->s1)
            sqlite3_bind_text(st, 4, j->s1, -1, SQLITE_STATIC);
        else
            sqlite3_bind_null(st, 4);
        sqlite3_bind_double(st, 5, db_now());
        sqlite3_bind_int64(st, 6, (sqlite3_int64)j->len);
        sqlite3_bind_blob(st, 7, j->blob, (int)j->len, SQLITE_STATIC);
        ok = sqlite3_step(st) == SQLITE_DONE;
        id = sqlite3_last_insert_rowid(w->db);
    }
    sqlite3_finalize(st);
    if (ok) {
        char detail[256];
        snprintf(detail, sizeof detail, "{\"checkpoint\":%lld,\"seq\":%llu,\"automatic\":%s}",
                 (long long)id, (unsigned long long)j->seq, j->conn_id ? "false" : "true");
        ok = insert_event(w, j->l, "checkpoint", detail) > 0 && retain(w, model) == 0 &&
             exec(w, "COMMIT") == 0;
    }
    if (!ok) {
        int code = db_error_code(w->db);
        char why[512];
        snprintf(why, sizeof why, "%s", sqlite3_errmsg(w->db));
        exec(w, "ROLLBACK");
        say_error("model %s: checkpoint not stored: %s", learner_name(j->l), why);
        post_reply(w, j->l, j->conn_id, code, "checkpoint not stored: %s", why);
        return;
    }
    refresh_checkpoint_info(w, j->l);
    say_debug("model %s: checkpoint %lld at seq %llu (%zu bytes)", learner_name(j->l),
              (long long)id, (unsigned long long)j->seq, j->len);
    post_reply(w, j->l, j->conn_id, 0, ",\"checkpoint\":%lld,\"seq\":%llu", (long long)id,
               (unsigned long long)j->seq);
}

static void job_list(struct writer *w, struct job *j)
{
    sqlite3_stmt *st = NULL;
    size_t len = 0, cap = 1024;
    char *buf = mem_alloc(cap);
    buf[0] = 0;
    appendf(&buf, &len, &cap, ",\"checkpoints\":[");
    int rc = SQLITE_ERROR, first = 1;
    if (sqlite3_prepare_v2(w->db,
                           "SELECT id, seq, label, created_at, size FROM checkpoints"
                           " WHERE model = ? AND invalid = 0 ORDER BY seq DESC, id DESC",
                           -1, &st, NULL) == SQLITE_OK) {
        sqlite3_bind_int64(st, 1, learner_db_id(j->l));
        while ((rc = sqlite3_step(st)) == SQLITE_ROW) {
            appendf(&buf, &len, &cap,
                    "%s{\"checkpoint\":%lld,\"seq\":%lld,\"label\":", first ? "" : ",",
                    (long long)sqlite3_column_int64(st, 0), (long long)sqlite3_column_int64(st, 1));
            if (sqlite3_column_type(st, 2) == SQLITE_NULL)
                appendf(&buf, &len, &cap, "null");
            else
                json_str(&buf, &len, &cap, (const char *)sqlite3_column_text(st, 2));
            appendf(&buf, &len, &cap, ",\"created_at\":%.17g,\"size\":%lld}",
                    sqlite3_column_double(st, 3), (long long)sqlite3_column_int64(st, 4));
            first = 0;
        }
    }
    sqlite3_finalize(st);
    appendf(&buf, &len, &cap, "]");
    if (rc != SQLITE_DONE)
        post_reply(w, j->l, j->conn_id, db_error_code(w->db), "cannot list checkpoints: %s",
                   sqlite3_errmsg(w->db));
    else {
        learner_event_t ev = {.kind = LEV_REPLY, .l = j->l, .conn_id = j->conn_id, .rc = 0};
        ev.text = buf;
        w->post(w->ctx, &ev);
        return;
    }
    mem_free(buf);
}

/* fsyncs path (a file or a directory); returns 0 or -1 with errno. */
static int sync_path(const char *path, int dir)
{
    int fd = open(path, (dir ? O_RDONLY | O_DIRECTORY : O_RDWR) | O_CLOEXEC);
    if (fd < 0)
        return -1;
    int rc = fsync(fd);
    close(fd);
    return rc;
}

static void job_backup(struct writer *w, struct job *j)
{
    char tmp[4200], dir[4200];
    const char *path = j->s1;
    snprintf(tmp, sizeof tmp, "%s.tmp-%ld", path, (long)getpid());
    snprintf(dir, sizeof dir, "%s", path);
    char *slash = strrchr(dir, '/');
    if (slash == dir)
        dir[1] = 0;
    else if (slash)
        *slash = 0;
    else
        snprintf(dir, sizeof dir, ".");
    /* Never over the live database or its companions. */
    char real[4200], live[4200];
    const char *main_file = sqlite3_db_filename(w->db, "main");
    if (db_resolve(path, real, sizeof real) != 0) {
        post_reply(w, NULL, j->conn_id, WORTH_E_BAD_PARAM, "backup path %s: %s", path,
                   "its directory does not exist");
        return;
    }
    if (main_file && db_resolve(main_file, live, sizeof live) == 0) {
        static const char *const suffix[] = {"", "-wal", "-shm", "-journal", ".lock"};
        for (size_t i = 0; i < sizeof suffix / sizeof suffix[0]; i++) {
            char name[4300];
            snprintf(name, sizeof name, "%s%s", live, suffix[i]);
            if (strcmp(name, real) == 0) {
                post_reply(w, NULL, j->conn_id, WORTH_E_BAD_PARAM,
                           "backup path %s is worthd's own database", path);
                return;
            }
        }
    }
    unlink(tmp);
    sqlite3_stmt *st = NULL;
    int ok = sqlite3_prepare_v2(w->db, "VACUUM INTO ?", -1, &st, NULL) == SQLITE_OK;
    if (ok) {
        sqlite3_bind_text(st, 1, tmp, -1, SQLITE_STATIC);
        ok = sqlite3_step(st) == SQLITE_DONE;
    }
    char why[512];
    int code = ok ? 0 : db_error_code(w->db);
    snprintf(why, sizeof why, "%s", ok ? "" : sqlite3_errmsg(w->db));
    sqlite3_finalize(st);
    struct stat sb;
    if (ok && (sync_path(tmp, 0) != 0 || rename(tmp, path) != 0 || sync_path(dir, 1) != 0 ||
               stat(path, &sb) != 0)) {
        ok = 0;
        code = errno == ENOSPC ? WORTH_E_STORAGE_FULL : WORTH_E_STORAGE_ERROR;
        snprintf(why, sizeof why, "%s", strerror(errno));
    }
    if (!ok) {
        unlink(tmp);
        say_warn("backup to %s failed: %s", path, why);
        post_reply(w, NULL, j->conn_id, code, "backup to %s failed: %s", path, why);
        return;
    }
    say_info("backup written to %s (%lld bytes)", path, (long long)sb.st_size);
    size_t len = 0, cap = 256;
    char *buf = mem_alloc(cap);
    buf[0] = 0;
    appendf(&buf, &len, &cap, ",\"path\":");
    json_str(&buf, &len, &cap, path);
    appendf(&buf, &len, &cap, ",\"bytes\":%lld", (long long)sb.st_size);
    post_reply(w, NULL, j->conn_id, 0, "%s", buf);
    mem_free(buf);
}

static void job_drift(struct writer *w, struct job *j)
{
    int64_t pre = 0, model = learner_db_id(j->l);
    if (j->id) { /* on_drift: copy the newest valid checkpoint before the onset, labelled */
        sqlite3_stmt *st = NULL;
        if (sqlite3_prepare_v2(
                w->db,
                "INSERT INTO checkpoints(model, seq, training, label, created_at, size, state)"
                " SELECT model, seq, training, 'pre-drift', ?1, size, state FROM checkpoints"
                " WHERE model = ?2 AND invalid = 0 AND seq < ?3 ORDER BY seq DESC, id DESC LIMIT 1",
                -1, &st, NULL) == SQLITE_OK) {
            sqlite3_bind_double(st, 1, db_now());
            sqlite3_bind_int64(st, 2, model);
            sqlite3_bind_int64(st, 3, (sqlite3_int64)j->a);
            if (sqlite3_step(st) == SQLITE_DONE && sqlite3_changes(w->db) == 1)
                pre = sqlite3_last_insert_rowid(w->db);
        }
        sqlite3_finalize(st);
        if (pre)
            refresh_checkpoint_info(w, j->l);
        else
            say_warn("model %s: no checkpoint before seq %llu to keep as pre-drift",
                     learner_name(j->l), (unsigned long long)j->a);
    }
    char detail[320];
    int n = snprintf(detail, sizeof detail,
                     "{\"seq\":%llu,\"onset_seq\":%llu,\"step\":%llu,\"onset_step\":%llu,"
                     "\"alarms\":%llu",
                     (unsigned long long)j->seq, (unsigned long long)j->a, (unsigned long long)j->b,
                     (unsigned long long)j->c, (unsigned long long)j->training);
    if (pre)
        n += snprintf(detail + n, sizeof detail - (size_t)n, ",\"pre_drift_checkpoint\":%lld",
                      (long long)pre);
    snprintf(detail + n, sizeof detail - (size_t)n, "}");
    insert_event(w, j->l, "drift", detail);
}

static void job_events(struct writer *w, struct job *j)
{
    sqlite3_stmt *st = NULL;
    size_t len = 0, cap = 4096;
    char *buf = mem_alloc(cap);
    buf[0] = 0;
    appendf(&buf, &len, &cap, ",\"events\":[");
    int rc = SQLITE_ERROR, first = 1;
    const char *sql = j->l ? "SELECT id, at, kind, detail FROM events WHERE model = ?1 AND at >= ?2"
                             " ORDER BY id LIMIT ?3"
                           : "SELECT id, at, kind, detail FROM events WHERE model IS NULL AND"
                             " at >= ?2 ORDER BY id LIMIT ?3";
    if (sqlite3_prepare_v2(w->db, sql, -1, &st, NULL) == SQLITE_OK) {
        if (j->l)
            sqlite3_bind_int64(st, 1, learner_db_id(j->l));
        sqlite3_bind_double(st, 2, j->since);
        sqlite3_bind_int64(st, 3, (sqlite3_int64)j->len);
        while ((rc = sqlite3_step(st)) == SQLITE_ROW) {
            appendf(&buf, &len, &cap, "%s{\"event\":%lld,\"at\":%.17g,\"kind\":", first ? "" : ",",
                    (long long)sqlite3_column_int64(st, 0), sqlite3_column_double(st, 1));
            json_str(&buf, &len, &cap, (const char *)sqlite3_column_text(st, 2));
            if (j->l) {
                appendf(&buf, &len, &cap, ",\"model\":");
                json_str(&buf, &len, &cap, learner_name(j->l));
            }
            /* detail is JSON written by worthd itself */
            appendf(&buf, &len, &cap, ",\"detail\":%s}", (const char *)sqlite3_column_text(st, 3));
            first = 0;
        }
    }
    sqlite3_finalize(st);
    appendf(&buf, &len, &cap, "]");
    if (rc != SQLITE_DONE) {
        post_reply(w, j->l, j->conn_id, db_error_code(w->db), "cannot list events: %s",
                   sqlite3_errmsg(w->db));
        mem_free(buf);
        return;
    }
    learner_event_t ev = {.kind = LEV_REPLY, .l = j->l, .conn_id = j->conn_id, .rc = 0};
    ev.text = buf;
    w->post(w->ctx, &ev);
}

static void run_job(struct writer *w, struct job *j)
{
    switch (j->kind) {
    case J_ADD:
        learner_set_db_id(j->l, j->id);
        add_model(w, j->l);
        refresh_checkpoint_info(w, j->l);
        break;
    case J_DRIFT:
        job_drift(w, j);
        break;
    case J_EVENTS:
        job_events(w, j);
        break;
    case J_CREATE:
        job_create(w, j);
        break;
    case J_DROP:
        job_drop(w, j);
        break;
    case J_CHECKPOINT:
        job_checkpoint(w, j);
        break;
    case J_LIST:
        job_list(w, j);
        break;
    case J_BACKUP:
        job_backup(w, j);
        break;
    case J_EVENT:
        insert_event(w, j->l, j->s1, j->s2);
        break;
    }
}

/* ---- records ----------------------------------------------------------------------------- */

/* Marks the log for a rollback inside the open transaction; fills the plan. */
static int mark_rollback(struct writer *w, struct learner *l, learner_rec_t *r)
{
    learner_plan_t *p = r->job;
    int64_t model = learner_db_id(l);
    sqlite3_stmt *st = NULL;
    int found = 0;
    if (sqlite3_prepare_v2(w->db,
                           "SELECT seq, training, state FROM checkpoints"
                           " WHERE id = ? AND model = ? AND invalid = 0",
                           -1, &st, NULL) != SQLITE_OK)
        return -1;
    sqlite3_bind_int64(st, 1, p->checkpoint);
    sqlite3_bind_int64(st, 2, model);
    int rc = sqlite3_step(st);
    if (rc == SQLITE_ROW) {
        found = 1;
        p->cp_seq = (uint64_t)sqlite3_column_int64(st, 0);
        p->cp_training = (uint64_t)sqlite3_column_int64(st, 1);
        p->blob_len = (size_t)sqlite3_column_bytes(st, 2);
        p->blob = mem_alloc(p->blob_len);
        memcpy(p->blob, sqlite3_column_blob(st, 2), p->blob_len);
    }
    sqlite3_finalize(st);
    if (rc != SQLITE_ROW && rc != SQLITE_DONE)
        return -1;
    if (!found) {
        p->rc = WORTH_E_NO_SUCH_CHECKPOINT;
        snprintf(p->err, sizeof p->err, "model %s has no valid checkpoint %lld", learner_name(l),
                 (long long)p->checkpoint);
        return 0;
    }
    /* A damaged checkpoint is refused before anything is marked. */
    char why[160];
    if (model_state_check(p->blob, p->blob_len, why, sizeof why) != 0) {
        p->rc = WORTH_E_BAD_DATABASE;
        snprintf(p->err, sizeof p->err, "checkpoint %lld cannot be restored: %s",
                 (long long)p->checkpoint, why);
        say_error("model %s: %s", learner_name(l), p->err);
        return 0;
    }
    int64_t ev = insert_event(w, l, "rollback", "{}");
    if (ev <= 0)
        return -1;
    const char *sql_tx =
        p->replay
            ? (p->by_t ? "UPDATE transitions SET rolled_back = ?1 WHERE model = ?2 AND seq > ?3"
                         " AND seq <= ?4 AND rolled_back = 0 AND t >= ?5 AND t <= ?6"
                       : "UPDATE transitions SET rolled_back = ?1 WHERE model = ?2 AND seq > ?3"
                         " AND seq <= ?4 AND rolled_back = 0 AND seq >= ?5 AND seq <= ?6")
            : "UPDATE transitions SET rolled_back = ?1 WHERE model = ?2 AND seq > ?3"
              " AND seq <= ?4 AND rolled_back = 0";
    if (sqlite3_prepare_v2(w->db, sql_tx, -1, &st, NULL) != SQLITE_OK)
        return -1;
    sqlite3_bind_int64(st, 1, ev);
    sqlite3_bind_int64(st, 2, model);
    sqlite3_bind_int64(st, 3, (sqlite3_int64)p->cp_seq);
    sqlite3_bind_int64(st, 4, (sqlite3_int64)r->seq);
    if (p->replay) {
        sqlite3_bind_double(st, 5, p->lo);
        sqlite3_bind_double(st, 6, p->hi);
    }
    rc = sqlite3_step(st);
    sqlite3_finalize(st);
    if (rc != SQLITE_DONE)
        return -1;
    p->undone = (uint64_t)sqlite3_changes(w->db);
    if (!p->replay) {
        if (sqlite3_prepare_v2(w->db,
                               "UPDATE trainings SET rolled_back = ?1 WHERE model = ?2"
                               " AND ordinal > ?3 AND rolled_back = 0",
                               -1, &st, NULL) != SQLITE_OK)
            return -1;
        sqlite3_bind_int64(st, 1, ev);
        sqlite3_bind_int64(st, 2, model);
        sqlite3_bind_int64(st, 3, (sqlite3_int64)p->cp_training);
        rc = sqlite3_step(st);
        sqlite3_finalize(st);
        if (rc != SQLITE_DONE)
            return -1;
    }
    if (sqlite3_prepare_v2(w->db,
                           "UPDATE checkpoints SET invalid = ?1 WHERE model = ?2 AND invalid = 0"
                           " AND (seq > ?3 OR training > ?4)",
                           -1, &st, NULL) != SQLITE_OK)
        return -1;
    sqlite3_bind_int64(st, 1, ev);
    sqlite3_bind_int64(st, 2, model);
    sqlite3_bind_int64(st, 3, (sqlite3_int64)p->cp_seq);
    sqlite3_bind_int64(st, 4, (sqlite3_int64)p->cp_training);
    rc = sqlite3_step(st);
    sqlite3_finalize(st);
    if (rc != SQLITE_DONE)
        return -1;
    char detail[256];
    snprintf(detail, sizeof detail,
             "{\"checkpoint\":%lld,\"seq\":%llu,\"undone\":%llu,\"replay\":%s}",
             (long long)p->checkpoint, (unsigned long long)p->cp_seq, (unsigned long long)p->undone,
             p->replay ? "true" : "false");
    if (sqlite3_prepare_v2(w->db, "UPDATE events SET detail = ? WHERE id = ?", -1, &st, NULL) !=
        SQLITE_OK)
        return -1;
    sqlite3_bind_text(st, 1, detail, -1, SQLITE_STATIC);
    sqlite3_bind_int64(st, 2, ev);
    rc = sqlite3_step(st);
    sqlite3_finalize(st);
    if (rc == SQLITE_DONE)
        refresh_checkpoint_info(w, l);
    return rc == SQLITE_DONE ? 0 : -1;
}

static int write_record(struct writer *w, struct learner *l, learner_rec_t *r)
{
    sqlite3_stmt *st;
    size_t d = model_dims(learner_model(l));
    switch (r->type) {
    case LREC_OBS:
        st = w->ins_tx;
        sqlite3_reset(st);
        sqlite3_bind_int64(st, 1, learner_db_id(l));
        sqlite3_bind_int64(st, 2, (sqlite3_int64)r->seq);
        if (isnan(r->t_s))
            sqlite3_bind_null(st, 3);
        else
            sqlite3_bind_double(st, 3, r->t_s);
        sqlite3_bind_text(st, 4, r->src, -1, SQLITE_STATIC);
        sqlite3_bind_blob(st, 5, r->v, (int)(d * sizeof(double)), SQLITE_STATIC);
        sqlite3_bind_double(st, 6, r->r);
        if (r->terminal)
            sqlite3_bind_null(st, 7);
        else
            sqlite3_bind_blob(st, 7, r->v + d, (int)(d * sizeof(double)), SQLITE_STATIC);
        sqlite3_bind_int(st, 8, (int)r->terminal);
        if (isnan(r->dt_s))
            sqlite3_bind_null(st, 9);
        else
            sqlite3_bind_double(st, 9, r->dt_s);
        return sqlite3_step(st) == SQLITE_DONE ? 0 : -1;
    case LREC_TRAIN:
        st = w->ins_tr;
        sqlite3_reset(st);
        sqlite3_bind_int64(st, 1, learner_db_id(l));
        sqlite3_bind_int64(st, 2, (sqlite3_int64)r->ordinal);
        sqlite3_bind_int64(st, 3, (sqlite3_int64)r->seq);
        sqlite3_bind_text(st, 4, model_est_name(learner_model(l), r->est), -1, SQLITE_STATIC);
        sqlite3_bind_int(st, 5, (int)r->passes);
        return sqlite3_step(st) == SQLITE_DONE ? 0 : -1;
    case LREC_ROLLBACK:
        return mark_rollback(w, l, r);
    default:
        return 0;
    }
}

/* A commit failed: the records taken are never learnt, and their requests hear io. */
static void fail_records(struct writer *w, struct learner *l, uint64_t from, uint64_t to, int code,
                         const char *why)
{
    uint64_t last_seq = 0;
    for (uint64_t k = from; k < to; k++) {
        learner_rec_t *r = learner_rec(l, k);
        if (r->type == LREC_TRAIN) {
            learner_event_t ev = {.kind = LEV_TRAINED, .l = l, .conn_id = r->conn_id, .rc = code};
            w->post(w->ctx, &ev);
        } else if (r->type == LREC_CHECKPOINT || r->type == LREC_ROLLBACK) {
            post_reply(w, l, r->conn_id, code, "the log could not be written: %s", why);
            if (r->type == LREC_ROLLBACK) {
                mem_free(r->job->blob);
                mem_free(r->job);
                r->job = NULL;
            }
        }
        if (r->type == LREC_OBS)
            last_seq = r->seq;
        r->type = LREC_DEAD;
    }
    learner_set_durable(l, to);
    if (last_seq) {
        learner_event_t ev = {.kind = LEV_FAILED, .l = l, .seq = last_seq, .rc = code};
        ev.text = mem_strdup(why);
        w->post(w->ctx, &ev);
    }
}

/* Appends pending records of every model in one transaction.  Returns 1 if any were taken. */
static int write_group(struct writer *w)
{
    size_t budget = w->o.group_max, taken = 0;
    uint64_t *from = w->from;
    size_t nm = w->n;
    if (nm == 0)
        return 0;
    int began = 0, ok = 1;
    for (size_t i = 0; i < nm; i++)
        from[i] = w->upto[i] = 0;
    for (size_t i = 0; i < nm; i++) {
        uint64_t f, t;
        learner_pending(w->models[i], &f, &t);
        from[i] = f;
        if (t - f > budget)
            t = f + budget;
        w->upto[i] = f;
        if (t == f)
            continue;
        if (!began) {
            if (exec(w, "BEGIN IMMEDIATE") != 0) {
                ok = 0;
                break;
            }
            began = 1;
        }
        /* Never split a request: run on to the end of the last one begun. */
        while (t > f && !learner_rec(w->models[i], t - 1)->last) {
            uint64_t f2, t2;
            learner_pending(w->models[i], &f2, &t2);
            if (t >= t2)
                break; /* cannot happen: the loop commits whole requests */
            t++;
        }
        for (uint64_t k = f; k < t && ok; k++)
            ok = write_record(w, w->models[i], learner_rec(w->models[i], k)) == 0;
        w->upto[i] = t;
        taken += t - f;
        budget = t - f >= budget ? 0 : budget - (t - f);
        if (!ok || budget == 0)
            break;
    }
    if (!began && ok)
        return 0;
    if (ok) {
        double t0 = db_now();
        if (exec(w, "COMMIT") != 0)
            ok = 0;
        double dt = db_now() - t0;
        pthread_mutex_lock(&w->mu);
        for (int b = 0; b < WRITER_HIST_N; b++)
            if (dt <= writer_hist_le[b])
                w->hist[b]++;
        w->hist_count++;
        w->hist_sum += dt;
        pthread_mutex_unlock(&w->mu);
    }
    if (!ok) {
        char why[512];
        int code = db_error_code(w->db);
        snprintf(why, sizeof why, "%s", sqlite3_errmsg(w->db));
        exec(w, "ROLLBACK");
        say_error("log commit failed (%s); %zu records not applied", why, taken);
        for (size_t i = 0; i < nm; i++)
            if (w->upto[i] > from[i])
                fail_records(w, w->models[i], from[i], w->upto[i], code, why);
        return 1;
    }
    for (size_t i = 0; i < nm; i++) {
        if (w->upto[i] == from[i])
            continue;
        struct learner *l = w->models[i];
        uint64_t last_seq = learner_rec(l, w->upto[i] - 1)->seq;
        learner_set_durable(l, w->upto[i]);
        learner_event_t ev = {.kind = LEV_DURABLE, .l = l, .seq = last_seq};
        w->post(w->ctx, &ev);
    }
    return taken > 0;
}

/* ---- thread ------------------------------------------------------------------------------ */

static void free_job(struct job *j)
{
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
        while (write_group(w))
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

struct writer *writer_new(sqlite3 *db, const writer_opts_t *o, learner_post_fn post, void *ctx)
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
    CHECK(sqlite3_prepare_v3(db,
                             "INSERT INTO transitions(model, seq, t, source, x, r, x_next,"
                             " terminal, dt) VALUES(?,?,?,?,?,?,?,?,?)",
                             -1, SQLITE_PREPARE_PERSISTENT, &w->ins_tx, NULL) == SQLITE_OK);
    CHECK(sqlite3_prepare_v3(db,
                             "INSERT INTO trainings(model, ordinal, after_seq, estimator, passes)"
                             " VALUES(?,?,?,?,?)",
                             -1, SQLITE_PREPARE_PERSISTENT, &w->ins_tr, NULL) == SQLITE_OK);
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
    sqlite3_finalize(w->ins_tx);
    sqlite3_finalize(w->ins_tr);
    if (sqlite3_close(w->db) != SQLITE_OK)
        say_error("database did not close cleanly: %s", sqlite3_errmsg(w->db));
    pthread_mutex_destroy(&w->mu);
    pthread_cond_destroy(&w->cond);
    mem_free(w->models);
    mem_free(w->from);
    mem_free(w->upto);
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

static struct job *job(enum job_kind kind, struct learner *l, uint64_t conn_id)
{
    struct job *j = mem_calloc(1, sizeof *j);
    j->kind = kind;
    j->l = l;
    j->conn_id = conn_id;
    return j;
}

void writer_add_model(struct writer *w, struct learner *l, int64_t model_id)
{
    struct job *j = job(J_ADD, l, 0);
    j->id = model_id;
    push(w, j);
}

void writer_create_model(struct writer *w, struct learner *l, const char *name, const char *spec,
                         size_t features, uint64_t conn_id)
{
    struct job *j = job(J_CREATE, l, conn_id);
    j->s1 = mem_strdup(name);
    j->s2 = mem_strdup(spec);
    j->features = features;
    push(w, j);
}

void writer_drop_model(struct writer *w, struct learner *l)
{
    push(w, job(J_DROP, l, 0));
}

void writer_store_checkpoint(struct writer *w, struct learner *l, uint64_t seq, uint64_t training,
                             const char *label, uint8_t *blob, size_t len, uint64_t conn_id)
{
    struct job *j = job(J_CHECKPOINT, l, conn_id);
    j->seq = seq;
    j->training = training;
    j->s1 = label ? mem_strdup(label) : NULL;
    j->blob = blob;
    j->len = len;
    push(w, j);
}

void writer_list_checkpoints(struct writer *w, struct learner *l, uint64_t conn_id)
{
    push(w, job(J_LIST, l, conn_id));
}

void writer_backup(struct writer *w, const char *path, uint64_t conn_id)
{
    struct job *j = job(J_BACKUP, NULL, conn_id);
    j->s1 = mem_strdup(path);
    push(w, j);
}

void writer_event(struct writer *w, struct learner *l, const char *kind, const char *detail)
{
    struct job *j = job(J_EVENT, l, 0);
    j->s1 = mem_strdup(kind);
    j->s2 = mem_strdup(detail);
    push(w, j);
}

void writer_drift(struct writer *w, struct learner *l, uint64_t seq, uint64_t onset_seq,
                  uint64_t step, uint64_t onset_step, uint64_t alarms, int pre_drift)
{
    struct job *j = job(J_DRIFT, l, 0);
    j->seq = seq;
    j->a = onset_seq;
    j->b = step;
    j->c = onset_step;
    j->training = alarms;
    j->id = pre_drift;
    push(w, j);
}

void writer_list_events(struct writer *w, struct learner *l, double since, size_t limit,
                        uint64_t conn_id)
{
    struct job *j = job(J_EVENTS, l, conn_id);
    j->since = since;
    j->len = limit;
    push(w, j);
}

void writer_commit_hist(struct writer *w, uint64_t counts[WRITER_HIST_N], double *sum,
                        uint64_t *count)
{
    pthread_mutex_lock(&w->mu);
    memcpy(counts, w->hist, sizeof w->hist);
    *sum = w->hist_sum;
    *count = w->hist_count;
    pthread_mutex_unlock(&w->mu);
}
