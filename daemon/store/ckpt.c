/*
 * ckpt.c - checkpoints: storing one, retention, listing them, the pre-drift
 * copy, and recording a training cut short (writer thread).
 *
 * Invariants.
 * 1. A checkpoint is one transaction: its row, its event and the retention
 *    that follows commit together or not at all.
 * 2. Retention never deletes the newest valid checkpoint, nor the newest
 *    valid one in which no estimator had diverged, nor a labelled one.
 */

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
#include "common/say.h"
#include "store/backup.h"
#include "store/db.h"
#include "store/fileguard.h"
#include "store/logsql.h"
#include "store/wr.h"
#include "worth/errors.h"

/* Tells q how many valid checkpoints it has and when the newest was taken. */
void ckpt_refresh_info(struct writer *w, struct queue *q)
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

/*
 * Deletes unlabelled checkpoints beyond the newest `keep` valid ones; never the
 * newest, nor the newest in which no estimator had diverged (a rollback to it
 * is how a diverged estimator comes back).
 */
static int ckpt_retain(struct writer *w, int64_t model)
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

void ckpt_job_store(struct writer *w, struct job *j)
{
    int64_t model = queue_db_id(j->q), id = 0;
    char refused[256];
    int code = rescue_may_write(w, FILEGUARD_ALL, refused, sizeof refused);
    if (code) {
        say_error("model %s: checkpoint not stored: %s", queue_name(j->q), refused);
        wr_reply(w, j->q, j->conn_id, code, "checkpoint not stored: %s", refused);
        return;
    }
    sqlite3_stmt *st = NULL;
    int ok = wr_exec(w, "BEGIN IMMEDIATE") == 0;
    if (ok)
        ok = sqlite3_prepare_v2(w->db,
                                "INSERT INTO checkpoints(model, seq, training, label, created_at,"
                                " size, state, diverged, plant_t) VALUES(?,?,?,?,?,?,?,?,?)",
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
        if (isnan(j->plant_t))
            sqlite3_bind_null(st, 9);
        else
            sqlite3_bind_double(st, 9, j->plant_t);
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
        if (!isnan(j->plant_t))
            n += snprintf(detail + n, sizeof detail - (size_t)n, ",\"t\":%.17g", j->plant_t);
        snprintf(detail + n, sizeof detail - (size_t)n, "}");
        ok = events_insert(w, j->q, "checkpoint", detail) > 0 && ckpt_retain(w, model) == 0 &&
             wr_exec(w, "COMMIT") == 0;
    }
    if (!ok) {
        int code = db_error_code(w->db);
        char why[512];
        snprintf(why, sizeof why, "%s", sqlite3_errmsg(w->db));
        wr_exec(w, "ROLLBACK");
        say_error("model %s: checkpoint not stored: %s", queue_name(j->q), why);
        wr_reply(w, j->q, j->conn_id, code, "checkpoint not stored: %s", why);
        return;
    }
    ckpt_refresh_info(w, j->q);
    say_debug("model %s: checkpoint %lld at seq %llu (%zu bytes)", queue_name(j->q), (long long)id,
              (unsigned long long)j->seq, j->len);
    wr_reply(w, j->q, j->conn_id, 0, ",\"checkpoint\":%lld,\"seq\":%llu", (long long)id,
             (unsigned long long)j->seq);
}

void ckpt_job_list(struct writer *w, struct job *j)
{
    sqlite3_stmt *st = NULL;
    jw_t jb;
    jw_init(&jb);
    jw_fmt(&jb, ",\"checkpoints\":[");
    int rc = SQLITE_ERROR, first = 1;
    if (sqlite3_prepare_v2(w->db,
                           "SELECT id, seq, label, created_at, size, plant_t FROM checkpoints"
                           " WHERE model = ? AND invalid = 0 ORDER BY seq DESC, id DESC",
                           -1, &st, NULL) == SQLITE_OK) {
        sqlite3_bind_int64(st, 1, queue_db_id(j->q));
        while ((rc = sqlite3_step(st)) == SQLITE_ROW) {
            jw_fmt(&jb, "%s{\"checkpoint\":%lld,\"seq\":%lld,\"label\":", first ? "" : ",",
                   (long long)sqlite3_column_int64(st, 0), (long long)sqlite3_column_int64(st, 1));
            if (sqlite3_column_type(st, 2) == SQLITE_NULL)
                jw_fmt(&jb, "null");
            else
                jw_str(&jb, (const char *)sqlite3_column_text(st, 2));
            jw_fmt(&jb, ",\"created_at\":%.17g,\"size\":%lld", sqlite3_column_double(st, 3),
                   (long long)sqlite3_column_int64(st, 4));
            if (sqlite3_column_type(st, 5) != SQLITE_NULL)
                jw_fmt(&jb, ",\"plant_t\":%.17g", sqlite3_column_double(st, 5));
            jw_fmt(&jb, "}");
            first = 0;
        }
    }
    sqlite3_finalize(st);
    jw_fmt(&jb, "]");
    if (rc != SQLITE_DONE)
        wr_reply(w, j->q, j->conn_id, db_error_code(w->db), "cannot list checkpoints: %s",
                 sqlite3_errmsg(w->db));
    else {
        event_t ev = {.kind = EV_REPLY, .q = j->q, .conn_id = j->conn_id, .rc = 0};
        ev.text = jw_take(&jb);
        w->post(w->ctx, &ev);
        return;
    }
    jw_close(&jb);
}

void ckpt_job_drift(struct writer *w, struct job *j)
{
    int64_t pre = 0, model = queue_db_id(j->q);
    /*
     * on_drift: copy the newest valid checkpoint that has learnt nothing from the onset on
     * (seq < onset_seq: its state covers transitions up to onset_seq - 1 at most), labelled.
     * The pre-drift checkpoint is therefore provably no later than the onset; how much
     * earlier depends on the automatic checkpoints' spacing (--checkpoint-every).
     */
    if (j->id) {
        /* An alarm whose newest such checkpoint is already a pre-drift copy reuses it: a
         * plant alarming again and again keeps one copy, not one per alarm. */
        sqlite3_stmt *st = NULL;
        int64_t src = 0;
        int is_copy = 0;
        if (sqlite3_prepare_v2(w->db,
                               "SELECT id, label = 'pre-drift' FROM checkpoints WHERE model = ?1"
                               " AND invalid = 0 AND seq < ?2 ORDER BY seq DESC, id DESC LIMIT 1",
                               -1, &st, NULL) == SQLITE_OK) {
            sqlite3_bind_int64(st, 1, model);
            sqlite3_bind_int64(st, 2, (sqlite3_int64)j->a);
            if (sqlite3_step(st) == SQLITE_ROW) {
                src = sqlite3_column_int64(st, 0);
                is_copy = sqlite3_column_int(st, 1);
            }
        }
        sqlite3_finalize(st);
        st = NULL;
        if (src && is_copy) {
            pre = src;
        } else if (src &&
                   sqlite3_prepare_v2(
                       w->db,
                       "INSERT INTO checkpoints(model, seq, training, label, created_at, size,"
                       " state, diverged, plant_t) SELECT model, seq, training, 'pre-drift', ?1,"
                       " size, state, diverged, plant_t FROM checkpoints WHERE id = ?2",
                       -1, &st, NULL) == SQLITE_OK) {
            sqlite3_bind_double(st, 1, db_now());
            sqlite3_bind_int64(st, 2, src);
            if (sqlite3_step(st) == SQLITE_DONE && sqlite3_changes(w->db) == 1)
                pre = sqlite3_last_insert_rowid(w->db);
        }
        sqlite3_finalize(st);
        if (pre)
            ckpt_refresh_info(w, j->q);
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
    /*
     * In plant time: the t of the alarm's and of the onset's transitions in the log, when
     * they have one (the learner's own plant time may run ahead of the transition whose
     * alarm it reports: the diagnostics take a chunk after it was pushed).
     */
    size_t dims = queue_dims(j->q);
    double ta = logsql_t_at(w->db, model, dims, j->seq), to = logsql_t_at(w->db, model, dims, j->a);
    if (isnan(ta))
        ta = j->plant_t;
    if (!isnan(ta))
        n += snprintf(detail + n, sizeof detail - (size_t)n, ",\"t\":%.17g", ta);
    if (!isnan(to))
        n += snprintf(detail + n, sizeof detail - (size_t)n, ",\"onset_t\":%.17g", to);
    snprintf(detail + n, sizeof detail - (size_t)n, "}");
    events_insert(w, j->q, "drift", detail);
}

void ckpt_job_cut(struct writer *w, struct job *j)
{
    char why[256];
    sqlite3_stmt *st = NULL;
    int ok = rescue_may_write(w, FILEGUARD_ALL, why, sizeof why) == 0;
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
