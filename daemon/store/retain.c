/*
 * retain.c - retention of the log, purging a dropped model, and the
 * database's side of a status request (retain.h).  Writer thread.
 *
 * A model's retention policy keeps its log for D days and/or at least its
 * newest N transitions (table retention, 004_ops.sql; the daemon's
 * --retain-days and --retain-transitions where a model has none).  A
 * transition is D days old once a checkpoint taken more than D days ago
 * covers it.  The window's start (the cut) is where both bounds allow
 * deleting; the newest valid checkpoint at or before the cut (the anchor)
 * stays, so the state at the window's start can still be restored, and so do
 * every checkpoint after it, the newest valid one and the newest valid one in
 * which no estimator had diverged.  Everything before them goes.
 *
 * Invariants.
 * 1. No kept row is ever needed that was deleted: transitions are deleted
 *    only up to the floor, the smallest seq of every valid checkpoint kept
 *    (and never past the cut); with no valid checkpoint nothing is deleted.
 *    Recovery (from the newest loadable checkpoint) and a rollback (to any
 *    valid checkpoint, then replaying after it) read only rows above the
 *    floor, so both rebuild the same weights bit for bit as before.
 * 2. The floor is stored (retention.log_floor) in the transaction that
 *    deletes the checkpoints below it, before any transition goes: a crash
 *    part way leaves rows below the floor, never a checkpoint whose rows are
 *    gone.  Recovery refuses to replay from below the floor (recover.c: the
 *    model is quarantined rather than rebuilt from a partial log).
 * 3. Trainings go only when no kept checkpoint replays them (ordinal at most
 *    the smallest training of the kept checkpoints) and never the newest, so
 *    new trainings keep their numbering.
 * 4. Deletions run in transactions of at most CHUNK rows, with the log
 *    written between them, so ingest waits at most one chunk.
 * It never deletes a row of a live model's events or its models row.
 */
#include "store/retain.h"

#include <errno.h>
#include <limits.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <sys/statvfs.h>

#include "common/jw.h"
#include "common/mem.h"
#include "common/say.h"
#include "core/queue.h"
#include "store/db.h"
#include "store/logsql.h"
#include "store/wr.h"
#include "worth/errors.h"

/* Most rows one deleting transaction takes. */
#define CHUNK 20000
/* Pages one incremental_vacuum step gives back before the log is written again. */
#define VACUUM_PAGES 4096

enum { OP_RETAIN, OP_PURGE, OP_STATUS };

struct ops_job {
    int op;
    retain_req_t r;         /* OP_RETAIN */
    char *name, *who;       /* OP_PURGE */
    char *head;             /* OP_STATUS */
    status_model_t *models; /* OP_STATUS */
    size_t n;
    uint64_t db_max_mb;
};

/* ---- SQL helpers ------------------------------------------------------------------------- */

/* Runs sql with up to two int64 parameters; *out gets the first column of the first row.
 * Returns 1 when a row with a non-NULL value came, 0 when none did, -1 on error. */
static int one_i64(sqlite3 *db, const char *sql, int64_t a, int64_t b, int64_t *out)
{
    sqlite3_stmt *st = NULL;
    int rc = -1;
    if (sqlite3_prepare_v2(db, sql, -1, &st, NULL) == SQLITE_OK) {
        int np = sqlite3_bind_parameter_count(st);
        if (np >= 1)
            sqlite3_bind_int64(st, 1, a);
        if (np >= 2)
            sqlite3_bind_int64(st, 2, b);
        int s = sqlite3_step(st);
        if (s == SQLITE_ROW) {
            rc = sqlite3_column_type(st, 0) != SQLITE_NULL;
            if (rc)
                *out = sqlite3_column_int64(st, 0);
        } else if (s == SQLITE_DONE) {
            rc = 0;
        }
    }
    sqlite3_finalize(st);
    return rc;
}

static int64_t pragma_i64(sqlite3 *db, const char *pragma)
{
    int64_t v = 0;
    return one_i64(db, pragma, 0, 0, &v) == 1 ? v : 0;
}

/* Bytes of the database's pages (what the file holds once the WAL is checkpointed). */
static uint64_t db_bytes(sqlite3 *db)
{
    return (uint64_t)pragma_i64(db, "PRAGMA page_count") *
           (uint64_t)pragma_i64(db, "PRAGMA page_size");
}

int retain_setup(sqlite3 *db)
{
    if (pragma_i64(db, "PRAGMA auto_vacuum") == 2)
        return 0;
    int64_t any = 0;
    if (one_i64(db, "SELECT 1 FROM transitions LIMIT 1", 0, 0, &any) != 0 ||
        one_i64(db, "SELECT 1 FROM models LIMIT 1", 0, 0, &any) != 0)
        return 0; /* an older database with data: converted when retention first frees space */
    if (sqlite3_exec(db, "PRAGMA auto_vacuum = INCREMENTAL; VACUUM", NULL, NULL, NULL) !=
        SQLITE_OK) {
        say_warn("cannot set auto_vacuum = INCREMENTAL: %s; space freed by retention is reused "
                 "but the file does not shrink",
                 sqlite3_errmsg(db));
        return -1;
    }
    return 0;
}

/*
 * Gives the free pages back to the file system: an incremental vacuum in steps
 * of VACUUM_PAGES (the log written between them), then a WAL checkpoint that
 * truncates the file.  A database still without auto_vacuum is converted once
 * by a whole VACUUM (logged: it holds the writer for as long as it takes).
 * Returns the bytes freed.
 */
static uint64_t give_back(struct writer *w)
{
    uint64_t before = db_bytes(w->db);
    if (pragma_i64(w->db, "PRAGMA auto_vacuum") != 2) {
        double t0 = db_now();
        if (sqlite3_exec(w->db, "PRAGMA auto_vacuum = INCREMENTAL; VACUUM", NULL, NULL, NULL) ==
            SQLITE_OK)
            say_info("database converted to auto_vacuum = INCREMENTAL (one VACUUM, %.1f s); "
                     "space freed from now on is given back as it is freed",
                     db_now() - t0);
        else
            say_warn("VACUUM failed: %s; the freed space is reused, the file does not shrink",
                     sqlite3_errmsg(w->db));
    } else {
        char sql[64];
        snprintf(sql, sizeof sql, "PRAGMA incremental_vacuum(%d)", VACUUM_PAGES);
        for (int i = 0; i < 1000000 && pragma_i64(w->db, "PRAGMA freelist_count") > 0; i++) {
            if (sqlite3_exec(w->db, sql, NULL, NULL, NULL) != SQLITE_OK) {
                say_warn("incremental vacuum: %s", sqlite3_errmsg(w->db));
                break;
            }
            while (log_write_group(w))
                ;
        }
    }
    sqlite3_exec(w->db, "PRAGMA wal_checkpoint(TRUNCATE)", NULL, NULL, NULL);
    uint64_t after = db_bytes(w->db);
    return before > after ? before - after : 0;
}

/* Deletes model's transitions with seq in (lo, hi], CHUNK seqs a transaction, the log written
 * between them (logsql_delete: rows and blocks; dims the model's, 0 when whole blocks go).
 * Returns the transitions deleted, or -1. */
static int64_t delete_transitions(struct writer *w, int64_t model, size_t dims, int64_t lo,
                                  int64_t hi)
{
    int64_t n = 0, chunk = dims ? CHUNK : hi - lo; /* without dims no block may be cut */
    for (int64_t a = lo; a < hi;) {
        int64_t b = hi - a > chunk ? a + chunk : hi;
        int64_t d = logsql_delete(w->db, model, dims, (uint64_t)a, (uint64_t)b, &w->enc);
        if (d < 0)
            return -1;
        n += d;
        a = b;
        while (log_write_group(w))
            ;
    }
    return n;
}

/* ---- retention --------------------------------------------------------------------------- */

/* Plain data: one model's policy, where it came from, and what a run did. */
struct policy {
    double days;
    uint64_t transitions;
    int own_days, own_transitions; /* the model's own (else the daemon's) */
    int64_t floor;
    double last_run;
    int64_t del_tx, del_cp, del_tr; /* this run */
    int ran;
};

static void read_policy(struct writer *w, int64_t model, const retain_req_t *r, struct policy *p)
{
    memset(p, 0, sizeof *p);
    p->days = r->default_days;
    p->transitions = r->default_transitions;
    sqlite3_stmt *st = NULL;
    if (sqlite3_prepare_v2(w->db,
                           "SELECT days, transitions, log_floor, last_run FROM retention"
                           " WHERE model = ?",
                           -1, &st, NULL) == SQLITE_OK) {
        sqlite3_bind_int64(st, 1, model);
        if (sqlite3_step(st) == SQLITE_ROW) {
            if (sqlite3_column_type(st, 0) != SQLITE_NULL) {
                p->days = sqlite3_column_double(st, 0);
                p->own_days = 1;
            }
            if (sqlite3_column_type(st, 1) != SQLITE_NULL) {
                p->transitions = (uint64_t)sqlite3_column_int64(st, 1);
                p->own_transitions = 1;
            }
            p->floor = sqlite3_column_int64(st, 2);
            p->last_run = sqlite3_column_double(st, 3);
        }
    }
    sqlite3_finalize(st);
}

/* Stores the policy change of r for model; 0 or -1. */
static int write_policy(struct writer *w, int64_t model, const retain_req_t *r)
{
    if (!r->change_days && !r->change_transitions)
        return 0;
    sqlite3_stmt *st = NULL;
    int ok = sqlite3_prepare_v2(
                 w->db,
                 "INSERT INTO retention(model, days, transitions) VALUES(?1, ?2, ?3)"
                 " ON CONFLICT(model) DO UPDATE SET"
                 " days = CASE WHEN ?4 THEN excluded.days ELSE days END,"
                 " transitions = CASE WHEN ?5 THEN excluded.transitions ELSE transitions END",
                 -1, &st, NULL) == SQLITE_OK;
    if (ok) {
        sqlite3_bind_int64(st, 1, model);
        if (r->change_days == RETAIN_SET)
            sqlite3_bind_double(st, 2, r->days);
        else
            sqlite3_bind_null(st, 2);
        if (r->change_transitions == RETAIN_SET)
            sqlite3_bind_int64(st, 3, (sqlite3_int64)r->transitions);
        else
            sqlite3_bind_null(st, 3);
        sqlite3_bind_int(st, 4, r->change_days != RETAIN_KEEP);
        sqlite3_bind_int(st, 5, r->change_transitions != RETAIN_KEEP);
        ok = sqlite3_step(st) == SQLITE_DONE;
    }
    sqlite3_finalize(st);
    return ok ? 0 : -1;
}

/*
 * The first transaction of a run: decides the cut, the anchor and the floor,
 * deletes the checkpoints and trainings below them and stores the floor.
 * Returns 0 (p->floor set: transitions up to it may go), or -1.
 */
static int plan_and_trim(struct writer *w, int64_t model, struct policy *p)
{
    sqlite3 *db = w->db;
    const int64_t none = INT64_MAX;
    int64_t last = 0, cut = none, v = 0;
    uint64_t lo_seq = 0, hi_seq = 0;
    if (logsql_bounds(db, model, &lo_seq, &hi_seq) != 0)
        return -1;
    last = (int64_t)hi_seq;
    if (p->transitions)
        cut = last > (int64_t)p->transitions ? last - (int64_t)p->transitions : 0;
    if (p->days > 0) {
        /* The rows a checkpoint older than the window covers are older than the window. */
        sqlite3_stmt *st = NULL;
        int64_t by_days = 0;
        if (sqlite3_prepare_v2(db,
                               "SELECT MAX(seq) FROM checkpoints WHERE model = ?1 AND"
                               " created_at < ?2",
                               -1, &st, NULL) != SQLITE_OK)
            return -1;
        sqlite3_bind_int64(st, 1, model);
        sqlite3_bind_double(st, 2, db_now() - p->days * 86400.0);
        if (sqlite3_step(st) == SQLITE_ROW && sqlite3_column_type(st, 0) != SQLITE_NULL)
            by_days = sqlite3_column_int64(st, 0);
        sqlite3_finalize(st);
        cut = by_days < cut ? by_days : cut;
    }
    if (cut == none || cut <= 0)
        return 0; /* no policy, or nothing outside the window */
    int64_t anchor_seq = -1, keep1 = 0, keep2 = 0;
    if (one_i64(db,
                "SELECT seq FROM checkpoints WHERE model = ?1 AND invalid = 0 AND seq <= ?2"
                " ORDER BY seq DESC, id DESC LIMIT 1",
                model, cut, &v) == 1)
        anchor_seq = v;
    one_i64(db,
            "SELECT id FROM checkpoints WHERE model = ?1 AND invalid = 0"
            " ORDER BY seq DESC, id DESC LIMIT 1",
            model, 0, &keep1);
    one_i64(db,
            "SELECT id FROM checkpoints WHERE model = ?1 AND invalid = 0 AND diverged = 0"
            " ORDER BY seq DESC, id DESC LIMIT 1",
            model, 0, &keep2);
    int64_t bound = anchor_seq >= 0 ? anchor_seq : cut + 1;
    sqlite3_stmt *st = NULL;
    int ok = sqlite3_prepare_v2(db,
                                "DELETE FROM checkpoints WHERE model = ?1 AND seq < ?2"
                                " AND id NOT IN (?3, ?4)",
                                -1, &st, NULL) == SQLITE_OK;
    if (ok) {
        sqlite3_bind_int64(st, 1, model);
        sqlite3_bind_int64(st, 2, bound);
        sqlite3_bind_int64(st, 3, keep1);
        sqlite3_bind_int64(st, 4, keep2);
        ok = sqlite3_step(st) == SQLITE_DONE;
        p->del_cp = sqlite3_changes(db);
    }
    sqlite3_finalize(st);
    if (!ok)
        return -1;
    /* The floor: no kept valid checkpoint replays from below it (none kept: nothing goes). */
    int64_t min_seq = 0, min_training = 0;
    int have = one_i64(db, "SELECT MIN(seq) FROM checkpoints WHERE model = ?1 AND invalid = 0",
                       model, 0, &min_seq);
    if (have < 0)
        return -1;
    int64_t floor = have == 1 ? (min_seq < cut ? min_seq : cut) : 0;
    if (floor < p->floor)
        floor = p->floor;
    if (have == 1 &&
        one_i64(db, "SELECT MIN(training) FROM checkpoints WHERE model = ?1 AND invalid = 0", model,
                0, &min_training) == 1 &&
        min_training > 0) {
        ok = sqlite3_prepare_v2(db,
                                "DELETE FROM trainings WHERE model = ?1 AND ordinal <= ?2"
                                " AND after_seq <= ?3 AND ordinal <"
                                " (SELECT MAX(ordinal) FROM trainings WHERE model = ?1)",
                                -1, &st, NULL) == SQLITE_OK;
        if (ok) {
            sqlite3_bind_int64(st, 1, model);
            sqlite3_bind_int64(st, 2, min_training);
            sqlite3_bind_int64(st, 3, floor);
            ok = sqlite3_step(st) == SQLITE_DONE;
            p->del_tr = sqlite3_changes(db);
        }
        sqlite3_finalize(st);
        if (!ok)
            return -1;
    }
    ok = sqlite3_prepare_v2(db,
                            "INSERT INTO retention(model, log_floor, last_run) VALUES(?1, ?2, ?3)"
                            " ON CONFLICT(model) DO UPDATE SET log_floor = excluded.log_floor,"
                            " last_run = excluded.last_run",
                            -1, &st, NULL) == SQLITE_OK;
    if (ok) {
        sqlite3_bind_int64(st, 1, model);
        sqlite3_bind_int64(st, 2, floor);
        sqlite3_bind_double(st, 3, db_now());
        ok = sqlite3_step(st) == SQLITE_DONE;
    }
    sqlite3_finalize(st);
    p->floor = floor;
    return ok ? 0 : -1;
}

/* Applies model q's policy p; 0 or -1 (with the database's message in why). */
static int retain_model(struct writer *w, struct queue *q, struct policy *p, char *why, size_t len)
{
    int64_t model = queue_db_id(q);
    if (wr_exec(w, "BEGIN IMMEDIATE") != 0 || plan_and_trim(w, model, p) != 0 ||
        wr_exec(w, "COMMIT") != 0) {
        snprintf(why, len, "%s", sqlite3_errmsg(w->db));
        wr_exec(w, "ROLLBACK");
        return -1;
    }
    p->ran = 1;
    p->last_run = db_now();
    ckpt_refresh_info(w, q);
    uint64_t lowest = 0, highest = 0;
    if (p->floor > 0 && logsql_bounds(w->db, model, &lowest, &highest) == 0 && lowest > 0 &&
        (int64_t)lowest <= p->floor) {
        p->del_tx = delete_transitions(w, model, queue_dims(q), (int64_t)lowest - 1, p->floor);
        if (p->del_tx < 0) {
            snprintf(why, len, "%s", sqlite3_errmsg(w->db));
            return -1;
        }
    }
    if (p->del_tx || p->del_cp || p->del_tr) {
        char detail[256];
        snprintf(detail, sizeof detail,
                 "{\"log_floor\":%lld,\"transitions\":%lld,\"checkpoints\":%lld,"
                 "\"trainings\":%lld}",
                 (long long)p->floor, (long long)p->del_tx, (long long)p->del_cp,
                 (long long)p->del_tr);
        events_insert(w, q, "retention", detail);
        say_info("model %s: retention deleted %lld transitions (up to seq %lld), %lld "
                 "checkpoints, %lld trainings",
                 queue_name(q), (long long)p->del_tx, (long long)p->floor, (long long)p->del_cp,
                 (long long)p->del_tr);
    }
    return 0;
}

static void out_policy(jw_t *o, struct queue *q, const struct policy *p)
{
    jw_lit(o, "{\"model\":");
    jw_str(o, queue_name(q));
    jw_lit(o, ",\"days\":");
    jw_num(o, p->days);
    jw_fmt(o, ",\"transitions\":%llu,\"own\":{\"days\":%s,\"transitions\":%s},\"log_floor\":%lld",
           (unsigned long long)p->transitions, p->own_days ? "true" : "false",
           p->own_transitions ? "true" : "false", (long long)p->floor);
    jw_lit(o, ",\"last_run\":");
    if (p->last_run > 0)
        jw_num(o, p->last_run);
    else
        jw_lit(o, "null");
    if (p->ran)
        jw_fmt(o, ",\"deleted\":{\"transitions\":%lld,\"checkpoints\":%lld,\"trainings\":%lld}",
               (long long)p->del_tx, (long long)p->del_cp, (long long)p->del_tr);
    jw_lit(o, "}");
}

static void post_text(struct writer *w, struct queue *q, uint64_t conn_id, jw_t *jb)
{
    if (!conn_id) {
        jw_close(jb);
        return;
    }
    event_t ev = {.kind = EV_REPLY, .q = q, .conn_id = conn_id, .rc = 0};
    ev.text = jw_take(jb);
    w->post(w->ctx, &ev);
}

static void run_retain(struct writer *w, struct ops_job *oj, uint64_t conn_id)
{
    const retain_req_t *r = &oj->r;
    char why[256];
    int code = !w->db ? WORTH_E_STORAGE_ERROR : rescue_may_write(w, FILEGUARD_ALL, why, sizeof why);
    if (!w->db)
        snprintf(why, sizeof why, "%s", w->lost_why);
    if (code) {
        wr_reply(w, r->q, conn_id, code, "retention did not run: %s", why);
        return;
    }
    jw_t jb;
    jw_init(&jb);
    jw_lit(&jb, ",\"models\":[");
    int first = 1, any = 0;
    for (size_t i = 0; i < w->n; i++) {
        struct queue *q = w->models[i];
        if ((r->q && q != r->q) || !queue_db_id(q))
            continue;
        if (write_policy(w, queue_db_id(q), r) != 0) {
            wr_reply(w, r->q, conn_id, db_error_code(w->db), "cannot store the policy: %s",
                     sqlite3_errmsg(w->db));
            jw_close(&jb);
            return;
        }
        struct policy p;
        read_policy(w, queue_db_id(q), r, &p);
        if (r->run && retain_model(w, q, &p, why, sizeof why) != 0) {
            say_error("model %s: retention failed: %s", queue_name(q), why);
            wr_reply(w, r->q, conn_id, db_error_code(w->db), "model %s: retention failed: %s",
                     queue_name(q), why);
            jw_close(&jb);
            return;
        }
        any |= p.del_tx || p.del_cp || p.del_tr;
        if (!first)
            jw_lit(&jb, ",");
        first = 0;
        out_policy(&jb, q, &p);
    }
    uint64_t freed = r->run && any ? give_back(w) : 0;
    jw_fmt(&jb, "],\"ran\":%s,\"bytes_freed\":%llu", r->run ? "true" : "false",
           (unsigned long long)freed);
    post_text(w, r->q, conn_id, &jb);
}

/* ---- purge ------------------------------------------------------------------------------- */

static void run_purge(struct writer *w, struct ops_job *oj, uint64_t conn_id)
{
    char why[256];
    int code = !w->db ? WORTH_E_STORAGE_ERROR : rescue_may_write(w, FILEGUARD_ALL, why, sizeof why);
    if (!w->db)
        snprintf(why, sizeof why, "%s", w->lost_why);
    if (code) {
        wr_reply(w, NULL, conn_id, code, "nothing purged: %s", why);
        return;
    }
    /* Every dropped model of that name. */
    int64_t ids[256];
    size_t n = 0;
    sqlite3_stmt *st = NULL;
    if (sqlite3_prepare_v2(w->db,
                           "SELECT id FROM models WHERE name = ? AND dropped_at IS NOT NULL"
                           " ORDER BY id",
                           -1, &st, NULL) == SQLITE_OK) {
        sqlite3_bind_text(st, 1, oj->name, -1, SQLITE_STATIC);
        while (n < sizeof ids / sizeof ids[0] && sqlite3_step(st) == SQLITE_ROW)
            ids[n++] = sqlite3_column_int64(st, 0);
    }
    sqlite3_finalize(st);
    if (!n) {
        wr_reply(w, NULL, conn_id, WORTH_E_NO_SUCH_MODEL, "no dropped model named \"%.64s\"",
                 oj->name);
        return;
    }
    /* The tables that hold rows of a model: every one with a column "model", but models
     * itself and events (kept for audit). */
    char tables[32][64];
    size_t nt = 0;
    if (sqlite3_prepare_v2(w->db,
                           "SELECT m.name FROM sqlite_master m WHERE m.type = 'table'"
                           " AND m.name NOT IN ('models', 'events', 'log_blocks', 'log_undone')"
                           " AND m.name NOT LIKE 'sqlite_%'"
                           " AND EXISTS (SELECT 1 FROM pragma_table_info(m.name) WHERE name ="
                           " 'model') ORDER BY m.name",
                           -1, &st, NULL) == SQLITE_OK) {
        while (nt < 32 && sqlite3_step(st) == SQLITE_ROW)
            snprintf(tables[nt++], sizeof tables[0], "%s", sqlite3_column_text(st, 0));
    }
    sqlite3_finalize(st);
    int64_t counts[32] = {0};
    int ok = 1;
    for (size_t k = 0; k < n && ok; k++) {
        for (size_t t = 0; t < nt && ok; t++) {
            if (strcmp(tables[t], "transitions") == 0) {
                /* The whole log, rows and blocks (log_blocks, log_undone: logsql.c). */
                uint64_t lo = 0, hi = 0;
                ok = logsql_bounds(w->db, ids[k], &lo, &hi) == 0;
                if (ok && lo > 0) {
                    int64_t d = delete_transitions(w, ids[k], 0, (int64_t)lo - 1, (int64_t)hi);
                    ok = d >= 0;
                    counts[t] += d > 0 ? d : 0;
                }
                continue;
            }
            char sql[160];
            snprintf(sql, sizeof sql, "DELETE FROM \"%s\" WHERE model = ?", tables[t]);
            ok = sqlite3_prepare_v2(w->db, sql, -1, &st, NULL) == SQLITE_OK;
            if (ok) {
                sqlite3_bind_int64(st, 1, ids[k]);
                ok = sqlite3_step(st) == SQLITE_DONE;
                counts[t] += sqlite3_changes(w->db);
            }
            sqlite3_finalize(st);
        }
    }
    if (!ok) {
        say_error("purge of %s failed: %s", oj->name, sqlite3_errmsg(w->db));
        wr_reply(w, NULL, conn_id, db_error_code(w->db),
                 "purge failed part way: %s (run it "
                 "again to finish)",
                 sqlite3_errmsg(w->db));
        return;
    }
    jw_t jb, dj;
    jw_init(&jb);
    jw_init(&dj);
    jw_fmt(&jb, ",\"model\":");
    jw_str(&jb, oj->name);
    jw_fmt(&jb, ",\"purged\":{\"models\":%zu,\"rows\":{", n);
    jw_lit(&dj, "{\"by\":");
    jw_str(&dj, oj->who ? oj->who : "worthd");
    jw_lit(&dj, ",\"rows\":{");
    int64_t total = 0;
    for (size_t t = 0; t < nt; t++) {
        jw_fmt(&jb, "%s\"%s\":%lld", t ? "," : "", tables[t], (long long)counts[t]);
        jw_fmt(&dj, "%s\"%s\":%lld", t ? "," : "", tables[t], (long long)counts[t]);
        total += counts[t];
    }
    jw_lit(&dj, "}}");
    for (size_t k = 0; k < n; k++)
        events_insert_id(w, ids[k], "purge", dj.b);
    uint64_t freed = give_back(w);
    say_info("model %s purged (%zu dropped model%s, %lld rows, %llu bytes freed) as asked by %s",
             oj->name, n, n == 1 ? "" : "s", (long long)total, (unsigned long long)freed,
             oj->who ? oj->who : "worthd");
    jw_fmt(&jb, "}},\"bytes_freed\":%llu", (unsigned long long)freed);
    jw_close(&dj);
    post_text(w, NULL, conn_id, &jb);
}

/* ---- status ------------------------------------------------------------------------------ */

static void run_status(struct writer *w, struct ops_job *oj, uint64_t conn_id)
{
    jw_t jb;
    jw_init(&jb);
    jw_lit(&jb, oj->head);
    double now = db_now();
    jw_lit(&jb, ",\"database\":{");
    const char *file = w->db ? sqlite3_db_filename(w->db, "main") : NULL;
    if (w->db && file && *file) {
        jw_lit(&jb, "\"path\":");
        jw_str(&jb, file);
        uint64_t bytes = db_bytes(w->db);
        uint64_t freel = (uint64_t)pragma_i64(w->db, "PRAGMA freelist_count") *
                         (uint64_t)pragma_i64(w->db, "PRAGMA page_size");
        char wal[PATH_MAX + 8];
        struct stat st;
        snprintf(wal, sizeof wal, "%s-wal", file);
        uint64_t wal_bytes = stat(wal, &st) == 0 ? (uint64_t)st.st_size : 0;
        jw_fmt(&jb, ",\"bytes\":%llu,\"free_pages_bytes\":%llu,\"wal_bytes\":%llu",
               (unsigned long long)bytes, (unsigned long long)freel, (unsigned long long)wal_bytes);
        char dir[PATH_MAX];
        snprintf(dir, sizeof dir, "%s", file);
        char *slash = strrchr(dir, '/');
        if (slash)
            *(slash == dir ? slash + 1 : slash) = 0;
        struct statvfs vfs;
        if (statvfs(slash ? dir : ".", &vfs) == 0)
            jw_fmt(&jb, ",\"disk_free_bytes\":%llu",
                   (unsigned long long)vfs.f_bavail * (unsigned long long)vfs.f_frsize);
        if (oj->db_max_mb) {
            uint64_t limit = oj->db_max_mb * 1048576u;
            jw_fmt(&jb, ",\"limit_bytes\":%llu,\"used\":", (unsigned long long)limit);
            jw_num(&jb, (double)bytes / (double)limit);
        } else {
            jw_lit(&jb, ",\"limit_bytes\":null");
        }
        jw_fmt(&jb, ",\"auto_vacuum\":\"%s\"",
               pragma_i64(w->db, "PRAGMA auto_vacuum") == 2 ? "incremental" : "none");
    } else {
        jw_lit(&jb, "\"error\":");
        jw_str(&jb, w->lost_why[0] ? w->lost_why : "no database");
    }
    jw_lit(&jb, "},\"models\":[");
    sqlite3_stmt *pol = NULL;
    if (w->db) {
        sqlite3_prepare_v2(w->db,
                           "SELECT days, transitions, log_floor, last_run FROM retention"
                           " WHERE model = ?",
                           -1, &pol, NULL);
    }
    for (size_t i = 0; i < oj->n; i++) {
        if (oj->models[i].q)
            oj->models[i].db_id = queue_db_id(oj->models[i].q);
        jw_lit(&jb, i ? ",{" : "{");
        jw_lit(&jb, oj->models[i].json + 1); /* without its leading comma */
        uint64_t lo = 0, hi = 0;
        if (w->db && oj->models[i].db_id) {
            if (logsql_bounds(w->db, oj->models[i].db_id, &lo, &hi) == 0 && hi > 0) {
                /* A quarantined model (no queue) has its dims unread: its t shows as null. */
                size_t dims = oj->models[i].q ? queue_dims(oj->models[i].q) : 0;
                double t = logsql_t_at(w->db, oj->models[i].db_id, dims, hi);
                jw_fmt(&jb, ",\"last_logged\":{\"seq\":%llu,\"t\":", (unsigned long long)hi);
                if (isnan(t)) {
                    jw_lit(&jb, "null,\"plant_age_s\":null}");
                } else {
                    jw_num(&jb, t);
                    jw_lit(&jb, ",\"plant_age_s\":");
                    jw_num(&jb, now - t);
                    jw_lit(&jb, "}");
                }
            } else {
                jw_lit(&jb, ",\"last_logged\":null");
            }
        }
        if (pol && oj->models[i].db_id) {
            sqlite3_bind_int64(pol, 1, oj->models[i].db_id);
            if (sqlite3_step(pol) == SQLITE_ROW) {
                jw_lit(&jb, ",\"retention\":{\"days\":");
                if (sqlite3_column_type(pol, 0) == SQLITE_NULL)
                    jw_lit(&jb, "null");
                else
                    jw_num(&jb, sqlite3_column_double(pol, 0));
                jw_lit(&jb, ",\"transitions\":");
                if (sqlite3_column_type(pol, 1) == SQLITE_NULL)
                    jw_lit(&jb, "null");
                else
                    jw_fmt(&jb, "%lld", (long long)sqlite3_column_int64(pol, 1));
                jw_fmt(&jb, ",\"log_floor\":%lld}", (long long)sqlite3_column_int64(pol, 2));
            }
            sqlite3_reset(pol);
        }
        jw_lit(&jb, "}");
    }
    sqlite3_finalize(pol);
    jw_lit(&jb, "]");
    post_text(w, NULL, conn_id, &jb);
}

/* ---- jobs -------------------------------------------------------------------------------- */

static void run(struct writer *w, struct job *j)
{
    struct ops_job *oj = j->arg;
    switch (oj->op) {
    case OP_RETAIN:
        run_retain(w, oj, j->conn_id);
        break;
    case OP_PURGE:
        run_purge(w, oj, j->conn_id);
        break;
    case OP_STATUS:
        run_status(w, oj, j->conn_id);
        break;
    }
    mem_free(oj->name);
    mem_free(oj->who);
    mem_free(oj->head);
    for (size_t i = 0; i < oj->n; i++)
        mem_free(oj->models[i].json);
    mem_free(oj->models);
    mem_free(oj);
    j->arg = NULL;
}

static void post(struct writer *w, struct ops_job *oj, uint64_t conn_id)
{
    struct job *j = wr_job(J_OPS, NULL, conn_id);
    j->fn = run;
    j->arg = oj;
    wr_push(w, j);
}

void writer_retain(struct writer *w, const retain_req_t *r, uint64_t conn_id)
{
    struct ops_job *oj = mem_calloc(1, sizeof *oj);
    oj->op = OP_RETAIN;
    oj->r = *r;
    post(w, oj, conn_id);
}

void writer_purge(struct writer *w, const char *name, const char *who, uint64_t conn_id)
{
    struct ops_job *oj = mem_calloc(1, sizeof *oj);
    oj->op = OP_PURGE;
    oj->name = mem_strdup(name);
    oj->who = who ? mem_strdup(who) : NULL;
    post(w, oj, conn_id);
}

void writer_status(struct writer *w, const char *head, status_model_t *models, size_t n,
                   uint64_t db_max_mb, uint64_t conn_id)
{
    struct ops_job *oj = mem_calloc(1, sizeof *oj);
    oj->op = OP_STATUS;
    oj->head = mem_strdup(head);
    oj->models = models;
    oj->n = n;
    oj->db_max_mb = db_max_mb;
    post(w, oj, conn_id);
}
