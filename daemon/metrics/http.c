/*
 * http.c - the HTTP listener for GET /metrics (see metrics.h).
 *
 * Loop thread.  Each connection buffers at most HDR_MAX bytes until the blank
 * line that ends the request head, then answers once and closes.  The parser
 * accepts exactly "METHOD SP TARGET SP HTTP/1.0|1.1" followed by header lines
 * "Name: value"; a NUL byte, a bare line without a colon, more than
 * MAX_HEADERS headers or a head over HDR_MAX bytes is a 400.  Connections are
 * freed only in their close callback.
 */
#include "metrics/http.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>
#include <sys/socket.h>

#include "common/list.h"
#include "common/mem.h"
#include "common/say.h"
#include "net/server.h"

#define HDR_MAX     8192
#define MAX_HEADERS 64
#define IDLE_MS     10000
/* Most metrics connections open at once; more are closed on accept, so scrapers can
 * never use up the descriptors the ingest sockets need. */
#define MAX_CONNS 32

struct mconn {
    uv_tcp_t tcp;
    uv_timer_t timer;
    struct metrics *m;
    struct mconn *next, *prev;
    char buf[HDR_MAX + 1];
    size_t len;
    int answered, closing, handles;
};

struct metrics {
    uv_tcp_t listener;
    int have_token;         /* scrapes must carry a bearer token */
    metrics_auth_fn auth;   /* is this one of worthd's tokens? */
    metrics_render_fn render;
    void *ctx;
    struct mconn *conns;
    int n_conns;
    int closing, listener_closed;
};

struct mwrite {
    uv_write_t req;
    struct mconn *c;
    char data[];
};

static void maybe_free(struct metrics *m)
{
    if (m->closing && m->listener_closed && !m->conns)
        mem_free(m);
}

static void on_handle_closed(uv_handle_t *h)
{
    struct mconn *c = h->data;
    if (--c->handles > 0)
        return;
    struct metrics *m = c->m;
    LIST_UNLINK(m->conns, c);
    mem_free(c);
    m->n_conns--;
    maybe_free(m);
}

static void mclose(struct mconn *c)
{
    if (c->closing)
        return;
    c->closing = 1;
    uv_close((uv_handle_t *)&c->tcp, on_handle_closed);
    uv_close((uv_handle_t *)&c->timer, on_handle_closed);
}

static void on_written(uv_write_t *req, int status)
{
    (void)status;
    struct mwrite *w = (struct mwrite *)req;
    mclose(w->c);
    mem_free(w);
}

/* Sends a whole response (status line, headers, body) and closes afterwards. */
static void respond(struct mconn *c, int code, const char *reason, const char *ctype,
                    const char *body, size_t blen, int head_only)
{
    c->answered = 1;
    uv_read_stop((uv_stream_t *)&c->tcp);
    char hdr[256];
    int hl = snprintf(hdr, sizeof hdr,
                      "HTTP/1.1 %d %s\r\nContent-Type: %s\r\nContent-Length: %zu\r\n"
                      "Connection: close\r\n\r\n",
                      code, reason, ctype, blen);
    size_t total = (size_t)hl + (head_only ? 0 : blen);
    struct mwrite *w = mem_alloc(sizeof *w + total);
    w->c = c;
    memcpy(w->data, hdr, (size_t)hl);
    if (!head_only && blen)
        memcpy(w->data + hl, body, blen);
    uv_buf_t b = uv_buf_init(w->data, (unsigned)total);
    if (uv_write(&w->req, (uv_stream_t *)&c->tcp, &b, 1, on_written) < 0) {
        mem_free(w);
        mclose(c);
    }
}

static int error(struct mconn *c, int code, const char *reason)
{
    char body[64];
    int n = snprintf(body, sizeof body, "%d %s\n", code, reason);
    respond(c, code, reason, "text/plain; charset=utf-8", body, (size_t)n, 0);
    return 0;
}

/* Handles a complete request head in c->buf[0..end). */
static int handle(struct mconn *c, size_t end)
{
    char *p = c->buf, *stop = c->buf + end;
    char *eol = memchr(p, '\n', (size_t)(stop - p));
    if (!eol)
        return error(c, 400, "Bad Request");
    size_t ll = (size_t)(eol - p);
    if (ll && p[ll - 1] == '\r')
        ll--;
    char method[16], target[1024], version[16];
    char line[1100];
    if (ll >= sizeof line)
        return error(c, 400, "Bad Request");
    memcpy(line, p, ll);
    line[ll] = 0;
    char extra;
    if (sscanf(line, "%15s %1023s %15s %c", method, target, version, &extra) != 3)
        return error(c, 400, "Bad Request");
    if (strcmp(version, "HTTP/1.1") != 0 && strcmp(version, "HTTP/1.0") != 0)
        return error(c, 400, "Bad Request");
    /* Header lines: "Name: value"; count them and find Authorization. */
    const char *auth = NULL;
    size_t auth_len = 0;
    int headers = 0;
    for (p = eol + 1; p < stop;) {
        char *e = memchr(p, '\n', (size_t)(stop - p));
        if (!e)
            break;
        size_t n = (size_t)(e - p);
        if (n && p[n - 1] == '\r')
            n--;
        if (n == 0)
            break; /* the blank line */
        char *colon = memchr(p, ':', n);
        if (!colon || colon == p || ++headers > MAX_HEADERS)
            return error(c, 400, "Bad Request");
        if ((size_t)(colon - p) == 13 && strncasecmp(p, "Authorization", 13) == 0) {
            const char *v = colon + 1;
            while (v < p + n && (*v == ' ' || *v == '\t'))
                v++;
            auth = v;
            auth_len = (size_t)(p + n - v);
        }
        p = e + 1;
    }
    int head = strcmp(method, "HEAD") == 0;
    if (!head && strcmp(method, "GET") != 0)
        return error(c, 405, "Method Not Allowed");
    char *q = strchr(target, '?');
    if (q)
        *q = 0;
    if (strcmp(target, "/metrics") != 0)
        return error(c, 404, "Not Found");
    if (c->m->have_token && (!auth || auth_len < 7 || strncmp(auth, "Bearer ", 7) != 0 ||
                             !c->m->auth(c->m->ctx, auth + 7, auth_len - 7)))
        return error(c, 401, "Unauthorized");
    size_t blen = 0;
    char *body = c->m->render(c->m->ctx, &blen);
    respond(c, 200, "OK", "text/plain; version=0.0.4; charset=utf-8", body, blen, head);
    free(body);
    return 0;
}

static void on_alloc(uv_handle_t *h, size_t suggested, uv_buf_t *buf)
{
    (void)suggested;
    struct mconn *c = h->data;
    *buf = uv_buf_init(c->buf + c->len, (unsigned)(HDR_MAX - c->len));
}

static void on_read(uv_stream_t *s, ssize_t n, const uv_buf_t *buf)
{
    (void)buf;
    struct mconn *c = s->data;
    if (c->answered || c->closing)
        return;
    if (n < 0) {
        mclose(c); /* the client went away before finishing its request */
        return;
    }
    if (memchr(c->buf + c->len, 0, (size_t)n)) {
        c->len += (size_t)n;
        error(c, 400, "Bad Request");
        return;
    }
    c->len += (size_t)n;
    c->buf[c->len] = 0;
    char *end = strstr(c->buf, "\r\n\r\n");
    size_t hl = end ? (size_t)(end - c->buf) + 4 : 0;
    if (!end) {
        end = strstr(c->buf, "\n\n");
        hl = end ? (size_t)(end - c->buf) + 2 : 0;
    }
    if (end)
        handle(c, hl);
    else if (c->len >= HDR_MAX)
        error(c, 400, "Bad Request");
}

/* A connection lives at most IDLE_MS, answered or not (a client that never reads its
 * response does not keep it open). */
static void on_idle(uv_timer_t *t)
{
    mclose(t->data);
}

static void on_connection(uv_stream_t *l, int status)
{
    struct metrics *m = l->data;
    if (status < 0 || m->closing)
        return;
    struct mconn *c = mem_calloc(1, sizeof *c);
    c->m = m;
    m->n_conns++;
    uv_tcp_init(l->loop, &c->tcp);
    uv_timer_init(l->loop, &c->timer);
    c->tcp.data = c->timer.data = c;
    c->handles = 2;
    LIST_PUSH(m->conns, c);
    if (uv_accept(l, (uv_stream_t *)&c->tcp) != 0) {
        mclose(c);
        return;
    }
    if (m->n_conns > MAX_CONNS) {
        mclose(c); /* too many scrapers at once */
        return;
    }
    uv_timer_start(&c->timer, on_idle, IDLE_MS, 0);
    uv_read_start((uv_stream_t *)&c->tcp, on_alloc, on_read);
}

static void on_listener_closed(uv_handle_t *h)
{
    struct metrics *m = h->data;
    m->listener_closed = 1;
    maybe_free(m);
}

int metrics_start(uv_loop_t *loop, const char *host_port, int token, metrics_auth_fn auth,
                  metrics_render_fn render, void *ctx, struct metrics **out)
{
    struct sockaddr_storage addr;
    int loopback = 0;
    memset(&addr, 0, sizeof addr);
    if (server_parse_hostport(host_port, &addr, &loopback) != 0) {
        say_error("--metrics %s: expected HOST:PORT with a numeric address", host_port);
        return -1;
    }
    if (!loopback && !token) {
        say_error("refusing to serve metrics on %s, a non-loopback address, without "
                  "--token-file",
                  host_port);
        return -1;
    }
    struct metrics *m = mem_calloc(1, sizeof *m);
    m->have_token = token;
    m->auth = auth;
    m->render = render;
    m->ctx = ctx;
    uv_tcp_init(loop, &m->listener);
    m->listener.data = m;
    int rc = uv_tcp_bind(&m->listener, (struct sockaddr *)&addr, 0);
    if (rc == 0)
        rc = uv_listen((uv_stream_t *)&m->listener, 64, on_connection);
    if (rc < 0) {
        say_error("cannot serve metrics on %s: %s", host_port, uv_strerror(rc));
        m->closing = 1;
        uv_close((uv_handle_t *)&m->listener, on_listener_closed);
        return -1;
    }
    say_info("metrics on http://%s/metrics%s", host_port, token ? " (bearer token required)" : "");
    *out = m;
    return 0;
}

void metrics_close(struct metrics *m)
{
    if (!m || m->closing)
        return;
    m->closing = 1;
    uv_close((uv_handle_t *)&m->listener, on_listener_closed);
    for (struct mconn *c = m->conns; c; c = c->next)
        mclose(c);
}
