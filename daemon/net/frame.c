/*
 * frame.c - splits one connection's bytes into request lines and bulk
 * payloads (see frame.h).
 *
 * It owns the connection's input buffer and the buffer a bulk payload is
 * gathered in; both are reused for the connection's life, so framing a line
 * or a payload allocates nothing once they have reached their high-water
 * mark.  It runs on whichever thread owns the connection (worthd's loop
 * thread) and never calls out: the owner asks for the next event and says
 * when it has handled it.  This is what lets the fuzz target drive exactly
 * the framing the daemon uses, with the input split at any byte.
 *
 * Invariants.
 * 1. A line's bytes leave the buffer only at frame_consume, so an event the
 *    owner could not handle yet (parked) comes back unchanged.
 * 2. Bytes after a bulk header belong to the payload until it is complete;
 *    a payload cut short by EOF is reported, never handed over.
 * 3. The input buffer never exceeds max_line + FRAME_READ_CHUNK + 2 bytes,
 *    and an unterminated run of more than max_line bytes is TOO_LONG as soon
 *    as it is seen.
 * It must never: block, call the protocol, or allocate per line.
 */
#include "frame.h"

#include <string.h>

#include "mem.h"

void frame_init(frame_t *f, size_t max_line)
{
    memset(f, 0, sizeof *f);
    f->max_line = max_line;
    f->in = mem_alloc(FRAME_IN_START);
    f->cap = FRAME_IN_START;
    f->last = FRAME_MORE;
}

void frame_close(frame_t *f)
{
    mem_free(f->in);
    mem_free(f->bulk);
    f->in = NULL;
    f->bulk = NULL;
    f->len = f->off = f->cap = f->bulk_cap = 0;
}

void frame_reset(frame_t *f)
{
    f->len = f->off = f->pending = 0;
    f->bulk_need = f->bulk_have = 0;
    f->in_bulk = f->ended = 0;
    f->last = FRAME_MORE;
}

void frame_space(frame_t *f, char **buf, size_t *room)
{
    /* Move the unread bytes to the front when that makes room for a whole read. */
    if (f->off > 0 && (f->off == f->len || f->cap - f->len < FRAME_READ_CHUNK)) {
        memmove(f->in, f->in + f->off, f->len - f->off);
        f->len -= f->off;
        f->off = 0;
    }
    size_t limit = f->max_line + FRAME_READ_CHUNK + 2;
    if (f->cap - f->len < FRAME_READ_CHUNK && f->cap < limit) {
        size_t cap = f->cap * 2;
        if (cap > limit)
            cap = limit;
        f->in = mem_realloc(f->in, cap);
        f->cap = cap;
    }
    size_t r = f->cap - f->len;
    *buf = f->in + f->len;
    *room = r > FRAME_READ_CHUNK ? FRAME_READ_CHUNK : r;
}

void frame_filled(frame_t *f, size_t n)
{
    CHECK(n <= f->cap - f->len);
    f->len += n;
}

size_t frame_feed(frame_t *f, const void *data, size_t n)
{
    char *buf;
    size_t room;
    frame_space(f, &buf, &room);
    if (n > room)
        n = room;
    memcpy(buf, data, n);
    frame_filled(f, n);
    return n;
}

enum frame_kind frame_next(frame_t *f, int eof, frame_ev_t *ev)
{
    memset(ev, 0, sizeof *ev);
    f->last = FRAME_MORE;
    if (f->ended)
        return ev->kind = FRAME_MORE;
    if (f->in_bulk) {
        size_t take = f->bulk_need - f->bulk_have, avail = f->len - f->off;
        if (take > avail)
            take = avail;
        if (take) {
            memcpy(f->bulk + f->bulk_have, f->in + f->off, take);
            f->bulk_have += take;
            f->off += take;
        }
        if (f->bulk_have < f->bulk_need) {
            if (!eof)
                return ev->kind = FRAME_MORE;
            f->in_bulk = 0;
            f->ended = 1;
            ev->len = f->bulk_need;
            ev->got = f->bulk_have;
            return ev->kind = FRAME_TRUNCATED;
        }
        ev->data = f->bulk;
        ev->len = f->bulk_need;
        return f->last = ev->kind = FRAME_BULK;
    }
    char *start = f->in + f->off;
    size_t avail = f->len - f->off;
    char *nl = avail ? memchr(start, '\n', avail) : NULL;
    size_t len = nl ? (size_t)(nl - start) : avail;
    if (len > f->max_line) {
        f->ended = 1;
        return ev->kind = FRAME_TOO_LONG;
    }
    if (!nl && !(eof && avail > 0))
        return ev->kind = FRAME_MORE; /* wait for the rest of the line */
    f->pending = nl ? len + 1 : len;
    if (len > 0 && start[len - 1] == '\r')
        len--;
    int blank = 1;
    for (size_t i = 0; i < len && blank; i++)
        blank = start[i] == ' ' || start[i] == '\t';
    ev->line = start;
    ev->len = len;
    return f->last = ev->kind = blank ? FRAME_BLANK : FRAME_LINE;
}

void frame_consume(frame_t *f)
{
    switch (f->last) {
    case FRAME_LINE:
    case FRAME_BLANK:
        f->off += f->pending;
        f->pending = 0;
        break;
    case FRAME_BULK:
        f->in_bulk = 0;
        break;
    default:
        CHECK(!"frame_consume without an event to consume");
    }
    f->last = FRAME_MORE;
}

void frame_expect_bulk(frame_t *f, size_t nbytes)
{
    CHECK(f->last == FRAME_LINE && !f->in_bulk);
    f->in_bulk = 1;
    f->bulk_need = nbytes;
    f->bulk_have = 0;
    if (f->bulk_cap < nbytes) {
        mem_free(f->bulk);
        f->bulk = mem_alloc(nbytes);
        f->bulk_cap = nbytes;
    }
}

int frame_in_bulk(const frame_t *f)
{
    return f->in_bulk;
}
