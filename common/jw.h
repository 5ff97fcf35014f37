/*
 * jw.h - the one JSON writer: a growable text buffer and the few JSON forms
 * worth writes (numbers that round-trip, escaped strings, raw fragments).
 *
 * Used by worthd for every reply and event detail, by its writer thread and
 * by the client library for requests, so that escaping and number format are
 * the same everywhere: doubles with 17 significant digits (they read back as
 * the same double), non-finite ones as null; in strings '"' and '\\' are
 * escaped and bytes below 0x20 written \u00XX; every other byte is copied
 * (the protocol checks UTF-8 on input).  Plain data in the caller's storage;
 * not thread-safe.  Allocation goes through mem.h (aborts on exhaustion).
 */
#ifndef WORTH_JW_H
#define WORTH_JW_H

#include <stddef.h>

/* Plain data: the text so far, b[0..len) (NUL-terminated once anything was written). */
typedef struct jw_t {
    char *b;
    size_t len, cap;
} jw_t;

/* Lifecycle */

/* Starts an empty buffer (allocates nothing yet). */
void jw_init(jw_t *j);
/* Frees the buffer; j may be initialised again. */
void jw_close(jw_t *j);
/* Empties the text, keeping the memory (no allocation once at its high-water mark). */
void jw_reset(jw_t *j);
/* Makes room for `more` bytes beyond len (and a NUL). */
void jw_reserve(jw_t *j, size_t more);
/* Returns the text (owned by the caller, free with mem_free) and leaves j empty. */
char *jw_take(jw_t *j);

/* Write */

/* n bytes of s (borrowed) as they are. */
void jw_raw(jw_t *j, const char *s, size_t n);
/* The C string s as it is. */
void jw_lit(jw_t *j, const char *s);
/* printf into the buffer. */
void jw_fmt(jw_t *j, const char *fmt, ...) __attribute__((format(printf, 2, 3)));
/* A double: %.17g, or null when it is not finite. */
void jw_num(jw_t *j, double v);
/* The C string s as a JSON string literal. */
void jw_str(jw_t *j, const char *s);

#endif /* WORTH_JW_H */
