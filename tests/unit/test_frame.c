/*
 * test_frame.c - the framing state machine (daemon/net/frame.h): lines with
 * and without "\r", blank lines, a last line at EOF, a line of exactly
 * max_line bytes and one byte more, a bulk payload gathered across reads and
 * the bytes after it, EOF inside a payload, an event handed back unchanged
 * while parked, and the input buffer staying within its bound.  The fuzz
 * target (tests/fuzz) checks the same machine on arbitrary input split at
 * every byte; these are the cases written out.  Then the buffer budget
 * (budget.h): a line that cannot grow, whole lines in a full buffer, a bulk
 * payload reserved but allocated only as it arrives, and one refused and
 * skipped.
 */
#include "testutil.h"

#include "net/frame.h"

#define MAXL 16

static void feed(frame_t *f, const char *s, size_t n)
{
    while (n) {
        size_t took = frame_feed(f, s, n);
        assert_true(took > 0);
        s += took;
        n -= took;
    }
}

/* The next event must be a line equal to want (or blank); consumes it. */
static void want_line(frame_t *f, int eof, enum frame_kind kind, const char *want)
{
    frame_ev_t ev;
    enum frame_kind k = frame_next(f, eof, &ev);
    if (k != kind)
        print_error("kind %d, expected %d\n", (int)k, (int)kind);
    assert_int_equal(k, kind);
    assert_int_equal(ev.len, strlen(want));
    assert_memory_equal(ev.line, want, ev.len);
    frame_consume(f);
}

static void want_kind(frame_t *f, int eof, enum frame_kind kind)
{
    frame_ev_t ev;
    assert_int_equal(frame_next(f, eof, &ev), kind);
}

static void lines_and_blanks(void **state)
{
    (void)state;
    frame_t f;
    frame_init(&f, MAXL, NULL);
    const char *in = "ab\r\n\n  \t\ncd\nlast";
    feed(&f, in, strlen(in));
    want_line(&f, 0, FRAME_LINE, "ab");
    want_line(&f, 0, FRAME_BLANK, "");
    want_line(&f, 0, FRAME_BLANK, "  \t");
    want_line(&f, 0, FRAME_LINE, "cd");
    want_kind(&f, 0, FRAME_MORE);         /* "last" waits for its newline... */
    want_line(&f, 1, FRAME_LINE, "last"); /* ...or for EOF */
    want_kind(&f, 1, FRAME_MORE);
    frame_close(&f);
}

static void line_length_limit(void **state)
{
    (void)state;
    frame_t f;
    frame_init(&f, MAXL, NULL);
    char ok[MAXL + 2], cr[MAXL + 4];
    memset(ok, 'a', MAXL);
    ok[MAXL] = '\n';
    ok[MAXL + 1] = 0;
    feed(&f, ok, MAXL + 1);
    ok[MAXL] = 0;
    want_line(&f, 0, FRAME_LINE, ok); /* exactly max_line: a line */
    /* max_line bytes and "\r\n": the "\r" belongs to the line end, not to the line,
     * also when the "\n" comes in a later read */
    memset(cr, 'b', MAXL);
    memcpy(cr + MAXL, "\r\n", 3);
    feed(&f, cr, MAXL + 1);
    want_kind(&f, 0, FRAME_MORE);
    feed(&f, "\n", 1);
    cr[MAXL] = 0;
    want_line(&f, 0, FRAME_LINE, cr);
    /* ... and at EOF without a "\n" */
    memset(cr, 'c', MAXL);
    cr[MAXL] = '\r';
    feed(&f, cr, MAXL + 1);
    cr[MAXL] = 0;
    want_line(&f, 1, FRAME_LINE, cr);
    frame_close(&f);

    /* max_line + 1 bytes before a "\r\n" are too long, as soon as the "\r" is not last */
    frame_init(&f, MAXL, NULL);
    memset(cr, 'd', MAXL + 1);
    memcpy(cr + MAXL + 1, "\r\n", 3);
    feed(&f, cr, MAXL + 3);
    want_kind(&f, 0, FRAME_TOO_LONG);
    want_kind(&f, 0, FRAME_MORE); /* the stream has ended */
    frame_close(&f);

    /* An unterminated run longer than max_line is too long before its newline comes. */
    frame_init(&f, MAXL, NULL);
    feed(&f, cr, MAXL);
    want_kind(&f, 0, FRAME_MORE);
    feed(&f, "b", 1);
    want_kind(&f, 0, FRAME_TOO_LONG);
    frame_close(&f);
}

static void bulk_across_reads(void **state)
{
    (void)state;
    frame_t f;
    frame_init(&f, MAXL, NULL);
    feed(&f, "hdr\n012", 7);
    frame_ev_t ev;
    assert_int_equal(frame_next(&f, 0, &ev), FRAME_LINE);
    assert_int_equal(ev.len, 3);
    frame_expect_bulk(&f, 10);
    assert_true(frame_in_bulk(&f));
    frame_consume(&f);
    want_kind(&f, 0, FRAME_MORE);
    feed(&f, "3456789\nnext\n", 13);
    assert_int_equal(frame_next(&f, 0, &ev), FRAME_BULK);
    assert_int_equal(ev.len, 10);
    assert_memory_equal(ev.data, "0123456789", 10);
    /* Parked: the same payload comes again. */
    assert_int_equal(frame_next(&f, 0, &ev), FRAME_BULK);
    assert_memory_equal(ev.data, "0123456789", 10);
    frame_consume(&f);
    assert_false(frame_in_bulk(&f));
    want_line(&f, 0, FRAME_BLANK, ""); /* the "\n" after the payload is an empty line */
    want_line(&f, 0, FRAME_LINE, "next");
    frame_close(&f);
}

static void bulk_truncated_at_eof(void **state)
{
    (void)state;
    frame_t f;
    frame_init(&f, MAXL, NULL);
    feed(&f, "h\nabc", 5);
    frame_ev_t ev;
    assert_int_equal(frame_next(&f, 0, &ev), FRAME_LINE);
    frame_expect_bulk(&f, 8);
    frame_consume(&f);
    want_kind(&f, 0, FRAME_MORE);
    assert_int_equal(frame_next(&f, 1, &ev), FRAME_TRUNCATED);
    assert_int_equal(ev.len, 8);
    assert_int_equal(ev.got, 3);
    assert_false(frame_in_bulk(&f));
    want_kind(&f, 1, FRAME_MORE);
    frame_close(&f);
}

static void parked_line_comes_back(void **state)
{
    (void)state;
    frame_t f;
    frame_init(&f, MAXL, NULL);
    feed(&f, "one\ntwo\n", 8);
    frame_ev_t a, b;
    assert_int_equal(frame_next(&f, 0, &a), FRAME_LINE);
    assert_int_equal(frame_next(&f, 0, &b), FRAME_LINE);
    assert_int_equal(a.len, b.len);
    assert_ptr_equal(a.line, b.line);
    frame_consume(&f);
    want_line(&f, 0, FRAME_LINE, "two");
    frame_close(&f);
}

static void buffer_stays_bounded(void **state)
{
    (void)state;
    frame_t f;
    frame_init(&f, MAXL, NULL);
    /* Many short lines through many reads: the buffer never outgrows its limit. */
    for (int i = 0; i < 50000; i++) {
        feed(&f, "0123456789\n", 11);
        want_line(&f, 0, FRAME_LINE, "0123456789");
        assert_true(f.cap <= MAXL + FRAME_READ_CHUNK + 2 || f.cap == FRAME_IN_START);
    }
    frame_close(&f);
}

/* A budget that holds one first buffer and a little: lines that need more are refused. */
static void budget_refuses_a_growing_line(void **state)
{
    (void)state;
    budget_t b = {.cap = FRAME_IN_START + 100};
    frame_t f, g;
    assert_int_equal(frame_init(&f, 1u << 20, &b), 0);
    assert_int_equal(b.used, FRAME_IN_START);
    assert_int_equal(frame_init(&g, 1u << 20, &b), -1); /* no room for a second connection */
    assert_int_equal(b.used, FRAME_IN_START);
    frame_close(&g);
    char chunk[1024];
    memset(chunk, 'x', sizeof chunk);
    size_t fed = 0;
    for (int i = 0; i < 64; i++) {
        size_t took = frame_feed(&f, chunk, sizeof chunk);
        fed += took;
        if (!took)
            break;
    }
    assert_int_equal(fed, FRAME_IN_START); /* it could not grow */
    assert_true(b.used <= b.cap);
    want_kind(&f, 0, FRAME_OVER_BUDGET);
    want_kind(&f, 0, FRAME_MORE); /* the stream has ended */
    frame_close(&f);
    assert_int_equal(b.used, 0);
}

/* Whole lines already in a full buffer are handled before the budget says no. */
static void budget_full_buffer_of_lines(void **state)
{
    (void)state;
    budget_t b = {.cap = FRAME_IN_START};
    frame_t f;
    assert_int_equal(frame_init(&f, 1u << 20, &b), 0);
    char line[FRAME_IN_START];
    memset(line, 'y', sizeof line);
    line[99] = '\n';
    feed(&f, line, FRAME_IN_START); /* one line of 99, then an unfinished one */
    frame_ev_t ev;
    char *buf;
    size_t room;
    frame_space(&f, &buf, &room);
    assert_int_equal(frame_next(&f, 0, &ev), FRAME_LINE);
    assert_int_equal(ev.len, 99);
    frame_consume(&f);
    frame_space(&f, &buf, &room); /* compaction gives back the 100 bytes */
    assert_int_equal(room, 100);
    frame_close(&f);
}

/* A payload is reserved whole but allocated as it arrives; a refused one is skipped. */
static void budget_bulk_reserved_and_skipped(void **state)
{
    (void)state;
    budget_t b = {.cap = FRAME_IN_START + 5000};
    frame_t f;
    assert_int_equal(frame_init(&f, MAXL, &b), 0);
    feed(&f, "big\n", 4);
    frame_ev_t ev;
    assert_int_equal(frame_next(&f, 0, &ev), FRAME_LINE);
    assert_int_equal(frame_expect_bulk(&f, 6000), -1); /* over the cap: nothing changed */
    assert_false(frame_in_bulk(&f));
    assert_int_equal(b.used, FRAME_IN_START);
    frame_skip_bulk(&f, 6000);
    frame_consume(&f);
    char junk[1000];
    memset(junk, '\n', sizeof junk); /* newlines inside the payload are not lines */
    for (int i = 0; i < 6; i++) {
        feed(&f, junk, sizeof junk);
        want_kind(&f, 0, FRAME_MORE);
    }
    feed(&f, "after\nsmall\n", 12);
    want_line(&f, 0, FRAME_LINE, "after");
    assert_int_equal(frame_next(&f, 0, &ev), FRAME_LINE);
    assert_int_equal(frame_expect_bulk(&f, 4000), 0);
    assert_int_equal(b.used, FRAME_IN_START + 4000); /* reserved... */
    assert_int_equal(f.bulk_cap, 0);                 /* ...not allocated */
    frame_consume(&f);
    feed(&f, junk, 10);
    want_kind(&f, 0, FRAME_MORE);
    assert_true(f.bulk_cap >= 10 && f.bulk_cap <= 4000);
    for (int i = 0; i < 4; i++)
        feed(&f, junk, i < 3 ? 1000 : 990);
    assert_int_equal(frame_next(&f, 0, &ev), FRAME_BULK);
    assert_int_equal(ev.len, 4000);
    frame_consume(&f);
    assert_true(b.used <= b.cap);
    frame_close(&f);
    assert_int_equal(b.used, 0);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(lines_and_blanks),
        cmocka_unit_test(line_length_limit),
        cmocka_unit_test(bulk_across_reads),
        cmocka_unit_test(bulk_truncated_at_eof),
        cmocka_unit_test(parked_line_comes_back),
        cmocka_unit_test(buffer_stays_bounded),
        cmocka_unit_test(budget_refuses_a_growing_line),
        cmocka_unit_test(budget_full_buffer_of_lines),
        cmocka_unit_test(budget_bulk_reserved_and_skipped),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
