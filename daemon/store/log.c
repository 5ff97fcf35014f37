/*
 * log.c - the transition log: every model's records, in arrival order, a
 * group of them per transaction (writer thread).
 *
 * Group commit: under load a turn finds many records waiting, so the fsync
 * of one COMMIT covers them all, at most group_max records and never a
 * request split across two.
 *
 * Invariants.
 * 1. A record is marked durable (released to the learner, acknowledged to the
 *    client) only after the transaction holding it has committed.
 * 2. A failed COMMIT is never reported as success: its records become
 *    QREC_DEAD (never learnt) and their requests are answered with its error.
 * 3. A rollback marks the log and invalidates later checkpoints in the same
 *    transaction as the records before it, so a crash either keeps all of it
 *    or none.
 * 4. A commit into a file that lost its name is not acknowledged (rescue.c).
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

const double writer_hist_le[WRITER_HIST_N] = {0.0005, 0.001, 0.002, 0.005, 0.01, 0.02,
                                              0.05,   0.1,   0.25,  0.5,   1.0,  INFINITY};

/* ---- records ----------------------------------------------------------------------------- */

/* Marks the log for a rollback inside the open transaction; fills the plan. */
static int log_mark_rollback(struct writer *w, struct queue *q, queue_rec_t *r)
{
    queue_plan_t *p = r->job;
    int64_t model = queue_db_id(q);
    sqlite3_stmt *st = NULL;
    int found = 0;
    if (sqlite3_prepare_v2(w->db,
                           "SELECT seq, training, state, plant_t FROM checkpoints"
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
        p->cp_plant_t =
            sqlite3_column_type(st, 3) == SQLITE_NULL ? NAN : sqlite3_column_double(st, 3);
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
    /* A savepoint: a damaged block met while choosing by t leaves nothing marked. */
    if (wr_exec(w, "SAVEPOINT log_rollback") != 0)
        return -1;
    int64_t ev = events_insert(w, q, "rollback", "{}");
    if (ev <= 0)
        return -1;
    /* Transitions without t cannot be in a window of t: they are counted, not excluded. */
    int mode = !p->replay ? LOGSQL_UNDO_ALL : p->by_t ? LOGSQL_UNDO_TIMES : LOGSQL_UNDO_SEQS;
    rc = logsql_undo(w->db, model, queue_dims(q), p->cp_seq, r->seq, mode, p->lo, p->hi, ev,
                     &p->undone, &p->untimed);
    if (rc == -2) {
        wr_exec(w, "ROLLBACK TO log_rollback");
        wr_exec(w, "RELEASE log_rollback");
        p->rc = WORTH_E_DAMAGED;
        snprintf(p->err, sizeof p->err,
                 "the log of model %s after checkpoint %lld holds a damaged block, so the "
                 "window of t cannot be chosen; nothing rolled back",
                 queue_name(q), (long long)p->checkpoint);
        say_error("model %s: %s", queue_name(q), p->err);
        return 0;
    }
    if (rc != 0 || wr_exec(w, "RELEASE log_rollback") != 0)
        return -1;
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
    /* Plant time: "t", the newest logged transition's before the rollback (where it happened
     * on the plant's clock); "to_t", the checkpoint's. */
    double at_t = logsql_last_t(w->db, model, queue_dims(q), r->seq);
    char detail[320], times[96] = "";
    int nt = 0;
    if (!isnan(at_t))
        nt = snprintf(times, sizeof times, ",\"t\":%.17g", at_t);
    if (!isnan(p->cp_plant_t))
        snprintf(times + nt, sizeof times - (size_t)nt, ",\"to_t\":%.17g", p->cp_plant_t);
    snprintf(detail, sizeof detail,
             "{\"checkpoint\":%lld,\"seq\":%llu,\"undone\":%llu,\"replay\":%s,"
             "\"untimed\":%llu%s}",
             (long long)p->checkpoint, (unsigned long long)p->cp_seq, (unsigned long long)p->undone,
             p->replay ? "true" : "false", (unsigned long long)p->untimed, times);
    if (sqlite3_prepare_v2(w->db, "UPDATE events SET detail = ? WHERE id = ?", -1, &st, NULL) !=
        SQLITE_OK)
        return -1;
    sqlite3_bind_text(st, 1, detail, -1, SQLITE_STATIC);
    sqlite3_bind_int64(st, 2, ev);
    rc = sqlite3_step(st);
    sqlite3_finalize(st);
    if (rc == SQLITE_DONE)
        ckpt_refresh_info(w, q);
    return rc == SQLITE_DONE ? 0 : -1;
}

/* Stores the block being built (for q), if it holds any record; 0 or -1. */
static int log_flush_block(struct writer *w, struct queue *q)
{
    if (!w->enc.n)
        return 0;
    logblk_enc_finish(&w->enc);
    int rc = logsql_put_block(w->ins_blk, queue_db_id(q), &w->enc);
    logblk_enc_reset(&w->enc, w->enc.dims);
    return rc;
}

static int log_write_record(struct writer *w, struct queue *q, queue_rec_t *r)
{
    sqlite3_stmt *st;
    size_t d = queue_dims(q);
    if (r->type != QREC_OBS && log_flush_block(w, q) != 0)
        return -1;
    switch (r->type) {
    case QREC_OBS: {
        /* Into the model's open block: a row per run of up to LOGBLK_MAX transitions. */
        logblk_rec_t b = {.seq = r->seq,
                          .r = r->r,
                          .t = r->t_s,
                          .dt = r->dt_s,
                          .terminal = (int)r->terminal,
                          .src = r->src,
                          .x = r->v,
                          .xn = r->v + d};
        if (!w->enc.n)
            logblk_enc_reset(&w->enc, d);
        if (logblk_enc_add(&w->enc, &b) == 0)
            return 0;
        if (log_flush_block(w, q) != 0)
            return -1;
        logblk_enc_reset(&w->enc, d);
        return logblk_enc_add(&w->enc, &b);
    }
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
        return log_mark_rollback(w, q, r);
    case QREC_SOURCE:
        st = w->ins_src;
        sqlite3_reset(st);
        sqlite3_bind_int64(st, 1, queue_db_id(q));
        sqlite3_bind_text(st, 2, r->src, -1, SQLITE_STATIC);
        if (r->est) {
            sqlite3_bind_double(st, 3, r->t_s);
            sqlite3_bind_blob(st, 4, r->v, (int)(d * sizeof(double)), SQLITE_STATIC);
            sqlite3_bind_double(st, 5, r->r);
        } else {
            for (int c = 3; c <= 5; c++)
                sqlite3_bind_null(st, c);
        }
        sqlite3_bind_int(st, 6, (int)r->terminal);
        sqlite3_bind_int64(st, 7, (sqlite3_int64)r->pseq);
        return sqlite3_step(st) == SQLITE_DONE ? 0 : -1;
    default:
        return 0;
    }
}

/* A commit failed: the records taken are never learnt, and their requests hear io. */
static void log_fail_records(struct writer *w, struct queue *q, uint64_t from, uint64_t to,
                             int code, const char *why)
{
    for (uint64_t k = from; k < to; k++) {
        queue_rec_t *r = queue_rec(q, k);
        if (r->type == QREC_SOURCE)
            queue_mark_unpaired(q); /* the loop's pairing ran ahead of what the log holds */
        if (r->type == QREC_TRAIN) {
            event_t ev = {.kind = EV_TRAINED, .q = q, .conn_id = r->conn_id, .rc = code};
            w->post(w->ctx, &ev);
        } else if (r->type == QREC_CHECKPOINT || r->type == QREC_ROLLBACK) {
            wr_reply(w, q, r->conn_id, code, "the log could not be written: %s", why);
            if (r->type == QREC_ROLLBACK) {
                queue_rollback_gone(q);
                mem_free(r->job->blob);
                mem_free(r->job);
                r->job = NULL;
            }
        }
        r->type = QREC_DEAD;
    }
    queue_set_durable(q, to);
    {
        event_t ev = {.kind = EV_FAILED, .q = q, .seq = to, .rc = code}; /* a queue position */
        ev.text = mem_strdup(why);
        w->post(w->ctx, &ev);
    }
}

/* Appends pending records of every model in one transaction.  Returns 1 if any were taken. */
int log_write_group(struct writer *w)
{
    size_t budget = w->o.group_max, taken = 0;
    int refused = 0; /* records of a model marked unpaired were failed */
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
        uint64_t unwritten;
        if (t > f && queue_unpaired(w->models[i], &unwritten)) {
            /* Paired on samples the log lost: refused until the loop reloads its pairing. */
            log_fail_records(w, w->models[i], f, t, WORTH_E_STORAGE_ERROR,
                             "an earlier commit of this model's samples failed; its pairing is "
                             "reloaded from the log, resend");
            w->upto[i] = f;
            refused = 1;
            continue;
        }
        if (t - f > budget)
            t = f + budget;
        w->upto[i] = f;
        if (t == f)
            continue;
        if (!began) {
            char why[256];
            int code = rescue_may_write(w, FILEGUARD_ALL, why, sizeof why);
            if (code) {
                /* Nothing begun: every pending request of every model is refused whole. */
                say_error("log not written (%s); pending records not applied", why);
                for (size_t k = i; k < nm; k++) {
                    uint64_t f2, t2;
                    queue_pending(w->models[k], &f2, &t2);
                    if (t2 > f2)
                        log_fail_records(w, w->models[k], f2, t2, code, why);
                }
                return 1;
            }
            if (wr_exec(w, "BEGIN IMMEDIATE") != 0) {
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
            ok = log_write_record(w, w->models[i], queue_rec(w->models[i], k)) == 0;
        ok = ok && log_flush_block(w, w->models[i]) == 0;
        logblk_enc_reset(&w->enc, w->enc.dims); /* a failed group leaves nothing behind */
        w->upto[i] = t;
        taken += t - f;
        budget = t - f >= budget ? 0 : budget - (t - f);
        if (!ok || budget == 0)
            break;
    }
    if (!began && ok)
        return refused;
    if (ok) {
        double t0 = db_now();
        if (wr_exec(w, "COMMIT") != 0)
            ok = 0;
        double dt = db_now() - t0;
        if (ok) {
            /* A commit into a file that lost its name is not durable unless written back. */
            char why[256];
            int h = rescue_health(w, FILEGUARD_NAME, why, sizeof why);
            if (h != FILEGUARD_OK && h != FILEGUARD_READONLY) {
                say_error("log committed into a file that is no longer the database (%s); %zu "
                          "records not applied",
                          why, taken);
                for (size_t i = 0; i < nm; i++)
                    if (w->upto[i] > from[i])
                        log_fail_records(w, w->models[i], from[i], w->upto[i],
                                         WORTH_E_STORAGE_ERROR, why);
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
        wr_exec(w, "ROLLBACK");
        say_error("log commit failed (%s); %zu records not applied", why, taken);
        for (size_t i = 0; i < nm; i++)
            if (w->upto[i] > from[i])
                log_fail_records(w, w->models[i], from[i], w->upto[i], code, why);
        return 1;
    }
    for (size_t i = 0; i < nm; i++) {
        if (w->upto[i] == from[i])
            continue;
        struct queue *q = w->models[i];
        queue_set_durable(q, w->upto[i]);
        event_t ev = {.kind = EV_DURABLE, .q = q, .seq = w->upto[i]}; /* a queue position */
        w->post(w->ctx, &ev);
    }
    return taken > 0 || refused;
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
