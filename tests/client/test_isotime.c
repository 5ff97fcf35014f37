/*
 * test_isotime.c - client/cli/isotime: ISO-8601 times with a zone, epoch
 * seconds and milliseconds, and the refusals, each with its message.
 *
 * The epoch values below are computed by hand from the calendar (days since
 * 1970-01-01 times 86400, less the offset); test_isotime_python.py checks
 * the same parser against Python's datetime.fromisoformat on many more
 * strings, DST change days included.
 */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <string.h>

#include <cmocka.h>

#include "isotime.h"

static double parse_ok(const char *s)
{
    char err[256] = "";
    double t = NAN;
    int rc = isotime_parse(s, &t, err, sizeof err);
    if (rc != 0)
        fail_msg("\"%s\" refused: %s", s, err);
    return t;
}

/* The string is refused with a message holding needle. */
static void parse_bad(const char *s, const char *needle)
{
    char err[256] = "";
    double t = 12345;
    int rc = isotime_parse(s, &t, err, sizeof err);
    if (rc == 0)
        fail_msg("\"%s\" accepted as %.17g, expected a refusal (%s)", s, t, needle);
    if (!strstr(err, needle))
        fail_msg("\"%s\": message \"%s\" lacks \"%s\"", s, err, needle);
    assert_true(t == 12345); /* nothing written on failure */
}

static void epoch_and_known_instants(void **state)
{
    (void)state;
    assert_true(parse_ok("1970-01-01T00:00:00Z") == 0.0);
    assert_true(parse_ok("1970-01-02T00:00:00Z") == 86400.0);
    /* 2026-12-01: 20788 days after 1970-01-01 (56 years, 14 leap days, 334 days of 2026). */
    assert_true(parse_ok("2026-12-01T00:00:00Z") == 20788.0 * 86400);
    assert_true(parse_ok("2026-12-01T12:00:00Z") == 1796126400.0);
    assert_true(parse_ok("2026-12-01 12:00:00Z") == 1796126400.0);
    assert_true(parse_ok("2026-12-01T12:00Z") == 1796126400.0);
    assert_true(parse_ok("1969-12-31T23:59:59Z") == -1.0);
    assert_true(parse_ok("2000-03-01T00:00:00Z") == 951868800.0);
}

static void offsets_in_every_spelling(void **state)
{
    (void)state;
    double z = parse_ok("2026-12-01T11:00:00Z");
    assert_true(parse_ok("2026-12-01T12:00:00+01:00") == z);
    assert_true(parse_ok("2026-12-01T12:00:00+0100") == z);
    assert_true(parse_ok("2026-12-01T12:00:00+01") == z);
    assert_true(parse_ok("2026-12-01T05:30:00-05:30") == z);
    assert_true(parse_ok("2026-12-01T11:00:00-00:00") == z);
    assert_true(parse_ok("2026-12-02T10:59:00+23:59") == z);
}

static void fractions(void **state)
{
    (void)state;
    double base = parse_ok("2026-12-01T12:00:00Z");
    assert_true(parse_ok("2026-12-01T12:00:00.5Z") == base + 0.5);
    assert_true(parse_ok("2026-12-01T12:00:00,5Z") == base + 0.5);
    assert_true(parse_ok("2026-12-01T12:00:00.250+00:00") == base + 0.25);
    /* beyond the sixth digit: dropped */
    assert_true(parse_ok("2026-12-01T12:00:00.1234569Z") ==
                parse_ok("2026-12-01T12:00:00.123456Z"));
    assert_true(parse_ok("2026-12-01T12:00:00.000001Z") == (1796126400.0 * 1e6 + 1) / 1e6);
}

static void dst_change_days_in_berlin(void **state)
{
    (void)state;
    /* 2026-03-29: 02:00 CET becomes 03:00 CEST; one second apart across the change. */
    double a = parse_ok("2026-03-29T01:59:59+01:00"), b = parse_ok("2026-03-29T03:00:00+02:00");
    assert_true(b - a == 1.0);
    assert_true(b == parse_ok("2026-03-29T01:00:00Z"));
    /* 2026-10-25: 03:00 CEST becomes 02:00 CET; 02:30 happens twice, an hour apart. */
    double c = parse_ok("2026-10-25T02:30:00+02:00"), d = parse_ok("2026-10-25T02:30:00+01:00");
    assert_true(d - c == 3600.0);
    assert_true(c == parse_ok("2026-10-25T00:30:00Z"));
}

static void leap_years(void **state)
{
    (void)state;
    assert_true(parse_ok("2024-02-29T00:00:00Z") + 86400 == parse_ok("2024-03-01T00:00:00Z"));
    assert_true(parse_ok("2000-02-29T00:00:00Z") + 86400 == parse_ok("2000-03-01T00:00:00Z"));
    parse_bad("2026-02-29T00:00:00Z", "2026 is not a leap year");
    parse_bad("2100-02-29T00:00:00Z", "2100 is not a leap year");
    parse_bad("2026-02-30T00:00:00Z", "February has no day 30");
    parse_bad("2026-04-31T00:00:00Z", "April has no day 31");
    parse_bad("2026-01-00T00:00:00Z", "January has no day 00");
}

static void refusals_name_their_field(void **state)
{
    (void)state;
    parse_bad("2026-13-01T00:00:00Z", "month 13");
    parse_bad("2026-00-01T00:00:00Z", "month 00");
    parse_bad("2026-12-01T24:00:00Z", "hour 24 is not read");
    parse_bad("2026-12-01T25:00:00Z", "hour 25");
    parse_bad("2026-12-01T12:60:00Z", "minute 60");
    parse_bad("2026-12-31T23:59:60Z", "leap second");
    parse_bad("2026-12-01T12:00:00", "no time zone");
    parse_bad("2026-12-01", "a date without a time");
    parse_bad("20261201T120000Z", "basic form");
    parse_bad("2026-12-01T12:00:00+24:00", "offset +24:00");
    parse_bad("2026-12-01T12:00:00+01:60", "offset +01:60");
    parse_bad("2026-12-01T12:00:00.Z", "without digits");
    parse_bad("2026-12-01T12:00:00 Z", "unexpected text");
    parse_bad("2026-12-01T12:00:00Zx", "unexpected text after the zone");
    parse_bad("2026-12-01T12:00:00z", "unexpected text");
    parse_bad("2026-12-01x12:00:00Z", "'T' or a space");
    parse_bad("2026-12-01T1:00:00Z", "hh:mm");
    parse_bad("0000-01-01T00:00:00Z", "year 0000");
    parse_bad("yesterday", "not an ISO-8601 time");
    parse_bad("", "not an ISO-8601 time");
}

static void classify_numbers_and_iso(void **state)
{
    (void)state;
    char err[256];
    double v;
    assert_int_equal(isotime_classify("1796126400", 0, &v, err, sizeof err), ISOTIME_S);
    assert_true(v == 1796126400.0);
    assert_int_equal(isotime_classify("1796126400.5", 0, &v, err, sizeof err), ISOTIME_S);
    assert_int_equal(isotime_classify("1796126400500", 0, &v, err, sizeof err), ISOTIME_MS);
    assert_true(v == 1796126400500.0);
    /* seconds and milliseconds of 1990..2100 do not overlap: 4.1e9 < 6.3e11 */
    assert_int_equal(isotime_classify("631152000", 0, &v, err, sizeof err), ISOTIME_S);
    assert_int_equal(isotime_classify("631151999", 0, &v, err, sizeof err), ISOTIME_NUMBER);
    assert_int_equal(isotime_classify("4102444800", 0, &v, err, sizeof err), ISOTIME_NUMBER);
    assert_int_equal(isotime_classify("631152000000", 0, &v, err, sizeof err), ISOTIME_MS);
    assert_int_equal(isotime_classify("60", 0, &v, err, sizeof err), ISOTIME_NUMBER);
    assert_int_equal(isotime_classify("1796126400,5", 1, &v, err, sizeof err), ISOTIME_S);
    assert_true(v == 1796126400.5);
    assert_int_equal(isotime_classify("1796126400,5", 0, &v, err, sizeof err), ISOTIME_NONE);
    assert_int_equal(isotime_classify("1796126400.5", 1, &v, err, sizeof err), ISOTIME_NONE);
    assert_int_equal(isotime_classify("2026-12-01T12:00:00+01:00", 0, &v, err, sizeof err),
                     ISOTIME_ISO);
    assert_true(v == 1796122800.0);
    assert_int_equal(isotime_classify("2026-12-01T12:00:00", 0, &v, err, sizeof err), ISOTIME_NONE);
    assert_non_null(strstr(err, "no time zone"));
    assert_int_equal(isotime_classify("", 0, &v, err, sizeof err), ISOTIME_NONE);
    assert_int_equal(isotime_classify("nan", 0, &v, err, sizeof err), ISOTIME_NONE);
    assert_int_equal(isotime_classify("1e400", 0, &v, err, sizeof err), ISOTIME_NONE);
}

static void format_round_trips(void **state)
{
    (void)state;
    static const char *const s[] = {"1970-01-01T00:00:00Z",        "2026-12-01T12:00:00Z",
                                    "2024-02-29T23:59:59.500000Z", "1969-12-31T23:59:59Z",
                                    "2099-12-31T23:59:59Z",        "2000-03-01T00:00:00.000001Z"};
    for (size_t i = 0; i < sizeof s / sizeof s[0]; i++) {
        char buf[64];
        isotime_format(parse_ok(s[i]), buf, sizeof buf);
        assert_string_equal(buf, s[i]);
    }
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(epoch_and_known_instants),
        cmocka_unit_test(offsets_in_every_spelling),
        cmocka_unit_test(fractions),
        cmocka_unit_test(dst_change_days_in_berlin),
        cmocka_unit_test(leap_years),
        cmocka_unit_test(refusals_name_their_field),
        cmocka_unit_test(classify_numbers_and_iso),
        cmocka_unit_test(format_round_trips),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
