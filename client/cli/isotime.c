/*
 * isotime.c - reads the times a plant's historian writes: ISO-8601 with a
 * zone, or epoch seconds or milliseconds, into seconds since 1970 (UTC).
 *
 * `worth feed` reads a time per sample; `rollback --exclude-time` and
 * `events --since` take one on the command line.  The grammar is the
 * extended form of ISO-8601 that exports use (RFC 3339 and a little more):
 * a date YYYY-MM-DD, 'T' or a space, hh:mm with optional seconds and
 * fraction ('.' or ','), and a zone that must be there: Z, +hh:mm, +hhmm or
 * +hh.  A time without a zone is refused, not guessed: local time repeats an
 * hour on the day the clocks go back, and a guess there is silently wrong.
 * Everything is checked (month 1..12, the day within its month and leap
 * year, hour 0..23, minute and second 0..59), each failure with a message
 * naming the field.  Hour 24 (ISO 8601:2004's end of day) is refused: it
 * names the same instant as 00:00 of the next day and would give a sample
 * two spellings.  Second 60 is refused: epoch seconds have no leap second.
 *
 * The instant is computed exactly in integer microseconds and divided once
 * by 1e6, so the double is the correctly rounded value, the same that
 * Python's datetime.timestamp() gives (tests/client/test_isotime_python.py
 * holds the two side by side); XXX: exact only while the microseconds fit a
 * double's 53 bits, i.e. within about 285 years of 1970.  No state, no
 * allocation; any thread.
 */
#include "isotime.h"

#include <errno.h>
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

/* Days before each month in a common year. */
static const int month_start[12] = {0, 31, 59, 90, 120, 151, 181, 212, 243, 273, 304, 334};
static const char *const month_name[12] = {"January",   "February", "March",    "April",
                                           "May",       "June",     "July",     "August",
                                           "September", "October",  "November", "December"};

static int is_leap(long y)
{
    return (y % 4 == 0 && y % 100 != 0) || y % 400 == 0;
}

static int month_days(long y, int m)
{
    static const int n[12] = {31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31};
    return m == 2 && is_leap(y) ? 29 : n[m - 1];
}

/* Days from 1970-01-01 to y-m-d (y 1..9999): days since 0001-01-01 less those to 1970. */
static int64_t days_since_epoch(long y, int m, int d)
{
    int64_t p = y - 1;
    int64_t days = p * 365 + p / 4 - p / 100 + p / 400;
    days += month_start[m - 1] + (m > 2 && is_leap(y)) + (d - 1);
    return days - 719162; /* 0001-01-01 .. 1970-01-01 */
}

/* n decimal digits at s into *out; 0, or -1 when any of them is not a digit. */
static int digits(const char *s, int n, int *out)
{
    int v = 0;
    for (int i = 0; i < n; i++) {
        if (s[i] < '0' || s[i] > '9')
            return -1;
        v = v * 10 + (s[i] - '0');
    }
    *out = v;
    return 0;
}

#define FAIL(...) (snprintf(err, errlen, __VA_ARGS__), -1)

int isotime_parse(const char *s, double *t_s, char *err, size_t errlen)
{
    char dummy[8];
    if (!err || !errlen) {
        err = dummy;
        errlen = sizeof dummy;
    }
    int y, mo, d, h, mi, sec = 0;
    const char *p = s;
    if (digits(p, 4, &y) || p[4] != '-' || digits(p + 5, 2, &mo) || p[7] != '-' ||
        digits(p + 8, 2, &d)) {
        if (strlen(s) >= 8 && digits(s, 8, &y) == 0)
            return FAIL("not an ISO-8601 time: write the date as YYYY-MM-DD (the basic form "
                        "YYYYMMDD is not read)");
        return FAIL("not an ISO-8601 time: expected YYYY-MM-DDThh:mm:ss and a zone");
    }
    if (y < 1)
        return FAIL("year 0000 is not a calendar year");
    if (mo < 1 || mo > 12)
        return FAIL("month %02d is not 1..12", mo);
    if (d < 1 || d > month_days(y, mo)) {
        if (mo == 2 && d == 29)
            return FAIL("%04d-02-29: %04d is not a leap year", y, y);
        return FAIL("%s has no day %02d", month_name[mo - 1], d);
    }
    p += 10;
    if (!*p)
        return FAIL("a date without a time: give hh:mm and a zone (e.g. %.10sT00:00Z)", s);
    if (*p != 'T' && *p != ' ')
        return FAIL("expected 'T' or a space between the date and the time");
    p++;
    if (digits(p, 2, &h) || p[2] != ':' || digits(p + 3, 2, &mi))
        return FAIL("expected the time as hh:mm or hh:mm:ss after the date");
    p += 5;
    int64_t us = 0;
    if (*p == ':') {
        if (digits(p + 1, 2, &sec))
            return FAIL("expected two digits of seconds after hh:mm:");
        p += 3;
        if (*p == '.' || *p == ',') {
            p++;
            int n = 0;
            /* Digits beyond the sixth (below a microsecond) are dropped, as Python's are. */
            for (; *p >= '0' && *p <= '9'; p++, n++)
                if (n < 6)
                    us = us * 10 + (*p - '0');
            if (n == 0)
                return FAIL("a decimal point without digits in the seconds");
            for (int k = n; k < 6; k++)
                us *= 10;
        }
    }
    if (h == 24)
        return FAIL("hour 24 is not read: write 00:00 of the next day");
    if (h > 23)
        return FAIL("hour %02d is not 0..23", h);
    if (mi > 59)
        return FAIL("minute %02d is not 0..59", mi);
    if (sec == 60)
        return FAIL("second 60 (a leap second) has no epoch second of its own");
    if (sec > 59)
        return FAIL("second %02d is not 0..59", sec);
    int off_s = 0;
    if (*p == 'Z') {
        p++;
    } else if (*p == '+' || *p == '-') {
        int sign = *p == '-' ? -1 : 1, oh, om = 0;
        p++;
        if (digits(p, 2, &oh))
            return FAIL("expected the offset as +hh:mm, +hhmm or +hh");
        p += 2;
        if (*p == ':') {
            if (digits(p + 1, 2, &om))
                return FAIL("expected two digits of minutes in the offset");
            p += 3;
        } else if (*p >= '0' && *p <= '9') {
            if (digits(p, 2, &om))
                return FAIL("expected the offset as +hh:mm, +hhmm or +hh");
            p += 2;
        }
        if (oh > 23 || om > 59)
            return FAIL("offset %c%02d:%02d is not within -23:59..+23:59", sign < 0 ? '-' : '+', oh,
                        om);
        off_s = sign * (oh * 3600 + om * 60);
    } else if (!*p) {
        return FAIL("no time zone: add Z or an offset such as +01:00 (a local time is "
                    "ambiguous on the day the clocks go back)");
    } else {
        return FAIL("unexpected text after the time: expected Z or an offset such as +01:00");
    }
    if (*p)
        return FAIL("unexpected text after the zone");
    int64_t secs = days_since_epoch(y, mo, d) * 86400 + h * 3600 + mi * 60 + sec - off_s;
    *t_s = (double)(secs * 1000000 + us) / 1e6;
    return 0;
}

enum isotime_kind isotime_classify(const char *s, int decimal_comma, double *value, char *err,
                                   size_t errlen)
{
    char buf[64];
    size_t n = strlen(s);
    if (n == 0) {
        snprintf(err, errlen, "empty, a time is needed");
        return ISOTIME_NONE;
    }
    /* A number: digits, sign, point, exponent only (so "2026-12-01..." never reads as 2026). */
    if (n < sizeof buf && strspn(s, "0123456789+-.,eE") == n && strchr("0123456789+-.,", s[0])) {
        memcpy(buf, s, n + 1);
        int ok = 1;
        if (decimal_comma) {
            if (strchr(buf, '.'))
                ok = 0;
            for (char *q = buf; *q; q++)
                if (*q == ',')
                    *q = '.';
        } else if (strchr(buf, ',')) {
            ok = 0;
        }
        char *end;
        errno = 0;
        double v = ok ? strtod(buf, &end) : 0;
        if (ok && end != buf && !*end && isfinite(v) && errno != ERANGE) {
            *value = v;
            if (v >= ISOTIME_MIN_S && v < ISOTIME_MAX_S)
                return ISOTIME_S;
            if (v >= ISOTIME_MIN_S * 1000 && v < ISOTIME_MAX_S * 1000)
                return ISOTIME_MS;
            return ISOTIME_NUMBER;
        }
        /* Not a number after all: an ISO date starts with digits and '-' too. */
    }
    if (isotime_parse(s, value, err, errlen) == 0)
        return ISOTIME_ISO;
    return ISOTIME_NONE;
}

void isotime_format(double t_s, char *buf, size_t len)
{
    if (!isfinite(t_s) || fabs(t_s) > 2.5e11) {
        snprintf(buf, len, "%.17g", t_s);
        return;
    }
    double whole = floor(t_s);
    long us = lround((t_s - whole) * 1e6);
    if (us >= 1000000) {
        whole += 1;
        us -= 1000000;
    }
    int64_t secs = (int64_t)whole;
    int64_t days = secs >= 0 ? secs / 86400 : -((-secs + 86399) / 86400);
    int64_t rem = secs - days * 86400;
    /* The year: step from 1970 by whole years (at most a few thousand steps). */
    long y = 1970;
    for (;;) {
        int64_t len_y = is_leap(y) ? 366 : 365;
        if (days < 0) {
            y--;
            days += is_leap(y) ? 366 : 365;
        } else if (days >= len_y) {
            days -= len_y;
            y++;
        } else {
            break;
        }
    }
    int m = 1;
    while (days >= month_days(y, m)) {
        days -= month_days(y, m);
        m++;
    }
    int h = (int)(rem / 3600), mi = (int)(rem / 60 % 60), s = (int)(rem % 60);
    if (us)
        snprintf(buf, len, "%04ld-%02d-%02dT%02d:%02d:%02d.%06ldZ", y, m, (int)days + 1, h, mi, s,
                 us);
    else
        snprintf(buf, len, "%04ld-%02d-%02dT%02d:%02d:%02dZ", y, m, (int)days + 1, h, mi, s);
}
