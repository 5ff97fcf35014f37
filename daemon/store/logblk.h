/*
 * logblk.h - the byte layout of one block of the transition log: a run of
 * consecutive transitions of one model, stored as one row of log_blocks
 * (schema/006_blocks.sql).  Pure: no SQLite, no threads of its own.
 *
 * A block's data is its records back to back, each (little-endian):
 *   u32 crc     CRC-32 (zlib) of the record's bytes after this field
 *   u8  flags   LOGBLK_TERMINAL, _T, _DT, _SOURCE, _XN_NEXT
 *   f64 r
 *   f64 t       if _T
 *   f64 dt      if _DT
 *   u8 n, n bytes of source   if _SOURCE (1..MODEL_NAME_MAX bytes)
 *   f64 x[dims]
 *   f64 x_next[dims]          unless terminal or _XN_NEXT
 * _XN_NEXT says x_next is, bit for bit, the next record's x (a trajectory):
 * never on a terminal record nor on a block's last.  The seqs of a block are
 * first_seq, first_seq + 1, ... with no gap.
 */
#ifndef WORTH_LOGBLK_H
#define WORTH_LOGBLK_H

#include <stddef.h>
#include <stdint.h>

#include "learn/model.h"

/* The most records one block holds. */
#define LOGBLK_MAX 1024

/* Record flags. */
#define LOGBLK_TERMINAL 0x01u
#define LOGBLK_T        0x02u
#define LOGBLK_DT       0x04u
#define LOGBLK_SOURCE   0x08u
#define LOGBLK_XN_NEXT  0x10u
#define LOGBLK_FLAGS    0x1fu

/* One transition as logged; NAN t or dt when absent, "" source for the default. */
typedef struct logblk_rec_t {
    uint64_t seq;
    double r, t, dt;
    int terminal;
    const char *src;      /* borrowed; NUL-terminated */
    const double *x, *xn; /* borrowed; dims each, xn unused when terminal */
} logblk_rec_t;

/* A block being built (plain data; logblk_enc_init / logblk_enc_free). */
typedef struct logblk_enc_t {
    uint8_t *b; /* owned */
    size_t len, cap, dims, max_dims;
    size_t n;          /* records so far */
    uint64_t first;    /* seq of the first */
    double t_lo, t_hi; /* NAN until a record has a t */
    uint64_t untimed;  /* records without t */
    size_t open;       /* offset of the last record, whose CRC is not yet written */
} logblk_enc_t;

/* A block read back: n records, their vectors in v (2 * dims doubles a record). */
typedef struct logblk_dec_t {
    size_t n, dims;
    struct {
        double r, t, dt;
        int terminal;
        char src[MODEL_NAME_MAX + 1];
    } rec[LOGBLK_MAX];
    double *v; /* owned */
} logblk_dec_t;

/* Lifecycle */

/* Readies e for blocks of up to max_dims inputs (allocates their largest size once). */
void logblk_enc_init(logblk_enc_t *e, size_t max_dims);
void logblk_enc_free(logblk_enc_t *e);
/* Returns a decoder for blocks of dims inputs (owned: logblk_dec_free), never NULL. */
logblk_dec_t *logblk_dec_new(size_t dims);
void logblk_dec_free(logblk_dec_t *d);

/* Operate */

/* Empties e for a new block of dims inputs (at most its max_dims). */
void logblk_enc_reset(logblk_enc_t *e, size_t dims);
/*
 * Appends r (borrowed).  Returns 0, or -1 when it cannot go in this block
 * (full, or r->seq not the next seq): finish this one and start another.
 */
int logblk_enc_add(logblk_enc_t *e, const logblk_rec_t *r);
/* Closes the last record (its CRC); e->b[0, len) is then the block's data. */
void logblk_enc_finish(logblk_enc_t *e);
/*
 * Decodes data (len bytes) holding the records of seqs first..last into d.
 * Returns 0, or -1 with *bad (the seq of the first record that fails its CRC,
 * its flags or its size) and why.
 */
int logblk_decode(logblk_dec_t *d, const void *data, size_t len, uint64_t first, uint64_t last,
                  uint64_t *bad, char *why, size_t whylen);

#endif /* WORTH_LOGBLK_H */
