/*
 * query.c - the requests that read: value, stats, history, model.list, model.get.
 *
 * Loop thread.  Values come from the learner's published snapshot, every
 * state of one request from the same one (learner_read_begin); a request is
 * bounded in work (--max-query-work) because the loop answers every client.
 * A diverged estimator answers null and the headline falls to a healthy one.
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
static void out_diverged(jw_t *o, const struct model *m, const double *vals, long head)
{
    int any = 0;
    for (size_t i = 0; i < model_n_est(m); i++) {
        if (!isnan(vals[i]))
            continue;
        jw_lit(o, any ? "," : ",\"diverged\":[");
        jw_str(o, model_est_name(m, i));
        any = 1;
    }
    if (!any)
        return;
    jw_lit(o, "]");
    if ((size_t)head != model_primary(m)) {
        jw_lit(o, ",\"answered_by\":");
        jw_str(o, model_est_name(m, (size_t)head));
    }
}

static void out_est_names(jw_t *o, const struct model *m)
{
    jw_lit(o, "[");
    for (size_t i = 0; i < model_n_est(m); i++) {
        if (i)
            jw_lit(o, ",");
        jw_str(o, model_est_name(m, i));
    }
    jw_lit(o, "]");
}

/* Writes "model":NAME,"dims":D,"features":N,"estimators":[NAMES], shared by list and get. */
static void out_model_head(jw_t *o, const struct learner *l, const struct model *m)
{
    jw_lit(o, "\"model\":");
    jw_str(o, learner_name(l));
    jw_fmt(o, ",\"dims\":%zu,\"features\":%zu,\"estimators\":", model_dims(m), model_features(m));
    out_est_names(o, m);
}

/* Writes "model":NAME,"state":"damaged","seq":N,"reason":WHY, shared by list and get. */
static void out_damaged(jw_t *o, const struct quarantined *dm)
{
    jw_lit(o, "\"model\":");
    jw_str(o, dm->name);
    jw_fmt(o, ",\"state\":\"damaged\",\"seq\":%llu,\"reason\":", (unsigned long long)dm->seq);
    jw_str(o, dm->reason);
}

/*
 * The model a request names (its model in *m), its figures from the latest
 * snapshot in *st, and the reply begun; NULL (answered) when there is no such model.
 */
static struct learner *begin_with_stats(struct req *rq, learner_stats_t *st, const struct model **m)
{
    struct learner *l = fld_model(rq);
    if (!l)
        return NULL;
    *m = learner_model(l);
    learner_stats(l, st);
    reply_begin(&rq->p->out, 1, rq->id);
    return l;
}

int do_list(struct req *rq)
{
    struct proto *p = rq->p;
    jw_t *o = &p->out;
    reply_begin(o, 1, rq->id);
    jw_lit(o, ",\"models\":[");
    for (size_t i = 0; i < p->n; i++) {
        const struct model *m = learner_model(p->models[i]->l);
        learner_stats_t st;
        learner_stats(p->models[i]->l, &st);
        jw_lit(o, i ? ",{" : "{");
        out_model_head(o, p->models[i]->l, m);
        jw_fmt(o, ",\"received\":%llu,\"applied\":%llu,\"state\":\"ok\"}",
               (unsigned long long)st.received, (unsigned long long)st.applied);
    }
    for (size_t i = 0; i < p->n_damaged; i++) {
        jw_lit(o, p->n || i ? ",{" : "{");
        out_damaged(o, &p->damaged[i]);
        jw_lit(o, "}");
    }
    jw_lit(o, "]");
    reply_end(o, rq->c);
    return PROTO_DONE;
}

int do_get(struct req *rq)
{
    const struct quarantined *dm = fld_damaged(rq);
    if (dm) {
        reply_begin(&rq->p->out, 1, rq->id);
        jw_lit(&rq->p->out, ",");
        out_damaged(&rq->p->out, dm);
        reply_end(&rq->p->out, rq->c);
        return PROTO_DONE;
    }
    learner_stats_t st;
    const struct model *m;
    struct learner *l = begin_with_stats(rq, &st, &m);
    if (!l)
        return PROTO_DONE;
    jw_t *o = &rq->p->out;
    jw_lit(o, ",");
    out_model_head(o, l, m);
    jw_lit(o, ",\"primary\":");
    jw_str(o, model_est_name(m, model_primary(m)));
    jw_fmt(o, ",\"received\":%llu,\"applied\":%llu,\"state\":\"ok\",\"spec\":",
           (unsigned long long)st.received, (unsigned long long)st.applied);
    jw_lit(o, learner_spec(l));
    reply_end(o, rq->c);
    return PROTO_DONE;
}

int do_value(struct req *rq)
{
    struct proto *p = rq->p;
    struct learner *l = fld_model(rq);
    if (!l)
        return PROTO_DONE;
    const struct model *m = learner_model(l);
    size_t d = model_dims(m), ne = model_n_est(m);
    const spec_meta_t *meta = learner_meta(l);
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
    jw_t *o = &p->out;
    if (x) {
        if (!fld_state(x, meta, xv, "x", &code, p->err, sizeof p->err, ""))
            return fail_done(rq, code, "%s", p->err);
        learner_value(l, xv, d, p->vals, p->sds, &seq);
        long head = headline(rq, m, pick, p->vals);
        if (head < 0)
            return PROTO_DONE;
        reply_begin(o, 1, rq->id);
        jw_lit(o, ",\"value\":");
        if (pick >= 0) {
            jw_num(o, p->vals[pick]);
            jw_lit(o, ",\"sd\":");
            jw_num(o, p->sds[pick]);
        } else {
            jw_num(o, p->vals[head]);
            jw_lit(o, ",\"estimators\":{");
            for (size_t i = 0; i < ne; i++) {
                if (i)
                    jw_lit(o, ",");
                jw_str(o, model_est_name(m, i));
                jw_lit(o, ":");
                jw_num(o, p->vals[i]);
            }
            jw_lit(o, "},\"sd\":");
            jw_num(o, pick_sd(m, p->sds, (size_t)head));
            /* Agreement: how far apart the estimators are at this state. */
            double lo = INFINITY, hi = -INFINITY;
            for (size_t i = 0; i < ne; i++) {
                lo = fmin(lo, p->vals[i]);
                hi = fmax(hi, p->vals[i]);
            }
            jw_lit(o, ",\"spread\":");
            jw_num(o, hi - lo);
            out_diverged(o, m, p->vals, head);
        }
        jw_fmt(o, ",\"seq\":%llu", (unsigned long long)seq);
        reply_end(o, rq->c);
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
        if (!fld_state(e, meta, xv, "x", &code, p->err, sizeof p->err, where)) {
            reply_error(p, rq->c, rq->id, code, (long)i, "%s", p->err);
            return PROTO_DONE;
        }
    }
    /* Every state from one snapshot, as protocol.md promises: one seq for the whole answer.
     * The first state tells which estimators have diverged in it. */
    seq = learner_read_begin(l);
    fld_state(xs->child, meta, xv, "x", &code, p->err, sizeof p->err, "");
    learner_read_value(l, xv, d, p->vals, p->sds);
    long head = headline(rq, m, pick, p->vals);
    if (head < 0) {
        learner_read_end(l);
        return PROTO_DONE;
    }
    reply_begin(o, 1, rq->id);
    jw_lit(o, ",\"values\":[");
    i = 0;
    for (const cJSON *e = xs->child; e; e = e->next, i++) {
        fld_state(e, meta, xv, "x", &code, p->err, sizeof p->err, "");
        learner_read_value(l, xv, d, p->vals, p->sds);
        if (i)
            jw_lit(o, ",");
        jw_num(o, p->vals[head]);
    }
    learner_read_end(l);
    jw_lit(o, "]");
    if (pick < 0)
        out_diverged(o, m, p->vals, head);
    jw_fmt(o, ",\"seq\":%llu", (unsigned long long)seq);
    reply_end(o, rq->c);
    return PROTO_DONE;
}

/* The rest of stats' "drift" (its state now and its stated rate), then "inputs". */
static void stats_alarms(jw_t *o, const learner_stats_t *st, const diag_params_t *dp,
                         const spec_meta_t *meta)
{
    static const char *const kinds[3] = {"frozen", "out_of_range", "silent"};
    const diag_drift_t *dr = &st->drift;
    jw_fmt(o,
           ",\"active\":%s,\"side\":\"%s\",\"clears\":%llu,\"last_clear_step\":%llu,"
           "\"threshold\":",
           dr->active ? "true" : "false", dr->side > 0 ? "up" : (dr->side < 0 ? "down" : ""),
           (unsigned long long)dr->clears, (unsigned long long)dr->last_clear);
    jw_num(o, dr->threshold);
    jw_lit(o, ",\"k\":");
    jw_num(o, dp->drift.k);
    jw_fmt(o, ",\"batch\":%u,\"false_alarm_transitions\":", dp->drift.batch);
    jw_num(o, dp->drift.arl0);
    if (dp->drift.false_alarm_days > 0) {
        jw_lit(o, ",\"false_alarm_days\":");
        jw_num(o, dp->drift.false_alarm_days);
    }
    jw_fmt(o, "},\"inputs\":{\"raised\":%zu,\"checks\":[", st->n_inputs);
    for (size_t i = 0; i < st->n_inputs && i < LEARNER_INPUTS_MAX; i++) {
        const learner_input_t *c = &st->inputs[i];
        jw_fmt(o, "%s{\"kind\":\"%s\",\"source\":", i ? "," : "", kinds[c->kind]);
        jw_str(o, c->src);
        if (c->dim >= 0) {
            jw_fmt(o, ",\"dim_index\":%d", c->dim);
            if (meta->named) {
                jw_lit(o, ",\"dim\":");
                jw_str(o, meta->names[c->dim]);
            }
        }
        jw_lit(o, ",\"since_t\":");
        jw_num(o, c->since);
        jw_lit(o, "}");
    }
    jw_lit(o, "]}");
}

int do_stats(struct req *rq)
{
    learner_stats_t st;
    const struct model *m;
    struct learner *l = begin_with_stats(rq, &st, &m);
    if (!l)
        return PROTO_DONE;
    jw_t *o = &rq->p->out;
    jw_lit(o, ",\"model\":");
    jw_str(o, learner_name(l));
    jw_fmt(o, ",\"received\":%llu,\"applied\":%llu,\"queue\":%zu,\"clipped\":%llu,\"sources\":%zu",
           (unsigned long long)st.received, (unsigned long long)st.applied,
           (size_t)(st.received - st.applied), (unsigned long long)st.counts.clipped,
           st.counts.sources);
    if (!isnan(st.plant_t)) {
        jw_lit(o, ",\"plant_t\":");
        jw_num(o, st.plant_t);
    }
    jw_lit(o, ",\"estimators\":{");
    for (size_t i = 0; i < model_n_est(m); i++) {
        const est_stats_t *e = &st.est[i];
        enum est_kind kind = est_params(model_est(m, i))->kind;
        if (i)
            jw_lit(o, ",");
        jw_str(o, model_est_name(m, i));
        jw_lit(o, ":{\"kind\":");
        jw_str(o, est_kind_name(kind));
        jw_fmt(o, ",\"updates\":%llu,\"guarded\":%llu", (unsigned long long)e->updates,
               (unsigned long long)e->guarded);
        static const char *const health[] = {"ok", "unhealthy", "diverged"};
        jw_lit(o, ",\"health\":");
        jw_str(o, e->health >= 0 && e->health <= 2 ? health[e->health] : "?");
        if (e->why) {
            jw_lit(o, ",\"why\":");
            jw_str(o, e->why);
        }
        if (e->health == EST_HEALTH_DIVERGED)
            jw_fmt(o, ",\"diverged_at\":%llu", (unsigned long long)e->diverged_at);
        jw_lit(o, ",\"td_rms\":");
        jw_num(o, e->td_rms);
        jw_lit(o, ",\"td_last\":");
        jw_num(o, e->td_last);
        if (kind == EST_RLS_TD) {
            jw_lit(o, ",\"trace_p\":");
            jw_num(o, e->trace_p);
            jw_fmt(o, ",\"p_resets\":%llu", (unsigned long long)e->p_resets);
        }
        if (kind == EST_LSTD)
            jw_fmt(o, ",\"refits\":%llu", (unsigned long long)e->refits);
        if (kind == EST_REPLAY)
            jw_fmt(o, ",\"steps\":%llu", (unsigned long long)e->refits);
        jw_lit(o, ",\"last_update\":");
        jw_num(o, st.last_update);
        const diag_est_t *d = &st.realised[i];
        jw_fmt(o, ",\"realised\":{\"n\":%llu,\"bias\":", (unsigned long long)d->n);
        jw_num(o, d->bias);
        jw_lit(o, ",\"rms\":");
        jw_num(o, d->rms);
        jw_lit(o, ",\"bias_window\":");
        jw_num(o, d->bias_window);
        jw_lit(o, ",\"rms_window\":");
        jw_num(o, d->rms_window);
        jw_lit(o, "}}");
    }
    jw_lit(o, "},\"spread\":");
    jw_num(o, st.spread);
    jw_fmt(o,
           ",\"horizon\":%u,\"drift\":{\"alarms\":%llu,\"last_alarm_step\":%llu,"
           "\"last_onset_step\":%llu,\"armed\":%s,\"statistic\":",
           st.horizon, (unsigned long long)st.drift.alarms, (unsigned long long)st.drift.last_alarm,
           (unsigned long long)st.drift.last_onset, st.drift.armed ? "true" : "false");
    jw_num(o, st.drift.statistic);
    stats_alarms(o, &st, model_diag_params(m), learner_meta(l));
    reply_end(o, rq->c);
    return PROTO_DONE;
}

int do_history(struct req *rq)
{
    struct learner *l = fld_model(rq);
    if (!l)
        return PROTO_DONE;
    struct proto *p = rq->p;
    if (!p->hist)
        p->hist = mem_calloc(LEARNER_HISTORY_MAX, sizeof *p->hist);
    size_t n = learner_history(l, p->hist, LEARNER_HISTORY_MAX);
    const struct model *m = learner_model(l);
    jw_t *o = &p->out;
    reply_begin(o, 1, rq->id);
    jw_lit(o, ",\"estimators\":");
    out_est_names(o, m);
    jw_lit(o, ",\"history\":[");
    for (size_t i = 0; i < n; i++) {
        jw_lit(o, i ? ",{\"t\":" : "{\"t\":");
        jw_num(o, p->hist[i].t);
        jw_fmt(o, ",\"seq\":%llu", (unsigned long long)p->hist[i].seq);
        if (!isnan(p->hist[i].plant_t)) {
            jw_lit(o, ",\"plant_t\":");
            jw_num(o, p->hist[i].plant_t);
        }
        jw_lit(o, ",\"td_rms\":[");
        for (size_t k = 0; k < model_n_est(m); k++) {
            if (k)
                jw_lit(o, ",");
            jw_num(o, p->hist[i].td_rms[k]);
        }
        jw_lit(o, "],\"realised_rms\":[");
        for (size_t k = 0; k < model_n_est(m); k++) {
            if (k)
                jw_lit(o, ",");
            jw_num(o, p->hist[i].realised_rms[k]);
        }
        jw_lit(o, "]}");
    }
    jw_lit(o, "]");
    reply_end(o, rq->c);
    return PROTO_DONE;
}
