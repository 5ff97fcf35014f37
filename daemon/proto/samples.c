/*
 * samples.c - samples paired into transitions, producer sequences, and the
 * sources op (schema/protocol.md, "Samples").
 *
 * Loop thread.  A request of samples is parsed into the model's free queue
 * slots (each sample's x where its transition's x_next goes), checked whole
 * (order of t per source, sources that fit), and only then paired
 * (live/pairing.h): each transition is written into a slot at or before the
 * sample's own, so nothing is copied twice and nothing is allocated.  The
 * sources whose state the request changes get one record each after its
 * transitions, so the log holds the pairing state with the transitions it
 * made, in one transaction.
 *
 * It must never pair a sample twice, pair across a gap, apply part of a
 * request, or pair on a state the log does not hold (learner_pairing_check).
 */

#include <cjson/cJSON.h>
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "common/jw.h"
#include "core/queue.h"
#include "live/pairing.h"
#include "proto/internal.h"
#include "worth/errors.h"

#if !defined(__BYTE_ORDER__) || __BYTE_ORDER__ != __ORDER_LITTLE_ENDIAN__
#error "bulk records are little-endian doubles; this build assumes a little-endian host"
#endif

/* The largest pseq: integers a JSON number holds exactly. */
#define PSEQ_MAX 9007199254740992.0

/* ---- the sources a request names ------------------------------------------------------- */

/* The request's entry of source name (added when new), or NULL when more sources than a
 * model can have are named. */
static struct req_src *rsrc(struct proto *p, const struct pairing *pr, const char *name)
{
    for (size_t i = 0; i < p->n_rsrc; i++)
        if (strcmp(p->rsrc[i].name, name) == 0)
            return &p->rsrc[i];
    if (p->n_rsrc > EST_MAX_SOURCES)
        return NULL;
    struct req_src *e = &p->rsrc[p->n_rsrc++];
    snprintf(e->name, sizeof e->name, "%s", name);
    e->req_t = -INFINITY;
    e->last_t = pairing_last_t(pr, name);
    e->pseq = pairing_pseq(pr, name);
    e->changed = 0;
    return e;
}

/* Appends a QREC_SOURCE record of every source the request changed, from slot j on. */
static size_t add_source_records(struct proto *p, struct learner *l, size_t j)
{
    for (size_t i = 0; i < p->n_rsrc; i++)
        if (p->rsrc[i].changed)
            pairing_record(learner_pairing(l), p->rsrc[i].name, queue_slot(learner_queue(l), j++));
    return j;
}

static size_t changed_count(const struct proto *p)
{
    size_t n = 0;
    for (size_t i = 0; i < p->n_rsrc; i++)
        n += p->rsrc[i].changed != 0;
    return n;
}

/* ---- samples --------------------------------------------------------------------------- */

/* Parses one sample object into slot r: t in t_s, x in v + dims, r, terminal, source. */
static int parse_sample(const spec_meta_t *meta, const cJSON *o, queue_rec_t *r, char *err,
                        size_t errlen, const char *where)
{
    static const char *const keys[] = {"source", "t", "x", "r", "terminal", NULL};
    const char *bad;
    int code = 0;
    if (!cJSON_IsObject(o)) {
        snprintf(err, errlen, "%sa sample must be an object", where);
        return WORTH_E_BAD_REQUEST;
    }
    if (fld_dup_key(o, &bad)) {
        snprintf(err, errlen, "%s\"%s\" appears twice", where, bad);
        return WORTH_E_BAD_REQUEST;
    }
    if (!fld_only_keys(o, keys, &bad)) {
        snprintf(err, errlen, "%sunknown field \"%.64s\" in a sample", where, bad);
        return WORTH_E_BAD_REQUEST;
    }
    static const char *const need[] = {"t", "x", "r"};
    for (int i = 0; i < 3; i++)
        if (!field(o, need[i])) {
            snprintf(err, errlen, "%s\"%s\" is required in a sample", where, need[i]);
            return WORTH_E_BAD_REQUEST;
        }
    if (!fld_number(o, "t", &r->t_s, &code, err, errlen, where) ||
        !fld_state(field(o, "x"), meta, r->v + meta->dims, "x", &code, err, errlen, where) ||
        !fld_number(o, "r", &r->r, &code, err, errlen, where))
        return code;
    if (fabs(r->r) > PROTO_MAX_ABS_R) {
        snprintf(err, errlen, "%s\"r\" is beyond +-%g", where, PROTO_MAX_ABS_R);
        return WORTH_E_BAD_NUMBER;
    }
    const cJSON *term = field(o, "terminal"), *s = field(o, "source");
    if (term && !cJSON_IsBool(term)) {
        snprintf(err, errlen, "%s\"terminal\" must be true or false", where);
        return WORTH_E_BAD_REQUEST;
    }
    r->terminal = cJSON_IsTrue(term);
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
        snprintf(r->src, sizeof r->src, "%s", s->valuestring);
    }
    return 0;
}

/*
 * The k samples parsed into the queue's first slots: checks the order of t per source and
 * that the sources fit, then pairs them and commits what they made.  Answers the request and
 * returns PROTO_DONE, or PROTO_PARK (nothing changed) when the queue lacks room.
 */
static int pair_samples(struct proto *p, struct conn *c, const char *id, struct learner *l,
                        size_t k, int applied, const char *what)
{
    struct queue *q = learner_queue(l);
    struct pairing *pr = learner_pairing(l);
    size_t d = queue_dims(q);
    p->n_rsrc = 0;
    for (size_t i = 0; i < k; i++) {
        queue_rec_t *r = queue_slot(q, i);
        struct req_src *e = rsrc(p, pr, r->src);
        if (!e) {
            reply_error(p, c, id, WORTH_E_TOO_MANY_SOURCES, (long)i,
                        "%s[%zu]: more sources in one request than a model can have (%d)", what, i,
                        EST_MAX_SOURCES);
            return PROTO_DONE;
        }
        if (!(r->t_s > e->req_t)) {
            reply_error(p, c, id, WORTH_E_OUT_OF_ORDER, (long)i,
                        "%s[%zu]: source \"%s\": t %.17g is not after %.17g earlier in this "
                        "request",
                        what, i, r->src, r->t_s, e->req_t);
            return PROTO_DONE;
        }
        e->req_t = r->t_s;
        e->changed |= r->t_s > e->last_t;
        p->srcs[i] = r->src;
    }
    size_t bad_at = 0;
    int rc = pairing_fit(learner_pairing(l), p->srcs, k, &bad_at, p->err, sizeof p->err);
    if (rc) {
        reply_error(p, c, id, rc, (long)bad_at, "%s[%zu]: %s", what, bad_at, p->err);
        return PROTO_DONE;
    }
    if (queue_space(q) < k + changed_count(p))
        return fld_park(l);

    /* Nothing can fail from here: pair, each transition into a slot at or before its sample's. */
    size_t j = 0, paired = 0, skipped = 0, gaps = 0;
    for (size_t i = 0; i < k; i++) {
        queue_rec_t *r = queue_slot(q, i);
        pair_sample_t s = {r->src, r->t_s, r->v + d, r->r, (int)r->terminal};
        switch (pairing_add(pr, &s, queue_slot(q, j))) {
        case PAIR_PAIRED:
            j++;
            paired++;
            break;
        case PAIR_SKIPPED:
            skipped++;
            break;
        case PAIR_GAP:
            gaps++;
            break;
        case PAIR_START:
            break;
        }
    }
    j = add_source_records(p, l, j);
    uint64_t seq = j ? learner_commit(l, j) : queue_last_seq(q);
    char more[96];
    snprintf(more, sizeof more, ",\"paired\":%zu,\"skipped\":%zu,\"gaps\":%zu", paired, skipped,
             gaps);
    ingest_ack(p, c, id, l, seq, more, applied);
    return PROTO_DONE;
}

int smp_observe(struct req *rq, struct learner *l, int applied)
{
    struct proto *p = rq->p;
    static const char *const keys[] = {"op", "id", "model", "sample", "samples", "ack", NULL};
    const char *bad;
    if (!fld_only_keys(rq->root, keys, &bad))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "unknown field \"%.64s\" beside samples", bad);
    const cJSON *one = field(rq->root, "sample"), *many = field(rq->root, "samples");
    if (one && many)
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"sample\" and \"samples\" are exclusive");
    if (many && !cJSON_IsArray(many))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"samples\" must be an array");
    size_t k = one ? 1 : (size_t)cJSON_GetArraySize(many);
    if (k == 0)
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"samples\" is empty");
    if (k > p->o->max_batch)
        return fail_done(rq, WORTH_E_TOO_LARGE, "%zu samples exceed the limit %zu", k,
                         p->o->max_batch);
    int rc = learner_pairing_check(l, p->err, sizeof p->err);
    if (rc)
        return fail_done(rq, rc, "%s", p->err);
    if (queue_space(learner_queue(l)) < k + 1)
        return fld_park(l);
    const spec_meta_t *meta = learner_meta(l);
    size_t i = 0;
    for (const cJSON *e = one ? one : many->child; e && i < k; e = e->next, i++) {
        char where[40] = "";
        if (!one)
            snprintf(where, sizeof where, "samples[%zu]: ", i);
        rc = parse_sample(meta, e, queue_slot(learner_queue(l), i), p->err, sizeof p->err, where);
        if (rc) {
            reply_error(p, rq->c, rq->id, rc, one ? -1 : (long)i, "%s", p->err);
            return PROTO_DONE;
        }
    }
    return pair_samples(p, rq->c, rq->id, l, k, applied, one ? "sample" : "samples");
}

int smp_bulk(struct proto *p, struct conn *c, const char *id, struct learner *l,
             const unsigned char *data, size_t count, int applied)
{
    struct queue *q = learner_queue(l);
    size_t d = queue_dims(q), rec = d + 3;
    int rc = learner_pairing_check(l, p->err, sizeof p->err);
    if (rc) {
        reply_error(p, c, id, rc, -1, "%s", p->err);
        return PROTO_DONE;
    }
    if (queue_space(q) < count + 1)
        return fld_park(l);
    const char *src = pconn(c)->source;
    for (size_t i = 0; i < count; i++) {
        queue_rec_t *r = queue_slot(q, i);
        const unsigned char *b = data + i * rec * sizeof(double);
        double term;
        memcpy(&r->t_s, b, sizeof(double));
        memcpy(r->v + d, b + sizeof(double), d * sizeof(double));
        memcpy(&r->r, b + (d + 1) * sizeof(double), sizeof(double));
        memcpy(&term, b + (d + 2) * sizeof(double), sizeof(double));
        int finite = isfinite(r->t_s) && isfinite(r->r);
        for (size_t j = 0; j < d && finite; j++)
            finite = isfinite(r->v[d + j]);
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
        r->terminal = term == 1.0;
        snprintf(r->src, sizeof r->src, "%s", src);
    }
    return pair_samples(p, c, id, l, count, applied, "record");
}

/* ---- producer sequences ---------------------------------------------------------------- */

int smp_pseq(const cJSON *o, uint64_t *pseq, int *code, char *err, size_t errlen, const char *where)
{
    const cJSON *f = field(o, "pseq");
    *pseq = 0;
    if (!f)
        return 1;
    if (!cJSON_IsNumber(f) || f->valuedouble != floor(f->valuedouble) || f->valuedouble < 1 ||
        f->valuedouble > PSEQ_MAX) {
        *code = WORTH_E_BAD_PARAM;
        snprintf(err, errlen, "%s\"pseq\" must be an integer 1..2^53", where);
        return 0;
    }
    *pseq = (uint64_t)f->valuedouble;
    return 1;
}

long smp_dedup(struct proto *p, struct conn *c, const char *id, struct learner *l, size_t k,
               size_t *skipped)
{
    struct queue *q = learner_queue(l);
    struct pairing *pr = learner_pairing(l);
    *skipped = 0;
    int rc = learner_pairing_check(l, p->err, sizeof p->err);
    if (rc) {
        reply_error(p, c, id, rc, -1, "%s", p->err);
        return -1;
    }
    p->n_rsrc = 0;
    size_t kept = 0;
    for (size_t i = 0; i < k; i++) {
        queue_rec_t *r = queue_slot(q, i);
        r->last = 1; /* kept; a skipped one is marked 0 until the slots move together */
        if (!r->pseq) {
            kept++;
            continue;
        }
        struct req_src *e = rsrc(p, pr, r->src);
        if (!e) {
            reply_error(p, c, id, WORTH_E_TOO_MANY_SOURCES, (long)i,
                        "[%zu]: more sources in one request than a model can have (%d)", i,
                        EST_MAX_SOURCES);
            return -1;
        }
        if (r->pseq <= e->pseq) {
            r->last = 0;
            (*skipped)++;
            continue;
        }
        e->pseq = r->pseq;
        e->changed = 1;
        kept++;
    }
    if (queue_space(q) < kept + changed_count(p)) {
        *skipped = 0;
        return -2;
    }
    size_t j = 0;
    for (size_t i = 0; i < k; i++) {
        if (!queue_slot(q, i)->last)
            continue;
        if (j != i)
            queue_slot_copy(q, j, i);
        j++;
    }
    for (size_t i = 0; i < p->n_rsrc; i++)
        if (p->rsrc[i].changed)
            pairing_pseq_set(pr, p->rsrc[i].name, p->rsrc[i].pseq);
    return (long)add_source_records(p, l, j);
}

/* ---- the sources op -------------------------------------------------------------------- */

int do_sources(struct req *rq)
{
    struct learner *l = fld_model(rq);
    if (!l)
        return PROTO_DONE;
    const struct pairing *pr = learner_pairing(l);
    jw_t *o = &rq->p->out;
    reply_begin(o, 1, rq->id);
    jw_lit(o, ",\"sources\":[");
    for (size_t i = 0; i < pairing_count(pr); i++) {
        const char *name;
        double t;
        uint64_t pseq;
        pairing_get(pr, i, &name, &t, &pseq);
        jw_lit(o, i ? ",{\"source\":" : "{\"source\":");
        jw_str(o, name);
        jw_lit(o, ",\"t\":");
        jw_num(o, t);
        jw_fmt(o, ",\"pseq\":%llu}", (unsigned long long)pseq);
    }
    jw_lit(o, "]");
    reply_end(o, rq->c);
    return PROTO_DONE;
}
