/*
 * ser.h - little-endian byte encoding for estimator state.
 *
 * Estimator state is stored as a byte buffer, never as JSON text: doubles are
 * written as their IEEE-754 bits so that a restore is bit-exact.  A writer
 * with buf == NULL only counts, which is how a caller sizes the buffer.  A
 * reader never reads past its end: it sets err and returns zeros instead.
 */
#ifndef WORTH_SER_H
#define WORTH_SER_H

#include <stddef.h>
#include <stdint.h>

/* Plain data.  buf may be NULL to count only; len keeps counting past cap. */
typedef struct ser_w {
    uint8_t *buf;
    size_t cap;
    size_t len;
} ser_w;

/* Plain data over a borrowed buffer.  err becomes 1 on any read past the end. */
typedef struct ser_r {
    const uint8_t *buf;
    size_t len;
    size_t pos;
    int err;
} ser_r;

void ser_put_u32(ser_w *w, uint32_t v);
void ser_put_u64(ser_w *w, uint64_t v);
void ser_put_f64(ser_w *w, double v);
/* Writes n doubles from v (borrowed). */
void ser_put_f64v(ser_w *w, const double *v, size_t n);
/* Writes n raw bytes from p (borrowed). */
void ser_put_bytes(ser_w *w, const void *p, size_t n);
/* Returns 1 when everything written so far fitted in cap. */
int ser_fits(const ser_w *w);

uint32_t ser_get_u32(ser_r *r);
uint64_t ser_get_u64(ser_r *r);
double ser_get_f64(ser_r *r);
/* Reads n doubles into v (borrowed, caller-sized). */
void ser_get_f64v(ser_r *r, double *v, size_t n);
/* Reads n raw bytes into p. */
void ser_get_bytes(ser_r *r, void *p, size_t n);

/* Returns the CRC-32 (zlib's polynomial) of n bytes at p. */
uint32_t ser_crc32(const void *p, size_t n);

#endif /* WORTH_SER_H */
