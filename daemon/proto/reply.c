/*
 * reply.c - replies: the frame of every line ({"ok":...,"id":...}, the error
 * form), and their order on a connection, the acknowledgements that wait for
 * durability included.
 *
 * Loop thread.  Replies are written into the protocol's one JSON writer
 * (common/jw.h, reused for every request).  Owns each connection's protocol
 * state (proto_conn_t): the queue of replies not yet sent.  A reply that
 * acknowledges transitions as durable waits until the writer has committed
 * them (EV_DURABLE), or turns into the error of a failed commit (EV_FAILED);
 * every reply behind it waits too, so a connection's replies never overtake
 * each other.  It must never send a "durable" acknowledgement before the
 * commit that holds it.  It counts the waiting replies that refer to a model's
 * slot (slot->refs) but never frees a slot: registry.c does (reg_sweep).
 */

#include <cjson/cJSON.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "common/ct.h"
#include "common/jw.h"
#include "common/mem.h"
#include "core/queue.h"
#include "core/arena.h"
#include "proto/internal.h"
#include "core/spec.h"
#include "common/say.h"
#include "store/backup.h"
#include "worth/errors.h"

/* Starts a reply object, with the request's id when it had one. */
void reply_begin(jw_t *o, int ok, const char *id)
{
    o->len = 0;
    jw_lit(o, ok ? "{\"ok\":true" : "{\"ok\":false");
    if (id) {
        jw_lit(o, ",\"id\":");
        jw_lit(o, id);
    }
}

void reply_end(jw_t *o, struct conn *c)
{
    jw_raw(o, "}\n", 2);
    reply_send(c, o->b, o->len);
}

/* Formats an error reply line into p->out. */
void reply_format_error(struct proto *p, const char *id, int code, long index, const char *msg)
{
    reply_format_error_with(p, id, code, index, msg, "");
}

void reply_format_error_with(struct proto *p, const char *id, int code, long index, const char *msg,
                             const char *more)
{
    jw_t *o = &p->out;
    reply_begin(o, 0, id);
    jw_lit(o, ",\"error\":{\"code\":");
    jw_str(o, worth_err_name(code));
    jw_lit(o, ",\"message\":");
    jw_str(o, msg);
    if (index >= 0)
        jw_fmt(o, ",\"index\":%ld", index);
    jw_lit(o, more);
    jw_lit(o, "}}\n");
}

void reply_error(struct proto *p, struct conn *c, const char *id, int code, long index,
                 const char *fmt, ...) __attribute__((format(printf, 6, 7)));
void reply_error(struct proto *p, struct conn *c, const char *id, int code, long index,
                 const char *fmt, ...)
{
    char msg[600];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(msg, sizeof msg, fmt, ap);
    va_end(ap);
    reply_format_error(p, id, code, index, msg);
    reply_send(c, p->out.b, p->out.len);
    ops_count_error(p, c, code);
}

/* Appends bytes to the connection's ack buffer; returns their offset. */
static size_t reply_text(proto_conn_t *pc, const char *b, size_t n)
{
    if (pc->ack_len + n > pc->ack_cap) {
        pc->ack_cap = (pc->ack_len + n) * 2;
        pc->ackbuf = mem_realloc(pc->ackbuf, pc->ack_cap);
    }
    memcpy(pc->ackbuf + pc->ack_len, b, n);
    pc->ack_len += n;
    return pc->ack_len - n;
}

/* Queues a reply behind the waiting ones: ready now (slot NULL) or once slot is durable to seq. */
static void queue_reply(proto_conn_t *pc, struct slot *slot, uint64_t seq, const char *b, size_t n,
                        const char *id)
{
    if (pc->n_acks == pc->cap_acks) {
        pc->cap_acks = pc->cap_acks ? 2 * pc->cap_acks : 16;
        pc->acks = mem_realloc(pc->acks, pc->cap_acks * sizeof *pc->acks);
    }
    struct proto_ack *a = &pc->acks[pc->n_acks++];
    a->slot = slot;
    a->seq = seq;
    a->off = reply_text(pc, b, n);
    a->len = n;
    a->id_len = id ? strlen(id) : 0;
    a->id_off = id ? reply_text(pc, id, a->id_len) : 0;
    if (slot)
        slot->refs++;
}

/* Sends a finished reply line, after any that still wait on this connection. */
void reply_send(struct conn *c, const char *b, size_t n)
{
    proto_conn_t *pc = pconn(c);
    if (pc->ack_head == pc->n_acks)
        conn_send(c, b, n);
    else
        queue_reply(pc, NULL, 0, b, n, NULL);
}

/* Sends every reply at the front of c's queue that is ready. */
static void reply_flush(struct proto *p, struct conn *c)
{
    proto_conn_t *pc = pconn(c);
    while (pc->ack_head < pc->n_acks) {
        struct proto_ack *a = &pc->acks[pc->ack_head];
        struct slot *sl = a->slot;
        if (!sl) {
            conn_send(c, pc->ackbuf + a->off, a->len);
        } else {
            char id[PROTO_ID_MAX + 1];
            memcpy(id, pc->ackbuf + a->id_off, a->id_len);
            id[a->id_len] = 0;
            const char *idp = a->id_len ? id : NULL;
            if (a->seq == 0) { /* marked failed */
                reply_format_error(p, idp, sl->fail_code, -1, sl->why);
                conn_send(c, p->out.b, p->out.len);
            } else if (sl->durable >= a->seq) {
                conn_send(c, pc->ackbuf + a->off, a->len);
            } else if (sl->gone) {
                reply_format_error(p, idp, WORTH_E_NO_SUCH_MODEL, -1,
                                   "the model was dropped before these transitions were durable");
                conn_send(c, p->out.b, p->out.len);
            } else {
                break;
            }
            sl->refs--; /* a dropped slot left with none is freed by reg_sweep */
        }
        pc->ack_head++;
    }
    if (pc->ack_head == pc->n_acks)
        pc->n_acks = pc->ack_head = pc->ack_len = 0;
}

void reply_flush_one(struct conn *c, void *ctx)
{
    reply_flush(ctx, c);
}

/* Marks the replies waiting for sl's seqs in (durable, upto] as failed. */
void reply_fail_one(struct conn *c, void *ctx)
{
    struct fail_ctx *f = ctx;
    proto_conn_t *pc = pconn(c);
    for (size_t i = pc->ack_head; i < pc->n_acks; i++) {
        struct proto_ack *a = &pc->acks[i];
        if (a->slot == f->sl && a->seq > f->sl->durable && a->seq <= f->upto)
            a->seq = 0;
    }
    reply_flush(f->p, c);
}

/* Queues the reply in p->out to be sent once sl's log is durable up to seq. */
void reply_durable(struct proto *p, struct conn *c, struct slot *sl, uint64_t seq, const char *id)
{
    proto_conn_t *pc = pconn(c);
    /* Position 0: nothing was committed since worthd started, so nothing to wait for. */
    queue_reply(pc, seq ? sl : NULL, seq, p->out.b, p->out.len, id);
    reply_flush(p, c);
}

proto_conn_t *reply_conn_new(int needs_auth)
{
    proto_conn_t *pc = mem_calloc(1, sizeof *pc);
    pc->needs_auth = needs_auth;
    pc->dt_s = NAN;
    return pc;
}

int reply_conn_quiet(const proto_conn_t *pc)
{
    return pc->ack_head == pc->n_acks && !pc->creating;
}

void reply_conn_free(proto_conn_t *pc)
{
    for (size_t i = pc->ack_head; i < pc->n_acks; i++) {
        struct slot *sl = pc->acks[i].slot;
        if (sl)
            sl->refs--; /* a dropped slot left with none is freed by reg_sweep */
    }
    mem_free(pc->acks);
    mem_free(pc->ackbuf);
    mem_free(pc);
}
