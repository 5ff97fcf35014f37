/*
 * admin.c - the requests that manage: hello, auth, model.create and
 * model.drop, train, checkpoint(s), rollback, backup, events.
 *
 * Loop thread.  Work that needs the database or the model's own thread is
 * queued (to the writer, or as a record in the model's queue) and answered
 * when it reports back; the connection waits meanwhile (conn_wait), so its
 * replies stay in order.  It must never log a token.
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

#ifndef WORTH_VERSION
#define WORTH_VERSION "0.0.0"
#endif

/* Largest number of training passes one request may ask for. */
#define MAX_PASSES 100000

/* ---- requests -------------------------------------------------------------------------- */

/*
 * A request the model's learner carries out in order with its transitions
 * (train, checkpoint, rollback): the free slot it goes in, zeroed, of type
 * (the caller made sure there is one) ...
 */
static queue_rec_t *request_record(struct req *rq, struct learner *l, uint32_t type)
{
    queue_rec_t *r = queue_slot(learner_queue(l), 0);
    memset(r, 0, sizeof *r);
    r->type = type;
    r->conn_id = conn_id(rq->c);
    return r;
}

/* ... then committed; the connection waits for the learner's reply. */
static int submit(struct req *rq, struct learner *l)
{
    fld_keep_id(rq);
    learner_commit(l, 1);
    conn_wait(rq->c);
    return PROTO_DONE;
}

int do_hello(struct req *rq)
{
    jw_t *o = &rq->p->out;
    reply_begin(o, 1, rq->id);
    jw_fmt(o, ",\"server\":\"worthd\",\"version\":\"%s\",\"protocol\":%d", WORTH_VERSION,
           PROTO_VERSION);
    reply_end(o, rq->c);
    return PROTO_DONE;
}

int do_auth(struct req *rq)
{
    proto_conn_t *pc = pconn(rq->c);
    const cJSON *t = field(rq->root, "token");
    const char *want = rq->p->o->token;
    if (!want) {
        pc->authed = 1; /* nothing to check: accept, as a client may always send auth */
    } else if (cJSON_IsString(t) && t->valuestring && ops_auth(rq, t->valuestring)) {
        pc->authed = 1; /* with the token's role (ops.c) */
    } else {
        say_warn("connection %llu: authentication failed", (unsigned long long)conn_id(rq->c));
        FAIL(rq, WORTH_E_UNAUTHORIZED, "wrong or missing token");
        conn_close_after_reply(rq->c);
        return PROTO_DONE;
    }
    reply_begin(&rq->p->out, 1, rq->id);
    reply_end(&rq->p->out, rq->c);
    return PROTO_DONE;
}

int do_create(struct req *rq)
{
    struct proto *p = rq->p;
    spec_t *s = NULL;
    int rc = spec_parse_within(rq->root, p->o->max_features, &s, p->err, sizeof p->err);
    if (rc)
        return fail_done(rq, rc, "%s", p->err);
    if (reg_find_model(p, s->name, NULL) || reg_find_damaged(p, s->name, NULL)) {
        FAIL(rq, WORTH_E_MODEL_EXISTS, "a model named \"%s\" exists%s", s->name,
             reg_find_damaged(p, s->name, NULL) ? " (quarantined: drop it first)" : "");
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
    CHECK(learner_set_meta(l, &s->meta, NULL, 0, p->err, sizeof p->err) == 0); /* no database */
    p->models[p->n++] = reg_new_slot(l, 0);
    say_info("model %s created: %zu dims, %zu features, %zu estimators", s->name, model_dims(m),
             model_features(m), model_n_est(m));
    /* The reply comes when the model's row has committed. */
    writer_create_model(p->w, learner_queue(l), s->name, learner_spec(l), model_features(m),
                        conn_id(rq->c));
    pconn(rq->c)->creating = l;
    fld_keep_id(rq);
    conn_wait(rq->c);
    spec_free(s);
    return PROTO_DONE;
}

int do_drop(struct req *rq)
{
    struct proto *p = rq->p;
    const char *name = fld_string(rq, "model");
    if (!name)
        return PROTO_DONE;
    size_t at = 0;
    if (!reg_find_model(p, name, &at) && reg_find_damaged(p, name, &at)) {
        fld_keep_id(rq); /* the writer replies, as for any drop */
        conn_wait(rq->c);
        reg_forget_damaged(p, at, conn_id(rq->c));
        return PROTO_DONE;
    }
    if (!reg_find_model(p, name, &at))
        return fail_done(rq, WORTH_E_NO_SUCH_MODEL, "no model named \"%.64s\"", name);
    say_info("model %s dropped", name);
    /* The reply comes from the writer: whether the drop is stored, or only in memory. */
    fld_keep_id(rq);
    conn_wait(rq->c);
    reg_unregister(p, at, 1, conn_id(rq->c));
    return PROTO_DONE;
}

int do_train(struct req *rq)
{
    struct learner *l = fld_model(rq);
    if (!l)
        return PROTO_DONE;
    const struct model *m = learner_model(l);
    const char *name = fld_string(rq, "estimator");
    if (!name)
        return PROTO_DONE;
    int e = model_est_find(m, name);
    if (e < 0)
        return fail_done(rq, WORTH_E_BAD_PARAM, "model has no estimator \"%.64s\"", name);
    enum est_kind kind = est_params(model_est(m, (size_t)e))->kind;
    if (kind != EST_REPLAY && kind != EST_LSTD && kind != EST_MLP && kind != EST_ENSEMBLE)
        return fail_done(rq, WORTH_E_UNSUPPORTED,
                         "estimator \"%s\" (%s) does not train; replay, lstd, mlp and "
                         "ensemble do",
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
    if (queue_space(learner_queue(l)) < 1)
        return fld_park(l);
    queue_rec_t *r = request_record(rq, l, QREC_TRAIN);
    r->est = (uint32_t)e;
    snprintf(r->src, sizeof r->src, "%s", name); /* the log names the estimator */
    r->passes = (uint32_t)passes;
    r->ordinal = learner_next_training(l);
    return submit(rq, l); /* its progress and reply come before anything else here */
}

int do_events(struct req *rq)
{
    static const char *const keys[] = {"op", "id", "model", "since", "limit", NULL};
    const char *bad;
    if (!fld_only_keys(rq->root, keys, &bad))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "unknown field \"%.64s\"", bad);
    struct learner *l = NULL;
    /* A quarantined model's events are listed: they say when and why it was quarantined. */
    const struct quarantined *dm = fld_damaged(rq);
    if (!dm && field(rq->root, "model") && !(l = fld_model(rq)))
        return PROTO_DONE;
    double since = 0, limit = 1000;
    int code = 0;
    if (!fld_number(rq->root, "since", &since, &code, rq->p->err, sizeof rq->p->err, "") ||
        !fld_number(rq->root, "limit", &limit, &code, rq->p->err, sizeof rq->p->err, ""))
        return fail_done(rq, code, "%s", rq->p->err);
    if (limit != floor(limit) || limit < 1 || limit > 100000)
        return fail_done(rq, WORTH_E_BAD_PARAM, "\"limit\" must be an integer 1..100000");
    fld_keep_id(rq);
    if (dm)
        writer_list_model_events(rq->p->w, dm->id, dm->name, since, (size_t)limit, conn_id(rq->c));
    else
        writer_list_events(rq->p->w, l ? learner_queue(l) : NULL, since, (size_t)limit,
                           conn_id(rq->c));
    conn_wait(rq->c);
    return PROTO_DONE;
}

int do_checkpoint(struct req *rq)
{
    struct learner *l = fld_model(rq);
    if (!l)
        return PROTO_DONE;
    const cJSON *lab = field(rq->root, "label");
    if (lab && !cJSON_IsString(lab))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"label\" must be a string");
    if (lab && (strlen(lab->valuestring) < 1 || strlen(lab->valuestring) > MODEL_NAME_MAX))
        return fail_done(rq, WORTH_E_BAD_PARAM, "\"label\" must be 1..%d bytes", MODEL_NAME_MAX);
    if (queue_space(learner_queue(l)) < 1)
        return fld_park(l);
    queue_rec_t *r = request_record(rq, l, QREC_CHECKPOINT);
    r->est = lab != NULL;
    if (lab)
        snprintf(r->src, sizeof r->src, "%s", lab->valuestring);
    return submit(rq, l);
}

int do_checkpoints(struct req *rq)
{
    struct learner *l = fld_model(rq);
    if (!l)
        return PROTO_DONE;
    fld_keep_id(rq);
    writer_list_checkpoints(rq->p->w, learner_queue(l), conn_id(rq->c));
    conn_wait(rq->c);
    return PROTO_DONE;
}

/* Reads a window [lo, hi] from a two-number array. */
static int read_window(const cJSON *a, double *lo, double *hi)
{
    if (!cJSON_IsArray(a) || cJSON_GetArraySize(a) != 2 || !cJSON_IsNumber(a->child) ||
        !cJSON_IsNumber(a->child->next) || !isfinite(a->child->valuedouble) ||
        !isfinite(a->child->next->valuedouble))
        return -1;
    *lo = a->child->valuedouble;
    *hi = a->child->next->valuedouble;
    return 0;
}

int do_rollback(struct req *rq)
{
    struct learner *l = fld_model(rq);
    if (!l)
        return PROTO_DONE;
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
        if (read_window(by_t ? wt : ws, &lo, &hi) != 0)
            return fail_done(rq, WORTH_E_BAD_REQUEST, "the window must be two finite numbers");
        /* Seqs are whole numbers from 1; a double holds them exactly up to 2^53. */
        if (!by_t && (lo != floor(lo) || hi != floor(hi) || lo < 1 || hi > 9007199254740992.0))
            return fail_done(rq, WORTH_E_BAD_PARAM,
                             "an excluded seq window is two whole numbers in 1..2^53");
        if (lo > hi)
            return fail_done(rq, WORTH_E_BAD_PARAM, "the window's start is after its end");
    }
    if (queue_space(learner_queue(l)) < 1)
        return fld_park(l);
    queue_plan_t *plan = mem_calloc(1, sizeof *plan);
    plan->checkpoint = (int64_t)cp->valuedouble;
    plan->replay = replay;
    plan->by_t = by_t;
    plan->lo = lo;
    plan->hi = hi;
    queue_rec_t *r = request_record(rq, l, QREC_ROLLBACK);
    r->job = plan;
    return submit(rq, l);
}

/*
 * A backup names a file in worthd's --backup-dir, never a path: a copy holds
 * bytes clients chose, and must not land on a file worthd may write elsewhere.
 */
int do_backup(struct req *rq)
{
    static const char *const keys[] = {"op", "id", "name", NULL};
    const char *bad;
    if (field(rq->root, "path"))
        return fail_done(rq, WORTH_E_BAD_PARAM,
                         "backups go to worthd's --backup-dir: send {\"op\":\"backup\"} for a "
                         "name of worthd's, or {\"op\":\"backup\",\"name\":\"nightly.db\"}");
    if (!fld_only_keys(rq->root, keys, &bad))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "unknown field \"%.64s\"", bad);
    const cJSON *n = field(rq->root, "name");
    if (n && (!cJSON_IsString(n) || !n->valuestring))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"name\" must be a string");
    char why[160];
    if (n && backup_name_check(n->valuestring, why, sizeof why) != 0)
        return fail_done(rq, WORTH_E_BAD_PARAM, "\"name\": %s", why);
    fld_keep_id(rq);
    writer_backup(rq->p->w, n ? n->valuestring : NULL, conn_id(rq->c));
    conn_wait(rq->c);
    return PROTO_DONE;
}
