/*
 * logsql.c - reading and changing the transition log in SQLite (logsql.h).
 *
 * Runs on whichever thread owns the connection it is given: the main thread
 * at start-up, a learner's read-only connection during a rollback's replay,
 * the writer thread for rollbacks and retention.  Owns nothing between calls
 * but the iterators it hands out.
 *
 * Invariants.
 * 1. A model's rows of the transitions table all have seqs below its first
 *    block's: they were written before schema 006, and blocks continue after
 *    them.  The iterator checks the order and calls a break of it damage.
 * 2. A block holds consecutive seqs; a seq is undone when a row of the
 *    transitions table says so (rolled_back) or a log_undone range covers it.
 *    log_undone ranges never overlap: a rollback marks only seqs not yet undone.
 * 3. Nothing of a stored transition reaches a caller before its column types
 *    (a row) or its CRC, flags and size (a block record) have been checked.
 */
#include "store/logsql.h"
#include "store/logsql_impl.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "common/fail.h"
#include "common/mem.h"
#include "learn/feat.h"
#include "worth/errors.h"

/* ---- rows of the transitions table (before schema 006) ----------------------------------- */

/* What column col of st holds, for a message: "NULL", "TEXT", "a BLOB of 12 bytes", ... */
static const char *col_kind(sqlite3_stmt *st, int col, char *buf, size_t len)
{
    switch (sqlite3_column_type(st, col)) {
    case SQLITE_NULL:
        return "NULL";
    case SQLITE_INTEGER:
        snprintf(buf, len, "the integer %lld", (long long)sqlite3_column_int64(st, col));
        return buf;
    case SQLITE_FLOAT:
        return "a real";
    case SQLITE_TEXT:
        return "TEXT";
    default:
        snprintf(buf, len, "a BLOB of %d bytes", sqlite3_column_bytes(st, col));
        return buf;
    }
}

static int is_number(sqlite3_stmt *st, int col)
{
    int t = sqlite3_column_type(st, col);
    return t == SQLITE_INTEGER || t == SQLITE_FLOAT;
}

/* A vector column holds exactly d float64 (a BLOB of 8d bytes); copies it into v. */
static int read_vec(sqlite3_stmt *st, int col, size_t d, double *v)
{
    if (sqlite3_column_type(st, col) != SQLITE_BLOB)
        return -1;
    const void *b = sqlite3_column_blob(st, col);
    if (!b || (size_t)sqlite3_column_bytes(st, col) != d * sizeof(double))
        return -1;
    memcpy(v, b, d * sizeof(double));
    return 0;
}

/*
 * Reads the row at st (seq, source, x, r, x_next, terminal, dt, t) into o, x and xn (d
 * doubles each).  Every column's type is checked before its value is used: a damaged row
 * (NULL or TEXT where a number or a BLOB belongs, a vector of the wrong length, terminal other
 * than 0 or 1) must never reach the model, nor hand a NULL pointer to memcpy.  Returns 0, or
 * -1 with why (the values themselves are then checked by model_check).
 */
static int read_row(sqlite3_stmt *st, size_t d, double *x, double *xn, char *src, model_obs_t *o,
                    char *why, size_t len)
{
    char k[48];
    if (sqlite3_column_type(st, 5) != SQLITE_INTEGER ||
        (sqlite3_column_int64(st, 5) != 0 && sqlite3_column_int64(st, 5) != 1))
        return err_fail(why, len, -1, "terminal is %s, not 0 or 1", col_kind(st, 5, k, sizeof k));
    int terminal = sqlite3_column_int(st, 5);
    if (read_vec(st, 2, d, x) != 0)
        return err_fail(why, len, -1, "x is %s, not %zu float64 (a BLOB of %zu bytes)",
                        col_kind(st, 2, k, sizeof k), d, d * sizeof(double));
    if (!terminal && read_vec(st, 4, d, xn) != 0)
        return err_fail(why, len, -1, "x_next is %s, not %zu float64 (a BLOB of %zu bytes)",
                        col_kind(st, 4, k, sizeof k), d, d * sizeof(double));
    if (terminal && sqlite3_column_type(st, 4) != SQLITE_NULL && read_vec(st, 4, d, xn) != 0)
        return err_fail(why, len, -1, "x_next of a terminal transition is %s, not NULL",
                        col_kind(st, 4, k, sizeof k));
    if (!is_number(st, 3))
        return err_fail(why, len, -1, "r is %s, not a number", col_kind(st, 3, k, sizeof k));
    if (sqlite3_column_type(st, 1) != SQLITE_TEXT || !sqlite3_column_text(st, 1))
        return err_fail(why, len, -1, "source is %s, not text", col_kind(st, 1, k, sizeof k));
    if (sqlite3_column_type(st, 6) != SQLITE_NULL && !is_number(st, 6))
        return err_fail(why, len, -1, "dt is %s, not a number or NULL",
                        col_kind(st, 6, k, sizeof k));
    snprintf(src, MODEL_NAME_MAX + 1, "%s", (const char *)sqlite3_column_text(st, 1));
    *o = (model_obs_t){
        .x = x,
        .x_len = d,
        .r = sqlite3_column_double(st, 3),
        .x_next = terminal ? NULL : xn,
        .x_next_len = d,
        .terminal = terminal,
        .source = src,
        .dt_s = sqlite3_column_type(st, 6) == SQLITE_NULL ? NAN : sqlite3_column_double(st, 6),
    };
    return 0;
}

/* ---- the iterator ------------------------------------------------------------------------ */

static int load_undone(struct logit *it, int64_t model)
{
    sqlite3_stmt *st = NULL;
    if (sqlite3_prepare_v2(it->db,
                           "SELECT lo, hi, rollback FROM log_undone WHERE model = ?1 AND hi > ?2"
                           " AND lo <= ?3 ORDER BY lo",
                           -1, &st, NULL) != SQLITE_OK)
        return -1;
    sqlite3_bind_int64(st, 1, model);
    sqlite3_bind_int64(st, 2, (sqlite3_int64)it->after);
    sqlite3_bind_int64(st, 3, (sqlite3_int64)it->upto);
    size_t cap = 0;
    int rc;
    while ((rc = sqlite3_step(st)) == SQLITE_ROW) {
        if (it->nu == cap) {
            cap = cap ? 2 * cap : 16;
            it->u = mem_realloc(it->u, cap * sizeof *it->u);
        }
        it->u[it->nu++] =
            (struct undone){(uint64_t)sqlite3_column_int64(st, 0),
                            (uint64_t)sqlite3_column_int64(st, 1), sqlite3_column_int64(st, 2)};
    }
    sqlite3_finalize(st);
    return rc == SQLITE_DONE ? 0 : -1;
}

int logit_open_part(sqlite3 *db, int64_t model, size_t dims, uint64_t after, uint64_t upto,
                    int legacy, struct logit **out)
{
    struct logit *it = mem_calloc(1, sizeof *it);
    it->db = db;
    it->dims = dims;
    it->after = after;
    it->upto = upto > (uint64_t)INT64_MAX ? (uint64_t)INT64_MAX : upto;
    it->prev = after;
    it->dec = logblk_dec_new(dims);
    int ok = (!legacy ||
              sqlite3_prepare_v2(db,
                                 "SELECT seq, source, x, r, x_next, terminal, dt, t, rolled_back"
                                 " FROM transitions WHERE model = ?1 AND seq > ?2 AND seq <= ?3"
                                 " ORDER BY seq",
                                 -1, &it->leg, NULL) == SQLITE_OK) &&
             sqlite3_prepare_v2(db,
                                "SELECT first_seq, last_seq, data FROM log_blocks WHERE model = ?1"
                                " AND last_seq > ?2 AND first_seq <= ?3 ORDER BY first_seq",
                                -1, &it->blk, NULL) == SQLITE_OK &&
             load_undone(it, model) == 0;
    if (!ok) {
        logit_close(it);
        return -1;
    }
    sqlite3_stmt *sts[2] = {it->leg, it->blk};
    for (int k = 0; k < 2; k++)
        if (sts[k]) {
            sqlite3_bind_int64(sts[k], 1, model);
            sqlite3_bind_int64(sts[k], 2, (sqlite3_int64)after);
            sqlite3_bind_int64(sts[k], 3, (sqlite3_int64)it->upto);
        }
    *out = it;
    return 0;
}

int logit_open(sqlite3 *db, int64_t model, size_t dims, uint64_t after, uint64_t upto,
               struct logit **out)
{
    return logit_open_part(db, model, dims, after, upto, 1, out);
}

void logit_close(struct logit *it)
{
    if (!it)
        return;
    sqlite3_finalize(it->leg);
    sqlite3_finalize(it->blk);
    logblk_dec_free(it->dec);
    mem_free(it->u);
    mem_free(it);
}

static int64_t undone_at(struct logit *it, uint64_t seq)
{
    while (it->ui < it->nu && it->u[it->ui].hi < seq)
        it->ui++;
    return it->ui < it->nu && it->u[it->ui].lo <= seq ? it->u[it->ui].ev : 0;
}

static int damaged(uint64_t seq, uint64_t *bad, char *why, size_t len, const char *fmt,
                   const char *what)
{
    *bad = seq;
    snprintf(why, len, fmt, what);
    return -1;
}

static int next_row(struct logit *it, logit_row_t *row, uint64_t *bad, char *why, size_t len)
{
    int rc = sqlite3_step(it->leg);
    if (rc == SQLITE_DONE) {
        sqlite3_finalize(it->leg);
        it->leg = NULL;
        return 0;
    }
    if (rc != SQLITE_ROW)
        return -2;
    if (sqlite3_column_type(it->leg, 0) != SQLITE_INTEGER) {
        *bad = it->prev + 1;
        snprintf(why, len, "the row after seq %llu has a seq that is not an integer",
                 (unsigned long long)it->prev);
        return -1;
    }
    memset(row, 0, sizeof *row);
    row->seq = (uint64_t)sqlite3_column_int64(it->leg, 0);
    row->legacy = 1;
    row->t = is_number(it->leg, 7) ? sqlite3_column_double(it->leg, 7) : NAN;
    row->rolled_back = sqlite3_column_int64(it->leg, 8);
    it->prev = row->seq;
    /* An undone row is never learnt again: its columns are not read. */
    if (!row->rolled_back &&
        read_row(it->leg, it->dims, it->x, it->xn, it->src, &row->o, why, len) != 0) {
        *bad = row->seq;
        return -1;
    }
    return 1;
}

/* Reads the next block into it->dec; 1, 0 at the end, -1 damaged, -2 SQLite. */
static int next_block(struct logit *it, uint64_t *bad, char *why, size_t len)
{
    int rc = sqlite3_step(it->blk);
    if (rc == SQLITE_DONE)
        return 0;
    if (rc != SQLITE_ROW)
        return -2;
    sqlite3_stmt *st = it->blk;
    if (sqlite3_column_type(st, 0) != SQLITE_INTEGER ||
        sqlite3_column_type(st, 1) != SQLITE_INTEGER || sqlite3_column_type(st, 2) != SQLITE_BLOB)
        return damaged(it->prev + 1, bad, why, len, "%s",
                       "its block's first_seq, last_seq or data has the wrong type");
    uint64_t first = (uint64_t)sqlite3_column_int64(st, 0),
             last = (uint64_t)sqlite3_column_int64(st, 1);
    if (first <= it->prev && it->prev > it->after)
        return damaged(first, bad, why, len, "%s",
                       "its block overlaps transitions before it (invariant 1 of logsql.c)");
    const void *data = sqlite3_column_blob(st, 2);
    if (logblk_decode(it->dec, data, (size_t)sqlite3_column_bytes(st, 2), first, last, bad, why,
                      len) != 0)
        return -1;
    it->first = first;
    it->i = first > it->after ? 0 : (size_t)(it->after - first + 1);
    return 1;
}

int logit_next(struct logit *it, logit_row_t *row, uint64_t *bad_seq, char *why, size_t len)
{
    uint64_t unused;
    if (!bad_seq)
        bad_seq = &unused;
    if (it->leg) {
        int rc = next_row(it, row, bad_seq, why, len);
        if (rc != 0)
            return rc;
    }
    for (;;) {
        logblk_dec_t *d = it->dec;
        if (it->i < d->n) {
            uint64_t seq = it->first + it->i;
            if (seq > it->upto)
                return 0;
            size_t i = it->i++;
            double *v = d->v + 2 * d->dims * i;
            *row = (logit_row_t){
                .seq = seq,
                .t = d->rec[i].t,
                .rolled_back = undone_at(it, seq),
                .o =
                    {
                        .x = v,
                        .x_len = d->dims,
                        .r = d->rec[i].r,
                        .x_next = d->rec[i].terminal ? NULL : v + d->dims,
                        .x_next_len = d->dims,
                        .terminal = d->rec[i].terminal,
                        .source = d->rec[i].src,
                        .dt_s = d->rec[i].dt,
                    },
            };
            it->prev = seq;
            return 1;
        }
        int rc = next_block(it, bad_seq, why, len);
        if (rc <= 0)
            return rc;
    }
}

/* ---- queries ----------------------------------------------------------------------------- */

/* Runs sql (binding model and, if a >= 0, a) for one integer; NULL reads as 0.  0 or -1. */
static int one_u64(sqlite3 *db, const char *sql, int64_t model, int64_t a, uint64_t *out)
{
    sqlite3_stmt *st = NULL;
    *out = 0;
    if (sqlite3_prepare_v2(db, sql, -1, &st, NULL) != SQLITE_OK)
        return -1;
    sqlite3_bind_int64(st, 1, model);
    if (a >= 0)
        sqlite3_bind_int64(st, 2, a);
    int rc = sqlite3_step(st);
    if (rc == SQLITE_ROW && sqlite3_column_type(st, 0) != SQLITE_NULL)
        *out = (uint64_t)sqlite3_column_int64(st, 0);
    sqlite3_finalize(st);
    return rc == SQLITE_ROW ? 0 : -1;
}

int logsql_bounds(sqlite3 *db, int64_t model, uint64_t *lo, uint64_t *hi)
{
    uint64_t a, b, c, e;
    if (one_u64(db, "SELECT MIN(seq) FROM transitions WHERE model = ?1", model, -1, &a) ||
        one_u64(db, "SELECT MAX(seq) FROM transitions WHERE model = ?1", model, -1, &b) ||
        one_u64(db, "SELECT MIN(first_seq) FROM log_blocks WHERE model = ?1", model, -1, &c) ||
        one_u64(db, "SELECT MAX(last_seq) FROM log_blocks WHERE model = ?1", model, -1, &e))
        return -1;
    *lo = a && (!c || a < c) ? a : c;
    *hi = b > e ? b : e;
    return 0;
}

uint64_t logsql_count_live(sqlite3 *db, int64_t model, uint64_t after)
{
    uint64_t rows, in_blocks, undone;
    int64_t a = after > (uint64_t)INT64_MAX ? INT64_MAX : (int64_t)after;
    if (one_u64(db,
                "SELECT count(*) FROM transitions WHERE model = ?1 AND seq > ?2"
                " AND rolled_back = 0",
                model, a, &rows) ||
        one_u64(db,
                "SELECT SUM(last_seq - MAX(first_seq, ?2 + 1) + 1) FROM log_blocks"
                " WHERE model = ?1 AND last_seq > ?2",
                model, a, &in_blocks) ||
        one_u64(db,
                "SELECT SUM(hi - MAX(lo, ?2 + 1) + 1) FROM log_undone WHERE model = ?1"
                " AND hi > ?2",
                model, a, &undone))
        return 0;
    return rows + (in_blocks > undone ? in_blocks - undone : 0);
}

double logsql_t_at(sqlite3 *db, int64_t model, size_t dims, uint64_t seq)
{
    struct logit *it = NULL;
    logit_row_t row;
    char why[160];
    double t = NAN;
    if (seq == 0 || logit_open_part(db, model, dims, seq - 1, seq, 1, &it) != 0)
        return NAN;
    if (logit_next(it, &row, NULL, why, sizeof why) == 1 && row.seq == seq)
        t = row.t;
    logit_close(it);
    return t;
}

double logsql_last_t(sqlite3 *db, int64_t model, size_t dims, uint64_t below)
{
    sqlite3_stmt *st = NULL;
    double t = NAN;
    /* Blocks with a t, newest first; within one, the newest record before `below`. */
    if (sqlite3_prepare_v2(db,
                           "SELECT first_seq, last_seq FROM log_blocks WHERE model = ?1"
                           " AND first_seq < ?2 AND t_hi IS NOT NULL ORDER BY first_seq DESC",
                           -1, &st, NULL) != SQLITE_OK)
        return NAN;
    sqlite3_bind_int64(st, 1, model);
    sqlite3_bind_int64(st, 2, (sqlite3_int64)below);
    while (isnan(t) && sqlite3_step(st) == SQLITE_ROW) {
        uint64_t first = (uint64_t)sqlite3_column_int64(st, 0);
        uint64_t last = (uint64_t)sqlite3_column_int64(st, 1);
        struct logit *it = NULL;
        logit_row_t row;
        char why[160];
        if (logit_open_part(db, model, dims, first - 1, last < below ? last : below - 1, 0, &it) !=
            0)
            break;
        while (logit_next(it, &row, NULL, why, sizeof why) == 1)
            if (!isnan(row.t))
                t = row.t;
        logit_close(it);
    }
    sqlite3_finalize(st);
    if (!isnan(t))
        return t;
    if (sqlite3_prepare_v2(db,
                           "SELECT t FROM transitions WHERE model = ?1 AND seq < ?2 AND t IS NOT"
                           " NULL ORDER BY seq DESC LIMIT 1",
                           -1, &st, NULL) != SQLITE_OK)
        return NAN;
    sqlite3_bind_int64(st, 1, model);
    sqlite3_bind_int64(st, 2, (sqlite3_int64)below);
    if (sqlite3_step(st) == SQLITE_ROW)
        t = sqlite3_column_double(st, 0);
    sqlite3_finalize(st);
    return t;
}
