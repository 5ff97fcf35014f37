/*
 * wire.c - the transport of libworth-client: connecting (Unix socket or TCP),
 * auth when a token is given and hello, sending with a deadline, cutting the
 * received bytes into reply lines, reading a reply's status, and the raw
 * worth_request.
 *
 * One connection is one socket, an input buffer and the last reply line.
 * Every wait is bounded by the connection's timeout with poll().  It never
 * raises SIGPIPE (MSG_NOSIGNAL) and never leaves a half-read reply behind: a
 * timeout or a lost connection closes the socket, and later calls fail with
 * io at once.  worth_connect says hello after auth and refuses a peer that is
 * not worthd (io) or a worthd of another protocol version (unsupported), so
 * a mismatch fails at connect, not at some later request.  The buffers grow
 * through common/mem (which aborts on exhaustion) to their high-water mark
 * and are reused.  It builds no request but auth and hello; requests.c
 * builds the others.  A connection belongs to one thread at a time.
 */
#include "wire.h"

#include <arpa/inet.h>
#include <errno.h>
#include <netinet/in.h>
#include <netinet/tcp.h>
#include <poll.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <sys/un.h>
#include <unistd.h>

#include "common/mem.h"

const char *worth_version(void)
{
    return WORTH_VERSION;
}

/* ---- errors ------------------------------------------------------------------------------ */

int wire_fail(worth_client *c, int code, const char *fmt, ...)
{
    snprintf(c->err_name, sizeof c->err_name, "%s", worth_err_name(code));
    c->err_index = -1;
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(c->err_msg, sizeof c->err_msg, fmt, ap);
    va_end(ap);
    return code;
}

const char *worth_error_name(const worth_client *c)
{
    return c->err_name;
}

const char *worth_error_message(const worth_client *c)
{
    return c->err_msg;
}

long worth_error_index(const worth_client *c)
{
    return c->err_index;
}

/* ---- transport --------------------------------------------------------------------------- */

/* Makes room for need bytes in *buf (*cap bytes now), doubling from 1 KiB. */
static void grow(char **buf, size_t *cap, size_t need)
{
    if (need <= *cap)
        return;
    size_t n = *cap ? *cap : 1024;
    while (n < need)
        n *= 2;
    *buf = mem_realloc(*buf, n);
    *cap = n;
}

static int remaining_ms(const struct timespec *deadline)
{
    struct timespec now;
    clock_gettime(CLOCK_MONOTONIC, &now);
    long ms = (deadline->tv_sec - now.tv_sec) * 1000 + (deadline->tv_nsec - now.tv_nsec) / 1000000;
    return ms < 0 ? 0 : (int)ms;
}

void wire_deadline(struct timespec *d, int ms)
{
    clock_gettime(CLOCK_MONOTONIC, d);
    d->tv_sec += ms / 1000;
    d->tv_nsec += (long)(ms % 1000) * 1000000;
    if (d->tv_nsec >= 1000000000) {
        d->tv_sec++;
        d->tv_nsec -= 1000000000;
    }
}

static void drop_conn(worth_client *c)
{
    if (c->fd >= 0)
        close(c->fd);
    c->fd = -1;
}

int wire_send(worth_client *c, const void *buf, size_t len, const struct timespec *dl)
{
    const char *p = buf;
    while (len > 0) {
        if (c->fd < 0)
            return wire_fail(c, WORTH_E_IO, "not connected (an earlier call failed)");
        ssize_t n = send(c->fd, p, len, MSG_NOSIGNAL);
        if (n > 0) {
            p += n;
            len -= (size_t)n;
            continue;
        }
        if (n < 0 && errno == EINTR)
            continue;
        if (n < 0 && (errno == EAGAIN || errno == EWOULDBLOCK)) {
            struct pollfd pf = {c->fd, POLLOUT, 0};
            int ms = remaining_ms(dl);
            if (ms == 0 || poll(&pf, 1, ms) <= 0) {
                drop_conn(c);
                return wire_fail(c, WORTH_E_IO, "timed out sending to worthd");
            }
            continue;
        }
        int e = errno;
        drop_conn(c);
        return wire_fail(c, WORTH_E_IO, "connection to worthd lost: %s", strerror(e));
    }
    return 0;
}

int wire_recv_line(worth_client *c, const struct timespec *dl)
{
    for (;;) {
        char *nl = c->in_len ? memchr(c->in, '\n', c->in_len) : NULL;
        if (nl) {
            size_t n = (size_t)(nl - c->in);
            grow(&c->line, &c->line_cap, n + 1);
            memcpy(c->line, c->in, n);
            c->line[n] = 0;
            memmove(c->in, nl + 1, c->in_len - n - 1);
            c->in_len -= n + 1;
            return 0;
        }
        if (c->fd < 0)
            return wire_fail(c, WORTH_E_IO, "not connected (an earlier call failed)");
        grow(&c->in, &c->in_cap, c->in_len + 65536);
        struct pollfd pf = {c->fd, POLLIN, 0};
        int ms = remaining_ms(dl);
        int pr = ms == 0 ? 0 : poll(&pf, 1, ms);
        if (pr < 0 && errno == EINTR)
            continue;
        if (pr <= 0) {
            drop_conn(c);
            return wire_fail(c, WORTH_E_IO, "timed out waiting for worthd's reply");
        }
        ssize_t n = recv(c->fd, c->in + c->in_len, c->in_cap - c->in_len, 0);
        if (n > 0) {
            c->in_len += (size_t)n;
            continue;
        }
        if (n < 0 && (errno == EINTR || errno == EAGAIN))
            continue;
        drop_conn(c);
        return wire_fail(c, WORTH_E_IO, "worthd closed the connection");
    }
}

int wire_status(worth_client *c, cJSON **root_out)
{
    if (root_out)
        *root_out = NULL;
    cJSON *root = cJSON_Parse(c->line);
    if (!root || !cJSON_IsObject(root)) {
        cJSON_Delete(root);
        return wire_fail(c, WORTH_E_IO, "worthd sent a reply that is not a JSON object");
    }
    if (cJSON_IsTrue(cJSON_GetObjectItemCaseSensitive(root, "ok"))) {
        if (root_out)
            *root_out = root;
        else
            cJSON_Delete(root);
        return 0;
    }
    const cJSON *e = cJSON_GetObjectItemCaseSensitive(root, "error");
    const cJSON *code = cJSON_GetObjectItemCaseSensitive(e, "code");
    const cJSON *msg = cJSON_GetObjectItemCaseSensitive(e, "message");
    int rc = WORTH_E_INTERNAL;
    const char *name = cJSON_IsString(code) ? code->valuestring : "internal";
    /* Map the wire name back to its number through the one table. */
#define X(nm, val, wire, m)                                                                        \
    if (strcmp(name, wire) == 0)                                                                   \
        rc = (val);
    WORTH_ERRORS(X)
#undef X
    snprintf(c->err_name, sizeof c->err_name, "%s", name);
    snprintf(c->err_msg, sizeof c->err_msg, "%s", cJSON_IsString(msg) ? msg->valuestring : "");
    const cJSON *idx = cJSON_GetObjectItemCaseSensitive(e, "index");
    c->err_index = cJSON_IsNumber(idx) && idx->valuedouble >= 0 && idx->valuedouble < 1e15
                       ? (long)idx->valuedouble
                       : -1;
    if (rc == 0)
        rc = WORTH_E_INTERNAL;
    if (root_out)
        *root_out = root;
    else
        cJSON_Delete(root);
    return rc;
}

int wire_call(worth_client *c, cJSON **root)
{
    struct timespec dl;
    wire_deadline(&dl, c->timeout_ms);
    jw_raw(&c->req, "\n", 1);
    int rc = wire_send(c, c->req.b, c->req.len, &dl);
    if (rc == 0)
        rc = wire_recv_line(c, &dl);
    if (rc) {
        if (root)
            *root = NULL;
        return rc;
    }
    return wire_status(c, root);
}

/* ---- lifecycle --------------------------------------------------------------------------- */

static int connect_unix(const char *path, char *err, size_t errlen)
{
    struct sockaddr_un a;
    memset(&a, 0, sizeof a);
    a.sun_family = AF_UNIX;
    if (strlen(path) >= sizeof a.sun_path) {
        snprintf(err, errlen, "socket path %s is too long", path);
        return -1;
    }
    snprintf(a.sun_path, sizeof a.sun_path, "%s", path);
    int fd = socket(AF_UNIX, SOCK_STREAM | SOCK_CLOEXEC, 0);
    if (fd < 0 || connect(fd, (struct sockaddr *)&a, sizeof a) != 0) {
        snprintf(err, errlen, "cannot connect to %s: %s", path, strerror(errno));
        if (fd >= 0)
            close(fd);
        return -1;
    }
    return fd;
}

static int connect_tcp(const char *host_port, char *err, size_t errlen)
{
    char host[256];
    const char *colon = strrchr(host_port, ':');
    if (!colon || (size_t)(colon - host_port) >= sizeof host) {
        snprintf(err, errlen, "%s: expected HOST:PORT", host_port);
        return -1;
    }
    memcpy(host, host_port, (size_t)(colon - host_port));
    host[colon - host_port] = 0;
    char *end = NULL;
    long port = strtol(colon + 1, &end, 10);
    if (!colon[1] || *end)
        port = -1; /* "80abc", "": not a port */
    struct sockaddr_storage ss;
    socklen_t len;
    memset(&ss, 0, sizeof ss);
    if (strcmp(host, "localhost") == 0)
        snprintf(host, sizeof host, "127.0.0.1");
    struct sockaddr_in *a4 = (struct sockaddr_in *)&ss;
    struct sockaddr_in6 *a6 = (struct sockaddr_in6 *)&ss;
    size_t hl = strlen(host);
    if (host[0] == '[' && hl > 2 && host[hl - 1] == ']') {
        host[hl - 1] = 0;
        a6->sin6_family = AF_INET6;
        a6->sin6_port = htons((uint16_t)port);
        if (inet_pton(AF_INET6, host + 1, &a6->sin6_addr) != 1)
            goto bad;
        len = sizeof *a6;
    } else {
        a4->sin_family = AF_INET;
        a4->sin_port = htons((uint16_t)port);
        if (inet_pton(AF_INET, host, &a4->sin_addr) != 1)
            goto bad;
        len = sizeof *a4;
    }
    if (port < 1 || port > 65535)
        goto bad;
    int fd = socket(ss.ss_family, SOCK_STREAM | SOCK_CLOEXEC, 0);
    if (fd < 0 || connect(fd, (struct sockaddr *)&ss, len) != 0) {
        snprintf(err, errlen, "cannot connect to %s: %s", host_port, strerror(errno));
        if (fd >= 0)
            close(fd);
        return -1;
    }
    int one = 1;
    setsockopt(fd, IPPROTO_TCP, TCP_NODELAY, &one, sizeof one);
    return fd;
bad:
    snprintf(err, errlen, "%s: expected a numeric HOST:PORT", host_port);
    return -1;
}

/*
 * Says hello and checks the answer (schema/protocol.md, hello): the peer must
 * be worthd ("server") and speak WORTH_PROTOCOL_VERSION ("protocol").  where
 * names the peer in messages.  Returns 0, or a code with its message in err.
 */
static int hello(worth_client *c, const char *where, char *err, size_t errlen)
{
    jw_reset(&c->req);
    jw_lit(&c->req, "{\"op\":\"hello\"}\n");
    struct timespec dl;
    wire_deadline(&dl, c->timeout_ms);
    int rc = wire_send(c, c->req.b, c->req.len, &dl);
    if (rc == 0)
        rc = wire_recv_line(c, &dl);
    if (rc) {
        snprintf(err, errlen, "%s: %s", where, c->err_msg);
        return rc;
    }
    cJSON *root = cJSON_Parse(c->line);
    const cJSON *ok = cJSON_GetObjectItemCaseSensitive(root, "ok");
    const cJSON *server = cJSON_GetObjectItemCaseSensitive(root, "server");
    int worthd = cJSON_IsString(server) && strcmp(server->valuestring, "worthd") == 0;
    if (!cJSON_IsObject(root) || (cJSON_IsTrue(ok) && !worthd)) {
        /* The start of what it said, as a JSON string: control bytes come out escaped. */
        char said[48];
        size_t n = strcspn(c->line, "\r");
        snprintf(said, sizeof said, "%.*s", (int)n, c->line);
        jw_reset(&c->req);
        jw_str(&c->req, said);
        snprintf(err, errlen, "%s is not worthd: it answered hello with %s%s", where, c->req.b,
                 n >= sizeof said ? " (cut)" : "");
        cJSON_Delete(root);
        return WORTH_E_IO;
    }
    if (!cJSON_IsTrue(ok)) { /* worthd refused, e.g. unauthorized on TCP without a token */
        cJSON_Delete(root);
        rc = wire_status(c, NULL);
        snprintf(err, errlen, "%s: %s", c->err_name, c->err_msg);
        return rc;
    }
    const cJSON *proto = cJSON_GetObjectItemCaseSensitive(root, "protocol");
    const cJSON *version = cJSON_GetObjectItemCaseSensitive(root, "version");
    if (!cJSON_IsNumber(proto) || proto->valuedouble != WORTH_PROTOCOL_VERSION) {
        char theirs[32];
        if (cJSON_IsNumber(proto))
            snprintf(theirs, sizeof theirs, "%.17g", proto->valuedouble);
        else
            snprintf(theirs, sizeof theirs, "(none given)");
        snprintf(err, errlen,
                 "worthd %s at %s speaks protocol %s; this libworth-client %s speaks protocol %d",
                 cJSON_IsString(version) ? version->valuestring : "(of unknown version)", where,
                 theirs, WORTH_VERSION, WORTH_PROTOCOL_VERSION);
        cJSON_Delete(root);
        return WORTH_E_UNSUPPORTED;
    }
    cJSON_Delete(root);
    return 0;
}

int worth_connect(const worth_opts *o, worth_client **out, char *err, size_t errlen)
{
    char dummy[8];
    if (!err) {
        err = dummy;
        errlen = sizeof dummy;
    }
    if (!o->socket_path == !o->host_port) {
        snprintf(err, errlen, "give exactly one of socket_path and host_port");
        return WORTH_E_BAD_PARAM;
    }
    int fd = o->socket_path ? connect_unix(o->socket_path, err, errlen)
                            : connect_tcp(o->host_port, err, errlen);
    if (fd < 0)
        return WORTH_E_IO;
    worth_client *c = mem_calloc(1, sizeof *c);
    c->fd = fd;
    c->timeout_ms = o->timeout_ms > 0 ? o->timeout_ms : 30000;
    c->batch_max = 256;
    c->err_index = -1;
    int rc = 0;
    if (o->token) {
        jw_lit(&c->req, "{\"op\":\"auth\",\"token\":");
        jw_str(&c->req, o->token);
        jw_lit(&c->req, "}");
        rc = wire_call(c, NULL);
        if (rc)
            snprintf(err, errlen, "%s: %s", c->err_name, c->err_msg);
    }
    if (rc == 0)
        rc = hello(c, o->socket_path ? o->socket_path : o->host_port, err, errlen);
    if (rc) {
        worth_close(c);
        return rc;
    }
    *out = c;
    return 0;
}

void worth_close(worth_client *c)
{
    if (!c)
        return;
    drop_conn(c);
    mem_free(c->in);
    mem_free(c->line);
    jw_close(&c->req);
    jw_close(&c->batch);
    mem_free(c);
}

/* ---- the raw request -------------------------------------------------------------------- */

int worth_request(worth_client *c, const char *json, const char **reply)
{
    jw_reset(&c->req);
    jw_lit(&c->req, json);
    jw_raw(&c->req, "\n", 1);
    if (c->line)
        c->line[0] = 0; /* no stale reply if none comes */
    struct timespec dl;
    wire_deadline(&dl, c->timeout_ms);
    int rc = wire_send(c, c->req.b, c->req.len, &dl);
    /* Progress lines (train) precede the reply: skip them, restarting the clock on each. */
    while (rc == 0) {
        rc = wire_recv_line(c, &dl);
        if (rc || !strstr(c->line, "\"progress\":") || strstr(c->line, "\"ok\":"))
            break;
        wire_deadline(&dl, c->timeout_ms);
    }
    if (reply)
        *reply = c->line ? c->line : "";
    return rc ? rc : wire_status(c, NULL);
}
