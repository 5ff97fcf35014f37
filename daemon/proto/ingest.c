/*
 * ingest.c - observe and observe.bulk: transitions into a model's queue.
 *
 * Loop thread.  A request is validated completely, then committed whole to
 * the model's queue (core/queue.h), numbered, and acknowledged once durable
 * (or at once with "ack":"applied").  It must never apply part of a batch or
 * bulk, nor wait: a full queue parks the request until the learner frees
 * room.
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
#include "live/pairing.h"
#include "proto/internal.h"
#include "core/spec.h"
#include "common/say.h"
#include "store/backup.h"
#include "worth/errors.h"

#if !defined(__BYTE_ORDER__) || __BYTE_ORDER__ != __ORDER_LITTLE_ENDIAN__
#error "bulk records are little-endian doubles; this build assumes a little-endian host"
#endif

/*
 * Parses one transition object into slot r of model l.  where prefixes error
 * messages ("" or "batch[3]: ").  Returns 0 or a worth code with err set;
 * *src gets the source name (borrowed from the tree; NULL = default).
 */
static int parse_obs(struct learner *l, const cJSON *o, int top, queue_rec_t *r, const char **src,
                     char *err, size_t errlen, const char *where)
{
    static const char *const keys_batch[] = {"x", "r",  "x_next", "terminal", "source",
                                             "t", "dt", "pseq",   NULL};
    static const char *const keys_top[] = {"op",     "id",       "model",  "x", "r",
                                           "x_next", "terminal", "source", "t", "dt",
                                           "ack",    "pseq",     NULL};
    const spec_meta_t *meta = learner_meta(l);
    size_t d = meta->dims;
    int code = 0;
    const char *bad;
    if (!cJSON_IsObject(o)) {
        snprintf(err, errlen, "%sa transition must be an object", where);
        return WORTH_E_BAD_REQUEST;
    }
    if (fld_dup_key(o, &bad)) {
        snprintf(err, errlen, "%s\"%s\" appears twice", where, bad);
        return WORTH_E_BAD_REQUEST;
    }
    if (!fld_only_keys(o, top ? keys_top : keys_batch, &bad)) {
        snprintf(err, errlen, "%sunknown field \"%.64s\"", where, bad);
        return WORTH_E_BAD_REQUEST;
    }
    const cJSON *term = field(o, "terminal");
    if (term && !cJSON_IsBool(term)) {
        snprintf(err, errlen, "%s\"terminal\" must be true or false", where);
        return WORTH_E_BAD_REQUEST;
    }
    r->type = QREC_OBS;
    r->terminal = cJSON_IsTrue(term);
    const cJSON *x = field(o, "x"), *xn = field(o, "x_next"), *rw = field(o, "r");
    if (!x) {
        snprintf(err, errlen, "%s\"x\" is required", where);
        return WORTH_E_BAD_REQUEST;
    }
    if (!fld_state(x, meta, r->v, "x", &code, err, errlen, where))
        return code;
    if (!rw) {
        snprintf(err, errlen, "%s\"r\" is required", where);
        return WORTH_E_BAD_REQUEST;
    }
    if (!fld_number(o, "r", &r->r, &code, err, errlen, where))
        return code;
    if (fabs(r->r) > PROTO_MAX_ABS_R) {
        snprintf(err, errlen, "%s\"r\" is beyond +-%g", where, PROTO_MAX_ABS_R);
        return WORTH_E_BAD_NUMBER;
    }
    if (xn) {
        if (!fld_state(xn, meta, r->v + d, "x_next", &code, err, errlen, where))
            return code;
    } else if (!r->terminal) {
        snprintf(err, errlen, "%s\"x_next\" is required unless terminal", where);
        return WORTH_E_BAD_REQUEST;
    }
    r->t_s = NAN;
    r->dt_s = NAN;
    if (!fld_number(o, "t", &r->t_s, &code, err, errlen, where) ||
        !fld_number(o, "dt", &r->dt_s, &code, err, errlen, where) ||
        !smp_pseq(o, &r->pseq, &code, err, errlen, where))
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

void ingest_ack(struct proto *p, struct conn *c, const char *id, struct learner *l, uint64_t seq,
                const char *more, int applied)
{
    jw_t *o = &p->out;
    reply_begin(o, 1, id);
    jw_fmt(o, ",\"seq\":%llu", (unsigned long long)seq);
    jw_lit(o, more);
    if (applied) {
        jw_lit(o, ",\"durable\":false");
        reply_end(o, c);
        return;
    }
    jw_lit(o, ",\"durable\":true}\n");
    reply_durable(p, c, reg_slot_of(p, learner_queue(l)), queue_position(learner_queue(l)), id);
}

/*
 * Commits the k transitions parsed into the queue's first slots (those with a pseq already
 * logged dropped first) and answers; count: say how many (a batch or bulk).  Returns
 * PROTO_DONE, or PROTO_PARK when the queue lacks room for the sources' records.
 */
static int commit_transitions(struct proto *p, struct conn *c, const char *id, struct learner *l,
                              size_t k, int count, int applied)
{
    int pseqs = 0;
    for (size_t i = 0; i < k && !pseqs; i++)
        pseqs = queue_slot(learner_queue(l), i)->pseq != 0;
    size_t skipped = 0, n = k;
    if (pseqs) {
        long j = smp_dedup(p, c, id, l, k, &skipped);
        if (j == -1)
            return PROTO_DONE;
        if (j == -2)
            return fld_park(l);
        n = (size_t)j;
    }
    uint64_t seq = n ? learner_commit(l, n) : queue_last_seq(learner_queue(l));
    char more[64] = "";
    int m = 0;
    if (count)
        m = snprintf(more, sizeof more, ",\"count\":%zu", k - skipped);
    if (pseqs)
        snprintf(more + m, sizeof more - (size_t)m, ",\"skipped\":%zu", skipped);
    ingest_ack(p, c, id, l, seq, more, applied);
    return PROTO_DONE;
}

int do_observe(struct req *rq)
{
    struct proto *p = rq->p;
    struct learner *l = fld_model(rq);
    if (!l)
        return PROTO_DONE;
    const cJSON *batch = field(rq->root, "batch");
    int applied = ack_mode(rq->root);
    if (applied < 0)
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"ack\" must be \"durable\" or \"applied\"");
    if (field(rq->root, "sample") || field(rq->root, "samples"))
        return smp_observe(rq, l, applied);
    if (!batch) {
        if (queue_space(learner_queue(l)) < 1)
            return fld_park(l);
        queue_rec_t *r = queue_slot(learner_queue(l), 0);
        const char *src = NULL;
        int rc = parse_obs(l, rq->root, 1, r, &src, p->err, sizeof p->err, "");
        if (!rc)
            rc = pairing_fit(learner_pairing(l), &src, 1, NULL, p->err, sizeof p->err);
        if (rc)
            return fail_done(rq, rc, "%s", p->err);
        return commit_transitions(p, rq->c, rq->id, l, 1, 0, applied);
    }
    static const char *const keys[] = {"op", "id", "model", "batch", "ack", NULL};
    const char *bad;
    if (!fld_only_keys(rq->root, keys, &bad))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "unknown field \"%.64s\" beside \"batch\"", bad);
    if (!cJSON_IsArray(batch))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"batch\" must be an array");
    size_t k = (size_t)cJSON_GetArraySize(batch);
    if (k == 0)
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"batch\" is empty");
    if (k > p->o->max_batch)
        return fail_done(rq, WORTH_E_TOO_LARGE, "batch of %zu exceeds the limit %zu", k,
                         p->o->max_batch);
    if (queue_space(learner_queue(l)) < k)
        return fld_park(l);
    size_t i = 0;
    for (const cJSON *e = batch->child; e; e = e->next, i++) {
        char where[32];
        snprintf(where, sizeof where, "batch[%zu]: ", i);
        int rc = parse_obs(l, e, 0, queue_slot(learner_queue(l), i), &p->srcs[i], p->err,
                           sizeof p->err, where);
        if (rc) {
            reply_error(p, rq->c, rq->id, rc, (long)i, "%s", p->err);
            return PROTO_DONE;
        }
    }
    size_t bad_at = 0;
    int rc = pairing_fit(learner_pairing(l), p->srcs, k, &bad_at, p->err, sizeof p->err);
    if (rc) {
        reply_error(p, rq->c, rq->id, rc, (long)bad_at, "batch[%zu]: %s", bad_at, p->err);
        return PROTO_DONE;
    }
    return commit_transitions(p, rq->c, rq->id, l, k, 1, applied);
}

int do_bulk_header(struct req *rq)
{
    struct proto *p = rq->p;
    proto_conn_t *pc = pconn(rq->c);
    /* Errors here close the connection: the payload that follows cannot be skipped safely. */
    struct learner *l = fld_model(rq);
    if (!l) {
        conn_close_after_reply(rq->c);
        return PROTO_DONE;
    }
    static const char *const keys[] = {"op", "id",  "model", "count", "source",
                                       "dt", "ack", "form",  "pseq",  NULL};
    const char *bad;
    const cJSON *cnt = field(rq->root, "count"), *s = field(rq->root, "source");
    const cJSON *form = field(rq->root, "form");
    double dt = NAN;
    uint64_t pseq = 0;
    int code = 0, applied = ack_mode(rq->root), samples = 0;
    if (cJSON_IsString(form))
        samples = strcmp(form->valuestring, "samples") == 0
                      ? 1
                      : (strcmp(form->valuestring, "transitions") == 0 ? 0 : -1);
    else if (form)
        samples = -1;
    if (!fld_only_keys(rq->root, keys, &bad)) {
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
    } else if (!fld_number(rq->root, "dt", &dt, &code, p->err, sizeof p->err, "")) {
        FAIL(rq, code, "%s", p->err);
    } else if (!isnan(dt) && dt < 0) {
        FAIL(rq, WORTH_E_BAD_PARAM, "\"dt\" must be >= 0");
    } else if (samples < 0) {
        FAIL(rq, WORTH_E_BAD_PARAM, "\"form\" must be \"transitions\" or \"samples\"");
    } else if (!smp_pseq(rq->root, &pseq, &code, p->err, sizeof p->err, "")) {
        FAIL(rq, code, "%s", p->err);
    } else if (samples && (pseq || !isnan(dt))) {
        FAIL(rq, WORTH_E_BAD_REQUEST,
             "samples carry their own t: \"pseq\" and \"dt\" are for transitions");
    } else if (pseq && pseq + (uint64_t)cnt->valuedouble - 1 > (uint64_t)9007199254740992.0) {
        FAIL(rq, WORTH_E_BAD_PARAM, "\"pseq\" + \"count\" - 1 exceeds 2^53");
    } else {
        snprintf(pc->model, sizeof pc->model, "%s", learner_name(l));
        pc->count = (size_t)cnt->valuedouble;
        snprintf(pc->source, sizeof pc->source, "%s", s ? s->valuestring : "");
        pc->dt_s = dt;
        pc->bulk_samples = samples;
        pc->pseq = pseq;
        pc->bulk_applied = applied;
        pc->has_id = rq->id != NULL;
        if (rq->id)
            snprintf(pc->id, sizeof pc->id, "%s", rq->id);
        size_t d = model_dims(learner_model(l));
        size_t bytes = pc->count * (samples ? d + 3 : 2 * d + 2) * sizeof(double);
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
    proto_conn_t *pc = pconn(c);
    const char *id = pc->has_id ? pc->id : NULL;
    struct learner *l = reg_find_model(p, pc->model, NULL);
    if (!l) {
        reply_error(p, c, id, WORTH_E_NO_SUCH_MODEL, -1, "model \"%s\" was dropped", pc->model);
        return PROTO_DONE;
    }
    size_t d = model_dims(learner_model(l)), k = pc->count, rec = 2 * d + 2;
    if (pc->bulk_samples) {
        CHECK(len == k * (d + 3) * sizeof(double));
        return smp_bulk(p, c, id, l, data, k, pc->bulk_applied);
    }
    CHECK(len == k * rec * sizeof(double));
    if (queue_space(learner_queue(l)) < k)
        return fld_park(l);
    const char *src = pc->source[0] ? pc->source : NULL;
    int rc = pairing_fit(learner_pairing(l), &src, 1, NULL, p->err, sizeof p->err);
    if (rc) {
        reply_error(p, c, id, rc, -1, "%s", p->err);
        return PROTO_DONE;
    }
    for (size_t i = 0; i < k; i++) {
        queue_rec_t *r = queue_slot(learner_queue(l), i);
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
        r->type = QREC_OBS;
        r->terminal = term == 1.0;
        r->dt_s = pc->dt_s;
        memcpy(r->src, pc->source, sizeof r->src);
        r->t_s = NAN;
        r->est = r->passes = 0;
        r->conn_id = 0;
        r->job = NULL;
        r->pseq = pc->pseq ? pc->pseq + i : 0;
    }
    return commit_transitions(p, c, id, l, k, 1, pc->bulk_applied);
}

void proto_bulk_truncated(struct proto *p, struct conn *c, size_t got)
{
    proto_conn_t *pc = pconn(c);
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
