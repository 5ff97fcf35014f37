/*
 * isotime.h - plant time as people and historians write it: ISO-8601 date
 * and time with a zone, or epoch seconds or milliseconds, read into seconds
 * since 1970 (UTC), the protocol's `t`.  Internal to the CLI; no state.
 */
#ifndef WORTH_CLI_ISOTIME_H
#define WORTH_CLI_ISOTIME_H

#include <stddef.h>

/* Plausible plant times, as seconds since 1970: 1990-01-01 .. 2100-01-01 (UTC). */
#define ISOTIME_MIN_S 631152000.0
#define ISOTIME_MAX_S 4102444800.0

/* What a time cell holds (isotime_classify). */
enum isotime_kind {
    ISOTIME_NONE = 0, /* not a time: the reason is in err */
    ISOTIME_ISO,      /* an ISO-8601 date and time with a zone */
    ISOTIME_S,        /* a number, plausible as seconds since 1970 */
    ISOTIME_MS,       /* a number, plausible as milliseconds since 1970 */
    ISOTIME_NUMBER,   /* a number plausible as neither (e.g. a simulation's own clock) */
};

/*
 * Parses s (borrowed, NUL-terminated, no surrounding blanks) as
 *   YYYY-MM-DD (T | space) hh:mm[:ss[(.|,)digits]] zone
 *   zone = Z | (+|-)hh:mm | (+|-)hhmm | (+|-)hh
 * into *t_s, seconds since 1970 UTC.  Rejected, with the reason in err
 * (errlen bytes): other forms (basic YYYYMMDD, week or ordinal dates, a date
 * or hour alone), a time without a zone (a local time is ambiguous on the day
 * the clocks go back), month 13, 30 February, hour 24 (write 00:00 of the
 * next day), second 60 (a leap second has no epoch second of its own), an
 * offset of 24 h or more.  Digits of a second beyond the sixth are dropped,
 * as Python's datetime does.  Returns 0 or -1.
 */
int isotime_parse(const char *s, double *t_s, char *err, size_t errlen);

/*
 * What kind of time the cell s holds, and its value: seconds since 1970 for
 * ISOTIME_ISO and ISOTIME_S, milliseconds for ISOTIME_MS, the number itself
 * for ISOTIME_NUMBER.  decimal_comma: a number may use ',' for its decimal
 * point (and must not hold '.').  A cell that is neither a finite number nor
 * a valid ISO-8601 time is ISOTIME_NONE with the reason in err.
 */
enum isotime_kind isotime_classify(const char *s, int decimal_comma, double *value, char *err,
                                   size_t errlen);

/* Formats t_s (seconds since 1970) as "YYYY-MM-DDThh:mm:ss[.ffffff]Z" into buf. */
void isotime_format(double t_s, char *buf, size_t len);

#endif /* WORTH_CLI_ISOTIME_H */
