/*
 * client.c - the C client library of worthd (include/worth/client.h).
 *
 * One connection is one socket plus a reply buffer.  Each call writes one
 * request line and reads reply lines until the final one (train also reads
 * its progress lines), each bounded by the connection's timeout with poll().
 * Requests are built with snprintf (numbers with 17 significant digits so
 * they round-trip); replies are parsed with cJSON.  It never raises SIGPIPE
 * (MSG_NOSIGNAL) and never leaves a half-read reply behind: a timeout or a
 * lost connection closes the socket, and later calls fail with io.
 *
 * Thread use: a connection belongs to one thread at a time.
 */
#include "worth/client.h"

#include <arpa/inet.h>
#include <cjson/cJSON.h>
#include <errno.h>
#include <math.h>
#include <netinet/in.h>
#include <netinet/tcp.h>
#include <poll.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <sys/un.h>
#include <time.h>
#include <unistd.h>

struct worth_client {
    int fd;
    int timeout_ms;
    char *in; /* received bytes */
    size_t in_len, in_cap;
    char *line; /* the last reply line, NUL-terminated */
    size_t line_cap;
    char *req; /* request being built */
    size_t req_len, req_cap;
    char err_name[64];
    char err_msg[512];
    /* automatic batching */
    char batch_model[64];
    size_t batch_dims, batch_n, batch_max;
    char *batch; /* the batch's elements, comma-separated */
    size_t batch_len, batch_cap;
};

const char *worth_version(void)
{
    return WORTH_VERSION;
}

/* ---- errors ------------------------------------------------------------------------------ */

static int set_err(worth_client *c, int code, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));
static int set_err(worth_client *c, int code, const char *fmt, ...)
{
    snprintf(c->err_name, sizeof c->err_name, "%s", worth_err_name(code));
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

/* ---- request building -------------------------------------------------------------------- */

static void grow(char **buf, size_t *cap, size_t need)
{
    if (need <= *cap)
        return;
    size_t n = *cap ? *cap : 1024;
    while (n < need)
        n *= 2;
    char *p = realloc(*buf, n);
    if (!p) {
        fprintf(stderr, "worth client: out of memory\n");
        abort();
    }
    *buf = p;
    *cap = n;
}

static void req_reset(worth_client *c)
{
    c->req_len = 0;
}

static void req_add(worth_client *c, const char *s, size_t n)
{
    grow(&c->req, &c->req_cap, c->req_len + n + 1);
    memcpy(c->req + c->req_len, s, n);
    c->req_len += n;
    c->req[c->req_len] = 0;
}

static void req_s(worth_client *c, const char *s)
{
    req_add(c, s, strlen(s));
}

static void req_fmt(worth_client *c, const char *fmt, ...) __attribute__((format(printf, 2, 3)));
static void req_fmt(worth_client *c, const char *fmt, ...)
{
    char buf[128];
    va_list ap;
    va_start(ap, fmt);
    int n = vsnprintf(buf, sizeof buf, fmt, ap);
    va_end(ap);
    if (n > 0 && (size_t)n < sizeof buf) {
        req_add(c, buf, (size_t)n);
        return;
    }
    grow(&c->req, &c->req_cap, c->req_len + (size_t)n + 1);
    va_start(ap, fmt);
    vsnprintf(c->req + c->req_len, (size_t)n + 1, fmt, ap);
    va_end(ap);
    c->req_len += (size_t)n;
}

/* A JSON string literal. */
static void req_str(worth_client *c, const char *s)
{
    req_s(c, "\"");
    for (const unsigned char *p = (const unsigned char *)s; *p; p++) {
        if (*p == '"' || *p == '\\') {
            char e[2] = {'\\', (char)*p};
            req_add(c, e, 2);
        } else if (*p < 0x20) {
            req_fmt(c, "\\u%04x", *p);
        } else {
            req_add(c, (const char *)p, 1);
        }
    }
    req_s(c, "\"");
}

/* A number; non-finite values are sent as strings so that worthd answers bad_number. */
static void req_num(worth_client *c, double v)
{
    if (isfinite(v))
        req_fmt(c, "%.17g", v);
    else
        req_s(c, "\"NaN\"");
}

static void req_vec(worth_client *c, const double *v, size_t n)
{
    req_s(c, "[");
    for (size_t i = 0; i < n; i++) {
        if (i)
            req_s(c, ",");
        req_num(c, v[i]);
    }
    req_s(c, "]");
}

/* ---- transport --------------------------------------------------------------------------- */

static int remaining_ms(const struct timespec *deadline)
{
    struct timespec now;
    clock_gettime(CLOCK_MONOTONIC, &now);
    long ms = (deadline->tv_sec - now.tv_sec) * 1000 + (deadline->tv_nsec - now.tv_nsec) / 1000000;
    return ms < 0 ? 0 : (int)ms;
}

static void deadline_in(struct timespec *d, int ms)
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

static int send_all(worth_client *c, const void *buf, size_t len, const struct timespec *dl)
{
    const char *p = buf;
    while (len > 0) {
        if (c->fd < 0)
            return set_err(c, WORTH_E_IO, "not connected (an earlier call failed)");
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
                return set_err(c, WORTH_E_IO, "timed out sending to worthd");
            }
            continue;
        }
        int e = errno;
        drop_conn(c);
        return set_err(c, WORTH_E_IO, "connection to worthd lost: %s", strerror(e));
    }
    return 0;
}

/* Reads one reply line into c->line. */
static int recv_line(worth_client *c, const struct timespec *dl)
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
            return set_err(c, WORTH_E_IO, "not connected (an earlier call failed)");
        grow(&c->in, &c->in_cap, c->in_len + 65536);
        struct pollfd pf = {c->fd, POLLIN, 0};
        int ms = remaining_ms(dl);
        int pr = ms == 0 ? 0 : poll(&pf, 1, ms);
        if (pr < 0 && errno == EINTR)
            continue;
        if (pr <= 0) {
            drop_conn(c);
            return set_err(c, WORTH_E_IO, "timed out waiting for worthd's reply");
        }
        ssize_t n = recv(c->fd, c->in + c->in_len, c->in_cap - c->in_len, 0);
        if (n > 0) {
            c->in_len += (size_t)n;
            continue;
        }
        if (n < 0 && (errno == EINTR || errno == EAGAIN))
            continue;
        drop_conn(c);
        return set_err(c, WORTH_E_IO, "worthd closed the connection");
    }
}

/* Returns 0 when the reply line says ok, else its error code (and sets the error). */
static int reply_status(worth_client *c, cJSON **root_out)
{
    cJSON *root = cJSON_Parse(c->line);
    if (!root || !cJSON_IsObject(root)) {
        cJSON_Delete(root);
        return set_err(c, WORTH_E_IO, "worthd sent a reply that is not a JSON object");
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
    if (rc == 0)
        rc = WORTH_E_INTERNAL;
    if (root_out)
        *root_out = root;
    else
        cJSON_Delete(root);
    return rc;
}

/* Sends c->req as one line and reads the reply; *root gets the parsed reply (may be NULL). */
static int call(worth_client *c, cJSON **root)
{
    struct timespec dl;
    deadline_in(&dl, c->timeout_ms);
    req_add(c, "\n", 1);
    int rc = send_all(c, c->req, c->req_len, &dl);
    if (rc == 0)
        rc = recv_line(c, &dl);
    if (rc)
        return rc;
    return reply_status(c, root);
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
    worth_client *c = calloc(1, sizeof *c);
    if (!c) {
        close(fd);
        snprintf(err, errlen, "out of memory");
        return WORTH_E_NO_MEMORY;
    }
    c->fd = fd;
    c->timeout_ms = o->timeout_ms > 0 ? o->timeout_ms : 30000;
    c->batch_max = 256;
    if (o->token) {
        req_reset(c);
        req_s(c, "{\"op\":\"auth\",\"token\":");
        req_str(c, o->token);
        req_s(c, "}");
        int rc = call(c, NULL);
        if (rc) {
            snprintf(err, errlen, "%s: %s", c->err_name, c->err_msg);
            worth_close(c);
            return rc;
        }
    }
    *out = c;
    return 0;
}

void worth_close(worth_client *c)
{
    if (!c)
        return;
    drop_conn(c);
    free(c->in);
    free(c->line);
    free(c->req);
    free(c->batch);
    free(c);
}

/* ---- calls ------------------------------------------------------------------------------- */

int worth_request(worth_client *c, const char *json, const char **reply)
{
    req_reset(c);
    req_s(c, json);
    req_add(c, "\n", 1);
    if (c->line)
        c->line[0] = 0; /* no stale reply if none comes */
    struct timespec dl;
    deadline_in(&dl, c->timeout_ms);
    int rc = send_all(c, c->req, c->req_len, &dl);
    /* Progress lines (train) precede the reply: skip them, restarting the clock on each. */
    while (rc == 0) {
        rc = recv_line(c, &dl);
        if (rc || !strstr(c->line, "\"progress\":") || strstr(c->line, "\"ok\":"))
            break;
        deadline_in(&dl, c->timeout_ms);
    }
    if (reply)
        *reply = c->line ? c->line : "";
    return rc ? rc : reply_status(c, NULL);
}

/* Starts a request {"op":OP,"model":MODEL (when not NULL) */
static void begin(worth_client *c, const char *op, const char *model)
{
    req_reset(c);
    req_s(c, "{\"op\":");
    req_str(c, op);
    if (model) {
        req_s(c, ",\"model\":");
        req_str(c, model);
    }
}

static double num(const cJSON *root, const char *name, double fallback)
{
    const cJSON *f = cJSON_GetObjectItemCaseSensitive(root, name);
    return cJSON_IsNumber(f) ? f->valuedouble : fallback;
}

int worth_model_create(worth_client *c, const char *spec_json, size_t *features)
{
    const char *p = spec_json;
    while (*p == ' ' || *p == '\t' || *p == '\n' || *p == '\r')
        p++;
    if (*p != '{')
        return set_err(c, WORTH_E_BAD_REQUEST, "the spec must be a JSON object");
    req_reset(c);
    req_s(c, "{\"op\":\"model.create\",");
    /* The spec's own members follow (an empty object leaves a trailing comma: worthd says so). */
    req_s(c, p + 1);
    cJSON *root = NULL;
    int rc = call(c, &root);
    if (rc == 0 && features)
        *features = (size_t)num(root, "features", 0);
    cJSON_Delete(root);
    return rc;
}

int worth_model_drop(worth_client *c, const char *model)
{
    begin(c, "model.drop", model);
    req_s(c, "}");
    return call(c, NULL);
}

/* Sends {"op":OP,"model":MODEL} and hands back the reply line (owned by c). */
static int line_request(worth_client *c, const char *op, const char *model, const char **json)
{
    begin(c, op, model);
    req_s(c, "}");
    int rc = call(c, NULL);
    if (json)
        *json = c->line;
    return rc;
}

int worth_model_info(worth_client *c, const char *model, const char **json)
{
    return line_request(c, model ? "model.get" : "model.list", model, json);
}

static void add_transition(worth_client *c, size_t dims, const worth_transition *t)
{
    req_s(c, "\"x\":");
    req_vec(c, t->x, dims);
    req_s(c, ",\"r\":");
    req_num(c, t->r);
    if (t->x_next) {
        req_s(c, ",\"x_next\":");
        req_vec(c, t->x_next, dims);
    }
    if (t->terminal)
        req_s(c, ",\"terminal\":true");
    if (t->source) {
        req_s(c, ",\"source\":");
        req_str(c, t->source);
    }
    if (!isnan(t->t)) {
        req_s(c, ",\"t\":");
        req_num(c, t->t);
    }
    if (!isnan(t->dt)) {
        req_s(c, ",\"dt\":");
        req_num(c, t->dt);
    }
}

int worth_observe(worth_client *c, const char *model, size_t dims, const worth_transition *t,
                  uint64_t *seq)
{
    begin(c, "observe", model);
    req_s(c, ",");
    add_transition(c, dims, t);
    req_s(c, "}");
    cJSON *root = NULL;
    int rc = call(c, &root);
    if (rc == 0 && seq)
        *seq = (uint64_t)num(root, "seq", 0);
    cJSON_Delete(root);
    return rc;
}

void worth_set_batch_max(worth_client *c, size_t n)
{
    c->batch_max = n ? n : 1;
}

int worth_flush(worth_client *c, uint64_t *seq)
{
    if (c->batch_n == 0)
        return 0;
    begin(c, "observe", c->batch_model);
    req_s(c, ",\"batch\":[");
    req_add(c, c->batch, c->batch_len);
    req_s(c, "]}");
    c->batch_n = c->batch_len = 0;
    cJSON *root = NULL;
    int rc = call(c, &root);
    if (rc == 0 && seq)
        *seq = (uint64_t)num(root, "seq", 0);
    if (rc && root) {
        const cJSON *idx = cJSON_GetObjectItemCaseSensitive(
            cJSON_GetObjectItemCaseSensitive(root, "error"), "index");
        if (cJSON_IsNumber(idx)) {
            size_t used = strlen(c->err_msg);
            if (used < sizeof c->err_msg - 32)
                snprintf(c->err_msg + used, sizeof c->err_msg - used, " (batch index %d)",
                         (int)idx->valuedouble);
        }
    }
    cJSON_Delete(root);
    return rc;
}

int worth_observe_queue(worth_client *c, const char *model, size_t dims, const worth_transition *t,
                        uint64_t *seq)
{
    if (c->batch_n && (strcmp(model, c->batch_model) != 0 || dims != c->batch_dims)) {
        int rc = worth_flush(c, seq);
        if (rc)
            return rc;
    }
    snprintf(c->batch_model, sizeof c->batch_model, "%s", model);
    c->batch_dims = dims;
    /* Build the element in the request buffer, then keep it in the batch buffer. */
    req_reset(c);
    req_s(c, c->batch_n ? ",{" : "{");
    add_transition(c, dims, t);
    req_s(c, "}");
    grow(&c->batch, &c->batch_cap, c->batch_len + c->req_len + 1);
    memcpy(c->batch + c->batch_len, c->req, c->req_len);
    c->batch_len += c->req_len;
    if (++c->batch_n >= c->batch_max)
        return worth_flush(c, seq);
    return 0;
}

int worth_observe_bulk(worth_client *c, const char *model, size_t dims, const double *records,
                       size_t count, int applied, uint64_t *seq)
{
    begin(c, "observe.bulk", model);
    req_fmt(c, ",\"count\":%zu", count);
    if (applied)
        req_s(c, ",\"ack\":\"applied\"");
    req_s(c, "}\n");
    struct timespec dl;
    deadline_in(&dl, c->timeout_ms);
    /* The header and the records go out together; worthd reads them as one stream. */
    size_t bytes = count * (2 * dims + 2) * sizeof(double);
    int rc = send_all(c, c->req, c->req_len, &dl);
    if (rc == 0)
        rc = send_all(c, records, bytes, &dl);
    if (rc == 0)
        rc = recv_line(c, &dl);
    if (rc)
        return rc;
    cJSON *root = NULL;
    rc = reply_status(c, &root);
    if (rc == 0 && seq)
        *seq = (uint64_t)num(root, "seq", 0);
    cJSON_Delete(root);
    return rc;
}

int worth_value(worth_client *c, const char *model, const double *x, size_t dims,
                const char *estimator, worth_value_t *out)
{
    begin(c, "value", model);
    req_s(c, ",\"x\":");
    req_vec(c, x, dims);
    if (estimator) {
        req_s(c, ",\"estimator\":");
        req_str(c, estimator);
    }
    req_s(c, "}");
    cJSON *root = NULL;
    int rc = call(c, &root);
    if (rc == 0) {
        memset(out, 0, sizeof *out);
        out->value = num(root, "value", NAN);
        out->sd = num(root, "sd", NAN);
        out->seq = (uint64_t)num(root, "seq", 0);
        const cJSON *es = cJSON_GetObjectItemCaseSensitive(root, "estimators");
        for (const cJSON *e = es ? es->child : NULL; e && out->n < WORTH_MAX_ESTIMATORS;
             e = e->next, out->n++) {
            snprintf(out->names[out->n], sizeof out->names[0], "%s", e->string);
            out->values[out->n] = cJSON_IsNumber(e) ? e->valuedouble : NAN;
        }
    }
    cJSON_Delete(root);
    return rc;
}

int worth_values(worth_client *c, const char *model, const double *xs, size_t count, size_t dims,
                 const char *estimator, double *out, uint64_t *seq)
{
    begin(c, "value", model);
    req_s(c, ",\"xs\":[");
    for (size_t i = 0; i < count; i++) {
        if (i)
            req_s(c, ",");
        req_vec(c, xs + i * dims, dims);
    }
    req_s(c, "]");
    if (estimator) {
        req_s(c, ",\"estimator\":");
        req_str(c, estimator);
    }
    req_s(c, "}");
    cJSON *root = NULL;
    int rc = call(c, &root);
    if (rc == 0) {
        const cJSON *vs = cJSON_GetObjectItemCaseSensitive(root, "values");
        size_t i = 0;
        for (const cJSON *v = vs ? vs->child : NULL; v && i < count; v = v->next, i++)
            out[i] = cJSON_IsNumber(v) ? v->valuedouble : NAN;
        if (seq)
            *seq = (uint64_t)num(root, "seq", 0);
    }
    cJSON_Delete(root);
    return rc;
}

int worth_stats(worth_client *c, const char *model, const char **json)
{
    return line_request(c, "stats", model, json);
}

int worth_checkpoint(worth_client *c, const char *model, const char *label, int64_t *id,
                     uint64_t *seq)
{
    begin(c, "checkpoint", model);
    if (label) {
        req_s(c, ",\"label\":");
        req_str(c, label);
    }
    req_s(c, "}");
    cJSON *root = NULL;
    int rc = call(c, &root);
    if (rc == 0) {
        if (id)
            *id = (int64_t)num(root, "checkpoint", 0);
        if (seq)
            *seq = (uint64_t)num(root, "seq", 0);
    }
    cJSON_Delete(root);
    return rc;
}

int worth_checkpoints(worth_client *c, const char *model, const char **json)
{
    return line_request(c, "checkpoints", model, json);
}

int worth_rollback(worth_client *c, const char *model, int64_t id, int replay, char exclude,
                   double lo, double hi, uint64_t *undone, uint64_t *replayed)
{
    begin(c, "rollback", model);
    req_fmt(c, ",\"checkpoint\":%lld", (long long)id);
    if (replay)
        req_s(c, ",\"replay\":true");
    if (exclude == 's' || exclude == 't') {
        req_s(c, exclude == 's' ? ",\"exclude\":{\"seq\":[" : ",\"exclude\":{\"t\":[");
        req_num(c, lo);
        req_s(c, ",");
        req_num(c, hi);
        req_s(c, "]}");
    }
    req_s(c, "}");
    cJSON *root = NULL;
    int rc = call(c, &root);
    if (rc == 0) {
        if (undone)
            *undone = (uint64_t)num(root, "undone", 0);
        if (replayed)
            *replayed = (uint64_t)num(root, "replayed", 0);
    }
    cJSON_Delete(root);
    return rc;
}

int worth_backup(worth_client *c, const char *name, char *path, size_t path_len, uint64_t *bytes)
{
    begin(c, "backup", NULL);
    if (name) {
        req_s(c, ",\"name\":");
        req_str(c, name);
    }
    req_s(c, "}");
    cJSON *root = NULL;
    int rc = call(c, &root);
    if (rc == 0 && bytes)
        *bytes = (uint64_t)num(root, "bytes", 0);
    if (rc == 0 && path && path_len) {
        const cJSON *p = cJSON_GetObjectItemCaseSensitive(root, "path");
        snprintf(path, path_len, "%s", cJSON_IsString(p) && p->valuestring ? p->valuestring : "");
    }
    cJSON_Delete(root);
    return rc;
}

int worth_train(worth_client *c, const char *model, const char *estimator, unsigned passes,
                worth_progress_fn progress, void *ctx, worth_train_t *out)
{
    begin(c, "train", model);
    req_s(c, ",\"estimator\":");
    req_str(c, estimator);
    req_fmt(c, ",\"passes\":%u}\n", passes);
    struct timespec dl;
    deadline_in(&dl, c->timeout_ms);
    int rc = send_all(c, c->req, c->req_len, &dl);
    while (rc == 0) {
        /* Each progress line restarts the clock: a long training is alive while it reports. */
        deadline_in(&dl, c->timeout_ms);
        rc = recv_line(c, &dl);
        if (rc)
            break;
        cJSON *root = cJSON_Parse(c->line);
        const cJSON *pg = cJSON_GetObjectItemCaseSensitive(root, "progress");
        if (pg) {
            if (progress)
                progress(ctx, (unsigned)num(pg, "pass", 0), (unsigned)num(pg, "of", 0),
                         num(pg, "change", NAN));
            cJSON_Delete(root);
            continue;
        }
        cJSON_Delete(root);
        root = NULL;
        rc = reply_status(c, &root);
        if (rc == 0 && out) {
            out->passes = (unsigned)num(root, "passes", 0);
            out->change = num(root, "change", NAN);
            out->converged = cJSON_IsTrue(cJSON_GetObjectItemCaseSensitive(root, "converged"));
        }
        cJSON_Delete(root);
        break;
    }
    return rc;
}
