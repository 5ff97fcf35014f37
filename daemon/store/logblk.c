/*
 * logblk.c - encoding and decoding one block of the transition log (logblk.h).
 *
 * Any thread; pure.  The encoder runs on the writer thread inside its turn:
 * it writes into a buffer allocated once for the largest block, so the log
 * allocates nothing per transition.  The decoder runs where the log is read
 * back (recovery, a rollback's replay, retention): it checks every record's
 * CRC, flags and size before a byte of it is used, so a damaged block names
 * its first damaged transition and never reaches the model.
 */
#include "store/logblk.h"

#include <assert.h>
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "common/mem.h"
#include "learn/ser.h"

#if !defined(__BYTE_ORDER__) || __BYTE_ORDER__ != __ORDER_LITTLE_ENDIAN__
#error "logblk.c stores float64 and u32 by memcpy: a little-endian target is assumed"
#endif

/* Bytes a record can take at most. */
static size_t rec_max(size_t dims)
{
    return 4 + 1 + 3 * 8 + 1 + MODEL_NAME_MAX + 2 * dims * sizeof(double);
}

void logblk_enc_init(logblk_enc_t *e, size_t max_dims)
{
    memset(e, 0, sizeof *e);
    e->max_dims = max_dims;
    e->cap = LOGBLK_MAX * rec_max(max_dims);
    e->b = mem_alloc(e->cap);
    logblk_enc_reset(e, max_dims);
}

void logblk_enc_free(logblk_enc_t *e)
{
    mem_free(e->b);
    e->b = NULL;
}

void logblk_enc_reset(logblk_enc_t *e, size_t dims)
{
    assert(dims <= e->max_dims);
    e->dims = dims;
    e->len = e->n = e->open = 0;
    e->first = 0;
    e->t_lo = e->t_hi = NAN;
    e->untimed = 0;
}

static void put(logblk_enc_t *e, const void *p, size_t n)
{
    memcpy(e->b + e->len, p, n);
    e->len += n;
}

/* Writes the CRC of the open record (the one at e->open, running to e->len). */
static void close_open(logblk_enc_t *e)
{
    uint32_t c = ser_crc32(e->b + e->open + 4, e->len - e->open - 4);
    memcpy(e->b + e->open, &c, 4);
}

int logblk_enc_add(logblk_enc_t *e, const logblk_rec_t *r)
{
    size_t vb = e->dims * sizeof(double);
    if (e->n == LOGBLK_MAX || (e->n && r->seq != e->first + e->n))
        return -1;
    if (e->n) {
        /* The open record's x_next is this x: keep it once. */
        uint8_t *prev = e->b + e->open;
        if (!(prev[4] & LOGBLK_TERMINAL) && memcmp(e->b + e->len - vb, r->x, vb) == 0) {
            prev[4] |= LOGBLK_XN_NEXT;
            e->len -= vb;
        }
        close_open(e);
    } else {
        e->first = r->seq;
    }
    e->open = e->len;
    size_t sl = r->src ? strlen(r->src) : 0;
    if (sl > MODEL_NAME_MAX)
        sl = MODEL_NAME_MAX; /* the loop never admits a longer one */
    uint8_t flags = (r->terminal ? LOGBLK_TERMINAL : 0) | (isnan(r->t) ? 0 : LOGBLK_T) |
                    (isnan(r->dt) ? 0 : LOGBLK_DT) | (sl ? LOGBLK_SOURCE : 0);
    uint32_t crc = 0;
    put(e, &crc, 4);
    put(e, &flags, 1);
    put(e, &r->r, 8);
    if (!isnan(r->t)) {
        put(e, &r->t, 8);
        if (isnan(e->t_lo) || r->t < e->t_lo)
            e->t_lo = r->t;
        if (isnan(e->t_hi) || r->t > e->t_hi)
            e->t_hi = r->t;
    } else {
        e->untimed++;
    }
    if (!isnan(r->dt))
        put(e, &r->dt, 8);
    if (sl) {
        uint8_t n = (uint8_t)sl;
        put(e, &n, 1);
        put(e, r->src, sl);
    }
    put(e, r->x, vb);
    if (!r->terminal)
        put(e, r->xn, vb);
    e->n++;
    return 0;
}

void logblk_enc_finish(logblk_enc_t *e)
{
    if (e->n)
        close_open(e);
}

logblk_dec_t *logblk_dec_new(size_t dims)
{
    logblk_dec_t *d = mem_calloc(1, sizeof *d);
    d->dims = dims;
    d->v = mem_alloc((LOGBLK_MAX * 2 * (dims ? dims : 1)) * sizeof(double));
    return d;
}

void logblk_dec_free(logblk_dec_t *d)
{
    if (!d)
        return;
    mem_free(d->v);
    mem_free(d);
}

static int bad_rec(uint64_t seq, uint64_t *bad, char *why, size_t len, const char *what)
{
    *bad = seq;
    snprintf(why, len, "%s", what);
    return -1;
}

int logblk_decode(logblk_dec_t *d, const void *data, size_t len, uint64_t first, uint64_t last,
                  uint64_t *bad, char *why, size_t whylen)
{
    const uint8_t *p = data, *end = p + len;
    size_t vb = d->dims * sizeof(double);
    d->n = 0;
    if (last < first || last - first >= LOGBLK_MAX)
        return bad_rec(first, bad, why, whylen, "its block's seq range is not 1..1024 records");
    size_t want = (size_t)(last - first) + 1;
    int pending = 0; /* the previous record's x_next is this one's x */
    for (size_t i = 0; i < want; i++) {
        uint64_t seq = first + i;
        if (end - p < 13)
            return bad_rec(seq, bad, why, whylen, "its block ends before the record");
        uint32_t crc;
        memcpy(&crc, p, 4);
        uint8_t flags = p[4];
        if (flags & ~LOGBLK_FLAGS)
            return bad_rec(seq, bad, why, whylen, "its record has unknown flags");
        size_t n = 5 + 8 + ((flags & LOGBLK_T) ? 8 : 0) + ((flags & LOGBLK_DT) ? 8 : 0);
        size_t sl = 0;
        if (flags & LOGBLK_SOURCE) {
            if ((size_t)(end - p) < n + 1)
                return bad_rec(seq, bad, why, whylen, "its block ends inside the record");
            sl = p[n];
            if (sl == 0 || sl > MODEL_NAME_MAX)
                return bad_rec(seq, bad, why, whylen, "its record's source length is wrong");
            n += 1 + sl;
        }
        int terminal = (flags & LOGBLK_TERMINAL) != 0;
        int xn_next = (flags & LOGBLK_XN_NEXT) != 0;
        if (xn_next && (terminal || i + 1 == want))
            return bad_rec(seq, bad, why, whylen,
                           "its record's x_next refers to a next record it cannot have");
        size_t body = n + vb + ((terminal || xn_next) ? 0 : vb);
        if ((size_t)(end - p) < body)
            return bad_rec(seq, bad, why, whylen, "its block ends inside the record");
        if (ser_crc32(p + 4, body - 4) != crc)
            return bad_rec(seq, bad, why, whylen, "its record fails its CRC-32");
        const uint8_t *q = p + 13;
        d->rec[i].r = 0;
        memcpy(&d->rec[i].r, p + 5, 8);
        d->rec[i].t = NAN;
        d->rec[i].dt = NAN;
        if (flags & LOGBLK_T) {
            memcpy(&d->rec[i].t, q, 8);
            q += 8;
        }
        if (flags & LOGBLK_DT) {
            memcpy(&d->rec[i].dt, q, 8);
            q += 8;
        }
        if (sl) {
            memcpy(d->rec[i].src, q + 1, sl);
            q += 1 + sl;
        }
        d->rec[i].src[sl] = '\0';
        if (memchr(d->rec[i].src, '\0', sl))
            return bad_rec(seq, bad, why, whylen, "its record's source holds a NUL byte");
        d->rec[i].terminal = terminal;
        double *x = d->v + 2 * d->dims * i;
        memcpy(x, q, vb);
        q += vb;
        if (pending)
            memcpy(x - d->dims, x, vb); /* the previous record's x_next */
        if (!terminal && !xn_next)
            memcpy(x + d->dims, q, vb);
        pending = xn_next;
        p += body;
    }
    if (p != end)
        return bad_rec(last, bad, why, whylen, "its block holds bytes after its last record");
    d->n = want;
    return 0;
}
