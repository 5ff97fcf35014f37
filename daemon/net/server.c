/*
 * server.c - worthd's libuv loop: listeners, connections, framing, wake-ups.
 *
 * The loop thread owns every handle here.  Each connection's framer (frame.h)
 * splits its input into lines of at most max_line bytes and bulk payloads;
 * this file gives them to the protocol layer, at most LINES_PER_PUMP per turn (the rest wait for
 * the idle handle, so one busy client cannot starve the others).  Replies are written at once with
 * uv_try_write; only what the socket does not take is copied and queued.
 *
 * A connection stops reading while: its unsent replies exceed WRITE_HIGH
 * (until they drain to WRITE_LOW), its request is parked for queue space,
 * it waits for a learner's reply, or it has unhandled lines in the backlog.
 * Lines already read are not handled either while the replies exceed
 * WRITE_HIGH (held), so the queue of one client is bounded.
 * Learners report through one uv_async handle (coalescing, so every wake-up
 * drains the whole outbox and retries every parked connection).
 *
 * Limits (schema/protocol.md, "Limits"): at most max_conns client
 * connections (one more is told too_many_connections and closed); a tick
 * every TICK_MS closes connections idle for idle_timeout_s (after an
 * idle_timeout line) and cuts off slow readers, whose unsent replies stayed
 * over WRITE_HIGH for send_timeout_s (logged as slow_reader).  When accept
 * fails for lack of descriptors (EMFILE), libuv frees its reserve descriptor
 * to accept and close the waiting connections, silently.  If that reserve is
 * gone (another thread took the descriptor it freed), libuv reports EMFILE
 * to on_connection and retries at once: on_connection then sheds one waiting
 * connection with a reserve of its own, so the retry loop ends when none is
 * left, and logs at most every SHED_LOG_MS.  XXX: with both reserves gone
 * the accept loop would spin until a descriptor frees up.
 *
 * Invariants.
 * 1. A connection is freed only in its uv_close callback.
 * 2. A line is consumed from the input buffer only when the protocol has
 *    handled it (not when it parked it).
 * 3. Bytes after a bulk header belong to the bulk payload until it is
 *    complete; a payload cut short by EOF applies nothing (frame.c).
 * It must never do disk I/O or O(n^2) work per transition.
 */
#include "net/server.h"

#include <arpa/inet.h>
#include <errno.h>
#include <fcntl.h>
#include <netinet/in.h>
#include <pthread.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <sys/stat.h>
#include <sys/un.h>
#include <unistd.h>
#include <uv.h>

#include "proto/arena.h"
#include "store/backup.h"
#include "store/db.h"
#include "net/frame.h"
#include "net/metrics.h"
#include "common/mem.h"
#include "proto/proto.h"
#include "recover.h"
#include "safedir.h"
#include "say.h"
#include "worth/errors.h"
#include "store/writer.h"

/* Lines handled per connection before yielding to others. */
#define LINES_PER_PUMP 64
/* Stop reading from a client whose unsent replies exceed this; resume below WRITE_LOW. */
#define WRITE_HIGH (4u << 20)
#define WRITE_LOW  (1u << 20)
/* At stop, how long connections may take to read their last replies. */
#define LINGER_MS 2000
/* Period of the timer that enforces the idle and send timeouts. */
#define TICK_MS 250
/* Least gap between two log lines about shed or refused connections. */
#define SHED_LOG_MS 10000

struct conn {
    union {
        uv_handle_t h;
        uv_stream_t s;
        uv_pipe_t pipe;
        uv_tcp_t tcp;
    } u;
    struct server *srv;
    uint64_t id;
    struct conn *prev, *next; /* every live connection */
    frame_t fr;               /* input buffer and framing */
    int reading, waiting, parked, backlog, eof, closing, close_after;
    int held;          /* lines left unhandled while unsent >= WRITE_HIGH (or over budget) */
    int tcp;           /* accepted on the TCP listener */
    int pending_auth;  /* TCP with a token, not authenticated yet (counted in n_unauthed) */
    uint64_t open_ms;  /* loop time it was accepted */
    int full;          /* unsent has been >= WRITE_HIGH since full_ms */
    uint64_t full_ms;  /* loop time unsent reached WRITE_HIGH */
    uint64_t quiet_ms; /* loop time since which the connection has been idle */
    size_t unsent;     /* bytes queued in uv_write requests */
    proto_conn_t pc;
};

struct wreq {
    uv_write_t req;
    struct conn *c;
    size_t len;
    char data[];
};

struct server {
    const server_opts_t *o;
    uv_loop_t loop;
    uv_pipe_t unix_listener;
    uv_tcp_t tcp_listener;
    int have_unix, have_tcp;
    int have_sock_id; /* sock_dev, sock_ino: the socket file bound (only it is unlinked) */
    dev_t sock_dev;
    ino_t sock_ino;
    struct backup_dir *backups; /* the --backup-dir, handed to the writer */
    uv_signal_t sigint, sigterm;
    uv_async_t wake;
    uv_idle_t idle;
    int idle_on;
    uv_timer_t tick;   /* idle and send timeouts */
    uv_timer_t linger; /* at stop: the bound on writing the last replies */
    int lingering;
    unsigned long long shed, refused; /* connections lost to EMFILE, refused over max_conns */
    unsigned long long auth_timeouts; /* TCP connections closed for not authenticating */
    uint64_t auth_log_ms;
    int reserve_fd; /* a spare descriptor, freed to shed a connection */
    uint64_t shed_log_ms, refused_log_ms;
    uv_signal_t sighup, sigusr1, sigusr2, sigquit;
    struct conn *conns;
    uint64_t next_id;
    size_t n_conns, n_tcp, n_unauthed;
    budget_t budget; /* every connection's buffers (--max-buffer-mb) */
    struct proto *proto;
    struct writer *writer;
    struct metrics *metrics;
    int stopping;

    /* Outbox: learner events, filled by learner threads under mu. */
    pthread_mutex_t mu;
    learner_event_t *events;
    size_t n_events, cap_events;
    learner_event_t *draining; /* loop-side copy */
    size_t cap_draining;
};

static void pump(struct conn *c);
static void update_reading(struct conn *c);
static void on_idle(uv_idle_t *h);
static void send_limit_error(struct conn *c, int code, const char *msg);

/* ---- connection helpers used by the protocol -------------------------------------------- */

uint64_t conn_id(const struct conn *c)
{
    return c->id;
}

struct proto_conn *conn_proto(struct conn *c)
{
    return &c->pc;
}

void server_each_conn(struct server *s, void (*fn)(struct conn *c, void *ctx), void *ctx)
{
    for (struct conn *c = s->conns, *next; c; c = next) {
        next = c->next;
        if (!c->closing)
            fn(c, ctx);
    }
}

struct conn *server_conn(struct server *s, uint64_t id)
{
    for (struct conn *c = s->conns; c; c = c->next)
        if (c->id == id && !c->closing)
            return c;
    return NULL;
}

static void on_close(uv_handle_t *h)
{
    struct conn *c = h->data;
    struct server *s = c->srv;
    if (c->prev)
        c->prev->next = c->next;
    else
        s->conns = c->next;
    if (c->next)
        c->next->prev = c->prev;
    s->n_conns--;
    if (s->lingering && !s->conns) { /* the stop's last connection: nothing to wait for */
        uv_timer_stop(&s->linger);
        s->lingering = 0;
        uv_close((uv_handle_t *)&s->linger, NULL);
    }
    if (c->tcp)
        s->n_tcp--;
    if (c->pending_auth)
        s->n_unauthed--;
    proto_conn_free(s->proto, &c->pc);
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
    if (!c->close_after || c->closing || c->unsent != 0 || !proto_conn_quiet(&c->pc))
        return 0;
    conn_close(c);
    return 1;
}

static void on_write(uv_write_t *req, int status)
{
    struct wreq *w = (struct wreq *)req;
    struct conn *c = w->c;
    c->unsent -= w->len;
    budget_give(&c->srv->budget, w->len);
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
    budget_force(&c->srv->budget, rest); /* a reply is never dropped: it may go over the cap */
    if (c->unsent >= WRITE_HIGH && !c->full) {
        c->full = 1;
        c->full_ms = uv_now(&c->srv->loop);
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
    if (!c->srv->stopping) /* at shutdown nothing new is accepted */
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
    struct server *s = c->srv;
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
    struct server *s = c->srv;
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
            proto_bulk_truncated(s->proto, c, ev.got);
            conn_close_after_reply(c);
            break;
        }
        if (k == FRAME_TOO_LONG) {
            proto_line_too_long(s->proto, c);
            conn_close_after_reply(c);
            break;
        }
        if (k == FRAME_OVER_BUDGET) {
            say_warn("connection %llu: a line of over %zu bytes does not fit in the buffer "
                     "budget (--max-buffer-mb %llu, %zu bytes in use); closed",
                     (unsigned long long)c->id, c->fr.cap, (unsigned long long)s->o->max_buffer_mb,
                     s->budget.used);
            send_limit_error(c, WORTH_E_OVER_BUDGET,
                             "the daemon's buffer budget (--max-buffer-mb) cannot hold this line "
                             "now; connection closed, retry later");
            conn_close_after_reply(c);
            break;
        }
        if (k == FRAME_BULK) {
            if (proto_bulk(s->proto, c, ev.data, ev.len) == PROTO_PARK) {
                c->parked = 1;
                break;
            }
            frame_consume(&c->fr);
            c->quiet_ms = uv_now(&s->loop);
            continue;
        }
        if (k == FRAME_LINE && proto_line(s->proto, c, ev.line, ev.len) == PROTO_PARK) {
            c->parked = 1;
            break;
        }
        frame_consume(&c->fr);
        /* Idleness is counted from the last whole request, not the last byte: one byte
         * every second must not keep a connection that never asks anything. */
        c->quiet_ms = uv_now(&s->loop);
        if (c->pending_auth && c->pc.authed) {
            c->pending_auth = 0;
            s->n_unauthed--;
        }
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
    struct server *s = h->data;
    int more = 0;
    for (struct conn *c = s->conns; c; c = c->next)
        if (c->backlog && !c->closing) {
            pump(c);
            more |= c->backlog;
        }
    if (!more) {
        uv_idle_stop(&s->idle);
        s->idle_on = 0;
    }
}

/* ---- learner wake-ups -------------------------------------------------------------------- */

static void post_event(void *ctx, const learner_event_t *ev)
{
    struct server *s = ctx;
    pthread_mutex_lock(&s->mu);
    if (s->n_events == s->cap_events) {
        s->cap_events = s->cap_events ? 2 * s->cap_events : 64;
        s->events = mem_realloc(s->events, s->cap_events * sizeof *s->events);
    }
    s->events[s->n_events++] = *ev;
    pthread_mutex_unlock(&s->mu);
    uv_async_send(&s->wake);
}

static void wake_loop(void *ctx)
{
    struct server *s = ctx;
    uv_async_send(&s->wake);
}

/* Delivers every event the learners and the writer posted.  Loop thread. */
static void drain_events(struct server *s)
{
    /* Take the whole outbox at once: uv_async_send coalesces. */
    pthread_mutex_lock(&s->mu);
    size_t n = s->n_events;
    if (n > s->cap_draining) {
        mem_free(s->draining);
        s->draining = mem_alloc(s->cap_events * sizeof *s->draining);
        s->cap_draining = s->cap_events;
    }
    if (n)
        memcpy(s->draining, s->events, n * sizeof *s->events);
    s->n_events = 0;
    pthread_mutex_unlock(&s->mu);
    for (size_t i = 0; i < n; i++)
        proto_event(s->proto, s, &s->draining[i]);
}

static void on_wake(uv_async_t *h)
{
    struct server *s = h->data;
    if (s->stopping)
        return;
    drain_events(s);
    /* Space may have been freed: retry every parked connection.  Replies may have become
     * durable: close the connections that only waited for theirs. */
    for (struct conn *c = s->conns; c; c = c->next) {
        if (maybe_close(c))
            continue;
        if (c->parked && !c->closing) {
            c->parked = 0;
            pump(c);
        }
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

/* Returns 1 when at most one log line per SHED_LOG_MS may be written now (then resets *last). */
static int log_due(struct server *s, uint64_t *last)
{
    uint64_t now = uv_now(&s->loop);
    if (*last && now - *last < SHED_LOG_MS)
        return 0;
    *last = now;
    return 1;
}

/* 1 when nothing is owed to c or pending on it: no request waiting, no reply queued. */
static int conn_idle(const struct conn *c)
{
    return !c->waiting && !c->parked && !c->backlog && !c->held && !c->close_after &&
           c->unsent == 0 && proto_conn_quiet(&c->pc) && !c->pc.creating;
}

/* Every TICK_MS: cuts off slow readers and closes idle connections. */
static void on_tick(uv_timer_t *t)
{
    struct server *s = t->data;
    uint64_t now = uv_now(&s->loop);
    uint64_t send_ms = (uint64_t)s->o->send_timeout_s * 1000;
    uint64_t idle_ms = (uint64_t)s->o->idle_timeout_s * 1000;
    uint64_t auth_ms = (uint64_t)s->o->auth_timeout_s * 1000;
    for (struct conn *c = s->conns, *next; c; c = next) {
        next = c->next;
        if (c->closing)
            continue;
        /* A deadline from the connection's start: bytes that trickle in do not extend it. */
        if (c->pending_auth && !c->pc.authed && !c->close_after && auth_ms &&
            now - c->open_ms >= auth_ms) {
            s->auth_timeouts++;
            if (log_due(s, &s->auth_log_ms))
                say_warn("connection %llu: not authenticated within %u s (--auth-timeout); "
                         "closed; %llu so far",
                         (unsigned long long)c->id, s->o->auth_timeout_s, s->auth_timeouts);
            send_limit_error(c, WORTH_E_AUTH_TIMEOUT,
                             "no auth request within --auth-timeout; connection closed");
            conn_close_after_reply(c);
            continue;
        }
        if (c->full && send_ms && now - c->full_ms >= send_ms) {
            say_warn("connection %llu: %s: %zu bytes of replies unread for %u s; cut off",
                     (unsigned long long)c->id, worth_err_name(WORTH_E_SLOW_READER), c->unsent,
                     s->o->send_timeout_s);
            conn_close(c);
            continue;
        }
        if (!conn_idle(c)) {
            c->quiet_ms = now;
            continue;
        }
        if (idle_ms && now - c->quiet_ms >= idle_ms) {
            say_info("connection %llu: idle for %u s; closed", (unsigned long long)c->id,
                     s->o->idle_timeout_s);
            send_limit_error(c, WORTH_E_IDLE_TIMEOUT,
                             "no whole request within --idle-timeout; connection closed");
            conn_close_after_reply(c);
        }
    }
}

/* ---- listeners --------------------------------------------------------------------------- */

static void on_connection(uv_stream_t *listener, int status)
{
    struct server *s = listener->data;
    if (status < 0) {
        /* libuv retries accept as soon as this returns: shed one waiting connection. */
        if ((status == UV_EMFILE || status == UV_ENFILE) && s->reserve_fd >= 0) {
            uv_os_fd_t lfd;
            close(s->reserve_fd);
            if (uv_fileno((uv_handle_t *)listener, &lfd) == 0) {
                int fd = accept(lfd, NULL, NULL);
                if (fd >= 0)
                    close(fd);
            }
            s->reserve_fd = open("/dev/null", O_RDONLY | O_CLOEXEC);
        }
        s->shed++;
        if (log_due(s, &s->shed_log_ms))
            say_warn("accept: %s; %llu connection%s shed so far", uv_strerror(status), s->shed,
                     s->shed == 1 ? "" : "s");
        return;
    }
    int tcp = listener == (uv_stream_t *)&s->tcp_listener;
    struct conn *c = mem_calloc(1, sizeof *c);
    c->srv = s;
    c->id = ++s->next_id;
    c->tcp = tcp;
    if (tcp)
        uv_tcp_init(&s->loop, &c->u.tcp);
    else
        uv_pipe_init(&s->loop, &c->u.pipe, 0);
    c->u.h.data = c;
    c->next = s->conns;
    if (s->conns)
        s->conns->prev = c;
    s->conns = c;
    s->n_conns++;
    s->n_tcp += tcp;
    int no_room = frame_init(&c->fr, s->o->max_line, &s->budget) != 0;
    proto_conn_init(&c->pc, tcp && s->o->token != NULL);
    c->pending_auth = c->pc.needs_auth;
    s->n_unauthed += c->pending_auth;
    int rc = uv_accept(listener, &c->u.s);
    if (rc < 0) {
        say_warn("accept: %s", uv_strerror(rc));
        conn_close(c);
        return;
    }
    if (tcp)
        uv_tcp_nodelay(&c->u.tcp, 1);
    c->quiet_ms = c->open_ms = uv_now(&s->loop);
    /*
     * Limits, in order: the whole daemon's; the share of TCP, so that slots stay for the
     * Unix socket; TCP peers still to authenticate, so that silent ones cannot hold the
     * share; the buffer budget.  Each refusal is one error line, then the close.
     */
    size_t tcp_cap = s->o->max_conns > s->o->unix_slots ? s->o->max_conns - s->o->unix_slots : 1;
    const char *why = NULL, *limit = NULL;
    int code = WORTH_E_TOO_MANY_CONNECTIONS;
    if (s->n_conns > s->o->max_conns) {
        why = "worthd holds its limit of connections (--max-conns); try again later";
        limit = "--max-conns";
    } else if (tcp && s->n_tcp > tcp_cap) {
        why = "worthd holds its limit of TCP connections (--max-conns less --unix-slots); "
              "try again later";
        limit = "--max-conns less --unix-slots";
    } else if (c->pending_auth && s->n_unauthed > s->o->max_unauthed) {
        why = "too many TCP connections are waiting to authenticate (--max-unauthenticated); "
              "try again later";
        limit = "--max-unauthenticated";
    } else if (no_room) {
        why = "the daemon's buffer budget (--max-buffer-mb) is spent; try again later";
        limit = "--max-buffer-mb";
        code = WORTH_E_OVER_BUDGET;
    }
    if (why) {
        s->refused++;
        if (log_due(s, &s->refused_log_ms))
            say_warn("connection %llu (%s) refused (%s, the limit of %s): %zu open, %zu tcp, %zu "
                     "not authenticated; %llu refused so far",
                     (unsigned long long)c->id, tcp ? "tcp" : "unix", worth_err_name(code), limit,
                     s->n_conns - 1, s->n_tcp, s->n_unauthed, s->refused);
        send_limit_error(c, code, why);
        conn_close_after_reply(c);
        return;
    }
    say_debug("connection %llu opened (%s)", (unsigned long long)c->id, tcp ? "tcp" : "unix");
    update_reading(c);
}

/* Returns 1 when something accepts connections at path (a live daemon), 0 when nothing does. */
static int unix_socket_live(const char *path)
{
    int fd = socket(AF_UNIX, SOCK_STREAM, 0);
    if (fd < 0)
        return 0;
    struct sockaddr_un a;
    memset(&a, 0, sizeof a);
    a.sun_family = AF_UNIX;
    snprintf(a.sun_path, sizeof a.sun_path, "%s", path);
    int live = connect(fd, (struct sockaddr *)&a, sizeof a) == 0;
    close(fd);
    return live;
}

/*
 * The socket's file mode guards it only as long as nobody else can replace it:
 * refuses a directory that every user may write to without the sticky bit,
 * or one owned by another user than worthd's or root.  Returns 0 or -1 (logged).
 */
static int check_socket_dir(const char *path)
{
    char dir[sizeof((struct sockaddr_un *)0)->sun_path];
    const char *slash = strrchr(path, '/');
    if (!slash)
        snprintf(dir, sizeof dir, ".");
    else if (slash == path)
        snprintf(dir, sizeof dir, "/");
    else
        snprintf(dir, sizeof dir, "%.*s", (int)(slash - path), path);
    struct stat st;
    if (stat(dir, &st) != 0) {
        say_error("socket directory %s: %s", dir, strerror(errno));
        return -1;
    }
    char why[sizeof dir + 200];
    if (safedir_check(dir, &st, "socket directory", "the socket", why, sizeof why) != 0) {
        say_error("%s", why);
        return -1;
    }
    return 0;
}

/*
 * Creates a Unix stream socket bound to path, mode 0660.  Bound here rather
 * than by uv_pipe_bind, because libuv's uv_close then unlinks whatever sits at
 * the path; stop() removes only this socket (unlink_socket).  Returns 0 with
 * *fd, or a negative errno (a libuv error code).
 */
static int bind_unix(const char *path, int *fd)
{
    struct sockaddr_un a;
    memset(&a, 0, sizeof a);
    a.sun_family = AF_UNIX;
    snprintf(a.sun_path, sizeof a.sun_path, "%s", path);
    int sfd = socket(AF_UNIX, SOCK_STREAM | SOCK_CLOEXEC, 0);
    if (sfd < 0)
        return -errno;
    /* Mode 0660: uv_pipe_chmod cannot express it, so set the umask around bind. */
    mode_t old = umask(0117);
    int rc = bind(sfd, (struct sockaddr *)&a, sizeof a), e = errno;
    umask(old);
    if (rc != 0) {
        close(sfd);
        return -e;
    }
    *fd = sfd;
    return 0;
}

static int listen_unix(struct server *s)
{
    const char *path = s->o->socket_path;
    struct sockaddr_un probe;
    if (strlen(path) >= sizeof probe.sun_path) {
        say_error("socket path %s is longer than %zu bytes", path, sizeof probe.sun_path - 1);
        return -1;
    }
    struct stat st;
    if (check_socket_dir(path) != 0)
        return -1;
    if (lstat(path, &st) == 0) {
        if (!S_ISSOCK(st.st_mode)) {
            say_error("%s exists and is not a socket; refusing to replace it", path);
            return -1;
        }
        if (unix_socket_live(path)) {
            say_error("another daemon is listening on %s", path);
            return -1;
        }
        say_warn("removing stale socket %s left by an earlier run", path);
        unlink(path);
    }
    uv_pipe_init(&s->loop, &s->unix_listener, 0);
    s->unix_listener.data = s;
    s->have_unix = 1;
    int fd = -1;
    int rc = bind_unix(path, &fd);
    if (rc == 0 && lstat(path, &st) == 0) { /* what stop() may remove: this socket, no other file */
        s->sock_dev = st.st_dev;
        s->sock_ino = st.st_ino;
        s->have_sock_id = 1;
    }
    if (rc == 0 && (rc = uv_pipe_open(&s->unix_listener, fd)) != 0)
        close(fd);
    if (rc == 0)
        rc = uv_listen((uv_stream_t *)&s->unix_listener, 511, on_connection);
    if (rc < 0) {
        say_error("cannot listen on %s: %s", path, uv_strerror(rc));
        return -1;
    }
    say_info("listening on %s (unix, mode 0660)", path);
    return 0;
}

/* Parses HOST:PORT or [V6]:PORT into addr; returns 0, or -1. */
int server_parse_hostport(const char *spec, struct sockaddr_storage *addr, int *loopback)
{
    char host[256];
    const char *colon = strrchr(spec, ':');
    if (!colon || colon == spec || !colon[1])
        return -1;
    size_t hl = (size_t)(colon - spec);
    if (hl >= sizeof host)
        return -1;
    memcpy(host, spec, hl);
    host[hl] = 0;
    char *end;
    long port = strtol(colon + 1, &end, 10);
    if (*end || port < 1 || port > 65535)
        return -1;
    if (host[0] == '[' && hl >= 2 && host[hl - 1] == ']') {
        host[hl - 1] = 0;
        struct sockaddr_in6 *a6 = (struct sockaddr_in6 *)addr;
        if (uv_ip6_addr(host + 1, (int)port, a6) != 0)
            return -1;
        *loopback = memcmp(&a6->sin6_addr, &in6addr_loopback, sizeof in6addr_loopback) == 0;
        return 0;
    }
    if (strcmp(host, "localhost") == 0)
        snprintf(host, sizeof host, "127.0.0.1");
    struct sockaddr_in *a4 = (struct sockaddr_in *)addr;
    if (uv_ip4_addr(host, (int)port, a4) != 0)
        return -1;
    *loopback = (ntohl(a4->sin_addr.s_addr) >> 24) == 127;
    return 0;
}

static int listen_tcp(struct server *s)
{
    struct sockaddr_storage addr;
    int loopback = 0;
    memset(&addr, 0, sizeof addr);
    if (server_parse_hostport(s->o->listen, &addr, &loopback) != 0) {
        say_error("--listen %s: expected HOST:PORT with a numeric address", s->o->listen);
        return -1;
    }
    if (!loopback && !s->o->token) {
        say_error("refusing to listen on %s, a non-loopback address, without --token-file",
                  s->o->listen);
        return -1;
    }
    if (!s->o->token && !s->o->tcp_without_token) {
        say_error("refusing to listen on %s without --token-file: every local user could "
                  "use the whole protocol (--allow-tcp-without-token to accept that)",
                  s->o->listen);
        return -1;
    }
    uv_tcp_init(&s->loop, &s->tcp_listener);
    s->tcp_listener.data = s;
    s->have_tcp = 1;
    int rc = uv_tcp_bind(&s->tcp_listener, (struct sockaddr *)&addr, 0);
    if (rc == 0)
        rc = uv_listen((uv_stream_t *)&s->tcp_listener, 511, on_connection);
    if (rc < 0) {
        say_error("cannot listen on %s: %s", s->o->listen, uv_strerror(rc));
        return -1;
    }
    if (s->o->token)
        say_info("listening on %s (tcp, token required within %u s)", s->o->listen,
                 s->o->auth_timeout_s);
    else
        say_warn("listening on %s (tcp) WITHOUT A TOKEN (--allow-tcp-without-token): every "
                 "user of this machine can create, feed, roll back and drop models",
                 s->o->listen);
    return 0;
}

/* ---- start and stop ---------------------------------------------------------------------- */

/*
 * Removes the socket file, but only while the path still names the socket
 * worthd bound: whoever replaced it meanwhile keeps their file.  XXX: a
 * replacement between the lstat and the unlink is still removed.
 */
static void unlink_socket(struct server *s)
{
    const char *path = s->o->socket_path;
    struct stat st;
    if (!s->have_sock_id || lstat(path, &st) != 0)
        return;
    if (!S_ISSOCK(st.st_mode) || st.st_dev != s->sock_dev || st.st_ino != s->sock_ino) {
        say_warn("%s is no longer worthd's socket; left in place", path);
        return;
    }
    unlink(path);
}

/* The stop's bound on writing the last replies: whatever is still open is closed. */
static void on_linger(uv_timer_t *t)
{
    struct server *s = t->data;
    for (struct conn *c = s->conns; c; c = c->next)
        conn_close(c);
    s->lingering = 0;
    uv_close((uv_handle_t *)&s->linger, NULL);
}

static void stop(struct server *s, const char *why)
{
    if (s->stopping)
        return;
    s->stopping = 1;
    say_info("%s: stopping; applying everything accepted", why);
    if (s->have_unix) {
        unlink_socket(s); /* before the close, as libuv would: the name goes first */
        uv_close((uv_handle_t *)&s->unix_listener, NULL);
    }
    if (s->have_tcp)
        uv_close((uv_handle_t *)&s->tcp_listener, NULL);
    metrics_close(s->metrics);
    s->metrics = NULL;
    for (struct conn *c = s->conns; c; c = c->next)
        update_reading(c);
    /* Learners apply everything accepted (the writer still commits it), checkpoint, end. */
    proto_shutdown(s->proto);
    writer_event(s->writer, NULL, "stop", "{}");
    writer_free(s->writer); /* finishes every queued job and record, closes the database */
    s->writer = NULL;
    /* Deliver what the learners and the writer posted last (final replies, acks). */
    drain_events(s);
    /*
     * A connection closes once its replies are written (closing at once would
     * cancel the writes libuv still holds, and with them the last replies); one
     * whose client does not read is closed after LINGER_MS regardless.
     */
    for (struct conn *c = s->conns, *next; c; c = next) {
        next = c->next;
        c->close_after = 1;
        if (c->unsent == 0)
            conn_close(c);
    }
    if (s->conns) {
        uv_timer_start(&s->linger, on_linger, LINGER_MS, 0);
        s->lingering = 1;
    } else {
        uv_close((uv_handle_t *)&s->linger, NULL);
    }
    uv_close((uv_handle_t *)&s->sigint, NULL);
    uv_close((uv_handle_t *)&s->sigterm, NULL);
    uv_close((uv_handle_t *)&s->sighup, NULL);
    uv_close((uv_handle_t *)&s->sigusr1, NULL);
    uv_close((uv_handle_t *)&s->sigusr2, NULL);
    uv_close((uv_handle_t *)&s->sigquit, NULL);
    uv_close((uv_handle_t *)&s->wake, NULL);
    uv_close((uv_handle_t *)&s->idle, NULL);
    uv_close((uv_handle_t *)&s->tick, NULL);
}

static char *render_metrics(void *ctx, size_t *len)
{
    struct server *s = ctx;
    return proto_metrics_text(s->proto, len);
}

/*
 * SIGINT, SIGTERM and SIGQUIT stop cleanly.  SIGHUP, SIGUSR1 and SIGUSR2 must
 * not kill a daemon that operators and scripts signal by habit: HUP says that
 * nothing can be reloaded in this version, USR1 logs a one-line status, USR2
 * is ignored (logged).  SIGALRM and SIGPIPE are ignored in main.c.
 */
static void on_signal(uv_signal_t *h, int signum)
{
    struct server *s = h->data;
    switch (signum) {
    case SIGHUP:
        say_info("SIGHUP: this worthd has nothing to reload; the options stay as started "
                 "(restart to change them)");
        return;
    case SIGUSR1: {
        size_t models = proto_n_models(s->proto);
        say_info("status: %zu model%s, %zu connection%s (%zu tcp, %zu not authenticated), "
                 "buffers %zu of %llu MiB (peak %zu), %llu refused, %llu shed",
                 models, models == 1 ? "" : "s", s->n_conns, s->n_conns == 1 ? "" : "s", s->n_tcp,
                 s->n_unauthed, s->budget.used, (unsigned long long)s->o->max_buffer_mb,
                 s->budget.peak, s->refused, s->shed);
        return;
    }
    case SIGUSR2:
        say_info("SIGUSR2: ignored");
        return;
    default:
        stop(s, signum == SIGINT ? "SIGINT" : signum == SIGQUIT ? "SIGQUIT" : "SIGTERM");
    }
}

/*
 * The stop signal that came during recovery, before the loop could take it.
 * Written only by note_stop (async-signal-safe: one store), read on the main
 * thread.
 */
static volatile sig_atomic_t stop_signal;

static void note_stop(int signum)
{
    stop_signal = signum;
}

/* db_abandon_fn for recovery: gives a long replay up once a stop signal came. */
static int stop_noted(void *ctx)
{
    (void)ctx;
    return stop_signal != 0;
}

int server_run(const server_opts_t *opts)
{
    struct server *s = mem_calloc(1, sizeof *s);
    s->o = opts;
    s->budget.cap = (size_t)(opts->max_buffer_mb * 1048576u);
    s->reserve_fd = open("/dev/null", O_RDONLY | O_CLOEXEC);
    int status = 1;
    char err[1024];
    CHECK(uv_loop_init(&s->loop) == 0);
    pthread_mutex_init(&s->mu, NULL);
    arena_install(4u << 20);

    int lock = db_lock(opts->db_path, err, sizeof err);
    sqlite3 *db = NULL;
    /* The backup directory after the lock: its leftovers may be swept only by the one worthd. */
    if (lock < 0 ||
        backup_dir_open(opts->backup_dir, opts->db_path, opts->socket_path, opts->file_mode,
                        &s->backups, err, sizeof err) != 0 ||
        db_open(opts->db_path, opts->sync_full, &db, err, sizeof err) != 0 ||
        db_set_max_mb(db, opts->db_max_mb) != 0) {
        if (db)
            snprintf(err, sizeof err, "cannot cap %s at %llu MiB", opts->db_path,
                     (unsigned long long)opts->db_max_mb);
        sqlite3_close(db);
        db = NULL;
        say_error("%s", err);
        backup_dir_free(s->backups);
        arena_uninstall();
        uv_loop_close(&s->loop);
        pthread_mutex_destroy(&s->mu);
        if (s->reserve_fd >= 0)
            close(s->reserve_fd);
        mem_free(s);
        if (lock >= 0)
            close(lock);
        return 1;
    }
    say_info("database %s (WAL, synchronous=%s)", opts->db_path,
             opts->sync_full ? "FULL" : "NORMAL");
    db_tighten(db, opts->file_mode ? opts->file_mode : 0600);
    writer_opts_t wo = {.keep = opts->keep, .group_max = 4096, .backups = s->backups};
    s->writer = writer_new(db, &wo, post_event, s);
    s->proto = proto_new(opts, s->writer, post_event, wake_loop, s);

    uv_async_init(&s->loop, &s->wake, on_wake);
    s->wake.data = s;
    uv_idle_init(&s->loop, &s->idle);
    s->idle.data = s;
    uv_timer_init(&s->loop, &s->tick);
    s->tick.data = s;
    uv_timer_init(&s->loop, &s->linger);
    s->linger.data = s;
    uv_signal_t *sigs[] = {&s->sigint,  &s->sigterm, &s->sighup,
                           &s->sigusr1, &s->sigusr2, &s->sigquit};
    const int signums[] = {SIGINT, SIGTERM, SIGHUP, SIGUSR1, SIGUSR2, SIGQUIT};
    for (size_t i = 0; i < sizeof sigs / sizeof sigs[0]; i++) {
        uv_signal_init(&s->loop, sigs[i]);
        sigs[i]->data = s;
        uv_signal_start(sigs[i], on_signal, signums[i]);
    }

    /*
     * Recover before listening: nobody connects to a half-restored daemon.  The
     * loop does not run meanwhile, so a stop signal only sets a flag that a long
     * replay looks at (recover.h); it is raised again afterwards for the loop.
     */
    const int stops[] = {SIGINT, SIGTERM, SIGQUIT};
    struct sigaction note = {.sa_handler = note_stop}, was[3];
    sigemptyset(&note.sa_mask);
    for (int i = 0; i < 3; i++)
        sigaction(stops[i], &note, &was[i]);
    int rec = recover_models(db, s->proto, s->writer, post_event, wake_loop, s, stop_noted, NULL,
                             err, sizeof err);
    for (int i = 0; i < 3; i++)
        sigaction(stops[i], &was[i], NULL);
    int ready = rec == 0, abandoned = rec == -2;
    if (abandoned)
        say_info("%s; stopping before listening", err);
    else if (!ready)
        say_error("%s", err);
    writer_start(s->writer);
    if (stop_signal)
        raise(stop_signal); /* now to the loop's handler */
    writer_event(s->writer, NULL, "start", "{}");

    if (ready && listen_unix(s) == 0 && (!opts->listen || listen_tcp(s) == 0) &&
        (!opts->metrics || metrics_start(&s->loop, opts->metrics, opts->token, render_metrics, s,
                                         &s->metrics) == 0)) {
        status = 0;
        uv_timer_start(&s->tick, on_tick, TICK_MS, TICK_MS);
    } else if (abandoned) {
        stop(s, "stop signal during recovery");
        status = 0;
    } else {
        stop(s, "start-up failed");
        status = 1;
    }
    uv_run(&s->loop, UV_RUN_DEFAULT);
    int rc = uv_loop_close(&s->loop);
    if (rc != 0) {
        say_error("event loop did not close cleanly: %s", uv_strerror(rc));
        status = 1;
    }
    writer_free(s->writer);
    proto_free(s->proto);
    backup_dir_free(s->backups);
    arena_uninstall();
    pthread_mutex_destroy(&s->mu);
    mem_free(s->events);
    mem_free(s->draining);
    if (s->reserve_fd >= 0)
        close(s->reserve_fd);
    mem_free(s);
    close(lock);
    if (status == 0)
        say_info("stopped");
    return status;
}
