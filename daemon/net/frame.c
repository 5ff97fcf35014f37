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
 *    and an unterminated run of more than max_line bytes (not counting a
 *    final "\r", which belongs to the line end) is TOO_LONG as soon as it is
 *    seen.
 * 4. f->charged is what f holds in memory, or has reserved, and exactly that
 *    is charged to the budget: the input buffer's capacity, plus the bulk
 *    buffer's or, while a payload is announced, the whole payload's size.
 * It must never: block, call the protocol, or allocate per line.
 */
#include "net/frame.h"

#include <string.h>

#include "common/mem.h"

/* Charges or gives back the difference between what f holds and want; returns 0 or -1. */
static int recharge(frame_t *f, size_t want)
{
    if (want > f->charged) {
        if (budget_take(f->budget, want - f->charged) != 0)
            return -1;
    } else {
        budget_give(f->budget, f->charged - want);
    }
    f->charged = want;
    return 0;
}

int frame_init(frame_t *f, size_t max_line, budget_t *b)
{
    memset(f, 0, sizeof *f);
    f->max_line = max_line;
    f->last = FRAME_MORE;
    f->budget = b;
    if (budget_take(b, FRAME_IN_START) != 0) {
        f->budget = NULL;
        return -1;
    }
    f->charged = FRAME_IN_START;
    f->in = mem_alloc(FRAME_IN_START);
    f->cap = FRAME_IN_START;
    return 0;
}

void frame_close(frame_t *f)
{
    mem_free(f->in);
    mem_free(f->bulk);
    f->in = NULL;
    f->bulk = NULL;
    budget_give(f->budget, f->charged);
    f->charged = 0;
    f->len = f->off = f->cap = f->bulk_cap = 0;
}

void frame_reset(frame_t *f)
{
    f->len = f->off = f->pending = 0;
    f->bulk_need = f->bulk_have = 0;
    f->in_bulk = f->ended = f->starved = 0;
    f->skip = 0;
    f->last = FRAME_MORE;
    recharge(f, f->cap + f->bulk_cap); /* gives back a reservation; never takes */
}

/* What f must hold charged besides a reservation: both buffers' capacities. */
static size_t held(const frame_t *f)
{
    return f->cap + f->bulk_cap;
}

void frame_space(frame_t *f, char **buf, size_t *room)
{
    /* Move the unread bytes to the front when that makes room for a whole read. */
    if (f->off > 0 && (f->off == f->len || f->cap - f->len < FRAME_READ_CHUNK)) {
        memmove(f->in, f->in + f->off, f->len - f->off);
        f->len -= f->off;
        f->off = 0;
    }
    /* An empty buffer that a long line made large goes back to its first size. */
    if (f->len == 0 && f->cap > 4 * FRAME_IN_START && !f->in_bulk) {
        mem_free(f->in);
        f->in = mem_alloc(FRAME_IN_START);
        f->cap = FRAME_IN_START;
        recharge(f, held(f));
    }
    size_t limit = f->max_line + FRAME_READ_CHUNK + 2;
    if (f->cap - f->len < FRAME_READ_MIN && f->cap < limit) {
        size_t cap = f->cap * 2;
        if (cap > limit)
            cap = limit;
        size_t extra = f->in_bulk && f->bulk_need > f->bulk_cap ? f->bulk_need - f->bulk_cap : 0;
        if (recharge(f, cap + f->bulk_cap + extra) == 0) {
            f->in = mem_realloc(f->in, cap);
            f->cap = cap;
        }
    }
    size_t r = f->cap - f->len;
    f->starved = r == 0;
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
    if (n)
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
    if (f->skip) {
        size_t drop = f->len - f->off < f->skip ? f->len - f->off : f->skip;
        f->off += drop;
        f->skip -= drop;
        if (f->skip)
            return ev->kind = FRAME_MORE; /* at EOF too: the refusal has been answered */
    }
    if (f->in_bulk) {
        size_t take = f->bulk_need - f->bulk_have, avail = f->len - f->off;
        if (take > avail)
            take = avail;
        if (take) {
            if (f->bulk_have + take > f->bulk_cap) {
                /* Grow within the reservation: as the bytes arrive, never ahead of them. */
                size_t cap = f->bulk_cap ? 2 * f->bulk_cap : FRAME_IN_START;
                if (cap < f->bulk_have + take)
                    cap = f->bulk_have + take;
                if (cap > f->bulk_need)
                    cap = f->bulk_need;
                f->bulk = mem_realloc(f->bulk, cap);
                f->bulk_cap = cap;
            }
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
            recharge(f, held(f));
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
    /* The line's own bytes: a "\r" before its "\n" (or before EOF) is part of the line end. */
    size_t body = len > 0 && start[len - 1] == '\r' && (nl || eof) ? len - 1 : len;
    int too_long =
        nl || eof ? body > f->max_line
                  : len > f->max_line + 1 || (len == f->max_line + 1 && start[len - 1] != '\r');
    if (too_long) {
        f->ended = 1;
        return ev->kind = FRAME_TOO_LONG;
    }
    if (!nl && !(eof && avail > 0)) {
        if (f->starved && avail >= f->cap) {
            f->ended = 1; /* a line the budget cannot hold: it cannot be read, nor skipped */
            return ev->kind = FRAME_OVER_BUDGET;
        }
        return ev->kind = FRAME_MORE; /* wait for the rest of the line */
    }
    f->pending = nl ? len + 1 : len;
    len = body;
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
        if (f->bulk_cap > FRAME_BULK_KEEP) {
            mem_free(f->bulk);
            f->bulk = NULL;
            f->bulk_cap = 0;
        }
        recharge(f, held(f)); /* the reservation ends with the payload */
        break;
    default:
        CHECK(!"frame_consume without an event to consume");
    }
    f->last = FRAME_MORE;
}

int frame_expect_bulk(frame_t *f, size_t nbytes)
{
    CHECK(f->last == FRAME_LINE && !f->in_bulk && !f->skip);
    size_t want = f->cap + (nbytes > f->bulk_cap ? nbytes : f->bulk_cap);
    if (recharge(f, want) != 0)
        return -1;
    f->in_bulk = 1;
    f->bulk_need = nbytes;
    f->bulk_have = 0;
    return 0;
}

void frame_skip_bulk(frame_t *f, size_t nbytes)
{
    CHECK(f->last == FRAME_LINE && !f->in_bulk && !f->skip);
    f->skip = nbytes;
}

int frame_in_bulk(const frame_t *f)
{
    return f->in_bulk;
}
