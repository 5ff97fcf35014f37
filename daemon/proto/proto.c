/*
 * proto.c - requests of protocol v1 (schema/protocol.md) and the model registry.
 *
 * Loop thread only.  Every request is parsed into a cJSON tree allocated from
 * the arena (arena.h), validated completely, then answered; the arena is
 * reset when the request is done, so no cJSON pointer survives a request.
 * Replies are formatted by hand into one growable buffer (no allocation once
 * it has reached its high-water mark), numbers with 17 significant digits so
 * they round-trip, non-finite numbers as null.
 *
 * It must never: block (a full queue parks the request), apply part of a
 * batch or bulk (validate all, then commit all), answer a request out of
 * order on its connection (a train request holds the connection until its
 * reply), or log a token.
 */
#include "proto/proto.h"

#include <cjson/cJSON.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <string.h>
#include <stdlib.h>
#include <time.h>

#include "proto/arena.h"
#include "store/backup.h"
#include "common/mem.h"
#include "say.h"
#include "proto/spec.h"
#include "worth/errors.h"

#if !defined(__BYTE_ORDER__) || __BYTE_ORDER__ != __ORDER_LITTLE_ENDIAN__
#error "bulk records are little-endian doubles; this build assumes a little-endian host"
#endif

#ifndef WORTH_VERSION
#define WORTH_VERSION "0.0.0"
#endif

/* Largest number of training passes one request may ask for. */
#define MAX_PASSES 100000

struct out {
    char *b;
    size_t len, cap;
};

/*
 * A model as the loop sees it: its learner and how far its log is durable.
 * A dropped model's slot lives on until its learner has exited, the writer
 * has released it and no waiting reply refers to it.
 */
struct slot {
    struct learner *l;
    uint64_t durable; /* last seq committed */
    uint64_t failed;  /* last seq whose commit failed */
    int fail_code;    /* and its error code */
    char why[200];    /* the reason of the last failure */
    int gone;         /* dropped */
    int exited, released;
    unsigned refs; /* waiting replies that refer to it */
};

/*
 * A model that start-up could not rebuild from its own rows (recover.c): quarantined.  It
 * has no learner; it keeps its name taken (model.create answers model_exists) until
 * model.drop, and every other request naming it answers damaged.
 */
struct damaged {
    char *name;   /* owned */
    int64_t id;   /* its row in the models table */
    uint64_t seq; /* the offending transition, 0 when no single row is to blame */
    char *reason; /* owned */
};

struct proto {
    const server_opts_t *o;
    struct writer *w;
    struct server *srv;
    struct slot **models; /* registry, o->max_models entries, first n used */
    size_t n;
    struct slot **dropped; /* dropped, not yet freed */
    size_t n_dropped, cap_dropped;
    struct damaged *damaged; /* quarantined at start-up, first n_damaged used */
    size_t n_damaged;
    learner_post_fn post;
    learner_wake_fn wake;
    void *ctx;
    struct out out;
    /* Per-request scratch, sized for the largest model (grown on create). */
    double *vals, *sds;
    learner_sample_t *hist; /* history request scratch */
    const char **srcs;      /* max_batch source names of a batch */
    char err[512];
};

/* ---- output ---------------------------------------------------------------------------- */

static void out_need(struct out *o, size_t more)
{
    if (o->len + more <= o->cap)
        return;
    size_t cap = o->cap ? o->cap : 4096;
    while (cap < o->len + more)
        cap *= 2;
    o->b = mem_realloc(o->b, cap);
    o->cap = cap;
}

static void out_raw(struct out *o, const char *s, size_t n)
{
    out_need(o, n);
    memcpy(o->b + o->len, s, n);
    o->len += n;
}

static void out_s(struct out *o, const char *s)
{
    out_raw(o, s, strlen(s));
}

static void out_fmt(struct out *o, const char *fmt, ...) __attribute__((format(printf, 2, 3)));
static void out_fmt(struct out *o, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    out_need(o, 64);
    int n = vsnprintf(o->b + o->len, o->cap - o->len, fmt, ap);
    va_end(ap);
    if (n >= 0 && (size_t)n >= o->cap - o->len) {
        out_need(o, (size_t)n + 1);
        va_start(ap, fmt);
        vsnprintf(o->b + o->len, o->cap - o->len, fmt, ap);
        va_end(ap);
    }
    if (n > 0)
        o->len += (size_t)n;
}

/* A double as JSON: 17 significant digits, null when not finite. */
static void out_num(struct out *o, double v)
{
    if (isfinite(v))
        out_fmt(o, "%.17g", v);
    else
        out_s(o, "null");
}

/* A string as a JSON string literal. */
static void out_str(struct out *o, const char *s)
{
    out_need(o, 2);
    o->b[o->len++] = '"';
    for (const unsigned char *p = (const unsigned char *)s; *p; p++) {
        if (*p == '"' || *p == '\\') {
            char esc[2] = {'\\', (char)*p};
            out_raw(o, esc, 2);
        } else if (*p < 0x20) {
            out_fmt(o, "\\u%04x", *p);
        } else {
            out_raw(o, (const char *)p, 1);
        }
    }
    out_raw(o, "\"", 1);
}

/* Starts a reply object, with the request's id when it had one. */
static void out_begin(struct out *o, int ok, const char *id)
{
    o->len = 0;
    out_s(o, ok ? "{\"ok\":true" : "{\"ok\":false");
    if (id) {
        out_s(o, ",\"id\":");
        out_s(o, id);
    }
}

/* Appends bytes to the connection's ack buffer; returns their offset. */
static size_t ack_text(proto_conn_t *pc, const char *b, size_t n)
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
static void ack_push(proto_conn_t *pc, struct slot *slot, uint64_t seq, const char *b, size_t n,
                     const char *id)
{
    if (pc->n_acks == pc->cap_acks) {
        pc->cap_acks = pc->cap_acks ? 2 * pc->cap_acks : 16;
        pc->acks = mem_realloc(pc->acks, pc->cap_acks * sizeof *pc->acks);
    }
    struct proto_ack *a = &pc->acks[pc->n_acks++];
    a->slot = slot;
    a->seq = seq;
    a->off = ack_text(pc, b, n);
    a->len = n;
    a->id_len = id ? strlen(id) : 0;
    a->id_off = id ? ack_text(pc, id, a->id_len) : 0;
    if (slot)
        slot->refs++;
}

/* Sends a finished reply line, after any that still wait on this connection. */
static void send_line(struct conn *c, const char *b, size_t n)
{
    proto_conn_t *pc = conn_proto(c);
    if (pc->ack_head == pc->n_acks)
        conn_send(c, b, n);
    else
        ack_push(pc, NULL, 0, b, n, NULL);
}

static void out_end(struct out *o, struct conn *c)
{
    out_raw(o, "}\n", 2);
    send_line(c, o->b, o->len);
}

/* Formats an error reply line into p->out. */
static void format_error(struct proto *p, const char *id, int code, long index, const char *msg)
{
    struct out *o = &p->out;
    out_begin(o, 0, id);
    out_s(o, ",\"error\":{\"code\":");
    out_str(o, worth_err_name(code));
    out_s(o, ",\"message\":");
    out_str(o, msg);
    if (index >= 0)
        out_fmt(o, ",\"index\":%ld", index);
    out_s(o, "}}\n");
}

static void reply_error(struct proto *p, struct conn *c, const char *id, int code, long index,
                        const char *fmt, ...) __attribute__((format(printf, 6, 7)));
static void reply_error(struct proto *p, struct conn *c, const char *id, int code, long index,
                        const char *fmt, ...)
{
    char msg[600];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(msg, sizeof msg, fmt, ap);
    va_end(ap);
    format_error(p, id, code, index, msg);
    send_line(c, p->out.b, p->out.len);
}

/* ---- registry -------------------------------------------------------------------------- */

static struct slot *find_slot(struct proto *p, const char *name, size_t *at)
{
    for (size_t i = 0; i < p->n; i++)
        if (strcmp(learner_name(p->models[i]->l), name) == 0) {
            if (at)
                *at = i;
            return p->models[i];
        }
    return NULL;
}

static struct learner *find_model(struct proto *p, const char *name, size_t *at)
{
    struct slot *sl = find_slot(p, name, at);
    return sl ? sl->l : NULL;
}

/* The quarantined model of that name, or NULL. */
static struct damaged *find_damaged(struct proto *p, const char *name, size_t *at)
{
    for (size_t i = 0; i < p->n_damaged; i++)
        if (strcmp(p->damaged[i].name, name) == 0) {
            if (at)
                *at = i;
            return &p->damaged[i];
        }
    return NULL;
}

/* Answers a request naming a quarantined model: damaged, with the row and the remedy. */
static void reply_damaged(struct proto *p, struct conn *c, const char *id, const struct damaged *dm)
{
    char msg[900], fix[128] = "Repair it while worthd is stopped (its start-up log says how)";
    if (dm->seq)
        snprintf(fix, sizeof fix,
                 "Correct or delete transition %llu of its log while worthd is stopped",
                 (unsigned long long)dm->seq);
    snprintf(msg, sizeof msg,
             "model \"%.64s\" is quarantined since start-up and not served: %s.  %s, or drop "
             "the model (model.drop) and create it again",
             dm->name, dm->reason, fix);
    struct out *o = &p->out;
    out_begin(o, 0, id);
    out_s(o, ",\"error\":{\"code\":");
    out_str(o, worth_err_name(WORTH_E_DAMAGED));
    out_s(o, ",\"message\":");
    out_str(o, msg);
    out_fmt(o, ",\"seq\":%llu}}\n", (unsigned long long)dm->seq);
    send_line(c, o->b, o->len);
}

/* The slot of learner l, live or dropped. */
static struct slot *slot_of(struct proto *p, const struct learner *l)
{
    for (size_t i = 0; i < p->n; i++)
        if (p->models[i]->l == l)
            return p->models[i];
    for (size_t i = 0; i < p->n_dropped; i++)
        if (p->dropped[i]->l == l)
            return p->dropped[i];
    return NULL;
}

static struct slot *new_slot(struct learner *l, uint64_t durable)
{
    struct slot *sl = mem_calloc(1, sizeof *sl);
    sl->l = l;
    sl->durable = durable;
    return sl;
}

/* Frees a dropped slot once nothing refers to it any more. */
static void maybe_free_dropped(struct proto *p, struct slot *sl)
{
    if (!sl->gone || !sl->exited || !sl->released || sl->refs)
        return;
    for (size_t i = 0; i < p->n_dropped; i++)
        if (p->dropped[i] == sl) {
            p->dropped[i] = p->dropped[--p->n_dropped];
            break;
        }
    learner_free(sl->l);
    mem_free(sl);
}

/* Sends every reply at the front of c's queue that is ready. */
static void flush_acks(struct proto *p, struct conn *c)
{
    proto_conn_t *pc = conn_proto(c);
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
                format_error(p, idp, sl->fail_code, -1, sl->why);
                conn_send(c, p->out.b, p->out.len);
            } else if (sl->durable >= a->seq) {
                conn_send(c, pc->ackbuf + a->off, a->len);
            } else if (sl->gone) {
                format_error(p, idp, WORTH_E_NO_SUCH_MODEL, -1,
                             "the model was dropped before these transitions were durable");
                conn_send(c, p->out.b, p->out.len);
            } else {
                break;
            }
            sl->refs--;
            maybe_free_dropped(p, sl);
        }
        pc->ack_head++;
    }
    if (pc->ack_head == pc->n_acks)
        pc->n_acks = pc->ack_head = pc->ack_len = 0;
}

static void flush_one(struct conn *c, void *ctx)
{
    flush_acks(ctx, c);
}

struct fail_ctx {
    struct proto *p;
    struct slot *sl;
    uint64_t upto;
};

/* Marks the replies waiting for sl's seqs in (durable, upto] as failed. */
static void fail_one(struct conn *c, void *ctx)
{
    struct fail_ctx *f = ctx;
    proto_conn_t *pc = conn_proto(c);
    for (size_t i = pc->ack_head; i < pc->n_acks; i++) {
        struct proto_ack *a = &pc->acks[i];
        if (a->slot == f->sl && a->seq > f->sl->durable && a->seq <= f->upto)
            a->seq = 0;
    }
    flush_acks(f->p, c);
}

/* Queues the reply in p->out to be sent once sl's log is durable up to seq. */
static void send_durable(struct proto *p, struct conn *c, struct slot *sl, uint64_t seq,
                         const char *id)
{
    proto_conn_t *pc = conn_proto(c);
    ack_push(pc, sl, seq, p->out.b, p->out.len, id);
    flush_acks(p, c);
}

/* ---- request fields -------------------------------------------------------------------- */

/* A request being handled: its tree, id text and connection. */
struct req {
    struct proto *p;
    struct conn *c;
    cJSON *root;
    const char *id; /* printed id, or NULL */
};

#define FAIL(rq, code, ...) reply_error((rq)->p, (rq)->c, (rq)->id, (code), -1, __VA_ARGS__)
/* FAIL, then the value a request handler returns when it has answered. */
#define fail_done(rq, code, ...) (FAIL(rq, code, __VA_ARGS__), PROTO_DONE)

static const cJSON *field(const cJSON *obj, const char *name)
{
    return cJSON_GetObjectItemCaseSensitive(obj, name);
}

/* Returns 1 when obj has two members of the same name (cJSON keeps both). */
static int dup_key(const cJSON *obj, const char **which)
{
    for (const cJSON *a = obj->child; a; a = a->next)
        for (const cJSON *b = a->next; b; b = b->next)
            if (a->string && b->string && strcmp(a->string, b->string) == 0) {
                *which = a->string;
                return 1;
            }
    return 0;
}

/* Returns 1 unless obj has a member not in the NULL-terminated list allowed. */
static int only_keys(const cJSON *obj, const char *const *allowed, const char **bad)
{
    for (const cJSON *a = obj->child; a; a = a->next) {
        int ok = 0;
        for (const char *const *k = allowed; *k && !ok; k++)
            ok = a->string && strcmp(a->string, *k) == 0;
        if (!ok) {
            *bad = a->string ? a->string : "";
            return 0;
        }
    }
    return 1;
}

/* The required string field name; replies bad_request and returns NULL when absent. */
static const char *need_string(struct req *rq, const char *name)
{
    const cJSON *f = field(rq->root, name);
    if (!cJSON_IsString(f) || !f->valuestring) {
        FAIL(rq, WORTH_E_BAD_REQUEST, "\"%s\" must be a string", name);
        return NULL;
    }
    return f->valuestring;
}

/* Looks up the model named by the request's "model"; replies and returns NULL on failure. */
static struct learner *need_model(struct req *rq)
{
    const char *name = need_string(rq, "model");
    if (!name)
        return NULL;
    struct learner *l = find_model(rq->p, name, NULL);
    const struct damaged *dm = l ? NULL : find_damaged(rq->p, name, NULL);
    if (dm)
        reply_damaged(rq->p, rq->c, rq->id, dm);
    else if (!l)
        FAIL(rq, WORTH_E_NO_SUCH_MODEL, "no model named \"%.64s\"", name);
    return l;
}

/* The quarantined model the request's "model" names, or NULL (then nothing is answered). */
static const struct damaged *named_damaged(struct req *rq)
{
    const cJSON *f = field(rq->root, "model");
    return cJSON_IsString(f) && f->valuestring ? find_damaged(rq->p, f->valuestring, NULL) : NULL;
}

/*
 * Reads an optional number; returns 1 (value in *v, or *v untouched when
 * absent) or 0 with code and message set.
 */
static int opt_number(const cJSON *obj, const char *name, double *v, int *code, char *err,
                      size_t errlen, const char *where)
{
    const cJSON *f = field(obj, name);
    if (!f)
        return 1;
    if (!cJSON_IsNumber(f) || !isfinite(f->valuedouble)) {
        *code = WORTH_E_BAD_NUMBER;
        snprintf(err, errlen, "%s\"%s\" must be a finite number", where, name);
        return 0;
    }
    *v = f->valuedouble;
    return 1;
}

/* Copies a JSON array of exactly n finite numbers into out. */
static int get_vector(const cJSON *arr, size_t n, double *out, const char *name, int *code,
                      char *err, size_t errlen, const char *where)
{
    if (!cJSON_IsArray(arr)) {
        *code = WORTH_E_BAD_REQUEST;
        snprintf(err, errlen, "%s\"%s\" must be an array of numbers", where, name);
        return 0;
    }
    size_t k = 0;
    for (const cJSON *e = arr->child; e; e = e->next, k++) {
        if (k >= n)
            break;
        if (!cJSON_IsNumber(e) || !isfinite(e->valuedouble)) {
            *code = WORTH_E_BAD_NUMBER;
            snprintf(err, errlen, "%s%s[%zu] is not a finite number", where, name, k);
            return 0;
        }
        out[k] = e->valuedouble;
    }
    size_t len = (size_t)cJSON_GetArraySize(arr);
    if (len != n) {
        *code = WORTH_E_BAD_DIMENSION;
        snprintf(err, errlen, "%s\"%s\" has %zu values, the model has %zu", where, name, len, n);
        return 0;
    }
    return 1;
}

/*
 * Parses one transition object into slot r of model l.  where prefixes error
 * messages ("" or "batch[3]: ").  Returns 0 or a worth code with err set;
 * *src gets the source name (borrowed from the tree; NULL = default).
 */
/* Largest |r| accepted.  Squares of TD errors must stay finite in a double for the
 * estimators and their running statistics; 1e12 leaves them room (1e24 each) and is far
 * beyond any reward a plant reports in its own units. */
#define PROTO_MAX_ABS_R 1e12

static int parse_obs(struct learner *l, const cJSON *o, int top, learner_rec_t *r, const char **src,
                     char *err, size_t errlen, const char *where)
{
    static const char *const keys_batch[] = {"x",      "r", "x_next", "terminal",
                                             "source", "t", "dt",     NULL};
    static const char *const keys_top[] = {"op",       "id",     "model", "x",  "r",   "x_next",
                                           "terminal", "source", "t",     "dt", "ack", NULL};
    size_t d = model_dims(learner_model(l));
    int code = 0;
    const char *bad;
    if (!cJSON_IsObject(o)) {
        snprintf(err, errlen, "%sa transition must be an object", where);
        return WORTH_E_BAD_REQUEST;
    }
    if (dup_key(o, &bad)) {
        snprintf(err, errlen, "%s\"%s\" appears twice", where, bad);
        return WORTH_E_BAD_REQUEST;
    }
    if (!only_keys(o, top ? keys_top : keys_batch, &bad)) {
        snprintf(err, errlen, "%sunknown field \"%.64s\"", where, bad);
        return WORTH_E_BAD_REQUEST;
    }
    const cJSON *term = field(o, "terminal");
    if (term && !cJSON_IsBool(term)) {
        snprintf(err, errlen, "%s\"terminal\" must be true or false", where);
        return WORTH_E_BAD_REQUEST;
    }
    r->type = LREC_OBS;
    r->terminal = cJSON_IsTrue(term);
    const cJSON *x = field(o, "x"), *xn = field(o, "x_next"), *rw = field(o, "r");
    if (!x) {
        snprintf(err, errlen, "%s\"x\" is required", where);
        return WORTH_E_BAD_REQUEST;
    }
    if (!get_vector(x, d, r->v, "x", &code, err, errlen, where))
        return code;
    if (!rw) {
        snprintf(err, errlen, "%s\"r\" is required", where);
        return WORTH_E_BAD_REQUEST;
    }
    if (!opt_number(o, "r", &r->r, &code, err, errlen, where))
        return code;
    if (fabs(r->r) > PROTO_MAX_ABS_R) {
        snprintf(err, errlen, "%s\"r\" is beyond +-%g", where, PROTO_MAX_ABS_R);
        return WORTH_E_BAD_NUMBER;
    }
    if (xn) {
        if (!get_vector(xn, d, r->v + d, "x_next", &code, err, errlen, where))
            return code;
    } else if (!r->terminal) {
        snprintf(err, errlen, "%s\"x_next\" is required unless terminal", where);
        return WORTH_E_BAD_REQUEST;
    }
    r->t_s = NAN;
    r->dt_s = NAN;
    if (!opt_number(o, "t", &r->t_s, &code, err, errlen, where) ||
        !opt_number(o, "dt", &r->dt_s, &code, err, errlen, where))
        return code;
    if (!isnan(r->dt_s) && r->dt_s < 0) {
        snprintf(err, errlen, "%s\"dt\" must be >= 0", where);
        return WORTH_E_BAD_PARAM;
    }
    const cJSON *s = field(o, "source");
    *src = NULL;
    r->src[0] = 0;
    if (s) {
        if (!cJSON_IsString(s) || !s->valuestring) {
            snprintf(err, errlen, "%s\"source\" must be a string", where);
            return WORTH_E_BAD_REQUEST;
        }
        if (strlen(s->valuestring) > MODEL_NAME_MAX) {
            snprintf(err, errlen, "%s\"source\" is longer than %d bytes", where, MODEL_NAME_MAX);
            return WORTH_E_BAD_PARAM;
        }
        *src = s->valuestring;
        snprintf(r->src, sizeof r->src, "%s", s->valuestring);
    }
    r->est = r->passes = 0;
    r->conn_id = 0;
    r->job = NULL;
    return 0;
}

/* Reads the optional "ack": 0 for "durable" (the default), 1 for "applied", -1 if malformed. */
static int ack_mode(const cJSON *root)
{
    const cJSON *a = cJSON_GetObjectItemCaseSensitive(root, "ack");
    if (!a)
        return 0;
    if (!cJSON_IsString(a))
        return -1;
    if (strcmp(a->valuestring, "durable") == 0)
        return 0;
    if (strcmp(a->valuestring, "applied") == 0)
        return 1;
    return -1;
}

/* Replies to an accepted observe: now when applied, else once its last seq is durable. */
static void ack_observe(struct proto *p, struct conn *c, const char *id, struct learner *l,
                        uint64_t seq, long count, int applied)
{
    struct out *o = &p->out;
    out_begin(o, 1, id);
    out_fmt(o, ",\"seq\":%llu", (unsigned long long)seq);
    if (count >= 0)
        out_fmt(o, ",\"count\":%ld", count);
    if (applied) {
        out_s(o, ",\"durable\":false");
        out_end(o, c);
        return;
    }
    out_s(o, ",\"durable\":true}\n");
    send_durable(p, c, slot_of(p, l), seq, id);
}

/* ---- requests -------------------------------------------------------------------------- */

static int do_hello(struct req *rq)
{
    struct out *o = &rq->p->out;
    out_begin(o, 1, rq->id);
    out_fmt(o, ",\"server\":\"worthd\",\"version\":\"%s\",\"protocol\":%d", WORTH_VERSION,
            PROTO_VERSION);
    out_end(o, rq->c);
    return PROTO_DONE;
}

/* Constant-time comparison: the time taken does not depend on where the strings differ. */
static int token_equal(const char *a, const char *b)
{
    size_t la = strlen(a), lb = strlen(b);
    volatile unsigned char diff = (unsigned char)(la != lb);
    for (size_t i = 0; i < lb; i++)
        diff |= (unsigned char)(a[i % (la ? la : 1)] ^ b[i]);
    return diff == 0 && la == lb;
}

static int do_auth(struct req *rq)
{
    proto_conn_t *pc = conn_proto(rq->c);
    const cJSON *t = field(rq->root, "token");
    const char *want = rq->p->o->token;
    if (!want) {
        pc->authed = 1; /* nothing to check: accept, as a client may always send auth */
    } else if (cJSON_IsString(t) && t->valuestring && token_equal(t->valuestring, want)) {
        pc->authed = 1;
    } else {
        say_warn("connection %llu: authentication failed", (unsigned long long)conn_id(rq->c));
        FAIL(rq, WORTH_E_UNAUTHORIZED, "wrong or missing token");
        conn_close_after_reply(rq->c);
        return PROTO_DONE;
    }
    out_begin(&rq->p->out, 1, rq->id);
    out_end(&rq->p->out, rq->c);
    return PROTO_DONE;
}

static void ensure_scratch(struct proto *p, size_t n_est)
{
    (void)n_est;
    if (!p->vals) {
        p->vals = mem_calloc(MODEL_MAX_EST, sizeof *p->vals);
        p->sds = mem_calloc(MODEL_MAX_EST, sizeof *p->sds);
    }
}

/* Remembers the request's id on the connection for a reply that comes later. */
static void keep_id(struct req *rq)
{
    proto_conn_t *pc = conn_proto(rq->c);
    pc->has_id = rq->id != NULL;
    if (rq->id)
        snprintf(pc->id, sizeof pc->id, "%s", rq->id);
}

static int do_create(struct req *rq)
{
    struct proto *p = rq->p;
    spec_t *s = NULL;
    int rc = spec_parse_within(rq->root, p->o->max_features, &s, p->err, sizeof p->err);
    if (rc)
        return fail_done(rq, rc, "%s", p->err);
    if (find_model(p, s->name, NULL) || find_damaged(p, s->name, NULL)) {
        FAIL(rq, WORTH_E_MODEL_EXISTS, "a model named \"%s\" exists%s", s->name,
             find_damaged(p, s->name, NULL) ? " (quarantined: drop it first)" : "");
        spec_free(s);
        return PROTO_DONE;
    }
    if (p->n + p->n_damaged >= p->o->max_models) {
        FAIL(rq, WORTH_E_TOO_LARGE, "the daemon holds its limit of %zu models", p->o->max_models);
        spec_free(s);
        return PROTO_DONE;
    }
    /* The memory the model implies, checked before its estimators are allocated. */
    learner_opts_t qo;
    proto_learner_opts(p, &qo);
    s->m.max_bytes = (double)p->o->max_model_mb * 1048576.0;
    s->m.base_bytes = learner_footprint(s->m.feat.dims, &qo);
    struct model *m = NULL;
    rc = model_new(&s->m, &m, p->err, sizeof p->err);
    if (rc) {
        FAIL(rq, rc, "%s", p->err);
        spec_free(s);
        return PROTO_DONE;
    }
    char *canonical = s->canonical;
    s->canonical = NULL;
    learner_opts_t lo;
    proto_learner_opts(p, &lo);
    struct learner *l = learner_new(s->name, canonical, m, &lo, p->post, p->wake, p->ctx);
    p->models[p->n++] = new_slot(l, 0);
    say_info("model %s created: %zu dims, %zu features, %zu estimators", s->name, model_dims(m),
             model_features(m), model_n_est(m));
    /* The reply comes when the model's row has committed. */
    writer_create_model(p->w, l, s->name, learner_spec(l), model_features(m), conn_id(rq->c));
    conn_proto(rq->c)->creating = l;
    keep_id(rq);
    conn_wait(rq->c);
    spec_free(s);
    return PROTO_DONE;
}

static void out_est_names(struct out *o, const struct model *m)
{
    out_s(o, "[");
    for (size_t i = 0; i < model_n_est(m); i++) {
        if (i)
            out_s(o, ",");
        out_str(o, model_est_name(m, i));
    }
    out_s(o, "]");
}

/* Writes "model":NAME,"dims":D,"features":N,"estimators":[NAMES], shared by list and get. */
static void out_model_head(struct out *o, const struct learner *l, const struct model *m)
{
    out_s(o, "\"model\":");
    out_str(o, learner_name(l));
    out_fmt(o, ",\"dims\":%zu,\"features\":%zu,\"estimators\":", model_dims(m), model_features(m));
    out_est_names(o, m);
}

/* Writes "model":NAME,"state":"damaged","seq":N,"reason":WHY, shared by list and get. */
static void out_damaged(struct out *o, const struct damaged *dm)
{
    out_s(o, "\"model\":");
    out_str(o, dm->name);
    out_fmt(o, ",\"state\":\"damaged\",\"seq\":%llu,\"reason\":", (unsigned long long)dm->seq);
    out_str(o, dm->reason);
}

static int do_list(struct req *rq)
{
    struct proto *p = rq->p;
    struct out *o = &p->out;
    out_begin(o, 1, rq->id);
    out_s(o, ",\"models\":[");
    for (size_t i = 0; i < p->n; i++) {
        const struct model *m = learner_model(p->models[i]->l);
        learner_stats_t st;
        learner_stats(p->models[i]->l, &st);
        out_s(o, i ? ",{" : "{");
        out_model_head(o, p->models[i]->l, m);
        out_fmt(o, ",\"received\":%llu,\"applied\":%llu,\"state\":\"ok\"}",
                (unsigned long long)st.received, (unsigned long long)st.applied);
    }
    for (size_t i = 0; i < p->n_damaged; i++) {
        out_s(o, p->n || i ? ",{" : "{");
        out_damaged(o, &p->damaged[i]);
        out_s(o, "}");
    }
    out_s(o, "]");
    out_end(o, rq->c);
    return PROTO_DONE;
}

static int do_get(struct req *rq)
{
    const struct damaged *dm = named_damaged(rq);
    if (dm) {
        out_begin(&rq->p->out, 1, rq->id);
        out_s(&rq->p->out, ",");
        out_damaged(&rq->p->out, dm);
        out_end(&rq->p->out, rq->c);
        return PROTO_DONE;
    }
    struct learner *l = need_model(rq);
    if (!l)
        return PROTO_DONE;
    const struct model *m = learner_model(l);
    learner_stats_t st;
    learner_stats(l, &st);
    struct out *o = &rq->p->out;
    out_begin(o, 1, rq->id);
    out_s(o, ",");
    out_model_head(o, l, m);
    out_s(o, ",\"primary\":");
    out_str(o, model_est_name(m, model_primary(m)));
    out_fmt(o, ",\"received\":%llu,\"applied\":%llu,\"state\":\"ok\",\"spec\":",
            (unsigned long long)st.received, (unsigned long long)st.applied);
    out_s(o, learner_spec(l));
    out_end(o, rq->c);
    return PROTO_DONE;
}

/*
 * Takes a model out of the registry: its learner stops, its waiting replies
 * fail.  With tell_writer, the writer marks it dropped in the database and
 * replies to conn_id (0: nobody) whether that was stored.
 */
static void unregister(struct proto *p, size_t at, int tell_writer, uint64_t conn_id)
{
    struct slot *sl = p->models[at];
    p->models[at] = p->models[--p->n];
    sl->gone = 1;
    learner_stop(sl->l, 1);
    if (tell_writer)
        writer_drop_model(p->w, sl->l, conn_id);
    else
        sl->released = 1;
    if (p->n_dropped == p->cap_dropped) {
        p->cap_dropped = p->cap_dropped ? 2 * p->cap_dropped : 8;
        p->dropped = mem_realloc(p->dropped, p->cap_dropped * sizeof *p->dropped);
    }
    p->dropped[p->n_dropped++] = sl;
    server_each_conn(p->srv, flush_one, p);
}

/* Drops the quarantined model at `at`: marked dropped in the database, its name free again. */
static void forget_damaged(struct proto *p, size_t at, uint64_t conn_id)
{
    struct damaged *dm = &p->damaged[at];
    writer_drop_damaged(p->w, dm->id, dm->name, conn_id);
    say_info("model %s (quarantined) dropped", dm->name);
    mem_free(dm->name);
    mem_free(dm->reason);
    p->damaged[at] = p->damaged[--p->n_damaged];
}

static int do_drop(struct req *rq)
{
    struct proto *p = rq->p;
    const char *name = need_string(rq, "model");
    if (!name)
        return PROTO_DONE;
    size_t at = 0;
    if (!find_model(p, name, &at) && find_damaged(p, name, &at)) {
        keep_id(rq); /* the writer replies, as for any drop */
        conn_wait(rq->c);
        forget_damaged(p, at, conn_id(rq->c));
        return PROTO_DONE;
    }
    if (!find_model(p, name, &at))
        return fail_done(rq, WORTH_E_NO_SUCH_MODEL, "no model named \"%.64s\"", name);
    say_info("model %s dropped", name);
    /* The reply comes from the writer: whether the drop is stored, or only in memory. */
    keep_id(rq);
    conn_wait(rq->c);
    unregister(p, at, 1, conn_id(rq->c));
    return PROTO_DONE;
}

/* Parks the request until l frees space; nothing has been changed. */
static int park(struct learner *l)
{
    learner_want_space(l);
    return PROTO_PARK;
}

static int do_observe(struct req *rq)
{
    struct proto *p = rq->p;
    struct learner *l = need_model(rq);
    if (!l)
        return PROTO_DONE;
    const cJSON *batch = field(rq->root, "batch");
    int applied = ack_mode(rq->root);
    if (applied < 0)
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"ack\" must be \"durable\" or \"applied\"");
    if (!batch) {
        if (learner_space(l) < 1)
            return park(l);
        learner_rec_t *r = learner_slot(l, 0);
        const char *src = NULL;
        int rc = parse_obs(l, rq->root, 1, r, &src, p->err, sizeof p->err, "");
        if (!rc)
            rc = learner_sources_fit(l, &src, 1, NULL, p->err, sizeof p->err);
        if (rc)
            return fail_done(rq, rc, "%s", p->err);
        uint64_t seq = learner_commit(l, 1);
        ack_observe(p, rq->c, rq->id, l, seq, -1, applied);
        return PROTO_DONE;
    }
    static const char *const keys[] = {"op", "id", "model", "batch", "ack", NULL};
    const char *bad;
    if (!only_keys(rq->root, keys, &bad))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "unknown field \"%.64s\" beside \"batch\"", bad);
    if (!cJSON_IsArray(batch))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"batch\" must be an array");
    size_t k = (size_t)cJSON_GetArraySize(batch);
    if (k == 0)
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"batch\" is empty");
    if (k > p->o->max_batch)
        return fail_done(rq, WORTH_E_TOO_LARGE, "batch of %zu exceeds the limit %zu", k,
                         p->o->max_batch);
    if (learner_space(l) < k)
        return park(l);
    size_t i = 0;
    for (const cJSON *e = batch->child; e; e = e->next, i++) {
        char where[32];
        snprintf(where, sizeof where, "batch[%zu]: ", i);
        int rc = parse_obs(l, e, 0, learner_slot(l, i), &p->srcs[i], p->err, sizeof p->err, where);
        if (rc) {
            reply_error(p, rq->c, rq->id, rc, (long)i, "%s", p->err);
            return PROTO_DONE;
        }
    }
    size_t bad_at = 0;
    int rc = learner_sources_fit(l, p->srcs, k, &bad_at, p->err, sizeof p->err);
    if (rc) {
        reply_error(p, rq->c, rq->id, rc, (long)bad_at, "batch[%zu]: %s", bad_at, p->err);
        return PROTO_DONE;
    }
    uint64_t seq = learner_commit(l, k);
    ack_observe(p, rq->c, rq->id, l, seq, (long)k, applied);
    return PROTO_DONE;
}

static int do_bulk_header(struct req *rq)
{
    struct proto *p = rq->p;
    proto_conn_t *pc = conn_proto(rq->c);
    /* Errors here close the connection: the payload that follows cannot be skipped safely. */
    struct learner *l = need_model(rq);
    if (!l) {
        conn_close_after_reply(rq->c);
        return PROTO_DONE;
    }
    static const char *const keys[] = {"op", "id", "model", "count", "source", "dt", "ack", NULL};
    const char *bad;
    const cJSON *cnt = field(rq->root, "count"), *s = field(rq->root, "source");
    double dt = NAN;
    int code = 0, applied = ack_mode(rq->root);
    if (!only_keys(rq->root, keys, &bad)) {
        FAIL(rq, WORTH_E_BAD_REQUEST, "unknown field \"%.64s\" in observe.bulk", bad);
    } else if (applied < 0) {
        FAIL(rq, WORTH_E_BAD_REQUEST, "\"ack\" must be \"durable\" or \"applied\"");
    } else if (!cJSON_IsNumber(cnt)) {
        FAIL(rq, WORTH_E_BAD_REQUEST, "\"count\" must be a number");
    } else if (cnt->valuedouble != floor(cnt->valuedouble) || cnt->valuedouble < 1) {
        FAIL(rq, WORTH_E_BAD_PARAM, "\"count\" must be an integer >= 1");
    } else if (cnt->valuedouble > (double)p->o->max_batch) {
        FAIL(rq, WORTH_E_TOO_LARGE, "bulk of %.0f exceeds the limit %zu", cnt->valuedouble,
             p->o->max_batch);
    } else if (s && !cJSON_IsString(s)) {
        FAIL(rq, WORTH_E_BAD_REQUEST, "\"source\" must be a string");
    } else if (s && strlen(s->valuestring) > MODEL_NAME_MAX) {
        FAIL(rq, WORTH_E_BAD_PARAM, "\"source\" is longer than %d bytes", MODEL_NAME_MAX);
    } else if (!opt_number(rq->root, "dt", &dt, &code, p->err, sizeof p->err, "")) {
        FAIL(rq, code, "%s", p->err);
    } else if (!isnan(dt) && dt < 0) {
        FAIL(rq, WORTH_E_BAD_PARAM, "\"dt\" must be >= 0");
    } else {
        snprintf(pc->model, sizeof pc->model, "%s", learner_name(l));
        pc->count = (size_t)cnt->valuedouble;
        snprintf(pc->source, sizeof pc->source, "%s", s ? s->valuestring : "");
        pc->dt_s = dt;
        pc->bulk_applied = applied;
        pc->has_id = rq->id != NULL;
        if (rq->id)
            snprintf(pc->id, sizeof pc->id, "%s", rq->id);
        size_t d = model_dims(learner_model(l));
        size_t bytes = pc->count * (2 * d + 2) * sizeof(double);
        if (conn_expect_bulk(rq->c, bytes) != 0) {
            /* The payload is dropped as it arrives; the connection goes on after it. */
            FAIL(rq, WORTH_E_OVER_BUDGET,
                 "the daemon's buffer budget (--max-buffer-mb) cannot hold a payload of %zu "
                 "bytes now; it is skipped, nothing applied; retry later or send smaller bulks",
                 bytes);
            conn_skip_bulk(rq->c, bytes);
        }
        return PROTO_DONE;
    }
    conn_close_after_reply(rq->c);
    return PROTO_DONE;
}

int proto_bulk(struct proto *p, struct conn *c, const unsigned char *data, size_t len)
{
    proto_conn_t *pc = conn_proto(c);
    const char *id = pc->has_id ? pc->id : NULL;
    struct learner *l = find_model(p, pc->model, NULL);
    if (!l) {
        reply_error(p, c, id, WORTH_E_NO_SUCH_MODEL, -1, "model \"%s\" was dropped", pc->model);
        return PROTO_DONE;
    }
    size_t d = model_dims(learner_model(l)), k = pc->count, rec = 2 * d + 2;
    CHECK(len == k * rec * sizeof(double));
    if (learner_space(l) < k)
        return park(l);
    const char *src = pc->source[0] ? pc->source : NULL;
    int rc = learner_sources_fit(l, &src, 1, NULL, p->err, sizeof p->err);
    if (rc) {
        reply_error(p, c, id, rc, -1, "%s", p->err);
        return PROTO_DONE;
    }
    for (size_t i = 0; i < k; i++) {
        learner_rec_t *r = learner_slot(l, i);
        const unsigned char *q = data + i * rec * sizeof(double);
        double term;
        memcpy(r->v, q, d * sizeof(double));
        memcpy(&r->r, q + d * sizeof(double), sizeof(double));
        memcpy(r->v + d, q + (d + 1) * sizeof(double), d * sizeof(double));
        memcpy(&term, q + (2 * d + 1) * sizeof(double), sizeof(double));
        /* A terminal record's x_next is ignored (V of a terminal state is 0): any bytes. */
        size_t check = term == 1.0 ? d : 2 * d;
        int finite = isfinite(r->r);
        for (size_t j = 0; j < check && finite; j++)
            finite = isfinite(r->v[j]);
        if (!finite) {
            reply_error(p, c, id, WORTH_E_BAD_NUMBER, (long)i,
                        "record %zu holds a NaN or infinite value", i);
            return PROTO_DONE;
        }
        if (fabs(r->r) > PROTO_MAX_ABS_R) {
            reply_error(p, c, id, WORTH_E_BAD_NUMBER, (long)i, "record %zu: r is beyond +-%g", i,
                        PROTO_MAX_ABS_R);
            return PROTO_DONE;
        }
        if (term != 0.0 && term != 1.0) {
            reply_error(p, c, id, WORTH_E_BAD_PARAM, (long)i, "record %zu: terminal must be 0 or 1",
                        i);
            return PROTO_DONE;
        }
        r->type = LREC_OBS;
        r->terminal = term == 1.0;
        r->dt_s = pc->dt_s;
        memcpy(r->src, pc->source, sizeof r->src);
        r->t_s = NAN;
        r->est = r->passes = 0;
        r->conn_id = 0;
        r->job = NULL;
    }
    uint64_t seq = learner_commit(l, k);
    ack_observe(p, c, id, l, seq, (long)k, pc->bulk_applied);
    return PROTO_DONE;
}

void proto_bulk_truncated(struct proto *p, struct conn *c, size_t got)
{
    proto_conn_t *pc = conn_proto(c);
    say_warn("connection %llu: bulk for model %s ended after %zu bytes; nothing applied",
             (unsigned long long)conn_id(c), pc->model, got);
    reply_error(p, c, pc->has_id ? pc->id : NULL, WORTH_E_TRUNCATED, -1,
                "connection ended after %zu bytes of the bulk payload; nothing applied", got);
}

void proto_line_too_long(struct proto *p, struct conn *c)
{
    reply_error(p, c, NULL, WORTH_E_LINE_TOO_LONG, -1, "request line exceeds %zu bytes",
                p->o->max_line);
}

/* The headline estimator's sd, else the first estimator's that has one. */
static double pick_sd(const struct model *m, const double *sd, size_t head)
{
    if (!isnan(sd[head]))
        return sd[head];
    for (size_t i = 0; i < model_n_est(m); i++)
        if (!isnan(sd[i]))
            return sd[i];
    return NAN;
}

/*
 * The work of answering one state, in multiply-adds: the features (about F per
 * input dimension for the costliest bases), a dot product per estimator, and
 * for each rls_td estimator its sd, phi'P phi, F^2.  An upper bound: sparse
 * bases cost less.
 */
static double state_work(const struct model *m)
{
    double f = (double)model_features(m), w = f * (double)(model_dims(m) + model_n_est(m));
    for (size_t i = 0; i < model_n_est(m); i++)
        if (est_params(model_est(m, i))->kind == EST_RLS_TD)
            w += f * f;
    return w;
}

/*
 * Which estimator answers: the one asked for, else the primary, else (when
 * that has diverged) the first that has not.  A diverged estimator's values
 * are NAN in the snapshot, and only then.  Returns its index, or -1 with a
 * diverged error answered.
 */
static long headline(struct req *rq, const struct model *m, long pick, const double *vals)
{
    if (pick >= 0) {
        if (!isnan(vals[pick]))
            return pick;
        FAIL(rq, WORTH_E_DIVERGED,
             "estimator \"%s\" has diverged and answers no values; ask another, or roll the "
             "model back to a checkpoint taken before it diverged (see events)",
             model_est_name(m, (size_t)pick));
        return -1;
    }
    size_t pr = model_primary(m);
    if (!isnan(vals[pr]))
        return (long)pr;
    for (size_t i = 0; i < model_n_est(m); i++)
        if (!isnan(vals[i]))
            return (long)i;
    FAIL(rq, WORTH_E_DIVERGED,
         "every estimator of the model has diverged; roll it back to a checkpoint taken before "
         "(see events)");
    return -1;
}

/* When estimators have diverged: ,"diverged":[names], and the headline's name if not the primary.
 */
static void out_diverged(struct out *o, const struct model *m, const double *vals, long head)
{
    int any = 0;
    for (size_t i = 0; i < model_n_est(m); i++) {
        if (!isnan(vals[i]))
            continue;
        out_s(o, any ? "," : ",\"diverged\":[");
        out_str(o, model_est_name(m, i));
        any = 1;
    }
    if (!any)
        return;
    out_s(o, "]");
    if ((size_t)head != model_primary(m)) {
        out_s(o, ",\"answered_by\":");
        out_str(o, model_est_name(m, (size_t)head));
    }
}

static int do_value(struct req *rq)
{
    struct proto *p = rq->p;
    struct learner *l = need_model(rq);
    if (!l)
        return PROTO_DONE;
    const struct model *m = learner_model(l);
    size_t d = model_dims(m), ne = model_n_est(m);
    long pick = -1;
    const cJSON *es = field(rq->root, "estimator");
    if (es) {
        if (!cJSON_IsString(es))
            return fail_done(rq, WORTH_E_BAD_REQUEST, "\"estimator\" must be a string");
        pick = model_est_find(m, es->valuestring);
        if (pick < 0)
            return fail_done(rq, WORTH_E_BAD_PARAM, "model has no estimator \"%.64s\"",
                             es->valuestring);
    }
    const cJSON *x = field(rq->root, "x"), *xs = field(rq->root, "xs");
    double xv[FEAT_MAX_DIMS];
    uint64_t seq = 0;
    int code = 0;
    if ((x != NULL) == (xs != NULL))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "give exactly one of \"x\" and \"xs\"");
    struct out *o = &p->out;
    if (x) {
        if (!get_vector(x, d, xv, "x", &code, p->err, sizeof p->err, ""))
            return fail_done(rq, code, "%s", p->err);
        learner_value(l, xv, d, p->vals, p->sds, &seq);
        long head = headline(rq, m, pick, p->vals);
        if (head < 0)
            return PROTO_DONE;
        out_begin(o, 1, rq->id);
        out_s(o, ",\"value\":");
        if (pick >= 0) {
            out_num(o, p->vals[pick]);
            out_s(o, ",\"sd\":");
            out_num(o, p->sds[pick]);
        } else {
            out_num(o, p->vals[head]);
            out_s(o, ",\"estimators\":{");
            for (size_t i = 0; i < ne; i++) {
                if (i)
                    out_s(o, ",");
                out_str(o, model_est_name(m, i));
                out_s(o, ":");
                out_num(o, p->vals[i]);
            }
            out_s(o, "},\"sd\":");
            out_num(o, pick_sd(m, p->sds, (size_t)head));
            /* Agreement: how far apart the estimators are at this state. */
            double lo = INFINITY, hi = -INFINITY;
            for (size_t i = 0; i < ne; i++) {
                lo = fmin(lo, p->vals[i]);
                hi = fmax(hi, p->vals[i]);
            }
            out_s(o, ",\"spread\":");
            out_num(o, hi - lo);
            out_diverged(o, m, p->vals, head);
        }
        out_fmt(o, ",\"seq\":%llu", (unsigned long long)seq);
        out_end(o, rq->c);
        return PROTO_DONE;
    }
    if (!cJSON_IsArray(xs))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"xs\" must be an array of states");
    size_t k = (size_t)cJSON_GetArraySize(xs);
    if (k == 0)
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"xs\" is empty");
    if (k > p->o->max_batch)
        return fail_done(rq, WORTH_E_TOO_LARGE, "%zu states exceed the limit %zu", k,
                         p->o->max_batch);
    /* The loop answers every client: one request may not hold it longer than its share. */
    double work = state_work(m);
    if ((double)k * work > (double)p->o->max_query_work) {
        size_t most = (size_t)((double)p->o->max_query_work / work);
        return fail_done(rq, WORTH_E_TOO_LARGE,
                         "%zu states of this model are %.3g multiply-adds, over --max-query-work "
                         "%zu; ask at most %zu states per request",
                         k, (double)k * work, p->o->max_query_work, most ? most : 1);
    }
    /* Validate every state before answering any. */
    size_t i = 0;
    for (const cJSON *e = xs->child; e; e = e->next, i++) {
        char where[32];
        snprintf(where, sizeof where, "xs[%zu]: ", i);
        if (!get_vector(e, d, xv, "x", &code, p->err, sizeof p->err, where)) {
            reply_error(p, rq->c, rq->id, code, (long)i, "%s", p->err);
            return PROTO_DONE;
        }
    }
    /* Every state from one snapshot, as protocol.md promises: one seq for the whole answer.
     * The first state tells which estimators have diverged in it. */
    seq = learner_read_begin(l);
    get_vector(xs->child, d, xv, "x", &code, p->err, sizeof p->err, "");
    learner_read_value(l, xv, d, p->vals, p->sds);
    long head = headline(rq, m, pick, p->vals);
    if (head < 0) {
        learner_read_end(l);
        return PROTO_DONE;
    }
    out_begin(o, 1, rq->id);
    out_s(o, ",\"values\":[");
    i = 0;
    for (const cJSON *e = xs->child; e; e = e->next, i++) {
        get_vector(e, d, xv, "x", &code, p->err, sizeof p->err, "");
        learner_read_value(l, xv, d, p->vals, p->sds);
        if (i)
            out_s(o, ",");
        out_num(o, p->vals[head]);
    }
    learner_read_end(l);
    out_s(o, "]");
    if (pick < 0)
        out_diverged(o, m, p->vals, head);
    out_fmt(o, ",\"seq\":%llu", (unsigned long long)seq);
    out_end(o, rq->c);
    return PROTO_DONE;
}

static int do_train(struct req *rq)
{
    struct learner *l = need_model(rq);
    if (!l)
        return PROTO_DONE;
    const struct model *m = learner_model(l);
    const char *name = need_string(rq, "estimator");
    if (!name)
        return PROTO_DONE;
    int e = model_est_find(m, name);
    if (e < 0)
        return fail_done(rq, WORTH_E_BAD_PARAM, "model has no estimator \"%.64s\"", name);
    enum est_kind kind = est_params(model_est(m, (size_t)e))->kind;
    if (kind != EST_REPLAY && kind != EST_LSTD)
        return fail_done(rq, WORTH_E_UNSUPPORTED,
                         "estimator \"%s\" (%s) does not train; replay and "
                         "lstd do",
                         name, est_kind_name(kind));
    double passes = 10;
    const cJSON *ps = field(rq->root, "passes");
    if (ps) {
        if (!cJSON_IsNumber(ps))
            return fail_done(rq, WORTH_E_BAD_REQUEST, "\"passes\" must be a number");
        passes = ps->valuedouble;
        if (passes != floor(passes) || passes < 1 || passes > MAX_PASSES)
            return fail_done(rq, WORTH_E_BAD_PARAM, "\"passes\" must be an integer 1..%d",
                             MAX_PASSES);
    }
    if (learner_space(l) < 1)
        return park(l);
    learner_rec_t *r = learner_slot(l, 0);
    memset(r, 0, sizeof *r);
    r->type = LREC_TRAIN;
    r->est = (uint32_t)e;
    r->passes = (uint32_t)passes;
    r->conn_id = conn_id(rq->c);
    r->ordinal = learner_next_training(l);
    keep_id(rq);
    learner_commit(l, 1);
    conn_wait(rq->c); /* its progress and reply come before anything else on this connection */
    return PROTO_DONE;
}

static int do_stats(struct req *rq)
{
    struct learner *l = need_model(rq);
    if (!l)
        return PROTO_DONE;
    const struct model *m = learner_model(l);
    learner_stats_t st;
    learner_stats(l, &st);
    struct out *o = &rq->p->out;
    out_begin(o, 1, rq->id);
    out_s(o, ",\"model\":");
    out_str(o, learner_name(l));
    out_fmt(o, ",\"received\":%llu,\"applied\":%llu,\"queue\":%zu,\"clipped\":%llu,\"sources\":%zu",
            (unsigned long long)st.received, (unsigned long long)st.applied,
            (size_t)(st.received - st.applied), (unsigned long long)st.counts.clipped,
            st.counts.sources);
    out_s(o, ",\"estimators\":{");
    for (size_t i = 0; i < model_n_est(m); i++) {
        const est_stats_t *e = &st.est[i];
        enum est_kind kind = est_params(model_est(m, i))->kind;
        if (i)
            out_s(o, ",");
        out_str(o, model_est_name(m, i));
        out_s(o, ":{\"kind\":");
        out_str(o, est_kind_name(kind));
        out_fmt(o, ",\"updates\":%llu,\"guarded\":%llu", (unsigned long long)e->updates,
                (unsigned long long)e->guarded);
        static const char *const health[] = {"ok", "unhealthy", "diverged"};
        out_s(o, ",\"health\":");
        out_str(o, e->health >= 0 && e->health <= 2 ? health[e->health] : "?");
        if (e->why) {
            out_s(o, ",\"why\":");
            out_str(o, e->why);
        }
        if (e->health == EST_HEALTH_DIVERGED)
            out_fmt(o, ",\"diverged_at\":%llu", (unsigned long long)e->diverged_at);
        out_s(o, ",\"td_rms\":");
        out_num(o, e->td_rms);
        out_s(o, ",\"td_last\":");
        out_num(o, e->td_last);
        if (kind == EST_RLS_TD) {
            out_s(o, ",\"trace_p\":");
            out_num(o, e->trace_p);
            out_fmt(o, ",\"p_resets\":%llu", (unsigned long long)e->p_resets);
        }
        if (kind == EST_LSTD)
            out_fmt(o, ",\"refits\":%llu", (unsigned long long)e->refits);
        if (kind == EST_REPLAY)
            out_fmt(o, ",\"steps\":%llu", (unsigned long long)e->refits);
        out_s(o, ",\"last_update\":");
        out_num(o, st.last_update);
        const diag_est_t *d = &st.realised[i];
        out_fmt(o, ",\"realised\":{\"n\":%llu,\"bias\":", (unsigned long long)d->n);
        out_num(o, d->bias);
        out_s(o, ",\"rms\":");
        out_num(o, d->rms);
        out_s(o, ",\"bias_window\":");
        out_num(o, d->bias_window);
        out_s(o, ",\"rms_window\":");
        out_num(o, d->rms_window);
        out_s(o, "}}");
    }
    out_s(o, "},\"spread\":");
    out_num(o, st.spread);
    out_fmt(o,
            ",\"horizon\":%u,\"drift\":{\"alarms\":%llu,\"last_alarm_step\":%llu,"
            "\"last_onset_step\":%llu,\"armed\":%s,\"statistic\":",
            st.horizon, (unsigned long long)st.drift.alarms,
            (unsigned long long)st.drift.last_alarm, (unsigned long long)st.drift.last_onset,
            st.drift.armed ? "true" : "false");
    out_num(o, st.drift.statistic);
    out_s(o, "}");
    out_end(o, rq->c);
    return PROTO_DONE;
}

static int do_history(struct req *rq)
{
    struct learner *l = need_model(rq);
    if (!l)
        return PROTO_DONE;
    struct proto *p = rq->p;
    if (!p->hist)
        p->hist = mem_calloc(LEARNER_HISTORY_MAX, sizeof *p->hist);
    size_t n = learner_history(l, p->hist, LEARNER_HISTORY_MAX);
    const struct model *m = learner_model(l);
    struct out *o = &p->out;
    out_begin(o, 1, rq->id);
    out_s(o, ",\"estimators\":");
    out_est_names(o, m);
    out_s(o, ",\"history\":[");
    for (size_t i = 0; i < n; i++) {
        out_s(o, i ? ",{\"t\":" : "{\"t\":");
        out_num(o, p->hist[i].t);
        out_fmt(o, ",\"seq\":%llu,\"td_rms\":[", (unsigned long long)p->hist[i].seq);
        for (size_t k = 0; k < model_n_est(m); k++) {
            if (k)
                out_s(o, ",");
            out_num(o, p->hist[i].td_rms[k]);
        }
        out_s(o, "],\"realised_rms\":[");
        for (size_t k = 0; k < model_n_est(m); k++) {
            if (k)
                out_s(o, ",");
            out_num(o, p->hist[i].realised_rms[k]);
        }
        out_s(o, "]}");
    }
    out_s(o, "]");
    out_end(o, rq->c);
    return PROTO_DONE;
}

static int do_events(struct req *rq)
{
    static const char *const keys[] = {"op", "id", "model", "since", "limit", NULL};
    const char *bad;
    if (!only_keys(rq->root, keys, &bad))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "unknown field \"%.64s\"", bad);
    struct learner *l = NULL;
    /* A quarantined model's events are listed: they say when and why it was quarantined. */
    const struct damaged *dm = named_damaged(rq);
    if (!dm && field(rq->root, "model") && !(l = need_model(rq)))
        return PROTO_DONE;
    double since = 0, limit = 1000;
    int code = 0;
    if (!opt_number(rq->root, "since", &since, &code, rq->p->err, sizeof rq->p->err, "") ||
        !opt_number(rq->root, "limit", &limit, &code, rq->p->err, sizeof rq->p->err, ""))
        return fail_done(rq, code, "%s", rq->p->err);
    if (limit != floor(limit) || limit < 1 || limit > 100000)
        return fail_done(rq, WORTH_E_BAD_PARAM, "\"limit\" must be an integer 1..100000");
    keep_id(rq);
    if (dm)
        writer_list_model_events(rq->p->w, dm->id, dm->name, since, (size_t)limit, conn_id(rq->c));
    else
        writer_list_events(rq->p->w, l, since, (size_t)limit, conn_id(rq->c));
    conn_wait(rq->c);
    return PROTO_DONE;
}

static int do_checkpoint(struct req *rq)
{
    static const char *const keys[] = {"op", "id", "model", "label", NULL};
    const char *bad;
    struct learner *l = need_model(rq);
    if (!l)
        return PROTO_DONE;
    if (!only_keys(rq->root, keys, &bad))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "unknown field \"%.64s\"", bad);
    const cJSON *lab = field(rq->root, "label");
    if (lab && !cJSON_IsString(lab))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"label\" must be a string");
    if (lab && (strlen(lab->valuestring) < 1 || strlen(lab->valuestring) > MODEL_NAME_MAX))
        return fail_done(rq, WORTH_E_BAD_PARAM, "\"label\" must be 1..%d bytes", MODEL_NAME_MAX);
    if (learner_space(l) < 1)
        return park(l);
    learner_rec_t *r = learner_slot(l, 0);
    memset(r, 0, sizeof *r);
    r->type = LREC_CHECKPOINT;
    r->est = lab != NULL;
    if (lab)
        snprintf(r->src, sizeof r->src, "%s", lab->valuestring);
    r->conn_id = conn_id(rq->c);
    keep_id(rq);
    learner_commit(l, 1);
    conn_wait(rq->c);
    return PROTO_DONE;
}

static int do_checkpoints(struct req *rq)
{
    struct learner *l = need_model(rq);
    if (!l)
        return PROTO_DONE;
    keep_id(rq);
    writer_list_checkpoints(rq->p->w, l, conn_id(rq->c));
    conn_wait(rq->c);
    return PROTO_DONE;
}

/* Reads a window [lo, hi] from a two-number array. */
static int window(const cJSON *a, double *lo, double *hi)
{
    if (!cJSON_IsArray(a) || cJSON_GetArraySize(a) != 2 || !cJSON_IsNumber(a->child) ||
        !cJSON_IsNumber(a->child->next) || !isfinite(a->child->valuedouble) ||
        !isfinite(a->child->next->valuedouble))
        return -1;
    *lo = a->child->valuedouble;
    *hi = a->child->next->valuedouble;
    return 0;
}

static int do_rollback(struct req *rq)
{
    static const char *const keys[] = {"op",     "id",      "model", "checkpoint",
                                       "replay", "exclude", NULL};
    const char *bad;
    struct learner *l = need_model(rq);
    if (!l)
        return PROTO_DONE;
    if (!only_keys(rq->root, keys, &bad))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "unknown field \"%.64s\"", bad);
    const cJSON *cp = field(rq->root, "checkpoint"), *rp = field(rq->root, "replay"),
                *ex = field(rq->root, "exclude");
    if (!cJSON_IsNumber(cp))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"checkpoint\" must be a number");
    if (cp->valuedouble != floor(cp->valuedouble) || cp->valuedouble < 1 ||
        cp->valuedouble > 9007199254740992.0)
        return fail_done(rq, WORTH_E_BAD_PARAM, "\"checkpoint\" must be an integer >= 1");
    if (rp && !cJSON_IsBool(rp))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"replay\" must be true or false");
    int replay = cJSON_IsTrue(rp), by_t = 0;
    double lo = 1, hi = 0; /* empty window */
    if (ex) {
        if (!replay)
            return fail_done(rq, WORTH_E_BAD_REQUEST, "\"exclude\" needs \"replay\":true");
        const cJSON *ws = field(ex, "seq"), *wt = field(ex, "t");
        if (!cJSON_IsObject(ex) || (ws != NULL) == (wt != NULL) || ex->child->next)
            return fail_done(rq, WORTH_E_BAD_REQUEST,
                             "\"exclude\" must be {\"seq\":[a,b]} or {\"t\":[t0,t1]}");
        by_t = wt != NULL;
        if (window(by_t ? wt : ws, &lo, &hi) != 0)
            return fail_done(rq, WORTH_E_BAD_REQUEST, "the window must be two finite numbers");
        /* Seqs are whole numbers from 1; a double holds them exactly up to 2^53. */
        if (!by_t && (lo != floor(lo) || hi != floor(hi) || lo < 1 || hi > 9007199254740992.0))
            return fail_done(rq, WORTH_E_BAD_PARAM,
                             "an excluded seq window is two whole numbers in 1..2^53");
        if (lo > hi)
            return fail_done(rq, WORTH_E_BAD_PARAM, "the window's start is after its end");
    }
    if (learner_space(l) < 1)
        return park(l);
    learner_plan_t *plan = mem_calloc(1, sizeof *plan);
    plan->checkpoint = (int64_t)cp->valuedouble;
    plan->replay = replay;
    plan->by_t = by_t;
    plan->lo = lo;
    plan->hi = hi;
    learner_rec_t *r = learner_slot(l, 0);
    memset(r, 0, sizeof *r);
    r->type = LREC_ROLLBACK;
    r->job = plan;
    r->conn_id = conn_id(rq->c);
    keep_id(rq);
    learner_commit(l, 1);
    conn_wait(rq->c);
    return PROTO_DONE;
}

/*
 * A backup names a file in worthd's --backup-dir, never a path: a copy holds
 * bytes clients chose, and must not land on a file worthd may write elsewhere.
 */
static int do_backup(struct req *rq)
{
    static const char *const keys[] = {"op", "id", "name", NULL};
    const char *bad;
    if (field(rq->root, "path"))
        return fail_done(rq, WORTH_E_BAD_PARAM,
                         "backups go to worthd's --backup-dir: send {\"op\":\"backup\"} for a "
                         "name of worthd's, or {\"op\":\"backup\",\"name\":\"nightly.db\"}");
    if (!only_keys(rq->root, keys, &bad))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "unknown field \"%.64s\"", bad);
    const cJSON *n = field(rq->root, "name");
    if (n && (!cJSON_IsString(n) || !n->valuestring))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"name\" must be a string");
    char why[160];
    if (n && backup_name_check(n->valuestring, why, sizeof why) != 0)
        return fail_done(rq, WORTH_E_BAD_PARAM, "\"name\": %s", why);
    keep_id(rq);
    writer_backup(rq->p->w, n ? n->valuestring : NULL, conn_id(rq->c));
    conn_wait(rq->c);
    return PROTO_DONE;
}

/* ---- dispatch -------------------------------------------------------------------------- */

/* The members a request of each op may have; the handlers with NULL check their own. */
static const char *const k_bare[] = {"op", "id", NULL};
static const char *const k_auth[] = {"op", "id", "token", NULL};
static const char *const k_model[] = {"op", "id", "model", NULL};
static const char *const k_value[] = {"op", "id", "model", "x", "xs", "estimator", NULL};
static const char *const k_train[] = {"op", "id", "model", "estimator", "passes", NULL};

static const struct {
    const char *op;
    int (*fn)(struct req *rq);
    const char *const *keys;
} ops[] = {
    {"hello", do_hello, k_bare},
    {"auth", do_auth, k_auth},
    {"model.create", do_create, NULL},
    {"model.list", do_list, k_bare},
    {"model.get", do_get, k_model},
    {"model.drop", do_drop, k_model},
    {"observe", do_observe, NULL},
    {"observe.bulk", do_bulk_header, NULL},
    {"value", do_value, k_value},
    {"train", do_train, k_train},
    {"stats", do_stats, k_model},
    {"checkpoint", do_checkpoint, NULL},
    {"checkpoints", do_checkpoints, k_model},
    {"rollback", do_rollback, NULL},
    {"backup", do_backup, NULL},
    {"history", do_history, k_model},
    {"events", do_events, NULL},
};

/*
 * Checks the bytes of a line before cJSON sees them: cJSON passes invalid
 * UTF-8 and raw control bytes through into strings (and so into names and
 * messages echoed back), and cuts a string at an escaped NUL.  Returns 0, or
 * the error code with a message in msg.
 */
static int line_check(const char *line, size_t len, char *msg, size_t msglen)
{
    const unsigned char *b = (const unsigned char *)line;
    for (size_t i = 0; i < len; i++) {
        unsigned char ch = b[i];
        if (ch < 0x20 && ch != '\t' && ch != '\r') {
            snprintf(msg, msglen, "control byte 0x%02x at byte %zu (JSON escapes it in strings)",
                     ch, i);
            return WORTH_E_BAD_JSON;
        }
        if (ch == '\\' && i + 1 < len) {
            if (b[i + 1] == 'u' && i + 5 < len && memcmp(b + i + 2, "0000", 4) == 0) {
                snprintf(msg, msglen, "strings may not hold \\u0000 (byte %zu)", i);
                return WORTH_E_BAD_REQUEST;
            }
            i++; /* the escaped character */
            continue;
        }
        if (ch < 0x80)
            continue;
        /* UTF-8: no overlong forms, no surrogates, nothing above U+10FFFF. */
        size_t more;
        uint32_t cp;
        if (ch >= 0xc2 && ch <= 0xdf)
            more = 1, cp = ch & 0x1f;
        else if (ch >= 0xe0 && ch <= 0xef)
            more = 2, cp = ch & 0x0f;
        else if (ch >= 0xf0 && ch <= 0xf4)
            more = 3, cp = ch & 0x07;
        else
            goto bad_utf8;
        if (i + more >= len)
            goto bad_utf8;
        for (size_t k = 1; k <= more; k++) {
            if ((b[i + k] & 0xc0) != 0x80)
                goto bad_utf8;
            cp = (cp << 6) | (b[i + k] & 0x3f);
        }
        if ((more == 2 && cp < 0x800) || (more == 3 && (cp < 0x10000 || cp > 0x10ffff)) ||
            (cp >= 0xd800 && cp <= 0xdfff))
            goto bad_utf8;
        i += more;
        continue;
    bad_utf8:
        snprintf(msg, msglen, "the line is not valid UTF-8 (byte %zu)", i);
        return WORTH_E_BAD_JSON;
    }
    return 0;
}

/*
 * Prints a numeric id so that it reads back as the same double: an integer
 * as itself, any other number with the fewest digits (15 to 17) that
 * round-trip.  Returns 0, or an error code with a message: a non-finite id or
 * an integer beyond 2^53, which a double cannot echo exactly.
 */
static int print_num_id(double v, char *buf, size_t cap, char *msg, size_t msglen)
{
    if (!isfinite(v)) {
        snprintf(msg, msglen, "\"id\" must be a finite number");
        return WORTH_E_BAD_NUMBER;
    }
    if (fabs(v) >= 9007199254740992.0) {
        snprintf(msg, msglen,
                 "a numeric \"id\" must lie within +-(2^53 - 1); send a larger one "
                 "as a string");
        return WORTH_E_BAD_PARAM;
    }
    if (v == floor(v)) {
        snprintf(buf, cap, "%.0f", v == 0 ? 0.0 : v);
        return 0;
    }
    for (int digits = 15; digits <= 17; digits++) {
        snprintf(buf, cap, "%.*g", digits, v);
        if (strtod(buf, NULL) == v)
            break;
    }
    return 0;
}

int proto_line(struct proto *p, struct conn *c, const char *line, size_t len)
{
    struct req rq = {p, c, NULL, NULL};
    int res = PROTO_DONE;
    const char *end = NULL;
    char numid[40];
    int code = line_check(line, len, p->err, sizeof p->err);
    if (code) {
        reply_error(p, c, NULL, code, -1, "%s", p->err);
        arena_reset();
        return PROTO_DONE;
    }
    rq.root = cJSON_ParseWithLengthOpts(line, len, &end, 0);
    int trailing = 0;
    if (rq.root && end) {
        for (const char *q = end; q < line + len && !trailing; q++)
            trailing = !(*q == ' ' || *q == '\t' || *q == '\r');
    }
    if (!rq.root || !cJSON_IsObject(rq.root) || trailing) {
        reply_error(p, c, NULL, WORTH_E_BAD_JSON, -1,
                    !rq.root   ? "the line is not valid JSON"
                    : trailing ? "text follows the JSON object"
                               : "a request must be a JSON object");
        goto out;
    }
    const cJSON *idf = field(rq.root, "id");
    char *idtext = NULL;
    if (idf) {
        if (!cJSON_IsNumber(idf) && !cJSON_IsString(idf)) {
            reply_error(p, c, NULL, WORTH_E_BAD_REQUEST, -1, "\"id\" must be a number or a string");
            goto out;
        }
        if (cJSON_IsNumber(idf)) {
            code = print_num_id(idf->valuedouble, numid, sizeof numid, p->err, sizeof p->err);
            if (code) {
                reply_error(p, c, NULL, code, -1, "%s", p->err);
                goto out;
            }
            idtext = numid;
        } else {
            idtext = cJSON_PrintUnformatted(idf);
        }
        if (!idtext || strlen(idtext) > PROTO_ID_MAX) {
            reply_error(p, c, NULL, WORTH_E_BAD_REQUEST, -1, "\"id\" is longer than %d bytes",
                        PROTO_ID_MAX);
            goto out;
        }
        rq.id = idtext;
    }
    const char *dup;
    if (dup_key(rq.root, &dup)) {
        FAIL(&rq, WORTH_E_BAD_REQUEST, "\"%.64s\" appears twice", dup);
        goto out;
    }
    const cJSON *opf = field(rq.root, "op");
    if (!cJSON_IsString(opf) || !opf->valuestring) {
        FAIL(&rq, WORTH_E_BAD_REQUEST, "\"op\" must be a string");
        goto out;
    }
    proto_conn_t *pc = conn_proto(c);
    if (pc->needs_auth && !pc->authed && strcmp(opf->valuestring, "auth") != 0) {
        FAIL(&rq, WORTH_E_UNAUTHORIZED, "authenticate first: {\"op\":\"auth\",\"token\":...}");
        goto out;
    }
    size_t i;
    for (i = 0; i < sizeof ops / sizeof ops[0]; i++)
        if (strcmp(ops[i].op, opf->valuestring) == 0)
            break;
    if (i == sizeof ops / sizeof ops[0]) {
        FAIL(&rq, WORTH_E_UNKNOWN_OP, "unknown op \"%.64s\"", opf->valuestring);
        goto out;
    }
    const char *bad;
    if (ops[i].keys && !only_keys(rq.root, ops[i].keys, &bad)) {
        FAIL(&rq, WORTH_E_BAD_REQUEST, "unknown field \"%.64s\" in %s", bad, ops[i].op);
        goto out;
    }
    res = ops[i].fn(&rq);
out:
    cJSON_Delete(rq.root);
    arena_reset();
    return res;
}

/* ---- learner events -------------------------------------------------------------------- */

void proto_event(struct proto *p, struct server *s, const learner_event_t *ev)
{
    struct slot *sl = slot_of(p, ev->l);
    switch (ev->kind) {
    case LEV_EXITED:
        if (sl && sl->gone) {
            sl->exited = 1;
            maybe_free_dropped(p, sl);
        }
        return; /* a registered learner ends only at shutdown, which joins it itself */
    case LEV_RELEASED:
        if (sl) {
            sl->released = 1;
            maybe_free_dropped(p, sl);
        }
        return;
    case LEV_DURABLE:
        if (sl && ev->seq > sl->durable)
            sl->durable = ev->seq;
        server_each_conn(s, flush_one, p);
        return;
    case LEV_FAILED:
        if (sl) {
            snprintf(sl->why, sizeof sl->why, "commit failed: %s; not applied", ev->text);
            sl->fail_code = ev->rc;
            struct fail_ctx f = {p, sl, ev->seq};
            server_each_conn(s, fail_one, &f);
            if (ev->seq > sl->failed)
                sl->failed = ev->seq;
        }
        mem_free(ev->text);
        return;
    default:
        break;
    }
    struct conn *c = server_conn(s, ev->conn_id);
    if (!c) {
        if (ev->kind == LEV_REPLY || ev->kind == LEV_TRAINED)
            mem_free(ev->text);
        return; /* the client left; the work was done all the same */
    }
    proto_conn_t *pc = conn_proto(c);
    const char *id = pc->has_id ? pc->id : NULL;
    struct out *o = &p->out;
    if (ev->kind == LEV_REPLY) {
        if (ev->rc == 0) {
            out_begin(o, 1, id);
            out_s(o, ev->text);
            out_end(o, c);
        } else {
            reply_error(p, c, id, ev->rc, -1, "%s", ev->text);
        }
        if (pc->creating && pc->creating == ev->l) {
            pc->creating = NULL;
            size_t at;
            if (ev->rc && find_slot(p, learner_name(ev->l), &at))
                unregister(p, at, 0, 0); /* the writer never took it */
        }
        mem_free(ev->text);
        conn_resume(c);
        return;
    }
    if (ev->kind == LEV_PROGRESS) {
        o->len = 0;
        out_s(o, "{");
        if (id) {
            out_s(o, "\"id\":");
            out_s(o, id);
            out_s(o, ",");
        }
        out_fmt(o, "\"progress\":{\"pass\":%u,\"of\":%u,\"change\":", ev->pass, ev->of);
        out_num(o, ev->change);
        out_s(o, "}");
        out_end(o, c);
        return;
    }
    if (ev->rc == WORTH_E_CANCELLED) {
        reply_error(p, c, id, ev->rc, -1,
                    "training cut short after %u of %u passes (%llu mini-batch steps): %s; what "
                    "it learnt so far is kept",
                    ev->pass, ev->of, (unsigned long long)ev->seq, ev->text ? ev->text : "");
    } else if (ev->rc == WORTH_E_DIVERGED) {
        reply_error(p, c, id, ev->rc, -1,
                    "the estimator has diverged (see stats and events); roll the model back to "
                    "a checkpoint taken before it did");
    } else if (ev->rc) {
        reply_error(p, c, id, ev->rc, -1, "training did not run: %s", worth_strerror(ev->rc));
    } else {
        out_begin(o, 1, id);
        out_fmt(o, ",\"passes\":%u,\"change\":", ev->pass);
        out_num(o, ev->change);
        out_s(o, ev->converged ? ",\"converged\":true" : ",\"converged\":false");
        out_end(o, c);
    }
    mem_free(ev->text);
    conn_resume(c);
}

/* ---- lifecycle ------------------------------------------------------------------------- */

struct proto *proto_new(const server_opts_t *opts, struct writer *w, learner_post_fn post,
                        learner_wake_fn wake, void *ctx)
{
    struct proto *p = mem_calloc(1, sizeof *p);
    p->o = opts;
    p->w = w;
    p->srv = ctx;
    p->models = mem_calloc(opts->max_models, sizeof *p->models);
    p->srcs = mem_calloc(opts->max_batch, sizeof *p->srcs);
    p->post = post;
    p->wake = wake;
    p->ctx = ctx;
    ensure_scratch(p, MODEL_MAX_EST);
    out_need(&p->out, 65536);
    return p;
}

size_t proto_n_models(const struct proto *p)
{
    return p->n;
}

void proto_learner_opts(const struct proto *p, learner_opts_t *o)
{
    memset(o, 0, sizeof *o);
    o->queue_cap = p->o->queue;
    o->checkpoint_every = p->o->checkpoint_every;
    o->db_path = p->o->db_path;
    o->writer = p->w;
}

void proto_add_recovered(struct proto *p, struct learner *l)
{
    CHECK(p->n < p->o->max_models);
    p->models[p->n++] = new_slot(l, learner_last_seq(l));
}

void proto_add_damaged(struct proto *p, int64_t id, const char *name, uint64_t seq,
                       const char *reason)
{
    p->damaged = mem_realloc(p->damaged, (p->n_damaged + 1) * sizeof *p->damaged);
    p->damaged[p->n_damaged++] = (struct damaged){mem_strdup(name), id, seq, mem_strdup(reason)};
}

void proto_conn_init(proto_conn_t *pc, int needs_auth)
{
    memset(pc, 0, sizeof *pc);
    pc->needs_auth = needs_auth;
    pc->dt_s = NAN;
}

int proto_conn_quiet(const proto_conn_t *pc)
{
    return pc->ack_head == pc->n_acks;
}

void proto_conn_free(struct proto *p, proto_conn_t *pc)
{
    for (size_t i = pc->ack_head; i < pc->n_acks; i++) {
        struct slot *sl = pc->acks[i].slot;
        if (sl) {
            sl->refs--;
            maybe_free_dropped(p, sl);
        }
    }
    mem_free(pc->acks);
    mem_free(pc->ackbuf);
    pc->acks = NULL;
    pc->ackbuf = NULL;
    pc->n_acks = pc->ack_head = 0;
}

void proto_shutdown(struct proto *p)
{
    for (size_t i = 0; i < p->n; i++)
        learner_stop(p->models[i]->l, 0);
    for (size_t i = 0; i < p->n; i++) {
        struct learner *l = p->models[i]->l;
        learner_join(l);
        learner_stats_t st;
        learner_stats(l, &st);
        say_info("model %s: applied %llu of %llu accepted", learner_name(l),
                 (unsigned long long)st.applied, (unsigned long long)st.received);
    }
    for (size_t i = 0; i < p->n_dropped; i++)
        learner_join(p->dropped[i]->l);
}

void proto_free(struct proto *p)
{
    if (!p)
        return;
    for (size_t i = 0; i < p->n; i++) {
        learner_free(p->models[i]->l);
        mem_free(p->models[i]);
    }
    for (size_t i = 0; i < p->n_dropped; i++) {
        learner_free(p->dropped[i]->l);
        mem_free(p->dropped[i]);
    }
    for (size_t i = 0; i < p->n_damaged; i++) {
        mem_free(p->damaged[i].name);
        mem_free(p->damaged[i].reason);
    }
    mem_free(p->damaged);
    mem_free(p->models);
    mem_free(p->dropped);
    mem_free(p->srcs);
    mem_free(p->vals);
    mem_free(p->sds);
    mem_free(p->hist);
    mem_free(p->out.b);
    mem_free(p);
}

/* A label value, escaped as the exposition format asks (backslash, quote, newline). */
static void out_label(struct out *o, const char *s)
{
    out_raw(o, "\"", 1);
    for (; *s; s++) {
        if (*s == '\\' || *s == '"') {
            char e[2] = {'\\', *s};
            out_raw(o, e, 2);
        } else if (*s == '\n') {
            out_raw(o, "\\n", 2);
        } else {
            out_raw(o, s, 1);
        }
    }
    out_raw(o, "\"", 1);
}

/* A sample value in the exposition format (Go float syntax: NaN, +Inf, -Inf). */
static void out_val(struct out *o, double v)
{
    if (isnan(v))
        out_s(o, "NaN");
    else if (isinf(v))
        out_s(o, v > 0 ? "+Inf" : "-Inf");
    else
        out_fmt(o, "%.17g", v);
}

static void metric_head(struct out *o, const char *name, const char *type, const char *help)
{
    out_fmt(o, "# HELP %s %s\n# TYPE %s %s\n", name, help, name, type);
}

char *proto_metrics_text(struct proto *p, size_t *len)
{
    struct out o = {NULL, 0, 0};
    learner_stats_t *st = mem_calloc(p->n ? p->n : 1, sizeof *st);
    for (size_t i = 0; i < p->n; i++)
        learner_stats(p->models[i]->l, &st[i]);
    static const struct {
        const char *name, *type, *help;
    } per_model[] = {
        {"worth_transitions_received_total", "counter", "Transitions accepted."},
        {"worth_transitions_applied_total", "counter", "Transitions learnt."},
        {"worth_queue_depth", "gauge", "Transitions accepted and not yet learnt."},
        {"worth_drift_alarms_total", "counter", "Drift alarms raised."},
        {"worth_checkpoints", "gauge", "Valid checkpoints stored."},
        {"worth_checkpoint_age_seconds", "gauge", "Age of the newest checkpoint."},
    };
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    double now = (double)ts.tv_sec + ts.tv_nsec * 1e-9;
    for (size_t k = 0; k < sizeof per_model / sizeof per_model[0]; k++) {
        metric_head(&o, per_model[k].name, per_model[k].type, per_model[k].help);
        for (size_t i = 0; i < p->n; i++) {
            double v = 0;
            switch (k) {
            case 0:
                v = (double)st[i].received;
                break;
            case 1:
                v = (double)st[i].applied;
                break;
            case 2:
                v = (double)(st[i].received - st[i].applied);
                break;
            case 3:
                v = (double)st[i].drift.alarms;
                break;
            case 4:
                v = (double)st[i].checkpoints;
                break;
            case 5:
                if (!st[i].checkpoints)
                    continue; /* no checkpoint: no age */
                v = now - st[i].newest_checkpoint_at;
                break;
            }
            out_s(&o, per_model[k].name);
            out_s(&o, "{model=");
            out_label(&o, learner_name(p->models[i]->l));
            out_s(&o, "} ");
            out_val(&o, v);
            out_s(&o, "\n");
        }
    }
    for (int k = 0; k < 3; k++) {
        const char *name = k == 2   ? "worth_estimator_diverged"
                           : k == 1 ? "worth_realised_return_rms"
                                    : "worth_td_error_rms";
        metric_head(&o, name, "gauge",
                    k == 2   ? "1 when the estimator has diverged and answers no values, else 0."
                    : k == 1 ? "Realised-return RMS error over the sliding window."
                             : "Running RMS TD error.");
        for (size_t i = 0; i < p->n; i++) {
            const struct model *m = learner_model(p->models[i]->l);
            for (size_t e = 0; e < model_n_est(m); e++) {
                out_s(&o, name);
                out_s(&o, "{model=");
                out_label(&o, learner_name(p->models[i]->l));
                out_s(&o, ",estimator=");
                out_label(&o, model_est_name(m, e));
                out_s(&o, "} ");
                out_val(&o, k == 2   ? (st[i].est[e].health == EST_HEALTH_DIVERGED ? 1.0 : 0.0)
                            : k == 1 ? st[i].realised[e].rms_window
                                     : st[i].est[e].td_rms);
                out_s(&o, "\n");
            }
        }
    }
    metric_head(&o, "worth_model_damaged", "gauge",
                "1 for a model quarantined at start-up (not served), 0 for one served.");
    for (size_t i = 0; i < p->n + p->n_damaged; i++) {
        out_s(&o, "worth_model_damaged{model=");
        out_label(&o, i < p->n ? learner_name(p->models[i]->l) : p->damaged[i - p->n].name);
        out_s(&o, i < p->n ? "} 0\n" : "} 1\n");
    }
    uint64_t counts[WRITER_HIST_N], count = 0;
    double sum = 0;
    writer_commit_hist(p->w, counts, &sum, &count);
    metric_head(&o, "worth_commit_seconds", "histogram", "Duration of the log's commits.");
    for (int b = 0; b < WRITER_HIST_N; b++) {
        out_s(&o, "worth_commit_seconds_bucket{le=\"");
        if (isinf(writer_hist_le[b]))
            out_s(&o, "+Inf");
        else
            out_fmt(&o, "%g", writer_hist_le[b]);
        out_fmt(&o, "\"} %llu\n", (unsigned long long)counts[b]);
    }
    out_s(&o, "worth_commit_seconds_sum ");
    out_val(&o, sum);
    out_fmt(&o, "\nworth_commit_seconds_count %llu\n", (unsigned long long)count);
    mem_free(st);
    /* The caller frees with free(): hand over a malloc'd copy. */
    char *text = malloc(o.len + 1);
    if (text) {
        memcpy(text, o.b, o.len);
        text[o.len] = 0;
    }
    *len = text ? o.len : 0;
    mem_free(o.b);
    return text;
}
