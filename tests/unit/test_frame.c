/*
 * test_frame.c - the framing state machine (daemon/net/frame.h): lines with
 * and without "\r", blank lines, a last line at EOF, a line of exactly
 * max_line bytes and one byte more, a bulk payload gathered across reads and
 * the bytes after it, EOF inside a payload, an event handed back unchanged
 * while parked, and the input buffer staying within its bound.  The fuzz
 * target (tests/fuzz) checks the same machine on arbitrary input split at
 * every byte; these are the cases written out.
 */
#include "testutil.h"

#include "frame.h"

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
    frame_init(&f, MAXL);
    const char *in = "ab\r\n\n  \t\ncd\nlast";
    feed(&f, in, strlen(in));
    want_line(&f, 0, FRAME_LINE, "ab");
    want_line(&f, 0, FRAME_BLANK, "");
    want_line(&f, 0, FRAME_BLANK, "  \t");
    want_line(&f, 0, FRAME_LINE, "cd");
    want_kind(&f, 0, FRAME_MORE); /* "last" waits for its newline... */
    want_line(&f, 1, FRAME_LINE, "last"); /* ...or for EOF */
    want_kind(&f, 1, FRAME_MORE);
    frame_close(&f);
}

static void line_length_limit(void **state)
{
    (void)state;
    frame_t f;
    frame_init(&f, MAXL);
    char ok[MAXL + 2], cr[MAXL + 3];
    memset(ok, 'a', MAXL);
    ok[MAXL] = '\n';
    ok[MAXL + 1] = 0;
    feed(&f, ok, MAXL + 1);
    ok[MAXL] = 0;
    want_line(&f, 0, FRAME_LINE, ok); /* exactly max_line: a line */
    /* max_line bytes and a "\r": the limit counts the "\r" */
    memset(cr, 'b', MAXL);
    memcpy(cr + MAXL, "\r\n", 3);
    feed(&f, cr, MAXL + 2);
    want_kind(&f, 0, FRAME_TOO_LONG);
    want_kind(&f, 0, FRAME_MORE); /* the stream has ended */
    frame_close(&f);

    /* An unterminated run longer than max_line is too long before its newline comes. */
    frame_init(&f, MAXL);
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
    frame_init(&f, MAXL);
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
    frame_init(&f, MAXL);
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
    frame_init(&f, MAXL);
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
    frame_init(&f, MAXL);
    /* Many short lines through many reads: the buffer never outgrows its limit. */
    for (int i = 0; i < 50000; i++) {
        feed(&f, "0123456789\n", 11);
        want_line(&f, 0, FRAME_LINE, "0123456789");
        assert_true(f.cap <= MAXL + FRAME_READ_CHUNK + 2 || f.cap == FRAME_IN_START);
    }
    frame_close(&f);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(lines_and_blanks),     cmocka_unit_test(line_length_limit),
        cmocka_unit_test(bulk_across_reads),    cmocka_unit_test(bulk_truncated_at_eof),
        cmocka_unit_test(parked_line_comes_back), cmocka_unit_test(buffer_stays_bounded),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
