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
#include "store/history.h"
#include "worth/errors.h"

/* The share of returns V +- 2 sd must cover for an estimator's own sd to give its interval. */
#define SD_COVER_LO 0.90
#define SD_COVER_HI 0.99

/*
 * The 95% interval of estimator i at value v with own sd (NAN: none) into lo and hi,
 * and its method: "sd" (v +- 1.96 sd) when the sd's own coverage of V +- 2 sd over
 * the window is within [SD_COVER_LO, SD_COVER_HI], else "realised" (v +- the 95%
 * quantile of the realised errors, diag.h), or NULL when there is none yet.
 */
static const char *interval(const diag_est_t *r, double v, double sd, double *lo, double *hi)
{
    if (isnan(v))
        return NULL;
    if (isfinite(sd) && r->sd_n >= DIAG_MIN_WEIGHT && r->cover_sd2 >= SD_COVER_LO &&
        r->cover_sd2 <= SD_COVER_HI) {
        *lo = v - 1.96 * sd, *hi = v + 1.96 * sd;
        return "sd";
    }
    if (!isfinite(r->half95))
        return NULL;
    *lo = v - r->half95, *hi = v + r->half95;
    return "realised";
}

/* Writes ,"interval95":[lo,hi],"interval_method":M (or null and no method). */
static void out_interval(jw_t *o, const diag_est_t *r, double v, double sd)
{
    double lo, hi;
    const char *how = interval(r, v, sd, &lo, &hi);
    jw_lit(o, ",\"interval95\":");
    if (!how) {
        jw_lit(o, "null");
        return;
    }
    jw_lit(o, "[");
    jw_num(o, lo);
    jw_lit(o, ",");
    jw_num(o, hi);
    jw_lit(o, "],\"interval_method\":");
    jw_str(o, how);
}

/* Writes "state":S[,"why":W] of verdict h. */
static void out_state(jw_t *o, const health_est_t *h)
{
    jw_lit(o, "\"state\":");
    jw_str(o, health_state_name(h->state));
    if (h->why[0]) {
        jw_lit(o, ",\"why\":");
        jw_str(o, h->why);
    }
}

/* Estimator i's value as answered: NAN (null) while it has no estimate yet. */
static double answered(const learner_stats_t *st, const double *vals, size_t i)
{
    return st->health[i].estimate ? vals[i] : NAN;
}

/*
 * The work of answering one state, in multiply-adds: the features (about F per
 * input dimension for the costliest bases), a dot product per estimator, and
 * for each rls_td estimator its sd, phi'P phi, F^2, and for mlp and ensemble
 * a forward pass, about one multiply-add per weight.  An upper bound: sparse
 * bases cost less.
 */
static double state_work(const struct model *m)
{
    double f = (double)model_features(m), w = f * (double)(model_dims(m) + model_n_est(m));
    for (size_t i = 0; i < model_n_est(m); i++) {
        enum est_kind k = est_params(model_est(m, i))->kind;
        if (k == EST_RLS_TD)
            w += f * f;
        else if (k == EST_MLP || k == EST_ENSEMBLE)
            w += (double)est_weight_count(model_est(m, i));
    }
    return w;
}

/*
 * Which estimator answers: the one asked for, else the headline (health.h),
 * else (when that has diverged since) the first that has not.  A diverged
 * estimator's values are NAN in the snapshot, and only then.  Returns its
 * index, or -1 with a diverged error answered.
 */
static long headline(struct req *rq, const struct model *m, long pick, const double *vals,
                     const learner_stats_t *st)
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
    size_t pr = st->head.index;
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

/* When estimators have diverged: ,"diverged":[names],"answered_by":the estimator that answers. */
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
    jw_lit(o, "],\"answered_by\":");
    jw_str(o, model_est_name(m, (size_t)head));
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
    jw_str(o, st.head.automatic ? "auto" : model_est_name(m, model_primary(m)));
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
        learner_stats_t *st = &p->qstats;
        learner_stats(l, st);
        learner_value(l, xv, d, p->vals, p->sds, &seq);
        long head = headline(rq, m, pick, p->vals, st);
        if (head < 0)
            return PROTO_DONE;
        reply_begin(o, 1, rq->id);
        size_t h = (size_t)head;
        double hv = answered(st, p->vals, h);
        jw_lit(o, ",\"value\":");
        jw_num(o, hv);
        jw_lit(o, ",\"sd\":");
        jw_num(o, isnan(hv) ? NAN : p->sds[h]);
        out_interval(o, &st->realised[h], hv, p->sds[h]);
        if (pick >= 0) {
            jw_lit(o, ",");
            out_state(o, &st->health[h]);
        } else {
            jw_lit(o, ",\"primary\":{\"name\":");
            jw_str(o, model_est_name(m, h));
            jw_lit(o, ",");
            out_state(o, &st->health[h]);
            jw_lit(o, ",\"auto\":");
            jw_lit(o, st->head.automatic ? "true" : "false");
            jw_lit(o, ",\"reason\":");
            jw_str(o, h == st->head.index ? st->head.why
                                          : "the headline has diverged; the first estimator "
                                            "that has not answers");
            jw_lit(o, "},\"estimators\":{");
            for (size_t i = 0; i < ne; i++) {
                if (i)
                    jw_lit(o, ",");
                jw_str(o, model_est_name(m, i));
                jw_lit(o, ":");
                jw_num(o, answered(st, p->vals, i));
            }
            jw_lit(o, "},\"health\":{");
            for (size_t i = 0; i < ne; i++) {
                double v = answered(st, p->vals, i);
                jw_lit(o, i ? "," : "");
                jw_str(o, model_est_name(m, i));
                jw_lit(o, ":{");
                out_state(o, &st->health[i]);
                jw_lit(o, ",\"sd\":");
                jw_num(o, isnan(v) ? NAN : p->sds[i]);
                out_interval(o, &st->realised[i], v, p->sds[i]);
                jw_lit(o, "}");
            }
            /* Agreement: how far apart the estimators that answer are at this state. */
            double lo = INFINITY, hi = -INFINITY;
            for (size_t i = 0; i < ne; i++) {
                double v = answered(st, p->vals, i);
                if (!isnan(v))
                    lo = fmin(lo, v), hi = fmax(hi, v);
            }
            jw_lit(o, "},\"spread\":");
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
    learner_stats_t *st = &p->qstats;
    learner_stats(l, st); /* before the snapshot is held: it takes the same lock */
    seq = learner_read_begin(l);
    fld_state(xs->child, meta, xv, "x", &code, p->err, sizeof p->err, "");
    learner_read_value(l, xv, d, p->vals, p->sds);
    long head = headline(rq, m, pick, p->vals, st);
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
        jw_num(o, answered(st, p->vals, (size_t)head));
    }
    learner_read_end(l);
    jw_lit(o, "]");
    if (pick < 0) {
        jw_lit(o, ",\"primary\":{\"name\":");
        jw_str(o, model_est_name(m, (size_t)head));
        jw_lit(o, ",");
        out_state(o, &st->health[head]);
        jw_lit(o, "}");
        out_diverged(o, m, p->vals, head);
    }
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
        const health_est_t *hv = &st.health[i];
        jw_lit(o, ",\"health\":");
        jw_str(o, health_state_name(hv->state));
        if (hv->why[0]) {
            jw_lit(o, ",\"why\":");
            jw_str(o, hv->why);
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
        if (kind == EST_REPLAY || kind == EST_MLP || kind == EST_ENSEMBLE)
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
        jw_lit(o, "},\"coverage\":{\"sd_n\":");
        jw_num(o, d->sd_n);
        jw_lit(o, ",\"sd1\":");
        jw_num(o, d->cover_sd1);
        jw_lit(o, ",\"sd2\":");
        jw_num(o, d->cover_sd2);
        jw_lit(o, ",\"n\":");
        jw_num(o, d->cover_n);
        jw_lit(o, ",\"rms2\":");
        jw_num(o, d->cover_rms2);
        jw_lit(o, ",\"interval95\":");
        jw_num(o, d->cover_95);
        jw_lit(o, ",\"k95\":");
        jw_num(o, d->k95);
        jw_lit(o, ",\"half95\":");
        jw_num(o, d->half95);
        const diag_drift_t *de = &st.drift_est[i];
        jw_fmt(o,
               "},\"drift\":{\"armed\":%s,\"active\":%s,\"raised\":%llu,\"last_onset_step\":%llu,"
               "\"statistic\":",
               de->armed ? "true" : "false", de->active ? "true" : "false",
               (unsigned long long)de->alarms, (unsigned long long)de->last_onset);
        jw_num(o, de->statistic);
        jw_lit(o, "}}");
    }
    jw_lit(o, "},\"primary\":{\"name\":");
    jw_str(o, model_est_name(m, st.head.index));
    jw_lit(o, ",\"auto\":");
    jw_lit(o, st.head.automatic ? "true" : "false");
    jw_fmt(o, ",\"switches\":%llu,\"reason\":", (unsigned long long)st.head.switches);
    jw_str(o, st.head.why);
    jw_lit(o, "},\"returns_rms\":");
    jw_num(o, st.returns_rms);
    jw_lit(o, ",\"spread\":");
    jw_num(o, st.spread);
    jw_fmt(o,
           ",\"horizon\":%u,\"drift\":{\"alarms\":%llu,\"last_alarm_step\":%llu,"
           "\"last_onset_step\":%llu,\"armed\":%s,\"statistic\":",
           st.horizon, (unsigned long long)st.drift.alarms, (unsigned long long)st.drift.last_alarm,
           (unsigned long long)st.drift.last_onset, st.drift.armed ? "true" : "false");
    jw_num(o, st.drift.statistic);
    jw_lit(o, ",\"follows\":");
    jw_str(o, model_est_name(m, st.drift_follows));
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
    double since = -INFINITY, until = INFINITY, max = 1024;
    int code = 0;
    if (!fld_number(rq->root, "since", &since, &code, p->err, sizeof p->err, "") ||
        !fld_number(rq->root, "until", &until, &code, p->err, sizeof p->err, "") ||
        !fld_number(rq->root, "max", &max, &code, p->err, sizeof p->err, ""))
        return fail_done(rq, code, "%s", p->err);
    if (max != floor(max) || max < 2 || max > 100000)
        return fail_done(rq, WORTH_E_BAD_PARAM, "\"max\" must be an integer 2..100000");
    if (since > until)
        return fail_done(rq, WORTH_E_BAD_PARAM, "\"since\" is after \"until\"");
    /* A window of plant time lists the rows that have a t; without one, every row by seq. */
    history_query_t hq = {.by_t = field(rq->root, "since") || field(rq->root, "until"),
                          .from = since,
                          .to = until,
                          .max = (size_t)max};
    if (!hq.by_t) {
        hq.from = 0;
        hq.to = 9.2e18;
    }
    const struct model *m = learner_model(l);
    jw_t names;
    jw_init(&names);
    out_est_names(&names, m);
    fld_keep_id(rq);
    writer_history_list(p->w, learner_queue(l), names.b, model_n_est(m), learner_history_width(l),
                        &hq, conn_id(rq->c));
    jw_close(&names);
    conn_wait(rq->c);
    return PROTO_DONE;
}
