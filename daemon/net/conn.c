/*
 * conn.c - client connections: reading, framing, writing and their limits
 * (conn.h).
 *
 * The loop thread owns every handle here.  Each connection's framer
 * (frame.h) splits its input into lines of at most max_line bytes and bulk
 * payloads; this file gives them to the protocol's handler, at most
 * LINES_PER_PUMP per turn (the rest wait for the idle handle, so one busy
 * client cannot starve the others).  Replies are written at once with
 * uv_try_write; only what the socket does not take is copied and queued.
 *
 * A connection stops reading while: its unsent replies exceed WRITE_HIGH
 * (until they drain to WRITE_LOW), its request is parked for queue space, it
 * waits for an answer from another thread, or it has unhandled lines in the
 * backlog.  Lines already read are not handled either while the replies
 * exceed WRITE_HIGH, or while replies hold the buffer budget over its cap
 * (held), so the queue of one client is bounded.
 *
 * A tick every TICK_MS closes connections that did not authenticate within
 * auth_timeout_s of connecting, cuts off slow readers (unsent replies over
 * WRITE_HIGH for send_timeout_s, logged as slow_reader) and closes
 * connections idle for idle_timeout_s (after an idle_timeout line).
 *
 * Invariants.
 * 1. A connection is freed only in its uv_close callback.
 * 2. A line is consumed from the input buffer only when the handler has
 *    handled it (not when it parked it).
 * 3. Bytes after a bulk header belong to the bulk payload until it is
 *    complete; a payload cut short by EOF applies nothing (frame.c).
 * 4. Every byte a connection holds is charged to the set's budget.
 * It must never do disk I/O or O(n^2) work per transition, and never call
 * the protocol but through the handler.
 */
/* struct ucred and SO_PEERCRED (Linux). */
#define _GNU_SOURCE
#include "net/conn.h"

#include <errno.h>
#include <stdio.h>
#include <string.h>
#include <sys/socket.h>

#include "common/list.h"
#include "common/mem.h"
#include "net/frame.h"
#include "common/say.h"
#include "worth/errors.h"

/* Lines handled per connection before yielding to others. */
#define LINES_PER_PUMP 64
/* Stop reading from a client whose unsent replies exceed this; resume below WRITE_LOW. */
#define WRITE_HIGH (4u << 20)
#define WRITE_LOW  (1u << 20)
/* Period of the timer that enforces the timeouts. */
#define TICK_MS 250
/* Least gap between two log lines about the same kind of closing. */
#define LOG_GAP_MS 10000

struct conn {
    union {
        uv_handle_t h;
        uv_stream_t s;
        uv_pipe_t pipe;
        uv_tcp_t tcp;
    } u;
    struct conns *set;
    uint64_t id;
    struct conn *prev, *next; /* every live connection */
    frame_t fr;               /* input buffer and framing */
    void *state;              /* the handler's */
    int reading, waiting, parked, backlog, eof, closing, close_after;
    int held;          /* lines left unhandled while unsent >= WRITE_HIGH (or over budget) */
    int tcp;           /* accepted on the TCP listener */
    int pending_auth;  /* must authenticate, has not yet (counted in n_unauthed) */
    int starved;       /* the budget could not give it a first buffer */
    uint64_t open_ms;  /* loop time it was accepted */
    int full;          /* unsent has been >= WRITE_HIGH since full_ms */
    uint64_t full_ms;  /* loop time unsent reached WRITE_HIGH */
    uint64_t quiet_ms; /* loop time since which the connection has been idle */
    size_t unsent;     /* bytes queued in uv_write requests */
};

struct wreq {
    uv_write_t req;
    struct conn *c;
    size_t len;
    char data[];
};

struct conns {
    uv_loop_t *loop;
    const config_t *cfg;
    conn_handler_t h;
    struct conn *head;
    uint64_t next_id;
    size_t n, n_tcp, n_unauthed;
    budget_t budget; /* every connection's buffers (--max-buffer-mb) */
    uv_idle_t idle;  /* pumps connections with a backlog */
    int idle_on;
    uv_timer_t tick;   /* the timeouts */
    uv_timer_t linger; /* at stop: the bound on writing the last replies */
    int lingering, stopping;
    unsigned long long auth_timeouts; /* TCP connections closed for not authenticating */
    uint64_t auth_log_ms;
};

static void pump(struct conn *c);
static void update_reading(struct conn *c);
static void on_idle(uv_idle_t *h);
static void send_limit_error(struct conn *c, int code, const char *msg);
static void on_tick(uv_timer_t *t);

/* 1 when the handler owes the connection no reply. */
static int quiet(struct conn *c)
{
    return !c->set->h.quiet || c->set->h.quiet(c->set->h.ctx, c);
}

/* ---- the set ----------------------------------------------------------------------------- */

struct conns *conns_new(uv_loop_t *loop, const config_t *cfg)
{
    struct conns *s = mem_calloc(1, sizeof *s);
    s->loop = loop;
    s->cfg = cfg;
    s->budget.cap = (size_t)(cfg->max_buffer_mb * 1048576u);
    uv_idle_init(loop, &s->idle);
    s->idle.data = s;
    uv_timer_init(loop, &s->tick);
    s->tick.data = s;
    uv_timer_init(loop, &s->linger);
    s->linger.data = s;
    uv_timer_start(&s->tick, on_tick, TICK_MS, TICK_MS);
    return s;
}

void conns_set_handler(struct conns *s, const conn_handler_t *h)
{
    s->h = *h;
}

void conns_free(struct conns *s)
{
    mem_free(s);
}

void conns_count(const struct conns *s, size_t *n, size_t *tcp, size_t *unauthed)
{
    *n = s->n;
    *tcp = s->n_tcp;
    *unauthed = s->n_unauthed;
}

const budget_t *conns_budget(const struct conns *s)
{
    return &s->budget;
}

void conns_each(struct conns *s, void (*fn)(struct conn *c, void *ctx), void *ctx)
{
    for (struct conn *c = s->head, *next; c; c = next) {
        next = c->next;
        if (!c->closing)
            fn(c, ctx);
    }
}

struct conn *conns_find(struct conns *s, uint64_t id)
{
    for (struct conn *c = s->head; c; c = c->next)
        if (c->id == id && !c->closing)
            return c;
    return NULL;
}

/* ---- one connection ---------------------------------------------------------------------- */

struct conn *conn_open(struct conns *s, int tcp, int needs_auth)
{
    struct conn *c = mem_calloc(1, sizeof *c);
    c->set = s;
    c->id = ++s->next_id;
    c->tcp = tcp;
    if (tcp)
        uv_tcp_init(s->loop, &c->u.tcp);
    else
        uv_pipe_init(s->loop, &c->u.pipe, 0);
    c->u.h.data = c;
    LIST_PUSH(s->head, c);
    s->n++;
    s->n_tcp += tcp;
    c->starved = frame_init(&c->fr, s->cfg->max_line, &s->budget) != 0;
    c->pending_auth = needs_auth;
    s->n_unauthed += needs_auth;
    c->state = s->h.open ? s->h.open(s->h.ctx, c, needs_auth) : NULL;
    c->quiet_ms = c->open_ms = uv_now(s->loop);
    return c;
}

uv_stream_t *conn_stream(struct conn *c)
{
    return &c->u.s;
}

int conn_starved(const struct conn *c)
{
    return c->starved;
}

/* Reads a Unix peer's credentials and hands them to the protocol (its role depends on them). */
static void tell_peer(struct conn *c)
{
    struct conns *s = c->set;
    uv_os_fd_t fd;
    if (!s->h.peer || uv_fileno(&c->u.h, &fd) != 0)
        return;
    struct ucred cr;
    socklen_t len = sizeof cr;
    if (getsockopt(fd, SOL_SOCKET, SO_PEERCRED, &cr, &len) != 0) {
        say_warn("connection %llu: no peer credentials: %s", (unsigned long long)c->id,
                 strerror(errno));
        return;
    }
    conn_peer_t p = {.pid = (int)cr.pid, .uid = (uint32_t)cr.uid, .gid = (uint32_t)cr.gid};
    p.groups[0] = p.gid;
    p.n_groups = 1;
    gid_t more[64];
    len = sizeof more;
    if (getsockopt(fd, SOL_SOCKET, SO_PEERGROUPS, more, &len) == 0)
        for (size_t i = 0; i < len / sizeof more[0] && p.n_groups < 65; i++)
            p.groups[p.n_groups++] = (uint32_t)more[i];
    s->h.peer(s->h.ctx, c, &p);
}

void conn_start(struct conn *c)
{
    if (c->tcp)
        uv_tcp_nodelay(&c->u.tcp, 1);
    else
        tell_peer(c);
    c->quiet_ms = c->open_ms = uv_now(c->set->loop);
    update_reading(c);
}

void conn_refuse(struct conn *c, int code, const char *msg)
{
    send_limit_error(c, code, msg);
    conn_close_after_reply(c);
}

uint64_t conn_id(const struct conn *c)
{
    return c->id;
}

void *conn_state(struct conn *c)
{
    return c->state;
}

void conn_set_authed(struct conn *c)
{
    if (c->pending_auth) {
        c->pending_auth = 0;
        c->set->n_unauthed--;
    }
}

static void on_close(uv_handle_t *h)
{
    struct conn *c = h->data;
    struct conns *s = c->set;
    LIST_UNLINK(s->head, c);
    s->n--;
    if (s->lingering && !s->head) { /* the stop's last connection: nothing to wait for */
        uv_timer_stop(&s->linger);
        s->lingering = 0;
        uv_close((uv_handle_t *)&s->linger, NULL);
    }
    if (c->tcp)
        s->n_tcp--;
    if (c->pending_auth)
        s->n_unauthed--;
    if (s->h.close)
        s->h.close(s->h.ctx, c, c->state);
    say_debug("connection %llu closed", (unsigned long long)c->id);
    frame_close(&c->fr);
    mem_free(c);
}

static void conn_close(struct conn *c)
{
    if (c->closing)
        return;
    c->closing = 1;
    if (c->reading)
        uv_read_stop(&c->u.s);
    c->reading = 0;
    uv_close(&c->u.h, on_close);
}

/*
 * Closes a connection marked close_after once its last reply is out: nothing
 * unsent and no reply still waiting in the protocol for its transitions to be
 * durable (closing earlier would drop those replies, and with them the error
 * that said why the connection ends).  Returns 1 when it closed.
 */
static int maybe_close(struct conn *c)
{
    if (!c->close_after || c->closing || c->unsent != 0 || !quiet(c))
        return 0;
    conn_close(c);
    return 1;
}

static void on_write(uv_write_t *req, int status)
{
    struct wreq *w = (struct wreq *)req;
    struct conn *c = w->c;
    c->unsent -= w->len;
    budget_give(&c->set->budget, w->len);
    mem_free(w);
    if (status < 0 && status != UV_ECANCELED) {
        say_debug("connection %llu: write failed: %s", (unsigned long long)c->id,
                  uv_strerror(status));
        conn_close(c);
        return;
    }
    if (c->closing || maybe_close(c))
        return;
    if (c->unsent < WRITE_HIGH)
        c->full = 0;
    if (c->unsent < WRITE_LOW) {
        if (c->held) {
            c->held = 0;
            pump(c); /* the lines read before the replies piled up */
        } else {
            update_reading(c);
        }
    }
}

void conn_send(struct conn *c, const char *buf, size_t len)
{
    if (c->closing)
        return;
    size_t done = 0;
    if (c->unsent == 0) {
        uv_buf_t b = uv_buf_init((char *)buf, (unsigned)len);
        int n = uv_try_write(&c->u.s, &b, 1);
        if (n > 0)
            done = (size_t)n;
        else if (n < 0 && n != UV_EAGAIN) {
            say_debug("connection %llu: write failed: %s", (unsigned long long)c->id,
                      uv_strerror(n));
            conn_close(c);
            return;
        }
    }
    if (done == len)
        return;
    size_t rest = len - done;
    struct wreq *w = mem_alloc(sizeof *w + rest);
    w->c = c;
    w->len = rest;
    memcpy(w->data, buf + done, rest);
    uv_buf_t b = uv_buf_init(w->data, (unsigned)rest);
    int rc = uv_write(&w->req, &c->u.s, &b, 1, on_write);
    if (rc < 0) {
        mem_free(w);
        conn_close(c);
        return;
    }
    c->unsent += rest;
    budget_force(&c->set->budget, rest); /* a reply is never dropped: it may go over the cap */
    if (c->unsent >= WRITE_HIGH && !c->full) {
        c->full = 1;
        c->full_ms = uv_now(c->set->loop);
    }
    if (c->unsent > WRITE_HIGH)
        update_reading(c);
}

void conn_close_after_reply(struct conn *c)
{
    c->close_after = 1;
    if (!maybe_close(c))
        update_reading(c);
}

int conn_expect_bulk(struct conn *c, size_t nbytes)
{
    return frame_expect_bulk(&c->fr, nbytes);
}

void conn_skip_bulk(struct conn *c, size_t nbytes)
{
    frame_skip_bulk(&c->fr, nbytes);
}

void conn_wait(struct conn *c)
{
    c->waiting = 1;
}

void conn_resume(struct conn *c)
{
    c->waiting = 0;
    if (!c->set->stopping) /* at shutdown nothing new is accepted */
        pump(c);
}

/* ---- reading and framing ----------------------------------------------------------------- */

static void on_alloc(uv_handle_t *h, size_t suggested, uv_buf_t *buf)
{
    (void)suggested;
    struct conn *c = h->data;
    char *p;
    size_t room;
    frame_space(&c->fr, &p, &room);
    *buf = uv_buf_init(p, (unsigned)room);
}

static void on_read(uv_stream_t *st, ssize_t n, const uv_buf_t *buf)
{
    (void)buf;
    struct conn *c = st->data;
    if (n > 0) {
        frame_filled(&c->fr, (size_t)n);
    } else if (n == UV_ENOBUFS) {
        /* The buffer is full and the budget refused to grow it: pump answers over_budget
         * unless whole lines are waiting (handling them makes room). */
        uv_read_stop(st);
        c->reading = 0;
    } else if (n < 0) {
        if (n != UV_EOF)
            say_debug("connection %llu: read: %s", (unsigned long long)c->id, uv_strerror((int)n));
        c->eof = 1;
        uv_read_stop(st);
        c->reading = 0;
    }
    pump(c);
}

static void update_reading(struct conn *c)
{
    struct conns *s = c->set;
    int want = !c->closing && !c->close_after && !c->eof && !c->waiting && !c->parked &&
               !c->backlog && !s->stopping && c->unsent < WRITE_HIGH;
    /* A full input buffer without a complete line is handled by pump (line_too_long). */
    if (want && !c->reading) {
        if (uv_read_start(&c->u.s, on_alloc, on_read) == 0)
            c->reading = 1;
    } else if (!want && c->reading) {
        uv_read_stop(&c->u.s);
        c->reading = 0;
    }
}

static void pump(struct conn *c)
{
    struct conns *s = c->set;
    int lines = 0;
    c->backlog = 0;
    while (!c->closing && !c->close_after && !c->waiting && !c->parked) {
        if (c->unsent >= WRITE_HIGH || (c->unsent > 0 && budget_over(&s->budget))) {
            c->held = 1; /* on_write resumes once the client has read its replies */
            break;
        }
        frame_ev_t ev;
        enum frame_kind k = frame_next(&c->fr, c->eof, &ev);
        if (k == FRAME_MORE)
            break; /* wait for more input (or, at EOF, the client is done) */
        if (k == FRAME_TRUNCATED) {
            s->h.truncated(s->h.ctx, c, ev.got);
            conn_close_after_reply(c);
            break;
        }
        if (k == FRAME_TOO_LONG) {
            s->h.too_long(s->h.ctx, c);
            conn_close_after_reply(c);
            break;
        }
        if (k == FRAME_OVER_BUDGET) {
            say_warn("connection %llu: a line of over %zu bytes does not fit in the buffer "
                     "budget (--max-buffer-mb %llu, %zu bytes in use); closed",
                     (unsigned long long)c->id, c->fr.cap,
                     (unsigned long long)s->cfg->max_buffer_mb, s->budget.used);
            send_limit_error(c, WORTH_E_OVER_BUDGET,
                             "the daemon's buffer budget (--max-buffer-mb) cannot hold this line "
                             "now; connection closed, retry later");
            conn_close_after_reply(c);
            break;
        }
        if (k == FRAME_BULK) {
            if (s->h.bulk(s->h.ctx, c, ev.data, ev.len) == CONN_PARK) {
                c->parked = 1;
                break;
            }
            frame_consume(&c->fr);
            c->quiet_ms = uv_now(s->loop);
            continue;
        }
        if (k == FRAME_LINE && s->h.line(s->h.ctx, c, ev.line, ev.len) == CONN_PARK) {
            c->parked = 1;
            break;
        }
        frame_consume(&c->fr);
        /* Idleness is counted from the last whole request, not the last byte: one byte
         * every second must not keep a connection that never asks anything. */
        c->quiet_ms = uv_now(s->loop);
        if (++lines >= LINES_PER_PUMP) {
            c->backlog = 1;
            break;
        }
    }
    if (c->eof && !c->closing && !c->close_after && !c->waiting && !c->parked && !c->backlog &&
        !c->held && !frame_in_bulk(&c->fr))
        conn_close_after_reply(c); /* the client finished: close once replies are out */
    if (c->backlog && !s->idle_on) {
        uv_idle_start(&s->idle, on_idle);
        s->idle_on = 1;
    }
    update_reading(c);
}

static void on_idle(uv_idle_t *h)
{
    struct conns *s = h->data;
    int more = 0;
    for (struct conn *c = s->head; c; c = c->next)
        if (c->backlog && !c->closing) {
            pump(c);
            more |= c->backlog;
        }
    if (!more) {
        uv_idle_stop(&s->idle);
        s->idle_on = 0;
    }
}

/* ---- limits ------------------------------------------------------------------------------ */

/*
 * Sends one error line that no request asked for (a limit closing the
 * connection), with the code's stable name; then the caller closes.
 */
static void send_limit_error(struct conn *c, int code, const char *msg)
{
    char line[320];
    int n = snprintf(line, sizeof line,
                     "{\"ok\":false,\"error\":{\"code\":\"%s\",\"message\":\"%s\"}}\n",
                     worth_err_name(code), msg);
    if (n > 0 && (size_t)n < sizeof line)
        conn_send(c, line, (size_t)n);
}

/* Returns 1 when at most one log line per LOG_GAP_MS may be written now (then resets *last). */
static int log_due(struct conns *s, uint64_t *last)
{
    uint64_t now = uv_now(s->loop);
    if (*last && now - *last < LOG_GAP_MS)
        return 0;
    *last = now;
    return 1;
}

/* 1 when nothing is owed to c or pending on it: no request waiting, no reply queued. */
static int conn_idle(struct conn *c)
{
    return !c->waiting && !c->parked && !c->backlog && !c->held && !c->close_after &&
           c->unsent == 0 && quiet(c);
}

/* Every TICK_MS: cuts off slow readers and closes idle connections. */
static void on_tick(uv_timer_t *t)
{
    struct conns *s = t->data;
    uint64_t now = uv_now(s->loop);
    uint64_t send_ms = (uint64_t)s->cfg->send_timeout_s * 1000;
    uint64_t idle_ms = (uint64_t)s->cfg->idle_timeout_s * 1000;
    uint64_t auth_ms = (uint64_t)s->cfg->auth_timeout_s * 1000;
    for (struct conn *c = s->head, *next; c; c = next) {
        next = c->next;
        if (c->closing)
            continue;
        /* A deadline from the connection's start: bytes that trickle in do not extend it. */
        if (c->pending_auth && !c->close_after && auth_ms && now - c->open_ms >= auth_ms) {
            s->auth_timeouts++;
            if (log_due(s, &s->auth_log_ms))
                say_warn("connection %llu: not authenticated within %u s (--auth-timeout); "
                         "closed; %llu so far",
                         (unsigned long long)c->id, s->cfg->auth_timeout_s, s->auth_timeouts);
            send_limit_error(c, WORTH_E_AUTH_TIMEOUT,
                             "no auth request within --auth-timeout; connection closed");
            conn_close_after_reply(c);
            continue;
        }
        if (c->full && send_ms && now - c->full_ms >= send_ms) {
            say_warn("connection %llu: %s: %zu bytes of replies unread for %u s; cut off",
                     (unsigned long long)c->id, worth_err_name(WORTH_E_SLOW_READER), c->unsent,
                     s->cfg->send_timeout_s);
            conn_close(c);
            continue;
        }
        if (!conn_idle(c)) {
            c->quiet_ms = now;
            continue;
        }
        if (idle_ms && now - c->quiet_ms >= idle_ms) {
            say_info("connection %llu: idle for %u s; closed", (unsigned long long)c->id,
                     s->cfg->idle_timeout_s);
            send_limit_error(c, WORTH_E_IDLE_TIMEOUT,
                             "no whole request within --idle-timeout; connection closed");
            conn_close_after_reply(c);
        }
    }
}

/* The stop's bound on writing the last replies: whatever is still open is closed. */
static void on_linger(uv_timer_t *t)
{
    struct conns *s = t->data;
    for (struct conn *c = s->head; c; c = c->next)
        conn_close(c);
    s->lingering = 0;
    uv_close((uv_handle_t *)&s->linger, NULL);
}

void conn_abort(struct conn *c)
{
    conn_close(c);
}

void conns_kick(struct conns *s)
{
    /* Space may have been freed: retry every parked connection.  Replies may have become
     * durable: close the connections that only waited for theirs. */
    for (struct conn *c = s->head; c; c = c->next) {
        if (maybe_close(c))
            continue;
        if (c->parked && !c->closing) {
            c->parked = 0;
            pump(c);
        }
    }
}

void conns_stop_reading(struct conns *s)
{
    s->stopping = 1;
    for (struct conn *c = s->head; c; c = c->next)
        update_reading(c);
}

void conns_close_all(struct conns *s, unsigned linger_ms)
{
    for (struct conn *c = s->head, *next; c; c = next) {
        next = c->next;
        c->close_after = 1;
        if (c->unsent == 0)
            conn_close(c);
    }
    uv_close((uv_handle_t *)&s->idle, NULL);
    uv_close((uv_handle_t *)&s->tick, NULL);
    if (s->head) {
        uv_timer_start(&s->linger, on_linger, linger_ms, 0);
        s->lingering = 1;
    } else {
        uv_close((uv_handle_t *)&s->linger, NULL);
    }
}
