/*
 * test_pairing.c - samples into transitions (daemon/live/pairing.h): the two
 * reward rules, a gap that breaks the chain, a terminal sample that ends it,
 * resends skipped, sources kept apart, a sample parsed into the very slot its
 * transition is written to, producer sequences, the source-slot limit, the
 * QREC_SOURCE record of a source's state, and that state read back from a
 * real database (the schema's migrations applied by db_open).  The expected
 * transitions are worked out by hand from the rules in schema/protocol.md.
 */
#include "testutil.h"

#include <stddef.h>
#include <unistd.h>

#include "core/queue.h"
#include "live/pairing.h"
#include "store/db.h"
#include "worth/errors.h"

#define D 2

/* Room for a queue slot: the record and its 2 * D doubles. */
typedef struct {
    _Alignas(max_align_t) unsigned char b[sizeof(queue_rec_t) + 2 * D * sizeof(double)];
} slot_t;
#define R(s) ((queue_rec_t *)(void *)(s)->b)

static spec_meta_t meta(int same, double gap)
{
    spec_meta_t m;
    memset(&m, 0, sizeof m);
    m.dims = D;
    m.reward_same = same;
    m.max_gap_s = gap;
    return m;
}

static enum pair_outcome add(struct pairing *p, const char *src, double t, double a, double b,
                             double r, int term, slot_t *out)
{
    double x[D] = {a, b};
    pair_sample_t s = {src, t, x, r, term};
    return pairing_add(p, &s, R(out));
}

static void reward_next_and_same(void **state)
{
    (void)state;
    for (int same = 0; same <= 1; same++) {
        spec_meta_t m = meta(same, INFINITY);
        struct pairing *p = pairing_new(&m, 4);
        slot_t o;
        assert_int_equal(add(p, "", 0, 1, 2, -1, 0, &o), PAIR_START);
        assert_int_equal(add(p, "", 60, 3, 4, -2, 0, &o), PAIR_PAIRED);
        assert_int_equal(R(&o)->type, QREC_OBS);
        assert_true(R(&o)->v[0] == 1 && R(&o)->v[1] == 2 && R(&o)->v[2] == 3 && R(&o)->v[3] == 4);
        /* next: the step A -> B carries B's r; same: A's */
        assert_true(R(&o)->r == (same ? -1 : -2));
        assert_true(R(&o)->t_s == 0 && R(&o)->dt_s == 60 && R(&o)->terminal == 0);
        assert_string_equal(R(&o)->src, "");
        pairing_free(p);
    }
}

static void gap_breaks_terminal_ends(void **state)
{
    (void)state;
    spec_meta_t m = meta(0, 180);
    struct pairing *p = pairing_new(&m, 4);
    slot_t o;
    assert_int_equal(add(p, "a", 0, 0, 0, 0, 0, &o), PAIR_START);
    assert_int_equal(add(p, "a", 180, 1, 1, 0, 0, &o), PAIR_PAIRED); /* at the limit: pairs */
    assert_int_equal(add(p, "a", 361, 2, 2, 0, 0, &o), PAIR_GAP);    /* beyond it: breaks */
    assert_int_equal(add(p, "a", 400, 3, 3, 0, 1, &o), PAIR_PAIRED);
    assert_true(R(&o)->terminal == 1 && R(&o)->v[0] == 2 && R(&o)->v[2] == 3);
    assert_int_equal(add(p, "a", 460, 4, 4, 0, 0, &o), PAIR_START); /* after a terminal one */
    assert_int_equal(add(p, "a", 520, 5, 5, 0, 0, &o), PAIR_PAIRED);
    pairing_free(p);
}

static void resends_skipped_sources_apart(void **state)
{
    (void)state;
    spec_meta_t m = meta(0, INFINITY);
    struct pairing *p = pairing_new(&m, 4);
    slot_t o;
    assert_true(isinf(pairing_last_t(p, "a")) && pairing_last_t(p, "a") < 0);
    add(p, "a", 10, 1, 1, 0, 0, &o);
    add(p, "b", 5, 7, 7, 0, 0, &o);
    assert_int_equal(add(p, "a", 10, 9, 9, 0, 0, &o), PAIR_SKIPPED); /* same t */
    assert_int_equal(add(p, "a", 3, 9, 9, 0, 0, &o), PAIR_SKIPPED);  /* earlier */
    assert_int_equal(add(p, "b", 6, 8, 8, 0, 0, &o), PAIR_PAIRED);
    assert_true(R(&o)->v[0] == 7 && R(&o)->v[2] == 8);
    assert_string_equal(R(&o)->src, "b");
    assert_true(pairing_last_t(p, "a") == 10 && pairing_last_t(p, "b") == 6);
    assert_int_equal(add(p, "a", 11, 2, 2, 0, 0, &o), PAIR_PAIRED);
    assert_true(R(&o)->v[0] == 1 && R(&o)->v[2] == 2); /* the skipped ones changed nothing */
    pairing_free(p);
}

/* The protocol parses a sample into the slot (x where x_next goes) its transition fills. */
static void sample_in_its_own_slot(void **state)
{
    (void)state;
    spec_meta_t m = meta(0, INFINITY);
    struct pairing *p = pairing_new(&m, 4);
    slot_t o;
    add(p, "pump-2", 0, 1, 2, 0, 0, &o);
    slot_t in;
    memset(&in, 0, sizeof in);
    snprintf(R(&in)->src, sizeof R(&in)->src, "pump-2");
    R(&in)->v[D] = 5;
    R(&in)->v[D + 1] = 6;
    pair_sample_t s = {R(&in)->src, 60, R(&in)->v + D, -3, 0};
    assert_int_equal(pairing_add(p, &s, R(&in)), PAIR_PAIRED);
    assert_true(R(&in)->v[0] == 1 && R(&in)->v[1] == 2 && R(&in)->v[2] == 5 && R(&in)->v[3] == 6);
    assert_true(R(&in)->r == -3 && R(&in)->dt_s == 60);
    assert_string_equal(R(&in)->src, "pump-2");
    pairing_free(p);
}

static void pseq_fit_and_record(void **state)
{
    (void)state;
    spec_meta_t m = meta(0, INFINITY);
    struct pairing *p = pairing_new(&m, 2);
    char err[160];
    size_t bad = 99;
    const char *two[] = {"a", NULL};
    const char *three[] = {"a", "b", "c"};
    assert_int_equal(pairing_fit(p, two, 2, &bad, err, sizeof err), 0);
    assert_int_equal(pairing_fit(p, three, 3, &bad, err, sizeof err), WORTH_E_TOO_MANY_SOURCES);
    assert_int_equal(bad, 2);
    pairing_note(p, "a");
    assert_int_equal(pairing_pseq(p, "a"), 0);
    pairing_pseq_set(p, "a", 7);
    pairing_pseq_set(p, "a", 5); /* never goes back */
    assert_int_equal(pairing_pseq(p, "a"), 7);
    slot_t rec;
    pairing_record(p, "a", R(&rec));
    assert_true(R(&rec)->type == QREC_SOURCE && R(&rec)->est == 0 && R(&rec)->pseq == 7);
    slot_t o;
    add(p, "a", 100, 4, 5, -1, 1, &o);
    pairing_record(p, "a", R(&rec));
    assert_true(R(&rec)->est == 1 && R(&rec)->t_s == 100 && R(&rec)->r == -1 &&
                R(&rec)->terminal == 1);
    assert_true(R(&rec)->v[0] == 4 && R(&rec)->v[1] == 5 && R(&rec)->pseq == 7);
    assert_int_equal(pairing_count(p), 1);
    pairing_free(p);
}

static void load_from_the_database(void **state)
{
    (void)state;
    char path[] = "/tmp/worth-test-pairing-XXXXXX";
    int fd = mkstemp(path);
    assert_true(fd >= 0);
    close(fd);
    unlink(path);
    sqlite3 *db = NULL;
    char err[256];
    assert_int_equal(db_open(path, 0, &db, err, sizeof err), 0);
    double x[D] = {1.5, -2.5};
    assert_int_equal(sqlite3_exec(db,
                                  "INSERT INTO models(id, name, spec, created_at)"
                                  " VALUES(1, 'm', '{}', 0)",
                                  NULL, NULL, NULL),
                     SQLITE_OK);
    sqlite3_stmt *st = NULL;
    assert_int_equal(sqlite3_prepare_v2(db,
                                        "INSERT INTO sources(model, source, t, x, r, terminal,"
                                        " pseq) VALUES(1, ?, ?, ?, ?, 0, ?)",
                                        -1, &st, NULL),
                     SQLITE_OK);
    sqlite3_bind_text(st, 1, "a", -1, SQLITE_STATIC);
    sqlite3_bind_double(st, 2, 60);
    sqlite3_bind_blob(st, 3, x, sizeof x, SQLITE_STATIC);
    sqlite3_bind_double(st, 4, -4);
    sqlite3_bind_int64(st, 5, 3);
    assert_int_equal(sqlite3_step(st), SQLITE_DONE);
    sqlite3_reset(st);
    sqlite3_bind_text(st, 1, "b", -1, SQLITE_STATIC);
    sqlite3_bind_null(st, 2);
    sqlite3_bind_null(st, 3);
    sqlite3_bind_null(st, 4);
    sqlite3_bind_int64(st, 5, 9);
    assert_int_equal(sqlite3_step(st), SQLITE_DONE);
    sqlite3_finalize(st);

    spec_meta_t m = meta(1, INFINITY);
    struct pairing *p = pairing_new(&m, 4);
    slot_t o;
    add(p, "a", 500, 0, 0, 0, 0, &o); /* state the log does not hold: load replaces it */
    assert_int_equal(pairing_load(p, db, 1, err, sizeof err), 0);
    assert_true(pairing_last_t(p, "a") == 60 && pairing_pseq(p, "a") == 3);
    assert_true(isinf(pairing_last_t(p, "b")) && pairing_pseq(p, "b") == 9);
    assert_int_equal(add(p, "a", 120, 2, 2, -5, 0, &o), PAIR_PAIRED);
    assert_true(R(&o)->v[0] == 1.5 && R(&o)->v[1] == -2.5 &&
                R(&o)->r == -4); /* same: A's r, from the row */

    /* a row of the wrong shape is damage, said as such */
    assert_int_equal(
        sqlite3_exec(db, "UPDATE sources SET x = x'00' WHERE source = 'a'", NULL, NULL, NULL),
        SQLITE_OK);
    assert_int_equal(pairing_load(p, db, 1, err, sizeof err), WORTH_E_DAMAGED);
    assert_non_null(strstr(err, "\"a\""));
    pairing_free(p);
    sqlite3_close(db);
    unlink(path);
    char side[sizeof path + 8];
    snprintf(side, sizeof side, "%s-wal", path);
    unlink(side);
    snprintf(side, sizeof side, "%s-shm", path);
    unlink(side);
    snprintf(side, sizeof side, "%s.lock", path);
    unlink(side);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(reward_next_and_same),          cmocka_unit_test(gap_breaks_terminal_ends),
        cmocka_unit_test(resends_skipped_sources_apart), cmocka_unit_test(sample_in_its_own_slot),
        cmocka_unit_test(pseq_fit_and_record),           cmocka_unit_test(load_from_the_database),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
