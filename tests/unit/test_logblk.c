/*
 * test_logblk.c - the transition log's blocks (daemon/store/logblk.c) and the
 * SQL around them (daemon/store/logsql.c), on a real database whose schema
 * db_open's migrations made.
 *
 * The format: records of every shape (terminal, with and without t, dt and
 * source, trajectories whose x_next is kept once) come back bit for bit; every
 * single-bit flip of a block is caught and names the record it hit.  The SQL:
 * rows of the transitions table written before schema 006 and blocks after
 * them are read as one log in seq order; rollbacks by all, by a window of seq
 * and by a window of t mark exactly the transitions a per-row UPDATE would;
 * a deletion that cuts blocks keeps exactly the transitions outside it.
 */
#include <sqlite3.h>
#include <unistd.h>

#include "testutil.h"

#include "common/mem.h"
#include "store/db.h"
#include "store/logblk.h"
#include "store/logsql.h"

#define D 3
#define N 700

/* One made-up transition per seq: shapes vary with seq so that every flag is used. */
typedef struct {
    double x[D], xn[D], r, t, dt;
    int terminal;
    char src[8];
} tr_t;

static void make(tr_t *v, size_t n, uint64_t first)
{
    for (size_t i = 0; i < n; i++) {
        uint64_t s = first + i;
        for (int k = 0; k < D; k++)
            v[i].x[k] =
                i && !v[i - 1].terminal && s % 5 != 0 ? v[i - 1].xn[k] : sin((double)(s * 7 + k));
        for (int k = 0; k < D; k++)
            v[i].xn[k] = cos((double)(s * 3 + k)) * 2.0;
        v[i].r = (double)(s % 11) - 5.0;
        v[i].t = s % 4 == 0 ? NAN : 1000.0 + (double)s * 10.0;
        v[i].dt = s % 3 == 0 ? NAN : 10.0;
        v[i].terminal = s % 37 == 0;
        snprintf(v[i].src, sizeof v[i].src, "%s", s % 6 == 0 ? "" : (s % 2 ? "p1" : "pump-2"));
    }
}

static logblk_rec_t rec_of(const tr_t *v, uint64_t seq)
{
    return (logblk_rec_t){.seq = seq,
                          .r = v->r,
                          .t = v->t,
                          .dt = v->dt,
                          .terminal = v->terminal,
                          .src = v->src,
                          .x = v->x,
                          .xn = v->xn};
}

static int same(double a, double b)
{
    return memcmp(&a, &b, sizeof a) == 0;
}

static void encode(logblk_enc_t *e, const tr_t *v, size_t n, uint64_t first)
{
    logblk_enc_reset(e, D);
    for (size_t i = 0; i < n; i++) {
        logblk_rec_t r = rec_of(&v[i], first + i);
        assert_int_equal(logblk_enc_add(e, &r), 0);
    }
    logblk_enc_finish(e);
}

static void round_trip(void **state)
{
    (void)state;
    static tr_t v[N];
    make(v, N, 41);
    logblk_enc_t e;
    logblk_enc_init(&e, 64);
    encode(&e, v, N, 41);
    size_t plain = 0;
    for (size_t i = 0; i < N; i++)
        plain += 5 + 8 + (isnan(v[i].t) ? 0 : 8) + (isnan(v[i].dt) ? 0 : 8) +
                 (v[i].src[0] ? 1 + strlen(v[i].src) : 0) + (v[i].terminal ? 1 : 2) * D * 8;
    print_message("block of %d records: %zu bytes (%zu without keeping x_next once)\n", N, e.len,
                  plain);
    assert_true(e.len < plain); /* trajectories keep x_next once */
    /* seq 41 has a t; the last, 740, has none (740 % 4 == 0): 739 has the largest */
    assert_true(same(e.t_lo, 1000.0 + 41 * 10.0) && same(e.t_hi, 1000.0 + 739 * 10.0));
    logblk_dec_t *d = logblk_dec_new(D);
    uint64_t bad = 0;
    char why[128];
    assert_int_equal(logblk_decode(d, e.b, e.len, 41, 41 + N - 1, &bad, why, sizeof why), 0);
    assert_int_equal(d->n, N);
    for (size_t i = 0; i < N; i++) {
        const double *x = d->v + 2 * D * i;
        assert_true(same(d->rec[i].r, v[i].r));
        assert_int_equal(isnan(d->rec[i].t), isnan(v[i].t));
        if (!isnan(v[i].t))
            assert_true(same(d->rec[i].t, v[i].t));
        assert_int_equal(isnan(d->rec[i].dt), isnan(v[i].dt));
        assert_int_equal(d->rec[i].terminal, v[i].terminal);
        assert_string_equal(d->rec[i].src, v[i].src);
        assert_memory_equal(x, v[i].x, sizeof v[i].x);
        if (!v[i].terminal)
            assert_memory_equal(x + D, v[i].xn, sizeof v[i].xn);
    }
    /* A record whose seq does not follow, and a full block, are refused. */
    logblk_enc_reset(&e, D);
    logblk_rec_t r = rec_of(&v[0], 5);
    assert_int_equal(logblk_enc_add(&e, &r), 0);
    r.seq = 7;
    assert_int_equal(logblk_enc_add(&e, &r), -1);
    for (uint64_t s = 6; s < 5 + LOGBLK_MAX; s++) {
        r.seq = s;
        assert_int_equal(logblk_enc_add(&e, &r), 0);
    }
    r.seq = 5 + LOGBLK_MAX;
    assert_int_equal(logblk_enc_add(&e, &r), -1);
    logblk_dec_free(d);
    logblk_enc_free(&e);
}

static void every_bit_flip_is_caught(void **state)
{
    (void)state;
    tr_t v[40];
    make(v, 40, 1);
    logblk_enc_t e;
    logblk_enc_init(&e, D);
    encode(&e, v, 40, 1);
    /* Where each record starts, to check the seq a flip is blamed on. */
    size_t start[41], off = 0;
    logblk_dec_t *d = logblk_dec_new(D);
    for (size_t i = 0; i < 40; i++) {
        start[i] = off;
        const uint8_t *p = e.b + off;
        size_t n = 13 + ((p[4] & LOGBLK_T) ? 8 : 0) + ((p[4] & LOGBLK_DT) ? 8 : 0);
        if (p[4] & LOGBLK_SOURCE)
            n += 1 + p[n];
        n += D * 8 * ((p[4] & (LOGBLK_TERMINAL | LOGBLK_XN_NEXT)) ? 1 : 2);
        off += n;
    }
    start[40] = off;
    assert_int_equal(off, e.len);
    uint8_t *buf = mem_alloc(e.len);
    size_t caught = 0;
    for (size_t byte = 0; byte < e.len; byte++)
        for (int bit = 0; bit < 8; bit++) {
            memcpy(buf, e.b, e.len);
            buf[byte] ^= (uint8_t)(1u << bit);
            uint64_t bad = 0;
            char why[128];
            int rc = logblk_decode(d, buf, e.len, 1, 40, &bad, why, sizeof why);
            if (rc != 0)
                caught++;
            size_t rec = 0;
            while (start[rec + 1] <= byte)
                rec++;
            if (rc != 0 && bad != rec + 1) {
                print_error("flip of bit %d of byte %zu (record %zu) blamed on %llu: %s\n", bit,
                            byte, rec + 1, (unsigned long long)bad, why);
                fail();
            }
        }
    print_message("%zu of %zu single-bit flips caught\n", caught, e.len * 8);
    assert_int_equal(caught, e.len * 8);
    /* Cut short, or with bytes after its last record. */
    uint64_t bad;
    char why[128];
    assert_int_equal(logblk_decode(d, e.b, start[17] + 3, 1, 40, &bad, why, sizeof why), -1);
    assert_int_equal(bad, 18);
    assert_int_equal(logblk_decode(d, e.b, e.len, 1, 41, &bad, why, sizeof why), -1);
    assert_int_equal(bad, 41);
    mem_free(buf);
    logblk_dec_free(d);
    logblk_enc_free(&e);
}

/* ---- logsql ------------------------------------------------------------------------------ */

static sqlite3 *fresh_db(char *path, size_t len)
{
    snprintf(path, len, "/tmp/worth-test-logblk-XXXXXX");
    int fd = mkstemp(path);
    assert_true(fd >= 0);
    close(fd);
    unlink(path);
    sqlite3 *db = NULL;
    char err[256];
    assert_int_equal(db_open(path, 0, &db, err, sizeof err), 0);
    assert_int_equal(sqlite3_exec(db,
                                  "INSERT INTO models(id, name, spec, created_at)"
                                  " VALUES(1, 'm', '{}', 0)",
                                  NULL, NULL, NULL),
                     SQLITE_OK);
    return db;
}

static void drop_db(sqlite3 *db, const char *path)
{
    sqlite3_close(db);
    char p[128];
    unlink(path);
    snprintf(p, sizeof p, "%s-wal", path);
    unlink(p);
    snprintf(p, sizeof p, "%s-shm", path);
    unlink(p);
}

/* Seqs 1..nrows as rows of the transitions table (the layout before 006), then blocks. */
static void fill(sqlite3 *db, const tr_t *v, size_t nrows, size_t n, size_t per_block)
{
    sqlite3_stmt *st = NULL;
    assert_int_equal(sqlite3_prepare_v2(db,
                                        "INSERT INTO transitions(model, seq, t, source, x, r,"
                                        " x_next, terminal, dt) VALUES(1,?,?,?,?,?,?,?,?)",
                                        -1, &st, NULL),
                     SQLITE_OK);
    for (size_t i = 0; i < nrows; i++) {
        sqlite3_reset(st);
        sqlite3_bind_int64(st, 1, (sqlite3_int64)(i + 1));
        if (isnan(v[i].t))
            sqlite3_bind_null(st, 2);
        else
            sqlite3_bind_double(st, 2, v[i].t);
        sqlite3_bind_text(st, 3, v[i].src, -1, SQLITE_STATIC);
        sqlite3_bind_blob(st, 4, v[i].x, sizeof v[i].x, SQLITE_STATIC);
        sqlite3_bind_double(st, 5, v[i].r);
        if (v[i].terminal)
            sqlite3_bind_null(st, 6);
        else
            sqlite3_bind_blob(st, 6, v[i].xn, sizeof v[i].xn, SQLITE_STATIC);
        sqlite3_bind_int(st, 7, v[i].terminal);
        if (isnan(v[i].dt))
            sqlite3_bind_null(st, 8);
        else
            sqlite3_bind_double(st, 8, v[i].dt);
        assert_int_equal(sqlite3_step(st), SQLITE_DONE);
    }
    sqlite3_finalize(st);
    assert_int_equal(sqlite3_prepare_v2(db, LOGSQL_INSERT_BLOCK, -1, &st, NULL), SQLITE_OK);
    logblk_enc_t e;
    logblk_enc_init(&e, D);
    for (size_t i = nrows; i < n; i += per_block) {
        size_t k = n - i < per_block ? n - i : per_block;
        encode(&e, v + i, k, i + 1);
        assert_int_equal(logsql_put_block(st, 1, &e), 0);
    }
    logblk_enc_free(&e);
    sqlite3_finalize(st);
}

/* The seqs the iterator reports undone, as a bitmap over 1..n. */
static void read_all(sqlite3 *db, const tr_t *v, size_t n, uint64_t after, char *undone)
{
    struct logit *it = NULL;
    assert_int_equal(logit_open(db, 1, D, after, UINT64_MAX, &it), 0);
    logit_row_t row;
    uint64_t bad, want = after + 1;
    char why[128];
    int rc;
    while ((rc = logit_next(it, &row, &bad, why, sizeof why)) == 1) {
        assert_int_equal(row.seq, want);
        const tr_t *t = &v[row.seq - 1];
        undone[row.seq] = row.rolled_back != 0;
        if (!row.rolled_back) {
            assert_memory_equal(row.o.x, t->x, sizeof t->x);
            assert_true(same(row.o.r, t->r));
            assert_int_equal(row.o.terminal, t->terminal);
            if (!t->terminal)
                assert_memory_equal(row.o.x_next, t->xn, sizeof t->xn);
            assert_string_equal(row.o.source, t->src);
        }
        want++;
    }
    assert_int_equal(rc, 0);
    assert_int_equal(want, n + 1);
    logit_close(it);
}

static void rows_then_blocks_and_rollbacks(void **state)
{
    (void)state;
    static tr_t v[N];
    make(v, N, 1);
    char path[64];
    sqlite3 *db = fresh_db(path, sizeof path);
    fill(db, v, 100, N, 128); /* 100 rows, then blocks 101-228, 229-356, ... */
    uint64_t lo, hi;
    assert_int_equal(logsql_bounds(db, 1, &lo, &hi), 0);
    assert_true(lo == 1 && hi == N);
    static char undone[N + 1], want[N + 1];
    read_all(db, v, N, 0, undone);
    read_all(db, v, N, 150, undone); /* from inside a block */
    assert_int_equal(logsql_count_live(db, 1, 0), N);
    assert_int_equal(logsql_count_live(db, 1, 150), N - 150);
    /* A window of seq across the rows' end and a block's, then one of t, then all after 600. */
    uint64_t n_undone, untimed;
    assert_int_equal(
        logsql_undo(db, 1, D, 50, N, LOGSQL_UNDO_SEQS, 90, 240, 7, &n_undone, &untimed), 0);
    assert_int_equal(n_undone, 240 - 90 + 1);
    memset(want, 0, sizeof want);
    for (int s = 90; s <= 240; s++)
        want[s] = 1;
    uint64_t t_untimed = 0, t_count = 0;
    for (int s = 301; s <= N; s++) { /* a window of t over seqs 301..N: [1000+3500, 1000+5000] */
        double t = v[s - 1].t;
        if (isnan(t)) {
            t_untimed++;
        } else if (t >= 4500.0 && t <= 6000.0) {
            t_count++;
            want[s] = 1;
        }
    }
    assert_int_equal(
        logsql_undo(db, 1, D, 300, N, LOGSQL_UNDO_TIMES, 4500.0, 6000.0, 8, &n_undone, &untimed),
        0);
    assert_int_equal(n_undone, t_count);
    assert_int_equal(untimed, t_untimed);
    uint64_t all = 0;
    for (int s = 601; s <= N; s++)
        if (!want[s]) {
            want[s] = 1;
            all++;
        }
    assert_int_equal(logsql_undo(db, 1, D, 600, N, LOGSQL_UNDO_ALL, 0, 0, 9, &n_undone, &untimed),
                     0);
    assert_int_equal(n_undone, all);
    read_all(db, v, N, 0, undone);
    assert_memory_equal(undone + 1, want + 1, N);
    uint64_t live = 0;
    for (int s = 1; s <= N; s++)
        live += !want[s];
    assert_int_equal(logsql_count_live(db, 1, 0), live);
    /* t as logged */
    assert_true(same(logsql_t_at(db, 1, D, 42), v[41].t));
    assert_true(same(logsql_t_at(db, 1, D, 333), v[332].t));
    assert_true(isnan(logsql_t_at(db, 1, D, 332))); /* 332 % 4 == 0: logged without t */
    assert_true(same(logsql_last_t(db, 1, D, 333), v[330].t));
    assert_true(same(logsql_last_t(db, 1, D, 101), v[98].t)); /* from the rows, 99 */
    drop_db(db, path);
}

static void delete_cuts_blocks(void **state)
{
    (void)state;
    static tr_t v[N];
    make(v, N, 1);
    char path[64];
    sqlite3 *db = fresh_db(path, sizeof path);
    fill(db, v, 60, N, 100); /* rows 1-60, blocks 61-160, 161-260, ... */
    uint64_t n_undone, untimed;
    assert_int_equal(logsql_undo(db, 1, D, 140, 200, LOGSQL_UNDO_ALL, 0, 0, 5, &n_undone, &untimed),
                     0);
    logblk_enc_t e;
    logblk_enc_init(&e, D);
    /* (50, 190]: rows 51-60, the rest of block 61-160, part of 161-260, and of the undone range */
    assert_int_equal(logsql_delete(db, 1, D, 50, 190, &e), 190 - 50);
    /* (300, 310]: inside one block, which becomes two */
    assert_int_equal(logsql_delete(db, 1, D, 300, 310, &e), 10);
    struct logit *it = NULL;
    assert_int_equal(logit_open(db, 1, D, 0, UINT64_MAX, &it), 0);
    logit_row_t row;
    uint64_t bad, count = 0;
    char why[128];
    int rc;
    while ((rc = logit_next(it, &row, &bad, why, sizeof why)) == 1) {
        count++;
        assert_true(row.seq <= 50 || (row.seq > 190 && row.seq <= 300) || row.seq > 310);
        assert_int_equal(row.rolled_back != 0, row.seq > 190 && row.seq <= 200);
        if (!row.rolled_back)
            assert_memory_equal(row.o.x, v[row.seq - 1].x, sizeof v[0].x);
    }
    assert_int_equal(rc, 0);
    assert_int_equal(count, N - 140 - 10);
    logit_close(it);
    uint64_t lo, hi;
    assert_int_equal(logsql_bounds(db, 1, &lo, &hi), 0);
    assert_true(lo == 1 && hi == N);
    /* Everything: whole blocks only, so no dims are needed. */
    assert_int_equal(logsql_delete(db, 1, 0, 0, N, &e), N - 150);
    assert_int_equal(logsql_bounds(db, 1, &lo, &hi), 0);
    assert_true(lo == 0 && hi == 0);
    logblk_enc_free(&e);
    drop_db(db, path);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(round_trip),
        cmocka_unit_test(every_bit_flip_is_caught),
        cmocka_unit_test(rows_then_blocks_and_rollbacks),
        cmocka_unit_test(delete_cuts_blocks),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
