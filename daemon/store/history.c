/*
 * history.c - the history table: the learner's buffer of rows (its thread),
 * storing them and listing a window (writer thread; the posting functions
 * run on any thread).
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "common/jw.h"
#include "common/mem.h"
#include "common/say.h"
#include "core/queue.h"
#include "store/db.h"
#include "learn/diag.h"
#include "store/history.h"
#include "store/wr.h"
#include "worth/errors.h"

/* What a J_OPS job of this file carries. */
struct hist_job {
    int list;
    history_row_t *rows;
    size_t n, n_est;
    char *names;
    double width_s;
    history_query_t hq;
};

static void free_hist_job(struct hist_job *hj)
{
    mem_free(hj->rows);
    mem_free(hj->names);
    mem_free(hj);
}

/* Writes a[0..n-1] as a JSON array (NAN as null). */
static void json_array(jw_t *o, const double *a, size_t n)
{
    jw_lit(o, "[");
    for (size_t i = 0; i < n; i++) {
        if (i)
            jw_lit(o, ",");
        jw_num(o, a[i]);
    }
    jw_lit(o, "]");
}

static void store(struct writer *w, struct queue *q, struct hist_job *hj)
{
    char why[256];
    if (!w->db || queue_db_id(q) <= 0)
        return;
    if (rescue_may_write(w, FILEGUARD_ALL, why, sizeof why) != 0) {
        say_debug("model %s: %zu history rows not stored: %s", queue_name(q), hj->n, why);
        return;
    }
    sqlite3_stmt *st = NULL;
    int ok = wr_exec(w, "BEGIN IMMEDIATE") == 0;
    if (ok)
        ok = sqlite3_prepare_v2(w->db,
                                "INSERT OR IGNORE INTO history(model, timed, bucket, seq, at, "
                                "plant_t, td_rms, realised_rms) VALUES(?,?,?,?,?,?,?,?)",
                                -1, &st, NULL) == SQLITE_OK;
    jw_t a, b;
    jw_init(&a);
    jw_init(&b);
    for (size_t i = 0; ok && i < hj->n; i++) {
        const history_row_t *r = &hj->rows[i];
        jw_reset(&a);
        jw_reset(&b);
        json_array(&a, r->td_rms, hj->n_est);
        json_array(&b, r->realised_rms, hj->n_est);
        sqlite3_reset(st);
        sqlite3_bind_int64(st, 1, queue_db_id(q));
        sqlite3_bind_int(st, 2, r->timed);
        sqlite3_bind_int64(st, 3, r->bucket);
        sqlite3_bind_int64(st, 4, (sqlite3_int64)r->seq);
        sqlite3_bind_double(st, 5, r->at);
        if (isnan(r->plant_t))
            sqlite3_bind_null(st, 6);
        else
            sqlite3_bind_double(st, 6, r->plant_t);
        sqlite3_bind_text(st, 7, a.b, (int)a.len, SQLITE_TRANSIENT);
        sqlite3_bind_text(st, 8, b.b, (int)b.len, SQLITE_TRANSIENT);
        ok = sqlite3_step(st) == SQLITE_DONE;
    }
    jw_close(&a);
    jw_close(&b);
    sqlite3_finalize(st);
    if (ok)
        ok = wr_exec(w, "COMMIT") == 0;
    if (!ok) {
        /* The history is for pictures: a failed write costs rows, never the log. */
        say_warn("model %s: history rows not stored: %s", queue_name(q), sqlite3_errmsg(w->db));
        if (!sqlite3_get_autocommit(w->db))
            (void)wr_exec(w, "ROLLBACK");
    }
}

static void list(struct writer *w, struct job *j, struct hist_job *hj)
{
    if (!w->db) {
        wr_reply(w, j->q, j->conn_id, WORTH_E_STORAGE_ERROR, "the database is unusable: %s",
                 w->lost_why);
        return;
    }
    const char *win = hj->hq.by_t ? "model = ?1 AND plant_t >= ?2 AND plant_t <= ?3"
                                  : "model = ?1 AND seq >= ?2 AND seq <= ?3";
    char sql[512];
    sqlite3_stmt *st = NULL;
    int64_t rows = 0;
    snprintf(sql, sizeof sql, "SELECT COUNT(*) FROM history WHERE %s", win);
    int rc = sqlite3_prepare_v2(w->db, sql, -1, &st, NULL);
    if (rc == SQLITE_OK) {
        sqlite3_bind_int64(st, 1, queue_db_id(j->q));
        sqlite3_bind_double(st, 2, hj->hq.from);
        sqlite3_bind_double(st, 3, hj->hq.to);
        rc = sqlite3_step(st);
        if (rc == SQLITE_ROW) {
            rows = sqlite3_column_int64(st, 0);
            rc = SQLITE_DONE;
        }
    }
    sqlite3_finalize(st);
    st = NULL;
    int64_t every = rows > (int64_t)hj->hq.max
                        ? (rows + (int64_t)hj->hq.max - 2) / ((int64_t)hj->hq.max - 1)
                        : 1;
    if (every < 1)
        every = 1;
    jw_t o;
    jw_init(&o);
    jw_fmt(&o, ",\"estimators\":%s,\"width_s\":", hj->names);
    jw_num(&o, hj->width_s);
    jw_fmt(&o, ",\"rows\":%lld,\"every\":%lld,\"history\":[", (long long)rows, (long long)every);
    if (rc == SQLITE_DONE && rows > 0) {
        /* Every k-th row of the window, oldest first, and always its newest. */
        snprintf(sql, sizeof sql,
                 "SELECT seq, at, plant_t, td_rms, realised_rms FROM (SELECT *, ROW_NUMBER() OVER"
                 " (ORDER BY seq) - 1 AS k FROM history WHERE %s) WHERE k %% ?4 = 0 OR k = ?5"
                 " ORDER BY seq",
                 win);
        rc = sqlite3_prepare_v2(w->db, sql, -1, &st, NULL);
        if (rc == SQLITE_OK) {
            sqlite3_bind_int64(st, 1, queue_db_id(j->q));
            sqlite3_bind_double(st, 2, hj->hq.from);
            sqlite3_bind_double(st, 3, hj->hq.to);
            sqlite3_bind_int64(st, 4, every);
            sqlite3_bind_int64(st, 5, rows - 1);
            int first = 1;
            while ((rc = sqlite3_step(st)) == SQLITE_ROW) {
                jw_fmt(&o, "%s{\"t\":", first ? "" : ",");
                jw_num(&o, sqlite3_column_double(st, 1));
                jw_fmt(&o, ",\"seq\":%lld", (long long)sqlite3_column_int64(st, 0));
                if (sqlite3_column_type(st, 2) != SQLITE_NULL) {
                    jw_lit(&o, ",\"plant_t\":");
                    jw_num(&o, sqlite3_column_double(st, 2));
                }
                /* Both arrays are JSON that worthd wrote itself. */
                jw_fmt(&o, ",\"td_rms\":%s,\"realised_rms\":%s}", sqlite3_column_text(st, 3),
                       sqlite3_column_text(st, 4));
                first = 0;
            }
        }
        sqlite3_finalize(st);
    }
    jw_lit(&o, "]");
    if (rc != SQLITE_DONE) {
        wr_reply(w, j->q, j->conn_id, db_error_code(w->db), "cannot list the history: %s",
                 sqlite3_errmsg(w->db));
        jw_close(&o);
        return;
    }
    event_t ev = {.kind = EV_REPLY, .q = j->q, .conn_id = j->conn_id, .rc = 0};
    ev.text = jw_take(&o);
    w->post(w->ctx, &ev);
}

static void run(struct writer *w, struct job *j)
{
    struct hist_job *hj = j->arg;
    if (hj->list)
        list(w, j, hj);
    else
        store(w, j->q, hj);
    free_hist_job(hj);
    j->arg = NULL;
}

static void post(struct writer *w, struct queue *q, struct hist_job *hj, uint64_t conn_id)
{
    struct job *j = wr_job(J_OPS, q, conn_id);
    j->fn = run;
    j->arg = hj;
    wr_push(w, j);
}

void writer_history_store(struct writer *w, struct queue *q, const history_row_t *rows, size_t n,
                          size_t n_est)
{
    if (!n)
        return;
    struct hist_job *hj = mem_calloc(1, sizeof *hj);
    hj->rows = mem_calloc(n, sizeof *rows);
    memcpy(hj->rows, rows, n * sizeof *rows);
    hj->n = n;
    hj->n_est = n_est;
    post(w, q, hj, 0);
}

void writer_history_list(struct writer *w, struct queue *q, const char *names, size_t n_est,
                         double width_s, const history_query_t *hq, uint64_t conn_id)
{
    struct hist_job *hj = mem_calloc(1, sizeof *hj);
    hj->list = 1;
    hj->names = mem_strdup(names);
    hj->n_est = n_est;
    hj->width_s = width_s;
    hj->hq = *hq;
    if (hj->hq.max < 2)
        hj->hq.max = 2;
    post(w, q, hj, conn_id);
}

/* ---- the learner's buffer ------------------------------------------------------------------ */

struct history_buf {
    history_row_t rows[HISTORY_PEND];
    size_t n, filled; /* rows; of those, the first `filled` have their td_rms */
    size_t n_est;
    int64_t bucket[2]; /* the last row's bucket, [timed] */
    int timed;         /* the row history_buf_due asked for */
    int64_t due;
    double t;       /* the t of the last transition seen that had one */
    double flushed; /* when the rows last went to the writer */
};

struct history_buf *history_buf_new(size_t n_est, double plant_t)
{
    struct history_buf *hb = mem_calloc(1, sizeof *hb);
    hb->n_est = n_est;
    hb->bucket[0] = hb->bucket[1] = INT64_MIN;
    hb->t = plant_t;
    return hb;
}

void history_buf_free(struct history_buf *hb)
{
    mem_free(hb);
}

double history_buf_footprint(void)
{
    return (double)sizeof(struct history_buf);
}

int history_buf_due(struct history_buf *hb, uint64_t seq, double t_s, double width_s)
{
    if (!isnan(t_s))
        hb->t = t_s;
    int timed = !isnan(hb->t);
    int64_t bucket = timed ? (int64_t)floor(hb->t / width_s) : (int64_t)(seq / HISTORY_SEQ_BUCKET);
    if (bucket == hb->bucket[timed] || hb->n == HISTORY_PEND)
        return 0;
    hb->bucket[timed] = bucket;
    hb->timed = timed;
    hb->due = bucket;
    return 1;
}

void history_buf_add(struct history_buf *hb, uint64_t seq, double now, const double *realised)
{
    history_row_t *h = &hb->rows[hb->n++];
    h->timed = hb->timed;
    h->bucket = hb->due;
    h->seq = seq;
    h->at = now;
    h->plant_t = hb->t;
    for (size_t i = 0; i < hb->n_est; i++) {
        h->realised_rms[i] = realised[i];
        h->td_rms[i] = NAN;
    }
}

void history_buf_fill(struct history_buf *hb, const est_stats_t *st)
{
    for (size_t k = hb->filled; k < hb->n; k++)
        for (size_t i = 0; i < hb->n_est; i++)
            hb->rows[k].td_rms[i] = st[i].td_rms;
    hb->filled = hb->n;
}

int history_buf_ripe(const struct history_buf *hb, double now)
{
    return hb->n && (hb->n == HISTORY_PEND || now - hb->flushed >= HISTORY_FLUSH_S);
}

void history_buf_flush(struct history_buf *hb, struct writer *w, struct queue *q, double now)
{
    if (!hb->filled)
        return;
    writer_history_store(w, q, hb->rows, hb->filled, hb->n_est);
    /* Rows not yet filled (none when the caller filled first) stay for the next look. */
    memmove(hb->rows, hb->rows + hb->filled, (hb->n - hb->filled) * sizeof *hb->rows);
    hb->n -= hb->filled;
    hb->filled = 0;
    hb->flushed = now;
}

void history_buf_take(struct history_buf *hb, const struct model *m, uint64_t seq, double t_s,
                      double width_s, double now)
{
    if (!history_buf_due(hb, seq, t_s, width_s))
        return;
    double realised[MODEL_MAX_EST];
    for (size_t i = 0; i < hb->n_est; i++) {
        diag_est_t de;
        diag_est(model_diag(m), i, &de);
        realised[i] = de.n ? de.rms_window : NAN;
    }
    history_buf_add(hb, seq, now, realised);
}

void history_buf_store(struct history_buf *hb, const struct model *m, struct writer *w,
                       struct queue *q, double now)
{
    est_stats_t st[MODEL_MAX_EST];
    for (size_t i = 0; i < hb->n_est; i++)
        est_stats(model_est(m, i), &st[i]);
    history_buf_fill(hb, st);
    history_buf_flush(hb, w, q, now);
}
