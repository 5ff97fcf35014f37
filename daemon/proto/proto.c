/*
 * proto.c - requests of protocol v1 (schema/protocol.md): checking a line,
 * dispatching it, and routing what the learner and writer threads report.
 *
 * Loop thread only.  Every request is parsed into a cJSON tree allocated from
 * the arena (arena.h), validated completely, then answered by its handler
 * (ingest.c, query.c, admin.c); the arena is reset when the request is done,
 * so no cJSON pointer survives a request.  Replies go through the one JSON
 * writer (common/jw.h): numbers with 17 significant digits so they
 * round-trip, non-finite numbers as null.
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

/* ---- dispatch -------------------------------------------------------------------------- */

/* The members a request of each op may have; the handlers with NULL check their own. */
static const char *const k_bare[] = {"op", "id", NULL};
static const char *const k_auth[] = {"op", "id", "token", NULL};
static const char *const k_model[] = {"op", "id", "model", NULL};
static const char *const k_value[] = {"op", "id", "model", "x", "xs", "estimator", NULL};
static const char *const k_train[] = {"op", "id", "model", "estimator", "passes", NULL};
static const char *const k_history[] = {"op", "id", "model", "since", "until", "max", NULL};
static const char *const k_checkpoint[] = {"op", "id", "model", "label", NULL};
static const char *const k_rollback[] = {"op",     "id",      "model", "checkpoint",
                                         "replay", "exclude", NULL};

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
    {"checkpoint", do_checkpoint, k_checkpoint},
    {"checkpoints", do_checkpoints, k_model},
    {"rollback", do_rollback, k_rollback},
    {"backup", do_backup, NULL},
    {"history", do_history, k_history},
    {"sources", do_sources, k_model},
    {"events", do_events, NULL},
    {"status", do_status, k_bare},
    {"retention", do_retention, NULL},
    {"model.purge", do_purge, k_model},
};

size_t proto_n_ops(void)
{
    return sizeof ops / sizeof ops[0];
}

const char *proto_op_name(size_t i)
{
    return ops[i].op;
}

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
    if (fld_dup_key(rq.root, &dup)) {
        FAIL(&rq, WORTH_E_BAD_REQUEST, "\"%.64s\" appears twice", dup);
        goto out;
    }
    const cJSON *opf = field(rq.root, "op");
    if (!cJSON_IsString(opf) || !opf->valuestring) {
        FAIL(&rq, WORTH_E_BAD_REQUEST, "\"op\" must be a string");
        goto out;
    }
    proto_conn_t *pc = pconn(c);
    pc->op = -1; /* until the op is known (errors before it count as op "none") */
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
    if (ops_admit(&rq, i, ops[i].op))
        goto out; /* forbidden for the connection's role */
    const char *bad;
    if (ops[i].keys && !fld_only_keys(rq.root, ops[i].keys, &bad)) {
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

void proto_event(struct proto *p, const event_t *ev)
{
    struct slot *sl = reg_slot_of(p, ev->q);
    switch (ev->kind) {
    case EV_EXITED:
        if (sl && sl->gone) {
            sl->exited = 1;
            reg_maybe_free(p, sl);
        }
        return; /* a registered learner ends only at shutdown, which joins it itself */
    case EV_RELEASED:
        if (sl) {
            sl->released = 1;
            reg_maybe_free(p, sl);
        }
        return;
    case EV_DURABLE:
        if (sl && ev->seq > sl->durable)
            sl->durable = ev->seq;
        conns_each(p->conns, reply_flush_one, p);
        reg_sweep(p);
        return;
    case EV_FAILED:
        if (sl) {
            snprintf(sl->why, sizeof sl->why, "commit failed: %s; not applied", ev->text);
            sl->fail_code = ev->rc;
            struct fail_ctx f = {p, sl, ev->seq};
            conns_each(p->conns, reply_fail_one, &f);
            reg_sweep(p);
            if (ev->seq > sl->failed)
                sl->failed = ev->seq;
            /* After a failed commit of samples, reload their pairing as soon as it can be. */
            if (!sl->gone)
                (void)learner_pairing_check(sl->l, p->err, sizeof p->err);
        }
        mem_free(ev->text);
        return;
    default:
        break;
    }
    struct conn *c = conns_find(p->conns, ev->conn_id);
    if (!c) {
        if (ev->kind == EV_REPLY || ev->kind == EV_TRAINED)
            mem_free(ev->text);
        return; /* the client left; the work was done all the same */
    }
    proto_conn_t *pc = pconn(c);
    const char *id = pc->has_id ? pc->id : NULL;
    jw_t *o = &p->out;
    if (ev->kind == EV_REPLY) {
        if (ev->rc == 0) {
            reply_begin(o, 1, id);
            jw_lit(o, ev->text);
            reply_end(o, c);
        } else {
            reply_error(p, c, id, ev->rc, -1, "%s", ev->text);
        }
        if (pc->creating && ev->q && learner_queue(pc->creating) == ev->q) {
            pc->creating = NULL;
            size_t at;
            if (ev->rc && reg_find_slot(p, queue_name(ev->q), &at))
                reg_unregister(p, at, 0, 0); /* the writer never took it */
        }
        mem_free(ev->text);
        conn_resume(c);
        return;
    }
    if (ev->kind == EV_PROGRESS) {
        o->len = 0;
        jw_lit(o, "{");
        if (id) {
            jw_lit(o, "\"id\":");
            jw_lit(o, id);
            jw_lit(o, ",");
        }
        jw_fmt(o, "\"progress\":{\"pass\":%u,\"of\":%u,\"change\":", ev->pass, ev->of);
        jw_num(o, ev->change);
        jw_lit(o, "}");
        reply_end(o, c);
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
        reply_begin(o, 1, id);
        jw_fmt(o, ",\"passes\":%u,\"change\":", ev->pass);
        jw_num(o, ev->change);
        jw_lit(o, ev->converged ? ",\"converged\":true" : ",\"converged\":false");
        reply_end(o, c);
    }
    mem_free(ev->text);
    conn_resume(c);
}

/* ---- lifecycle ------------------------------------------------------------------------- */

struct proto *proto_new(const config_t *opts, struct writer *w, struct conns *conns,
                        event_post_fn post, event_wake_fn wake, void *ctx)
{
    struct proto *p = mem_calloc(1, sizeof *p);
    p->o = opts;
    p->w = w;
    p->conns = conns;
    p->models = mem_calloc(opts->max_models, sizeof *p->models);
    p->srcs = mem_calloc(opts->max_batch, sizeof *p->srcs);
    p->rsrc = mem_calloc(EST_MAX_SOURCES + 1, sizeof *p->rsrc);
    p->post = post;
    p->wake = wake;
    p->ctx = ctx;
    fld_ensure_scratch(p, MODEL_MAX_EST);
    jw_reserve(&p->out, 65536);
    p->n_requests = mem_calloc(proto_n_ops() + 1, sizeof *p->n_requests);
    p->n_errors = mem_calloc((proto_n_ops() + 1) * PROTO_CODES, sizeof *p->n_errors);
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    p->started_at = (double)ts.tv_sec + ts.tv_nsec * 1e-9;
    return p;
}

void *proto_conn_open(struct proto *p, struct conn *c, int needs_auth)
{
    proto_conn_t *pc = reply_conn_new(needs_auth);
    ops_conn_init(p, c, pc, needs_auth);
    return pc;
}

int proto_conn_quiet(struct proto *p, struct conn *c)
{
    (void)p;
    return reply_conn_quiet(pconn(c));
}

void proto_conn_close(struct proto *p, struct conn *c, void *state)
{
    (void)c;
    reply_conn_free(state);
    reg_sweep(p);
}

/* The handler's callbacks: the connections' way up to the protocol (net/conn.h). */
static void *h_open(void *ctx, struct conn *c, int needs_auth)
{
    return proto_conn_open(ctx, c, needs_auth);
}

static void h_close(void *ctx, struct conn *c, void *state)
{
    proto_conn_close(ctx, c, state);
}

static int h_line(void *ctx, struct conn *c, const char *line, size_t len)
{
    int rc = proto_line(ctx, c, line, len);
    reg_sweep(ctx); /* replies sent may have let go of dropped models */
    return rc;
}

static int h_bulk(void *ctx, struct conn *c, const unsigned char *data, size_t len)
{
    int rc = proto_bulk(ctx, c, data, len);
    reg_sweep(ctx);
    return rc;
}

static void h_truncated(void *ctx, struct conn *c, size_t got)
{
    proto_bulk_truncated(ctx, c, got);
}

static void h_too_long(void *ctx, struct conn *c)
{
    proto_line_too_long(ctx, c);
}

static int h_quiet(void *ctx, struct conn *c)
{
    return proto_conn_quiet(ctx, c);
}

static void h_peer(void *ctx, struct conn *c, const conn_peer_t *peer)
{
    ops_peer(ctx, c, peer);
}

void proto_handler(struct proto *p, conn_handler_t *h)
{
    *h = (conn_handler_t){.ctx = p,
                          .open = h_open,
                          .close = h_close,
                          .line = h_line,
                          .bulk = h_bulk,
                          .truncated = h_truncated,
                          .too_long = h_too_long,
                          .quiet = h_quiet,
                          .peer = h_peer};
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
    mem_free(p->rsrc);
    mem_free(p->vals);
    mem_free(p->sds);
    mem_free(p->out.b);
    mem_free(p->n_requests);
    mem_free(p->n_errors);
    mem_free(p);
}
