/*
 * ask.c - questions to the fleet: worth.ask.<model> (mapped by the servers to
 * worth.q.<shard>.<model>, answered by the shard's owner) and
 * worth.via.<node>.<model> (any node forwards to the owner and relays the
 * answer).
 *
 * A request is one JSON object with "op":
 *   value      {"x":[...]}      every estimator's value and sd, the headline's
 *   stats      {}               counts, the newest sequence, the shard's place
 *   state      {}               model_save's bytes in hex (for bit-for-bit checks)
 *   check      {"spec":{...}}   would this model.create be accepted, does the model exist
 *   checkpoint {}               store the shard's checkpoint now
 *   rollback   {"exclude":[...]} re-learn the model without those windows (relearn.c)
 * The answer is {"ok":true,...} or {"ok":false,"error":{"code","message"}}
 * with the codes of worth/errors.h; no_owner when no node holds the shard (a
 * takeover is under way: retry).
 */
#include <cjson/cJSON.h>
#include <inttypes.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "common/jw.h"
#include "common/mem.h"
#include "fleet/fleet_impl.h"
#include "worth/errors.h"

/* Most bytes of a forwarded answer's wait. */
#define FORWARD_TIMEOUT_MS 5000

void ask_error(natsConnection *nc, const char *reply, int code, const char *fmt, ...)
{
    if (!reply || !*reply)
        return;
    char msg[400];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(msg, sizeof msg, fmt, ap);
    va_end(ap);
    cJSON *o = cJSON_CreateObject();
    cJSON_AddFalseToObject(o, "ok");
    cJSON *e = cJSON_AddObjectToObject(o, "error");
    cJSON_AddStringToObject(e, "code", worth_err_name(code));
    cJSON_AddStringToObject(e, "message", msg);
    char *s = cJSON_PrintUnformatted(o);
    if (s)
        natsConnection_PublishString(nc, reply, s);
    free(s);
    cJSON_Delete(o);
}

void ask_queue(natsConnection *nc, natsSubscription *sub, natsMsg *msg, void *closure)
{
    (void)sub;
    struct node *nd = closure;
    pthread_mutex_lock(&nd->q.mu);
    if (nd->q.n == FLEET_ASKS) {
        pthread_mutex_unlock(&nd->q.mu);
        ask_error(nc, natsMsg_GetReply(msg), WORTH_E_OVER_BUDGET,
                  "node %s holds %d questions already; retry later", nd->o.node, FLEET_ASKS);
        natsMsg_Destroy(msg);
        return;
    }
    nd->q.msg[(nd->q.head + nd->q.n) % FLEET_ASKS] = msg;
    nd->q.n++;
    pthread_cond_signal(&nd->q.cv);
    pthread_mutex_unlock(&nd->q.mu);
}

void ask_forward(natsConnection *nc, natsSubscription *sub, natsMsg *msg, void *closure)
{
    (void)sub;
    struct node *nd = closure;
    const char *reply = natsMsg_GetReply(msg);
    const char *model = fleet_subject_model(natsMsg_GetSubject(msg));
    if (!model || !spec_name_ok(model) || strchr(model, '.')) {
        ask_error(nc, reply, WORTH_E_BAD_REQUEST, "no model name in subject %s",
                  natsMsg_GetSubject(msg));
        natsMsg_Destroy(msg);
        return;
    }
    char subj[128];
    snprintf(subj, sizeof subj, "worth.ask.%s", model);
    natsMsg *ans = NULL;
    natsStatus st = natsConnection_Request(&ans, nc, subj, natsMsg_GetData(msg),
                                           natsMsg_GetDataLength(msg), FORWARD_TIMEOUT_MS);
    if (st == NATS_OK && reply)
        natsConnection_Publish(nc, reply, natsMsg_GetData(ans), natsMsg_GetDataLength(ans));
    else if (st == NATS_NO_RESPONDERS)
        ask_error(nc, reply, WORTH_E_NO_OWNER,
                  "no node owns model %s's shard now (takeover under way?); retry later", model);
    else if (st != NATS_OK)
        ask_error(nc, reply, WORTH_E_NO_OWNER, "node %s got no answer from %s's owner: %s",
                  nd->o.node, model, natsStatus_GetText(st));
    natsMsg_Destroy(ans);
    natsMsg_Destroy(msg);
}

static void send_obj(struct node *nd, const char *reply, cJSON *o)
{
    char *s = cJSON_PrintUnformatted(o);
    if (s && reply && *reply)
        natsConnection_PublishString(nd->nc, reply, s);
    free(s);
    cJSON_Delete(o);
}

static cJSON *ok_obj(const struct node *nd, const struct shard *s, const struct fmodel *f)
{
    cJSON *o = cJSON_CreateObject();
    cJSON_AddTrueToObject(o, "ok");
    cJSON_AddStringToObject(o, "model", f->name);
    cJSON_AddStringToObject(o, "node", nd->o.node);
    cJSON_AddNumberToObject(o, "shard", s->id);
    cJSON_AddNumberToObject(o, "applied", (double)f->applied);
    cJSON_AddNumberToObject(o, "rejected", (double)f->rejected);
    cJSON_AddNumberToObject(o, "seq", (double)f->last_seq);
    return o;
}

static void ask_value(struct node *nd, const char *reply, const struct shard *s,
                      const struct fmodel *f, const cJSON *req)
{
    const cJSON *jx = cJSON_GetObjectItemCaseSensitive(req, "x");
    size_t n = 0;
    for (const cJSON *e = cJSON_IsArray(jx) ? jx->child : NULL; e; e = e->next) {
        if (!cJSON_IsNumber(e) || n == FEAT_MAX_DIMS) {
            ask_error(nd->nc, reply, WORTH_E_BAD_REQUEST, "x: an array of at most %d numbers",
                      FEAT_MAX_DIMS);
            return;
        }
        nd->x[n++] = e->valuedouble;
    }
    if (!cJSON_IsArray(jx)) {
        ask_error(nd->nc, reply, WORTH_E_BAD_REQUEST, "value needs \"x\": [numbers]");
        return;
    }
    size_t ne = model_n_est(f->m);
    double v[MODEL_MAX_EST], sd[MODEL_MAX_EST];
    int rc = model_value(f->m, nd->x, n, v, sd, f->work);
    if (rc) {
        ask_error(nd->nc, reply, rc, "model %s has %zu dims, x has %zu", f->name, model_dims(f->m),
                  n);
        return;
    }
    cJSON *o = ok_obj(nd, s, f);
    size_t h = model_headline(f->m);
    cJSON_AddStringToObject(o, "estimator", model_est_name(f->m, h));
    if (isfinite(v[h]))
        cJSON_AddNumberToObject(o, "value", v[h]);
    else
        cJSON_AddNullToObject(o, "value");
    cJSON *vals = cJSON_AddObjectToObject(o, "values");
    cJSON *sds = cJSON_AddObjectToObject(o, "sd");
    for (size_t i = 0; i < ne; i++) {
        const char *en = model_est_name(f->m, i);
        if (isfinite(v[i]))
            cJSON_AddNumberToObject(vals, en, v[i]);
        else
            cJSON_AddNullToObject(vals, en);
        if (isfinite(sd[i]))
            cJSON_AddNumberToObject(sds, en, sd[i]);
        else
            cJSON_AddNullToObject(sds, en);
    }
    send_obj(nd, reply, o);
}

static void ask_state(struct node *nd, const char *reply, const struct shard *s,
                      const struct fmodel *f)
{
    size_t len = 0;
    model_save(f->m, NULL, 0, &len);
    uint8_t *buf = malloc(len);
    char *hex = malloc(2 * len + 1);
    if (!buf || !hex || model_save(f->m, buf, len, &len) != 0) {
        free(buf);
        free(hex);
        ask_error(nd->nc, reply, WORTH_E_NO_MEMORY, "no memory for model %s's state", f->name);
        return;
    }
    static const char digits[] = "0123456789abcdef";
    for (size_t i = 0; i < len; i++) {
        hex[2 * i] = digits[buf[i] >> 4];
        hex[2 * i + 1] = digits[buf[i] & 15];
    }
    hex[2 * len] = 0;
    cJSON *o = ok_obj(nd, s, f);
    cJSON_AddStringToObject(o, "state", hex);
    free(buf);
    free(hex);
    send_obj(nd, reply, o);
}

/* Puts a model.rollback in the model's subject; the owner applies it when it gets there. */
static void ask_rollback(struct node *nd, const char *reply, const struct shard *s,
                         const struct fmodel *f, const cJSON *req)
{
    struct fwin w[FLEET_MAX_WINDOWS];
    char err[300];
    const cJSON *ex = cJSON_GetObjectItemCaseSensitive(req, "exclude");
    if (relearn_windows(ex, w, FLEET_MAX_WINDOWS - f->n_excl, err, sizeof err) < 0) {
        ask_error(nd->nc, reply, WORTH_E_BAD_PARAM, "%s", err);
        return;
    }
    cJSON *m = cJSON_CreateObject();
    cJSON_AddStringToObject(m, "op", "model.rollback");
    cJSON_AddStringToObject(m, "model", f->name);
    cJSON_AddItemToObject(m, "exclude", cJSON_Duplicate(ex, 1));
    char *text = cJSON_PrintUnformatted(m);
    cJSON_Delete(m);
    char subj[128];
    snprintf(subj, sizeof subj, "worth.t.%u.%s", s->id, f->name);
    jsPubAck *pa = NULL;
    natsStatus st =
        text ? js_Publish(&pa, nd->js, subj, text, (int)strlen(text), NULL, NULL) : NATS_NO_MEMORY;
    free(text);
    if (st != NATS_OK || !pa) {
        ask_error(nd->nc, reply, WORTH_E_IO, "the stream did not take the rollback: %s",
                  natsStatus_GetText(st));
        jsPubAck_Destroy(pa);
        return;
    }
    cJSON *o = cJSON_CreateObject();
    cJSON_AddTrueToObject(o, "ok");
    cJSON_AddStringToObject(o, "model", f->name);
    cJSON_AddNumberToObject(o, "seq", (double)pa->Sequence);
    cJSON_AddNumberToObject(o, "rollbacks", (double)f->rollbacks);
    jsPubAck_Destroy(pa);
    send_obj(nd, reply, o);
}

static void ask_check(struct node *nd, const char *reply, const struct shard *s, const char *model,
                      const cJSON *req)
{
    const cJSON *spec = cJSON_GetObjectItemCaseSensitive(req, "spec");
    if (!cJSON_IsObject(spec)) {
        ask_error(nd->nc, reply, WORTH_E_BAD_REQUEST, "check needs \"spec\": {model.create}");
        return;
    }
    char err[300];
    spec_t *sp = NULL;
    int rc = spec_parse(spec, &sp, err, sizeof err);
    if (rc) {
        ask_error(nd->nc, reply, rc, "%s", err);
        return;
    }
    struct model *m = NULL;
    if (strcmp(sp->name, model) != 0) {
        rc = WORTH_E_BAD_REQUEST;
        snprintf(err, sizeof err, "the spec names model %s, the subject %s", sp->name, model);
    } else {
        rc = model_new(&sp->m, &m, err, sizeof err);
    }
    model_free(m);
    spec_free(sp);
    if (rc) {
        ask_error(nd->nc, reply, rc, "%s", err);
        return;
    }
    cJSON *o = cJSON_CreateObject();
    cJSON_AddTrueToObject(o, "ok");
    cJSON_AddStringToObject(o, "model", model);
    cJSON_AddBoolToObject(o, "exists", fmodel_find((struct shard *)s, model) != NULL);
    send_obj(nd, reply, o);
}

/* The node's own figures (worth.node.<node>): Prometheus text for {"op":"metrics"}, else
 * JSON.  Lag is the owner's last figure: messages of the shard not yet fetched. */
static void answer_node(struct node *nd, natsMsg *msg)
{
    const char *reply = natsMsg_GetReply(msg);
    cJSON *req = cJSON_ParseWithLength(natsMsg_GetData(msg), (size_t)natsMsg_GetDataLength(msg));
    const cJSON *op = cJSON_GetObjectItemCaseSensitive(req, "op");
    int text = cJSON_IsString(op) && strcmp(op->valuestring, "metrics") == 0;
    if (!text && !(cJSON_IsString(op) && strcmp(op->valuestring, "status") == 0)) {
        ask_error(nd->nc, reply, WORTH_E_UNKNOWN_OP, "a node answers \"metrics\" and \"status\"");
        cJSON_Delete(req);
        return;
    }
    cJSON_Delete(req);
    jw_t j;
    jw_init(&j);
    const char *n = nd->o.node;
    if (text) {
        jw_fmt(&j,
               "# HELP worth_fleet_nodes_alive Nodes whose heartbeat moved within a lease time.\n"
               "# TYPE worth_fleet_nodes_alive gauge\n"
               "worth_fleet_nodes_alive{node=\"%s\"} %u\n"
               "# HELP worth_fleet_shards_owned Shards this node owns.\n"
               "# TYPE worth_fleet_shards_owned gauge\n"
               "worth_fleet_shards_owned{node=\"%s\"} %d\n",
               n, nd->nodes_alive, n, nd->owned);
        static const char *const heads[] = {
            "worth_fleet_consumer_lag Messages of the shard not yet fetched by its owner.\n"
            "# TYPE worth_fleet_consumer_lag gauge",
            "worth_fleet_stream_seq Newest stream sequence the shard has applied.\n"
            "# TYPE worth_fleet_stream_seq gauge",
            "worth_fleet_checkpoint_seq Stream sequence the shard's newest checkpoint covers.\n"
            "# TYPE worth_fleet_checkpoint_seq gauge",
            "worth_fleet_models Models of the shard.\n# TYPE worth_fleet_models gauge",
            "worth_fleet_applied_total Transitions the shard's models learnt.\n"
            "# TYPE worth_fleet_applied_total counter",
            "worth_fleet_rejected_total Messages or transitions the shard's models refused.\n"
            "# TYPE worth_fleet_rejected_total counter",
        };
        for (size_t k = 0; k < sizeof heads / sizeof heads[0]; k++) {
            jw_fmt(&j, "# HELP %s\n", heads[k]);
            size_t nl = strcspn(heads[k], " ");
            for (unsigned p = 0; p < nd->o.shards; p++) {
                const struct shard *s = &nd->sh[p];
                if (!s->owned)
                    continue;
                uint64_t applied = 0, rejected = 0;
                for (size_t i = 0; i < s->n_models; i++) {
                    applied += s->models[i].applied;
                    rejected += s->models[i].rejected;
                }
                uint64_t v[] = {s->pending, s->seq, s->ck_seq, s->n_models, applied, rejected};
                jw_fmt(&j, "%.*s{node=\"%s\",shard=\"%u\"} %" PRIu64 "\n", (int)nl, heads[k], n, p,
                       v[k]);
            }
        }
    } else {
        jw_fmt(&j, "{\"ok\":true,\"node\":\"%s\",\"nodes_alive\":%u,\"shards\":[", n,
               nd->nodes_alive);
        int first = 1;
        for (unsigned p = 0; p < nd->o.shards; p++) {
            const struct shard *s = &nd->sh[p];
            if (!s->owned)
                continue;
            jw_fmt(&j,
                   "%s{\"shard\":%u,\"lag\":%" PRIu64 ",\"seq\":%" PRIu64
                   ",\"checkpoint_seq\":%" PRIu64 ",\"models\":%zu}",
                   first ? "" : ",", p, s->pending, s->seq, s->ck_seq, s->n_models);
            first = 0;
        }
        jw_lit(&j, "]}");
    }
    char *out = jw_take(&j);
    if (out && reply && *reply)
        natsConnection_PublishString(nd->nc, reply, out);
    mem_free(out);
    jw_close(&j);
}

void ask_answer(struct node *nd, natsMsg *msg)
{
    if (strncmp(natsMsg_GetSubject(msg), "worth.node.", 11) == 0) {
        answer_node(nd, msg);
        natsMsg_Destroy(msg);
        return;
    }
    const char *reply = natsMsg_GetReply(msg);
    const char *subj = natsMsg_GetSubject(msg);
    const char *model = fleet_subject_model(subj);
    unsigned p = (unsigned)strtoul(subj + strlen("worth.q."), NULL, 10);
    struct shard *s = p < nd->o.shards ? &nd->sh[p] : NULL;
    cJSON *req = cJSON_ParseWithLength(natsMsg_GetData(msg), (size_t)natsMsg_GetDataLength(msg));
    const cJSON *op = cJSON_GetObjectItemCaseSensitive(req, "op");
    struct fmodel *f = s && model ? fmodel_find(s, model) : NULL;
    if (!s || !s->owned || !model)
        ask_error(nd->nc, reply, WORTH_E_NO_OWNER, "node %s does not own shard %u now; retry",
                  nd->o.node, p);
    else if (!req || !cJSON_IsObject(req))
        ask_error(nd->nc, reply, WORTH_E_BAD_JSON, "the request is not a JSON object");
    else if (!cJSON_IsString(op))
        ask_error(nd->nc, reply, WORTH_E_BAD_REQUEST, "the request has no \"op\"");
    else if (strcmp(op->valuestring, "check") == 0)
        ask_check(nd, reply, s, model, req);
    else if (strcmp(op->valuestring, "checkpoint") == 0) {
        if (shard_checkpoint(nd, s) != 0)
            ask_error(nd->nc, reply, WORTH_E_IO, "shard %u: checkpoint not stored", s->id);
        else {
            cJSON *o = cJSON_CreateObject();
            cJSON_AddTrueToObject(o, "ok");
            cJSON_AddNumberToObject(o, "shard", s->id);
            cJSON_AddNumberToObject(o, "seq", (double)s->ck_seq);
            send_obj(nd, reply, o);
        }
    } else if (!f)
        ask_error(nd->nc, reply, WORTH_E_NO_SUCH_MODEL, "no model %s in the fleet", model);
    else if (strcmp(op->valuestring, "value") == 0)
        ask_value(nd, reply, s, f, req);
    else if (strcmp(op->valuestring, "state") == 0)
        ask_state(nd, reply, s, f);
    else if (strcmp(op->valuestring, "rollback") == 0)
        ask_rollback(nd, reply, s, f, req);
    else if (strcmp(op->valuestring, "stats") == 0) {
        cJSON *o = ok_obj(nd, s, f);
        cJSON_AddNumberToObject(o, "shard_seq", (double)s->seq);
        cJSON_AddNumberToObject(o, "checkpoint_seq", (double)s->ck_seq);
        cJSON_AddNumberToObject(o, "lag", (double)s->pending);
        cJSON_AddNumberToObject(o, "excluded", (double)f->excluded);
        cJSON_AddNumberToObject(o, "rollbacks", (double)f->rollbacks);
        cJSON *ws = cJSON_AddArrayToObject(o, "exclude");
        for (size_t i = 0; i < f->n_excl; i++) {
            cJSON *w = cJSON_CreateObject();
            double lh[2] = {f->excl[i].lo, f->excl[i].hi};
            cJSON_AddItemToObject(w, f->excl[i].by_time ? "t" : "seq",
                                  cJSON_CreateDoubleArray(lh, 2));
            cJSON_AddItemToArray(ws, w);
        }
        cJSON *es = cJSON_AddArrayToObject(o, "estimators");
        for (size_t i = 0; i < model_n_est(f->m); i++)
            cJSON_AddItemToArray(es, cJSON_CreateString(model_est_name(f->m, i)));
        send_obj(nd, reply, o);
    } else
        ask_error(nd->nc, reply, WORTH_E_UNKNOWN_OP,
                  "unknown op \"%s\" (value, stats, state, check, checkpoint, rollback)",
                  op->valuestring);
    cJSON_Delete(req);
    natsMsg_Destroy(msg);
}
