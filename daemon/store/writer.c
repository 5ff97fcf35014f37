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
 *    QREC_DEAD (never learnt) and their requests are answered with io.
 * 3. A checkpoint is one transaction: its row, its event and the retention
 *    that follows commit together or not at all.
 * 4. A rollback marks the log and invalidates later checkpoints in the same
 *    transaction as the records before it, so a crash either keeps all of it
 *    or none.
 * 5. Nothing is written, and no commit acknowledged, while the file at the
 *    database's path is not the one the connection writes (removed or
 *    replaced: the commit would vanish with worthd) or worthd may not write
 *    it (made read-only).  A removed file is first written back to its path
 *    from the open connection, which is then reopened there; a replaced one
 *    is never overwritten.  See "the database file's health" below.
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

#include "store/backup.h"
#include "store/db.h"
#include "store/fileguard.h"
#include "common/mem.h"
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
    J_EVENTS,
    J_CUT
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
    int64_t id;
    unsigned diverged;     /* J_CHECKPOINT */
    struct job_done *done; /* set: the poster waits for the job (J_CUT) */
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
    sqlite3_stmt *ins_tx, *ins_tr;
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

static void post_reply(struct writer *w, struct queue *q, uint64_t conn_id, int rc, const char *fmt,
                       ...) __attribute__((format(printf, 5, 6)));
static void post_reply(struct writer *w, struct queue *q, uint64_t conn_id, int rc, const char *fmt,
                       ...)
{
    if (!conn_id)
        return;
    char buf[1024];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(buf, sizeof buf, fmt, ap);
    va_end(ap);
    event_t ev = {.kind = EV_REPLY, .q = q, .conn_id = conn_id, .rc = rc};
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

/* Records an event of the model with database id model (0: a daemon-wide event). */
static int64_t insert_event_id(struct writer *w, int64_t model, const char *kind,
                               const char *detail)
{
    sqlite3_stmt *st = NULL;
    int64_t id = 0;
    if (sqlite3_prepare_v2(w->db, "INSERT INTO events(model, at, kind, detail) VALUES(?,?,?,?)", -1,
                           &st, NULL) == SQLITE_OK) {
        if (model)
            sqlite3_bind_int64(st, 1, model);
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

static int64_t insert_event(struct writer *w, struct queue *q, const char *kind, const char *detail)
{
    return insert_event_id(w, q ? queue_db_id(q) : 0, kind, detail);
}

static void add_model(struct writer *w, struct queue *q)
{
    if (w->n == w->cap) {
        w->cap = w->cap ? 2 * w->cap : 16;
        w->models = mem_realloc(w->models, w->cap * sizeof *w->models);
        w->from = mem_realloc(w->from, w->cap * sizeof *w->from);
        w->upto = mem_realloc(w->upto, w->cap * sizeof *w->upto);
    }
    w->models[w->n++] = q;
}

const double writer_hist_le[WRITER_HIST_N] = {0.0005, 0.001, 0.002, 0.005, 0.01, 0.02,
                                              0.05,   0.1,   0.25,  0.5,   1.0,  INFINITY};

/* Tells q how many valid checkpoints it has and when the newest was taken. */
static void refresh_checkpoint_info(struct writer *w, struct queue *q)
{
    sqlite3_stmt *st = NULL;
    if (sqlite3_prepare_v2(w->db,
                           "SELECT count(*), COALESCE(max(created_at), 0) FROM checkpoints"
                           " WHERE model = ? AND invalid = 0",
                           -1, &st, NULL) == SQLITE_OK) {
        sqlite3_bind_int64(st, 1, queue_db_id(q));
        if (sqlite3_step(st) == SQLITE_ROW)
            queue_set_checkpoint_info(q, (uint64_t)sqlite3_column_int64(st, 0),
                                      sqlite3_column_double(st, 1));
    }
    sqlite3_finalize(st);
}

/* ---- the database file's health ---------------------------------------------------------- */

/* snprintf for messages that may be cut short (paths are long; messages end up in replies). */
static void msgf(char *buf, size_t len, const char *fmt, ...) __attribute__((format(printf, 3, 4)));
static void msgf(char *buf, size_t len, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(buf, len, fmt, ap);
    va_end(ap);
}

static int prepare_inserts(struct writer *w)
{
    return sqlite3_prepare_v3(w->db,
                              "INSERT INTO transitions(model, seq, t, source, x, r, x_next,"
                              " terminal, dt) VALUES(?,?,?,?,?,?,?,?,?)",
                              -1, SQLITE_PREPARE_PERSISTENT, &w->ins_tx, NULL) == SQLITE_OK &&
                   sqlite3_prepare_v3(w->db,
                                      "INSERT INTO trainings(model, ordinal, after_seq, estimator,"
                                      " passes) VALUES(?,?,?,?,?)",
                                      -1, SQLITE_PREPARE_PERSISTENT, &w->ins_tr, NULL) == SQLITE_OK
               ? 0
               : -1;
}

static int64_t pragma_int(sqlite3 *db, const char *sql)
{
    sqlite3_stmt *st = NULL;
    int64_t v = -1;
    if (sqlite3_prepare_v2(db, sql, -1, &st, NULL) == SQLITE_OK && sqlite3_step(st) == SQLITE_ROW)
        v = sqlite3_column_int64(st, 0);
    sqlite3_finalize(st);
    return v;
}

static int sync_path(const char *path, int dir);

/* Writes the directory that holds path into dir (len bytes): "." for a bare name. */
static void dir_of(const char *path, char *dir, size_t len)
{
    snprintf(dir, len, "%s", path);
    char *slash = strrchr(dir, '/');
    if (slash == dir)
        dir[1] = 0;
    else if (slash)
        *slash = 0;
    else
        snprintf(dir, len, ".");
}

/*
 * The database file or its -wal was removed while worthd ran: everything
 * committed lives only in files that have no name any more.  Writes it back:
 * checkpoint the WAL into the main file (truncating the WAL), copy the main
 * file to a temporary name beside the path if the path is empty, close the
 * connection (SQLite then removes the -wal and -shm it named), rename the copy
 * into place, fsync the directory, and open the path again.  Returns 0 with
 * w->db open on the path, or -1 with why: w->db is then the old connection
 * (nothing was closed) or NULL (the data is in the file why names).
 */
static int rescue(struct writer *w, char *why, size_t len)
{
    char path[PATH_MAX]; /* a copy: fileguard_init below rewrites w->guard */
    snprintf(path, sizeof path, "%s", w->guard.path);
    char tmp[PATH_MAX + 32], dir[PATH_MAX];
    snprintf(tmp, sizeof tmp, "%s.rescue-%ld", path, (long)getpid());
    dir_of(path, dir, sizeof dir);
    int sync_full = pragma_int(w->db, "PRAGMA synchronous") >= 2;
    int64_t max_pages = pragma_int(w->db, "PRAGMA max_page_count");
    int copy = access(path, F_OK) != 0;
    sqlite3_stmt *st = NULL;
    int ok =
        sqlite3_prepare_v2(w->db, "PRAGMA wal_checkpoint(TRUNCATE)", -1, &st, NULL) == SQLITE_OK &&
        sqlite3_step(st) == SQLITE_ROW && sqlite3_column_int(st, 0) == 0;
    sqlite3_finalize(st);
    if (!ok) {
        msgf(why, len, "cannot checkpoint the log into the open file: %s", sqlite3_errmsg(w->db));
        return -1;
    }
    if (copy) {
        unlink(tmp);
        ok = sqlite3_prepare_v2(w->db, "VACUUM INTO ?", -1, &st, NULL) == SQLITE_OK;
        if (ok) {
            sqlite3_bind_text(st, 1, tmp, -1, SQLITE_STATIC);
            ok = sqlite3_step(st) == SQLITE_DONE;
        }
        if (!ok)
            msgf(why, len, "cannot copy the open file to %s: %s", tmp, sqlite3_errmsg(w->db));
        sqlite3_finalize(st);
        if (ok && sync_path(tmp, 0) != 0) {
            msgf(why, len, "cannot fsync %s: %s", tmp, strerror(errno));
            ok = 0;
        }
        if (!ok) {
            unlink(tmp);
            return -1;
        }
    }
    sqlite3_finalize(w->ins_tx);
    sqlite3_finalize(w->ins_tr);
    w->ins_tx = w->ins_tr = NULL;
    if (sqlite3_close(w->db) != SQLITE_OK) {
        msgf(why, len, "cannot close the old connection: %s", sqlite3_errmsg(w->db));
        if (prepare_inserts(w) != 0)
            CHECK(!"statements that compiled before compile again");
        if (copy)
            unlink(tmp);
        return -1;
    }
    w->db = NULL;
    w->guarded = 0;
    if (copy && (rename(tmp, path) != 0 || sync_path(dir, 1) != 0)) {
        msgf(why, len, "cannot move %s to %s (%s); everything acknowledged is in %s", tmp, path,
             strerror(errno), tmp);
        return -1;
    }
    char err[512];
    if (db_open(path, sync_full, &w->db, err, sizeof err) != 0) {
        w->db = NULL;
        msgf(why, len, "cannot open %s again: %s", path, err);
        return -1;
    }
    if (max_pages > 0) {
        char sql[80];
        snprintf(sql, sizeof sql, "PRAGMA max_page_count = %lld", (long long)max_pages);
        sqlite3_exec(w->db, sql, NULL, NULL, NULL);
    }
    if (prepare_inserts(w) != 0 || fileguard_init(&w->guard, path) != 0) {
        msgf(why, len, "cannot use %s again: %s", path, sqlite3_errmsg(w->db));
        sqlite3_finalize(w->ins_tx);
        sqlite3_finalize(w->ins_tr);
        w->ins_tx = w->ins_tr = NULL;
        sqlite3_close(w->db);
        w->db = NULL;
        return -1;
    }
    w->guarded = 1;
    return 0;
}

/*
 * Checks the database file (what: fileguard_what bits; always all of them
 * while something is wrong).  Returns a fileguard_state: FILEGUARD_OK (also
 * after a successful rescue: the connection then writes the restored file) or
 * the reason to refuse, with why filled; logs each change of state once,
 * loudly.  A group of log records costs five syscalls: all three checks
 * before it (so a replaced or read-only file is refused before anything is
 * written to it) and the names after its COMMIT (about 15 us in all on the
 * sandboxed test machine, where a syscall costs 1.5-3 us).
 */
static int health(struct writer *w, int what, char *why, size_t len)
{
    if (!w->db) {
        msgf(why, len, "%s", w->lost_why);
        return FILEGUARD_REPLACED;
    }
    if (!w->guarded)
        return FILEGUARD_OK; /* the file could not be stat'ed at start (never seen) */
    if (w->lost == FILEGUARD_REPLACED) {
        msgf(why, len, "%s", w->lost_why);
        return FILEGUARD_REPLACED;
    }
    if (w->lost || w->readonly)
        what = FILEGUARD_ALL;
    char found[sizeof w->lost_why];
    int s = fileguard_check(&w->guard, what, found, sizeof found);
    if (s == FILEGUARD_OK || s == FILEGUARD_READONLY) {
        if (s == FILEGUARD_READONLY && !w->readonly)
            say_error("%s: worthd refuses every write (storage_error) until it is writable "
                      "again; queries go on",
                      found);
        else if (s == FILEGUARD_OK && w->readonly)
            say_info("database %s is writable again; writes resume", w->guard.path);
        w->readonly = s == FILEGUARD_READONLY;
        if (s == FILEGUARD_READONLY)
            msgf(why, len, "%s", found);
        return s;
    }
    if (s == FILEGUARD_REPLACED) {
        say_error("%s while worthd ran: worthd refuses every write (storage_error) until it is "
                  "restarted; what it committed since it started is only in its open file: save "
                  "it with the backup request before stopping worthd",
                  found);
        w->lost = FILEGUARD_REPLACED;
        /* Everything committed into the open main file: if it was moved rather than deleted,
         * the file under its new name is then complete without the -wal left at the path. */
        if (sqlite3_exec(w->db, "PRAGMA wal_checkpoint(TRUNCATE)", NULL, NULL, NULL) != SQLITE_OK)
            say_warn("cannot checkpoint the log into the open file: %s", sqlite3_errmsg(w->db));
        msgf(w->lost_why, sizeof w->lost_why, "%s; restart worthd", found);
        msgf(why, len, "%s", w->lost_why);
        return s;
    }
    /* Removed: write it back from the open connection, at most once a second. */
    double now = db_now();
    if (w->lost == FILEGUARD_REMOVED && now < w->next_rescue) {
        msgf(why, len, "%s", w->lost_why);
        return s;
    }
    if (w->lost != FILEGUARD_REMOVED)
        say_error("%s while worthd ran; writing the database back to %s from the open file", found,
                  w->guard.path);
    char fail[sizeof w->lost_why];
    if (rescue(w, fail, sizeof fail) == 0) {
        say_warn("database %s written back with everything committed; writes go on", w->guard.path);
        w->lost = 0;
        return FILEGUARD_OK;
    }
    if (w->lost != FILEGUARD_REMOVED || !w->db)
        say_error("database %s could not be written back: %s; worthd refuses every write "
                  "(storage_error)%s",
                  w->guard.path, fail,
                  w->db ? " and tries again each second; save the data with the backup request"
                        : "");
    w->lost = FILEGUARD_REMOVED;
    w->next_rescue = now + 1.0;
    msgf(w->lost_why, sizeof w->lost_why, "%s; %s", found, fail);
    msgf(why, len, "%s", w->lost_why);
    return s;
}

/* health() before a write: returns 0, or storage_error with why. */
static int may_write(struct writer *w, int what, char *why, size_t len)
{
    return health(w, what, why, len) == FILEGUARD_OK ? 0 : WORTH_E_STORAGE_ERROR;
}

/* ---- jobs -------------------------------------------------------------------------------- */

static void job_create(struct writer *w, struct job *j)
{
    char why[256];
    int code = may_write(w, FILEGUARD_ALL, why, sizeof why);
    if (code) {
        post_reply(w, j->q, j->conn_id, code, "cannot store the model: %s", why);
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
        post_reply(w, j->q, j->conn_id, db_error_code(w->db), "cannot store the model: %s",
                   sqlite3_errmsg(w->db));
        return;
    }
    queue_set_db_id(j->q, sqlite3_last_insert_rowid(w->db));
    add_model(w, j->q);
    insert_event(w, j->q, "create", "{}");
    char *buf = mem_alloc(256);
    size_t len = 0, cap = 256;
    buf[0] = 0;
    appendf(&buf, &len, &cap, ",\"model\":");
    json_str(&buf, &len, &cap, j->s1);
    appendf(&buf, &len, &cap, ",\"features\":%zu", j->features);
    post_reply(w, j->q, j->conn_id, 0, "%s", buf);
    mem_free(buf);
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
    } else if (!w->db || may_write(w, FILEGUARD_ALL, why, sizeof why) != 0) {
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
            insert_event_id(w, id, "drop", "{}");
    }
    if (stored) {
        post_reply(w, j->q, j->conn_id, 0, ",\"persisted\":true");
    } else {
        say_error("model %s: dropped in memory, but the drop could not be stored: %s; it comes "
                  "back at the next start unless dropped again",
                  name, why);
        size_t len = 0, cap = 512;
        char *buf = mem_alloc(cap);
        buf[0] = 0;
        appendf(&buf, &len, &cap, ",\"persisted\":false,\"warning\":");
        char msg[512];
        snprintf(msg, sizeof msg,
                 "dropped in memory only: the database could not store the drop (%s); the model "
                 "comes back at the next start unless it is dropped again",
                 why);
        json_str(&buf, &len, &cap, msg);
        post_reply(w, j->q, j->conn_id, 0, "%s", buf);
        mem_free(buf);
    }
    if (!j->q)
        return;
    event_t ev = {.kind = EV_RELEASED, .q = j->q};
    w->post(w->ctx, &ev);
}

/*
 * Deletes unlabelled checkpoints beyond the newest `keep` valid ones; never the
 * newest, nor the newest in which no estimator had diverged (a rollback to it
 * is how a diverged estimator comes back).
 */
static int retain(struct writer *w, int64_t model)
{
    sqlite3_stmt *st = NULL;
    int ok = sqlite3_prepare_v2(
                 w->db,
                 "DELETE FROM checkpoints WHERE model = ?1 AND label IS NULL AND id NOT IN"
                 " (SELECT id FROM checkpoints WHERE model = ?1 AND label IS NULL AND invalid = 0"
                 "  ORDER BY seq DESC, id DESC LIMIT ?2)"
                 " AND id NOT IN (SELECT id FROM checkpoints WHERE model = ?1 AND invalid = 0"
                 "  ORDER BY seq DESC, id DESC LIMIT 1)"
                 " AND id NOT IN (SELECT id FROM checkpoints WHERE model = ?1 AND invalid = 0"
                 "  AND diverged = 0 ORDER BY seq DESC, id DESC LIMIT 1)",
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
    int64_t model = queue_db_id(j->q), id = 0;
    char refused[256];
    int code = may_write(w, FILEGUARD_ALL, refused, sizeof refused);
    if (code) {
        say_error("model %s: checkpoint not stored: %s", queue_name(j->q), refused);
        post_reply(w, j->q, j->conn_id, code, "checkpoint not stored: %s", refused);
        return;
    }
    sqlite3_stmt *st = NULL;
    int ok = exec(w, "BEGIN IMMEDIATE") == 0;
    if (ok)
        ok = sqlite3_prepare_v2(w->db,
                                "INSERT INTO checkpoints(model, seq, training, label, created_at,"
                                " size, state, diverged) VALUES(?,?,?,?,?,?,?,?)",
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
        sqlite3_bind_int(st, 8, (int)j->diverged);
        ok = sqlite3_step(st) == SQLITE_DONE;
        id = sqlite3_last_insert_rowid(w->db);
    }
    sqlite3_finalize(st);
    if (ok) {
        char detail[256];
        int n =
            snprintf(detail, sizeof detail, "{\"checkpoint\":%lld,\"seq\":%llu,\"automatic\":%s",
                     (long long)id, (unsigned long long)j->seq, j->conn_id ? "false" : "true");
        if (j->diverged) /* estimators stored reset (est.h): said only when there are some */
            n += snprintf(detail + n, sizeof detail - (size_t)n, ",\"diverged\":%u", j->diverged);
        snprintf(detail + n, sizeof detail - (size_t)n, "}");
        ok = insert_event(w, j->q, "checkpoint", detail) > 0 && retain(w, model) == 0 &&
             exec(w, "COMMIT") == 0;
    }
    if (!ok) {
        int code = db_error_code(w->db);
        char why[512];
        snprintf(why, sizeof why, "%s", sqlite3_errmsg(w->db));
        exec(w, "ROLLBACK");
        say_error("model %s: checkpoint not stored: %s", queue_name(j->q), why);
        post_reply(w, j->q, j->conn_id, code, "checkpoint not stored: %s", why);
        return;
    }
    refresh_checkpoint_info(w, j->q);
    say_debug("model %s: checkpoint %lld at seq %llu (%zu bytes)", queue_name(j->q), (long long)id,
              (unsigned long long)j->seq, j->len);
    post_reply(w, j->q, j->conn_id, 0, ",\"checkpoint\":%lld,\"seq\":%llu", (long long)id,
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
        sqlite3_bind_int64(st, 1, queue_db_id(j->q));
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
        post_reply(w, j->q, j->conn_id, db_error_code(w->db), "cannot list checkpoints: %s",
                   sqlite3_errmsg(w->db));
    else {
        event_t ev = {.kind = EV_REPLY, .q = j->q, .conn_id = j->conn_id, .rc = 0};
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
        post_reply(w, NULL, j->conn_id, code, "backup failed: %s", why);
        return;
    }
    const char *dir = backup_dir_path(w->o.backups);
    say_info("backup written to %s/%s (%llu bytes)", dir, name, (unsigned long long)bytes);
    size_t len = 0, cap = 256;
    char *buf = mem_alloc(cap);
    buf[0] = 0;
    char path[PATH_MAX + sizeof name + 2];
    snprintf(path, sizeof path, "%s/%s", dir, name);
    appendf(&buf, &len, &cap, ",\"name\":");
    json_str(&buf, &len, &cap, name);
    appendf(&buf, &len, &cap, ",\"path\":");
    json_str(&buf, &len, &cap, path);
    appendf(&buf, &len, &cap, ",\"bytes\":%llu", (unsigned long long)bytes);
    if (!j->conn_id) {
        mem_free(buf);
        return;
    }
    /* Posted whole: a long path must not be cut by post_reply's buffer. */
    event_t ev = {.kind = EV_REPLY, .conn_id = j->conn_id, .rc = 0};
    ev.text = buf;
    w->post(w->ctx, &ev);
}

static void job_drift(struct writer *w, struct job *j)
{
    int64_t pre = 0, model = queue_db_id(j->q);
    if (j->id) { /* on_drift: copy the newest valid checkpoint before the onset, labelled */
        sqlite3_stmt *st = NULL;
        if (sqlite3_prepare_v2(
                w->db,
                "INSERT INTO checkpoints(model, seq, training, label, created_at, size, state,"
                " diverged) SELECT model, seq, training, 'pre-drift', ?1, size, state, diverged"
                " FROM checkpoints"
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
            refresh_checkpoint_info(w, j->q);
        else
            say_warn("model %s: no checkpoint before seq %llu to keep as pre-drift",
                     queue_name(j->q), (unsigned long long)j->a);
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
    insert_event(w, j->q, "drift", detail);
}

static void job_events(struct writer *w, struct job *j)
{
    sqlite3_stmt *st = NULL;
    size_t len = 0, cap = 4096;
    char *buf = mem_alloc(cap);
    buf[0] = 0;
    appendf(&buf, &len, &cap, ",\"events\":[");
    int rc = SQLITE_ERROR, first = 1;
    /* A quarantined model has no learner: its id and name came with the job. */
    int64_t model = j->q ? queue_db_id(j->q) : j->id;
    const char *name = j->q ? queue_name(j->q) : j->s1;
    int scoped = j->q || j->id; /* else the daemon-wide events */
    const char *sql = scoped
                          ? "SELECT id, at, kind, detail FROM events WHERE model = ?1 AND at >= ?2"
                            " ORDER BY id LIMIT ?3"
                          : "SELECT id, at, kind, detail FROM events WHERE model IS NULL AND"
                            " at >= ?2 ORDER BY id LIMIT ?3";
    if (sqlite3_prepare_v2(w->db, sql, -1, &st, NULL) == SQLITE_OK) {
        if (scoped)
            sqlite3_bind_int64(st, 1, model);
        sqlite3_bind_double(st, 2, j->since);
        sqlite3_bind_int64(st, 3, (sqlite3_int64)j->len);
        while ((rc = sqlite3_step(st)) == SQLITE_ROW) {
            appendf(&buf, &len, &cap, "%s{\"event\":%lld,\"at\":%.17g,\"kind\":", first ? "" : ",",
                    (long long)sqlite3_column_int64(st, 0), sqlite3_column_double(st, 1));
            json_str(&buf, &len, &cap, (const char *)sqlite3_column_text(st, 2));
            if (scoped) {
                appendf(&buf, &len, &cap, ",\"model\":");
                json_str(&buf, &len, &cap, name);
            }
            /* detail is JSON written by worthd itself */
            appendf(&buf, &len, &cap, ",\"detail\":%s}", (const char *)sqlite3_column_text(st, 3));
            first = 0;
        }
    }
    sqlite3_finalize(st);
    appendf(&buf, &len, &cap, "]");
    if (rc != SQLITE_DONE) {
        post_reply(w, j->q, j->conn_id, db_error_code(w->db), "cannot list events: %s",
                   sqlite3_errmsg(w->db));
        mem_free(buf);
        return;
    }
    event_t ev = {.kind = EV_REPLY, .q = j->q, .conn_id = j->conn_id, .rc = 0};
    ev.text = buf;
    w->post(w->ctx, &ev);
}

static void job_cut(struct writer *w, struct job *j)
{
    char why[256];
    sqlite3_stmt *st = NULL;
    int ok = may_write(w, FILEGUARD_ALL, why, sizeof why) == 0;
    if (!ok) {
        say_error("model %s: cannot record that training %llu was cut short: %s; a replay of "
                  "the log would run it whole",
                  queue_name(j->q), (unsigned long long)j->seq, why);
        return;
    }
    if (sqlite3_prepare_v2(w->db, "UPDATE trainings SET steps = ? WHERE model = ? AND ordinal = ?",
                           -1, &st, NULL) == SQLITE_OK) {
        sqlite3_bind_int64(st, 1, (sqlite3_int64)j->training);
        sqlite3_bind_int64(st, 2, queue_db_id(j->q));
        sqlite3_bind_int64(st, 3, (sqlite3_int64)j->seq);
        ok = sqlite3_step(st) == SQLITE_DONE;
    } else {
        ok = 0;
    }
    sqlite3_finalize(st);
    if (!ok)
        say_error("model %s: cannot record that training %llu was cut short: %s; a replay of "
                  "the log would run it whole",
                  queue_name(j->q), (unsigned long long)j->seq, sqlite3_errmsg(w->db));
}

static void run_job(struct writer *w, struct job *j)
{
    char why[256];
    if (!w->db) { /* lost after a failed write-back: answer from memory what needs no file */
        snprintf(why, sizeof why, "%s", w->lost_why);
        if (j->kind == J_ADD) {
            queue_set_db_id(j->q, j->id);
            add_model(w, j->q);
        } else if (j->kind == J_DROP) {
            job_drop(w, j);
        } else {
            post_reply(w, j->q, j->conn_id, WORTH_E_STORAGE_ERROR, "the database is unusable: %s",
                       why);
        }
        return;
    }
    switch (j->kind) {
    case J_ADD:
        queue_set_db_id(j->q, j->id);
        add_model(w, j->q);
        refresh_checkpoint_info(w, j->q);
        break;
    case J_DRIFT:
        if (may_write(w, FILEGUARD_ALL, why, sizeof why) == 0)
            job_drift(w, j);
        else
            say_error("model %s: drift alarm not recorded: %s", queue_name(j->q), why);
        break;
    case J_EVENTS:
        job_events(w, j);
        break;
    case J_CUT:
        job_cut(w, j);
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
        if (may_write(w, FILEGUARD_ALL, why, sizeof why) == 0)
            insert_event_id(w, j->q ? queue_db_id(j->q) : j->id, j->s1, j->s2);
        else
            say_warn("event %s not recorded: %s", j->s1, why);
        break;
    }
}

/* ---- records ----------------------------------------------------------------------------- */

/* Marks the log for a rollback inside the open transaction; fills the plan. */
static int mark_rollback(struct writer *w, struct queue *q, queue_rec_t *r)
{
    queue_plan_t *p = r->job;
    int64_t model = queue_db_id(q);
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
        snprintf(p->err, sizeof p->err, "model %s has no valid checkpoint %lld", queue_name(q),
                 (long long)p->checkpoint);
        return 0;
    }
    /* A damaged checkpoint is refused before anything is marked. */
    char why[160];
    if (model_state_check(p->blob, p->blob_len, why, sizeof why) != 0) {
        p->rc = WORTH_E_BAD_DATABASE;
        snprintf(p->err, sizeof p->err, "checkpoint %lld cannot be restored: %s",
                 (long long)p->checkpoint, why);
        say_error("model %s: %s", queue_name(q), p->err);
        return 0;
    }
    int64_t ev = insert_event(w, q, "rollback", "{}");
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
        refresh_checkpoint_info(w, q);
    return rc == SQLITE_DONE ? 0 : -1;
}

static int write_record(struct writer *w, struct queue *q, queue_rec_t *r)
{
    sqlite3_stmt *st;
    size_t d = queue_dims(q);
    switch (r->type) {
    case QREC_OBS:
        st = w->ins_tx;
        sqlite3_reset(st);
        sqlite3_bind_int64(st, 1, queue_db_id(q));
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
    case QREC_TRAIN:
        st = w->ins_tr;
        sqlite3_reset(st);
        sqlite3_bind_int64(st, 1, queue_db_id(q));
        sqlite3_bind_int64(st, 2, (sqlite3_int64)r->ordinal);
        sqlite3_bind_int64(st, 3, (sqlite3_int64)r->seq);
        sqlite3_bind_text(st, 4, r->src, -1, SQLITE_STATIC);
        sqlite3_bind_int(st, 5, (int)r->passes);
        return sqlite3_step(st) == SQLITE_DONE ? 0 : -1;
    case QREC_ROLLBACK:
        return mark_rollback(w, q, r);
    default:
        return 0;
    }
}

/* A commit failed: the records taken are never learnt, and their requests hear io. */
static void fail_records(struct writer *w, struct queue *q, uint64_t from, uint64_t to, int code,
                         const char *why)
{
    uint64_t last_seq = 0;
    for (uint64_t k = from; k < to; k++) {
        queue_rec_t *r = queue_rec(q, k);
        if (r->type == QREC_TRAIN) {
            event_t ev = {.kind = EV_TRAINED, .q = q, .conn_id = r->conn_id, .rc = code};
            w->post(w->ctx, &ev);
        } else if (r->type == QREC_CHECKPOINT || r->type == QREC_ROLLBACK) {
            post_reply(w, q, r->conn_id, code, "the log could not be written: %s", why);
            if (r->type == QREC_ROLLBACK) {
                queue_rollback_gone(q);
                mem_free(r->job->blob);
                mem_free(r->job);
                r->job = NULL;
            }
        }
        if (r->type == QREC_OBS)
            last_seq = r->seq;
        r->type = QREC_DEAD;
    }
    queue_set_durable(q, to);
    if (last_seq) {
        event_t ev = {.kind = EV_FAILED, .q = q, .seq = last_seq, .rc = code};
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
        queue_pending(w->models[i], &f, &t);
        from[i] = f;
        if (t - f > budget)
            t = f + budget;
        w->upto[i] = f;
        if (t == f)
            continue;
        if (!began) {
            char why[256];
            int code = may_write(w, FILEGUARD_ALL, why, sizeof why);
            if (code) {
                /* Nothing begun: every pending request of every model is refused whole. */
                say_error("log not written (%s); pending records not applied", why);
                for (size_t k = i; k < nm; k++) {
                    uint64_t f2, t2;
                    queue_pending(w->models[k], &f2, &t2);
                    if (t2 > f2)
                        fail_records(w, w->models[k], f2, t2, code, why);
                }
                return 1;
            }
            if (exec(w, "BEGIN IMMEDIATE") != 0) {
                ok = 0;
                break;
            }
            began = 1;
        }
        /* Never split a request: run on to the end of the last one begun. */
        while (t > f && !queue_rec(w->models[i], t - 1)->last) {
            uint64_t f2, t2;
            queue_pending(w->models[i], &f2, &t2);
            if (t >= t2)
                break; /* cannot happen: the loop commits whole requests */
            t++;
        }
        for (uint64_t k = f; k < t && ok; k++)
            ok = write_record(w, w->models[i], queue_rec(w->models[i], k)) == 0;
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
        if (ok) {
            /* A commit into a file that lost its name is not durable unless written back. */
            char why[256];
            int h = health(w, FILEGUARD_NAME, why, sizeof why);
            if (h != FILEGUARD_OK && h != FILEGUARD_READONLY) {
                say_error("log committed into a file that is no longer the database (%s); %zu "
                          "records not applied",
                          why, taken);
                for (size_t i = 0; i < nm; i++)
                    if (w->upto[i] > from[i])
                        fail_records(w, w->models[i], from[i], w->upto[i], WORTH_E_STORAGE_ERROR,
                                     why);
                return 1;
            }
        }
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
        struct queue *q = w->models[i];
        uint64_t last_seq = queue_rec(q, w->upto[i] - 1)->seq;
        queue_set_durable(q, w->upto[i]);
        event_t ev = {.kind = EV_DURABLE, .q = q, .seq = last_seq};
        w->post(w->ctx, &ev);
    }
    return taken > 0;
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
    CHECK(prepare_inserts(w) == 0);
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

static struct job *job(enum job_kind kind, struct queue *q, uint64_t conn_id)
{
    struct job *j = mem_calloc(1, sizeof *j);
    j->kind = kind;
    j->q = q;
    j->conn_id = conn_id;
    return j;
}

void writer_add_model(struct writer *w, struct queue *q, int64_t model_id)
{
    struct job *j = job(J_ADD, q, 0);
    j->id = model_id;
    push(w, j);
}

void writer_create_model(struct writer *w, struct queue *q, const char *name, const char *spec,
                         size_t features, uint64_t conn_id)
{
    struct job *j = job(J_CREATE, q, conn_id);
    j->s1 = mem_strdup(name);
    j->s2 = mem_strdup(spec);
    j->features = features;
    push(w, j);
}

void writer_drop_model(struct writer *w, struct queue *q, uint64_t conn_id)
{
    push(w, job(J_DROP, q, conn_id));
}

void writer_store_checkpoint(struct writer *w, struct queue *q, uint64_t seq, uint64_t training,
                             unsigned diverged, const char *label, uint8_t *blob, size_t len,
                             uint64_t conn_id)
{
    struct job *j = job(J_CHECKPOINT, q, conn_id);
    j->seq = seq;
    j->training = training;
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
    struct job *j = job(J_CUT, q, 0);
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
    push(w, job(J_LIST, q, conn_id));
}

void writer_backup(struct writer *w, const char *name, uint64_t conn_id)
{
    struct job *j = job(J_BACKUP, NULL, conn_id);
    j->s1 = name ? mem_strdup(name) : NULL;
    push(w, j);
}

void writer_event(struct writer *w, struct queue *q, const char *kind, const char *detail)
{
    struct job *j = job(J_EVENT, q, 0);
    j->s1 = mem_strdup(kind);
    j->s2 = mem_strdup(detail);
    push(w, j);
}

void writer_model_event(struct writer *w, int64_t model_id, const char *kind, const char *detail)
{
    struct job *j = job(J_EVENT, NULL, 0);
    j->id = model_id;
    j->s1 = mem_strdup(kind);
    j->s2 = mem_strdup(detail);
    push(w, j);
}

void writer_drop_damaged(struct writer *w, int64_t model_id, const char *name, uint64_t conn_id)
{
    struct job *j = job(J_DROP, NULL, conn_id);
    j->id = model_id;
    j->s1 = mem_strdup(name);
    push(w, j);
}

void writer_drift(struct writer *w, struct queue *q, uint64_t seq, uint64_t onset_seq,
                  uint64_t step, uint64_t onset_step, uint64_t alarms, int pre_drift)
{
    struct job *j = job(J_DRIFT, q, 0);
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
    struct job *j = job(J_EVENTS, q, conn_id);
    j->since = since;
    j->len = limit;
    push(w, j);
}

void writer_list_model_events(struct writer *w, int64_t model_id, const char *name, double since,
                              size_t limit, uint64_t conn_id)
{
    struct job *j = job(J_EVENTS, NULL, conn_id);
    j->id = model_id;
    j->s1 = mem_strdup(name);
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
