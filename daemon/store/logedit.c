/*
 * logedit.c - changing the transition log in SQLite (logsql.h): storing blocks, the marks of
 * rollbacks, and deletions that may cut a block (retention, purge).
 *
 * Writer thread, inside the writer's open transaction; the rewrites of a cut block and a
 * deletion are savepoints of their own, so a failure part way leaves the log as it was.
 * Invariants 1-3 of logsql.c hold after every function here: a rollback marks only seqs not
 * yet undone (ranges never overlap), and a rewritten block is decoded and checked whole
 * before its old row goes.
 */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "common/mem.h"
#include "store/logsql.h"
#include "store/logsql_impl.h"

/* ---- writes ------------------------------------------------------------------------------ */

int logsql_put_block(sqlite3_stmt *st, int64_t model, const logblk_enc_t *e)
{
    sqlite3_reset(st);
    sqlite3_bind_int64(st, 1, model);
    sqlite3_bind_int64(st, 2, (sqlite3_int64)e->first);
    sqlite3_bind_int64(st, 3, (sqlite3_int64)(e->first + e->n - 1));
    if (isnan(e->t_lo)) {
        sqlite3_bind_null(st, 4);
        sqlite3_bind_null(st, 5);
    } else {
        sqlite3_bind_double(st, 4, e->t_lo);
        sqlite3_bind_double(st, 5, e->t_hi);
    }
    sqlite3_bind_int64(st, 6, (sqlite3_int64)e->untimed);
    sqlite3_bind_blob(st, 7, e->b, (int)e->len, SQLITE_STATIC);
    return sqlite3_step(st) == SQLITE_DONE ? 0 : -1;
}

static int put_range(sqlite3_stmt *st, int64_t model, uint64_t lo, uint64_t hi, int64_t ev)
{
    sqlite3_reset(st);
    sqlite3_bind_int64(st, 1, model);
    sqlite3_bind_int64(st, 2, (sqlite3_int64)lo);
    sqlite3_bind_int64(st, 3, (sqlite3_int64)hi);
    sqlite3_bind_int64(st, 4, ev);
    return sqlite3_step(st) == SQLITE_DONE ? 0 : -1;
}

/* The rows of the transitions table: as before schema 006, one UPDATE. */
static int undo_rows(sqlite3 *db, int64_t model, uint64_t after, uint64_t upto, int mode, double lo,
                     double hi, int64_t ev, uint64_t *undone, uint64_t *untimed)
{
    sqlite3_stmt *st = NULL;
    if (mode == LOGSQL_UNDO_TIMES) {
        if (sqlite3_prepare_v2(db,
                               "SELECT COUNT(*) FROM transitions WHERE model = ? AND seq > ?"
                               " AND seq <= ? AND rolled_back = 0 AND t IS NULL",
                               -1, &st, NULL) != SQLITE_OK)
            return -1;
        sqlite3_bind_int64(st, 1, model);
        sqlite3_bind_int64(st, 2, (sqlite3_int64)after);
        sqlite3_bind_int64(st, 3, (sqlite3_int64)upto);
        int rc = sqlite3_step(st);
        *untimed += rc == SQLITE_ROW ? (uint64_t)sqlite3_column_int64(st, 0) : 0;
        sqlite3_finalize(st);
        if (rc != SQLITE_ROW)
            return -1;
    }
    const char *sql = mode == LOGSQL_UNDO_TIMES
                          ? "UPDATE transitions SET rolled_back = ?1 WHERE model = ?2 AND seq > ?3"
                            " AND seq <= ?4 AND rolled_back = 0 AND t >= ?5 AND t <= ?6"
                      : mode == LOGSQL_UNDO_SEQS
                          ? "UPDATE transitions SET rolled_back = ?1 WHERE model = ?2 AND seq > ?3"
                            " AND seq <= ?4 AND rolled_back = 0 AND seq >= ?5 AND seq <= ?6"
                          : "UPDATE transitions SET rolled_back = ?1 WHERE model = ?2 AND seq > ?3"
                            " AND seq <= ?4 AND rolled_back = 0";
    if (sqlite3_prepare_v2(db, sql, -1, &st, NULL) != SQLITE_OK)
        return -1;
    sqlite3_bind_int64(st, 1, ev);
    sqlite3_bind_int64(st, 2, model);
    sqlite3_bind_int64(st, 3, (sqlite3_int64)after);
    sqlite3_bind_int64(st, 4, (sqlite3_int64)upto);
    if (mode != LOGSQL_UNDO_ALL) {
        sqlite3_bind_double(st, 5, lo);
        sqlite3_bind_double(st, 6, hi);
    }
    int rc = sqlite3_step(st);
    sqlite3_finalize(st);
    if (rc != SQLITE_DONE)
        return -1;
    *undone += (uint64_t)sqlite3_changes(db);
    return 0;
}

/* A run of seqs to mark, merged with the one before when they touch; flushed by put_range. */
struct run {
    sqlite3_stmt *ins;
    int64_t model, ev;
    uint64_t a, b; /* a == 0: none open */
};

static int run_add(struct run *r, uint64_t a, uint64_t b)
{
    if (r->a && a == r->b + 1) {
        r->b = b;
        return 0;
    }
    if (r->a && put_range(r->ins, r->model, r->a, r->b, r->ev) != 0)
        return -1;
    r->a = a;
    r->b = b;
    return 0;
}

static int run_end(struct run *r)
{
    return r->a ? put_range(r->ins, r->model, r->a, r->b, r->ev) : 0;
}

/* Blocks by seq alone (LOGSQL_UNDO_ALL, _SEQS): from their seq ranges, nothing decoded. */
static int undo_by_seq(sqlite3 *db, int64_t model, uint64_t after, uint64_t upto, int mode,
                       double lo, double hi, struct run *run, uint64_t *undone)
{
    uint64_t a = after + 1, b = upto;
    if (mode == LOGSQL_UNDO_SEQS) {
        if (!(lo <= hi) || hi < 1)
            return 0;
        if (lo > (double)a)
            a = lo >= 9.2e18 ? UINT64_MAX : (uint64_t)ceil(lo);
        if (hi < (double)b)
            b = (uint64_t)floor(hi);
    }
    if (a > b)
        return 0;
    struct logit *it = NULL; /* only for its undone ranges */
    if (logit_open_part(db, model, 0, a - 1, b, 0, &it) != 0)
        return -1;
    sqlite3_stmt *st = NULL;
    int rc = sqlite3_prepare_v2(db,
                                "SELECT first_seq, last_seq FROM log_blocks WHERE model = ?1"
                                " AND last_seq >= ?2 AND first_seq <= ?3 ORDER BY first_seq",
                                -1, &st, NULL) == SQLITE_OK
                 ? SQLITE_OK
                 : SQLITE_ERROR;
    if (rc == SQLITE_OK) {
        sqlite3_bind_int64(st, 1, model);
        sqlite3_bind_int64(st, 2, (sqlite3_int64)a);
        sqlite3_bind_int64(st, 3, (sqlite3_int64)b);
    }
    while (rc == SQLITE_OK && (rc = sqlite3_step(st)) == SQLITE_ROW) {
        rc = SQLITE_OK;
        uint64_t f = (uint64_t)sqlite3_column_int64(st, 0),
                 l = (uint64_t)sqlite3_column_int64(st, 1);
        uint64_t s = f > a ? f : a, e = l < b ? l : b;
        /* [s, e] less the ranges already undone (sorted, never overlapping). */
        while (s <= e) {
            while (it->ui < it->nu && it->u[it->ui].hi < s)
                it->ui++;
            uint64_t stop = e;
            if (it->ui < it->nu && it->u[it->ui].lo <= e) {
                if (it->u[it->ui].lo <= s) {
                    s = it->u[it->ui].hi + 1;
                    continue;
                }
                stop = it->u[it->ui].lo - 1;
            }
            if (run_add(run, s, stop) != 0) {
                rc = SQLITE_ERROR;
                break;
            }
            *undone += stop - s + 1;
            s = stop + 1;
        }
    }
    sqlite3_finalize(st);
    logit_close(it);
    return rc == SQLITE_DONE ? 0 : -1;
}

int logsql_undo(sqlite3 *db, int64_t model, size_t dims, uint64_t after, uint64_t upto, int mode,
                double lo, double hi, int64_t ev, uint64_t *undone, uint64_t *untimed)
{
    *undone = *untimed = 0;
    if (undo_rows(db, model, after, upto, mode, lo, hi, ev, undone, untimed) != 0)
        return -1;
    struct run run = {.model = model, .ev = ev};
    if (sqlite3_prepare_v2(db, "INSERT INTO log_undone(model, lo, hi, rollback) VALUES(?,?,?,?)",
                           -1, &run.ins, NULL) != SQLITE_OK)
        return -1;
    int out = 0;
    if (mode != LOGSQL_UNDO_TIMES) {
        out = undo_by_seq(db, model, after, upto, mode, lo, hi, &run, undone);
    } else {
        /* By t: every record in range is read (and checked). */
        struct logit *it = NULL;
        uint64_t bad;
        logit_row_t row;
        char why[160];
        int rc = 0;
        if (logit_open_part(db, model, dims, after, upto, 0, &it) != 0)
            out = -1;
        while (out == 0 && (rc = logit_next(it, &row, &bad, why, sizeof why)) == 1) {
            if (row.rolled_back)
                continue;
            if (isnan(row.t)) {
                (*untimed)++;
                continue;
            }
            if (row.t < lo || row.t > hi)
                continue;
            (*undone)++;
            out = run_add(&run, row.seq, row.seq);
        }
        if (out == 0 && rc != 0)
            out = rc == -1 ? -2 : -1;
        logit_close(it);
    }
    if (out == 0)
        out = run_end(&run);
    sqlite3_finalize(run.ins);
    return out;
}

/* Runs sql (a statement without rows) on db; 0 or -1. */
static int exec0(sqlite3 *db, const char *sql)
{
    return sqlite3_exec(db, sql, NULL, NULL, NULL) == SQLITE_OK ? 0 : -1;
}

/*
 * Rewrites the block of model at first..last with only its records outside (lo, hi]: one
 * block, or two when the cut falls inside it.  Every record is decoded and checked before the
 * old row goes, and the rewrite is one savepoint.  Returns the records dropped, or -1.
 */
static int64_t trim_block(sqlite3 *db, int64_t model, size_t dims, uint64_t first, uint64_t last,
                          uint64_t lo, uint64_t hi, logblk_enc_t *enc)
{
    if (dims == 0 || dims > enc->max_dims)
        return -1;
    sqlite3_stmt *st = NULL, *ins = NULL;
    logblk_dec_t *d = logblk_dec_new(dims);
    char why[160];
    uint64_t bad;
    int ok =
        sqlite3_prepare_v2(db, "SELECT data FROM log_blocks WHERE model = ?1 AND first_seq = ?2",
                           -1, &st, NULL) == SQLITE_OK;
    if (ok) {
        sqlite3_bind_int64(st, 1, model);
        sqlite3_bind_int64(st, 2, (sqlite3_int64)first);
        ok = sqlite3_step(st) == SQLITE_ROW && sqlite3_column_type(st, 0) == SQLITE_BLOB &&
             logblk_decode(d, sqlite3_column_blob(st, 0), (size_t)sqlite3_column_bytes(st, 0),
                           first, last, &bad, why, sizeof why) == 0;
    }
    sqlite3_finalize(st);
    st = NULL;
    ok = ok && exec0(db, "SAVEPOINT logsql_trim") == 0;
    if (!ok) {
        logblk_dec_free(d);
        return -1;
    }
    ok = sqlite3_prepare_v2(db, "DELETE FROM log_blocks WHERE model = ?1 AND first_seq = ?2", -1,
                            &st, NULL) == SQLITE_OK &&
         sqlite3_prepare_v2(db, LOGSQL_INSERT_BLOCK, -1, &ins, NULL) == SQLITE_OK;
    if (ok) {
        sqlite3_bind_int64(st, 1, model);
        sqlite3_bind_int64(st, 2, (sqlite3_int64)first);
        ok = sqlite3_step(st) == SQLITE_DONE;
    }
    int64_t gone = 0;
    logblk_enc_reset(enc, dims);
    for (size_t i = 0; ok && i < d->n; i++) {
        uint64_t seq = first + i;
        if (seq > lo && seq <= hi) {
            gone++;
            continue;
        }
        const double *v = d->v + 2 * dims * i;
        logblk_rec_t r = {.seq = seq,
                          .r = d->rec[i].r,
                          .t = d->rec[i].t,
                          .dt = d->rec[i].dt,
                          .terminal = d->rec[i].terminal,
                          .src = d->rec[i].src,
                          .x = v,
                          .xn = v + dims};
        if (logblk_enc_add(enc, &r) != 0) {
            /* The cut fell inside the block: what follows it is a block of its own. */
            logblk_enc_finish(enc);
            ok = logsql_put_block(ins, model, enc) == 0;
            logblk_enc_reset(enc, dims);
            ok = ok && logblk_enc_add(enc, &r) == 0;
        }
    }
    if (ok && enc->n) {
        logblk_enc_finish(enc);
        ok = logsql_put_block(ins, model, enc) == 0;
    }
    sqlite3_finalize(st);
    sqlite3_finalize(ins);
    logblk_dec_free(d);
    if (!ok)
        exec0(db, "ROLLBACK TO logsql_trim");
    exec0(db, "RELEASE logsql_trim");
    return ok ? gone : -1;
}

static int64_t delete_in(sqlite3 *db, int64_t model, size_t dims, uint64_t lo, uint64_t hi,
                         logblk_enc_t *enc)
{
    sqlite3_stmt *st = NULL;
    int64_t n = 0;
    if (hi <= lo)
        return 0;
    /* Rows of the transitions table. */
    if (sqlite3_prepare_v2(db,
                           "DELETE FROM transitions WHERE model = ?1 AND seq > ?2 AND seq <= ?3",
                           -1, &st, NULL) != SQLITE_OK)
        return -1;
    sqlite3_bind_int64(st, 1, model);
    sqlite3_bind_int64(st, 2, (sqlite3_int64)lo);
    sqlite3_bind_int64(st, 3, (sqlite3_int64)hi);
    int rc = sqlite3_step(st);
    sqlite3_finalize(st);
    if (rc != SQLITE_DONE)
        return -1;
    n += sqlite3_changes(db);
    /* Blocks: those that straddle an end are rewritten, the rest deleted whole. */
    uint64_t cut[2][2];
    size_t ncut = 0;
    if (sqlite3_prepare_v2(db,
                           "SELECT first_seq, last_seq FROM log_blocks WHERE model = ?1"
                           " AND last_seq > ?2 AND first_seq <= ?3 AND (first_seq <= ?2 OR"
                           " last_seq > ?3) ORDER BY first_seq",
                           -1, &st, NULL) != SQLITE_OK)
        return -1;
    sqlite3_bind_int64(st, 1, model);
    sqlite3_bind_int64(st, 2, (sqlite3_int64)lo);
    sqlite3_bind_int64(st, 3, (sqlite3_int64)hi);
    while ((rc = sqlite3_step(st)) == SQLITE_ROW && ncut < 2) {
        cut[ncut][0] = (uint64_t)sqlite3_column_int64(st, 0);
        cut[ncut++][1] = (uint64_t)sqlite3_column_int64(st, 1);
    }
    sqlite3_finalize(st);
    if (rc != SQLITE_ROW && rc != SQLITE_DONE)
        return -1;
    if (sqlite3_prepare_v2(db,
                           "SELECT SUM(last_seq - first_seq + 1) FROM log_blocks WHERE model = ?1"
                           " AND first_seq > ?2 AND last_seq <= ?3",
                           -1, &st, NULL) != SQLITE_OK)
        return -1;
    sqlite3_bind_int64(st, 1, model);
    sqlite3_bind_int64(st, 2, (sqlite3_int64)lo);
    sqlite3_bind_int64(st, 3, (sqlite3_int64)hi);
    rc = sqlite3_step(st);
    n += rc == SQLITE_ROW ? sqlite3_column_int64(st, 0) : 0;
    sqlite3_finalize(st);
    if (rc != SQLITE_ROW ||
        sqlite3_prepare_v2(db,
                           "DELETE FROM log_blocks WHERE model = ?1 AND first_seq > ?2"
                           " AND last_seq <= ?3",
                           -1, &st, NULL) != SQLITE_OK)
        return -1;
    sqlite3_bind_int64(st, 1, model);
    sqlite3_bind_int64(st, 2, (sqlite3_int64)lo);
    sqlite3_bind_int64(st, 3, (sqlite3_int64)hi);
    rc = sqlite3_step(st);
    sqlite3_finalize(st);
    if (rc != SQLITE_DONE)
        return -1;
    for (size_t k = 0; k < ncut; k++) {
        int64_t g = trim_block(db, model, dims, cut[k][0], cut[k][1], lo, hi, enc);
        if (g < 0)
            return -1;
        n += g;
    }
    /* The undone ranges lose what fell inside (lo, hi]: kept parts go back as new ranges. */
    struct undone keep[2];
    size_t nk = 0;
    if (sqlite3_prepare_v2(db,
                           "SELECT lo, hi, rollback FROM log_undone WHERE model = ?1 AND hi > ?2"
                           " AND lo <= ?3 AND (lo <= ?2 OR hi > ?3)",
                           -1, &st, NULL) != SQLITE_OK)
        return -1;
    sqlite3_bind_int64(st, 1, model);
    sqlite3_bind_int64(st, 2, (sqlite3_int64)lo);
    sqlite3_bind_int64(st, 3, (sqlite3_int64)hi);
    while ((rc = sqlite3_step(st)) == SQLITE_ROW) {
        uint64_t a = (uint64_t)sqlite3_column_int64(st, 0),
                 b = (uint64_t)sqlite3_column_int64(st, 1);
        int64_t ev = sqlite3_column_int64(st, 2);
        if (a <= lo && nk < 2)
            keep[nk++] = (struct undone){a, b < lo ? b : lo, ev};
        if (b > hi && nk < 2)
            keep[nk++] = (struct undone){a > hi ? a : hi + 1, b, ev};
    }
    sqlite3_finalize(st);
    if (rc != SQLITE_DONE ||
        sqlite3_prepare_v2(db, "DELETE FROM log_undone WHERE model = ?1 AND hi > ?2 AND lo <= ?3",
                           -1, &st, NULL) != SQLITE_OK)
        return -1;
    sqlite3_bind_int64(st, 1, model);
    sqlite3_bind_int64(st, 2, (sqlite3_int64)lo);
    sqlite3_bind_int64(st, 3, (sqlite3_int64)hi);
    rc = sqlite3_step(st);
    sqlite3_finalize(st);
    if (rc != SQLITE_DONE ||
        sqlite3_prepare_v2(db, "INSERT INTO log_undone(model, lo, hi, rollback) VALUES(?,?,?,?)",
                           -1, &st, NULL) != SQLITE_OK)
        return -1;
    int ok = 1;
    for (size_t k = 0; k < nk && ok; k++)
        ok = put_range(st, model, keep[k].lo, keep[k].hi, keep[k].ev) == 0;
    sqlite3_finalize(st);
    return ok ? n : -1;
}

int64_t logsql_delete(sqlite3 *db, int64_t model, size_t dims, uint64_t lo, uint64_t hi,
                      logblk_enc_t *enc)
{
    if (hi <= lo)
        return 0;
    if (exec0(db, "SAVEPOINT logsql_delete") != 0)
        return -1;
    int64_t n = delete_in(db, model, dims, lo, hi, enc);
    if (n < 0)
        exec0(db, "ROLLBACK TO logsql_delete");
    exec0(db, "RELEASE logsql_delete");
    return n;
}
