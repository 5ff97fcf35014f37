/*
 * requests.c - the typed calls of libworth-client: each builds its request
 * line with the one JSON writer (common/jw), sends it through wire.c and
 * reads the fields it answers from the reply.
 *
 * The request bytes are protocol v1's: numbers with 17 significant digits
 * (they read back as the same double), strings escaped by jw_str.  One policy
 * is the library's own, in req_num: a non-finite number is sent as the string
 * "NaN", so that worthd answers bad_number for it (JSON has no literal for
 * NaN, and jw writes null).  Replies are parsed with cJSON and read
 * defensively: a missing field reads as 0 or NAN, never crashes.  Every
 * ingest reply (observe, a batch, a bulk, samples) leaves its counts in the
 * connection for worth_last_ingest.  Automatic batching keeps the queued
 * elements in the connection's batch buffer.  Runs on the caller's thread;
 * owns nothing beyond the connection's buffers.
 */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "wire.h"

/* ---- request building -------------------------------------------------------------------- */

/* A number; non-finite values go as the string "NaN" so that worthd answers bad_number. */
static void req_num(jw_t *j, double v)
{
    if (isfinite(v))
        jw_num(j, v);
    else
        jw_lit(j, "\"NaN\"");
}

static void req_vec(jw_t *j, const double *v, size_t n)
{
    jw_lit(j, "[");
    for (size_t i = 0; i < n; i++) {
        if (i)
            jw_lit(j, ",");
        req_num(j, v[i]);
    }
    jw_lit(j, "]");
}

/* ,"KEY":"S" when s is not NULL (key is a literal of ours, never escaped). */
static void req_opt_str(jw_t *j, const char *key, const char *s)
{
    if (!s)
        return;
    jw_fmt(j, ",\"%s\":", key);
    jw_str(j, s);
}

/* Starts c->req as {"op":OP,"model":MODEL (the model when not NULL). */
static void req_begin(worth_client *c, const char *op, const char *model)
{
    jw_reset(&c->req);
    jw_lit(&c->req, "{\"op\":");
    jw_str(&c->req, op);
    req_opt_str(&c->req, "model", model);
}

/* The members of one transition, "x":[...],"r":R,... (no braces). */
static void req_transition(jw_t *j, size_t dims, const worth_transition *t)
{
    jw_lit(j, "\"x\":");
    req_vec(j, t->x, dims);
    jw_lit(j, ",\"r\":");
    req_num(j, t->r);
    if (t->x_next) {
        jw_lit(j, ",\"x_next\":");
        req_vec(j, t->x_next, dims);
    }
    if (t->terminal)
        jw_lit(j, ",\"terminal\":true");
    req_opt_str(j, "source", t->source);
    if (!isnan(t->t)) {
        jw_lit(j, ",\"t\":");
        req_num(j, t->t);
    }
    if (!isnan(t->dt)) {
        jw_lit(j, ",\"dt\":");
        req_num(j, t->dt);
    }
    if (t->pseq)
        jw_fmt(j, ",\"pseq\":%llu", (unsigned long long)t->pseq);
}

/* The members of one sample, "source":S,"t":T,"x":[...],"r":R (no braces). */
static void req_sample(jw_t *j, size_t dims, const worth_sample *s)
{
    if (s->source) {
        jw_lit(j, "\"source\":");
        jw_str(j, s->source);
        jw_lit(j, ",");
    }
    jw_lit(j, "\"t\":");
    req_num(j, s->t);
    jw_lit(j, ",\"x\":");
    req_vec(j, s->x, dims);
    jw_lit(j, ",\"r\":");
    req_num(j, s->r);
    if (s->terminal)
        jw_lit(j, ",\"terminal\":true");
}

/* ---- reading replies --------------------------------------------------------------------- */

static double num(const cJSON *root, const char *name, double fallback)
{
    const cJSON *f = cJSON_GetObjectItemCaseSensitive(root, name);
    return cJSON_IsNumber(f) ? f->valuedouble : fallback;
}

/* *out (when out is not NULL) gets the reply's count named key, 0 when it has none. */
static void get_u64(const cJSON *root, const char *key, uint64_t *out)
{
    if (out)
        *out = (uint64_t)num(root, key, 0);
}

/* c->ingest (and *out, when not NULL) from an ingest reply: seq, paired, skipped, gaps. */
static void get_ingest(worth_client *c, const cJSON *root, worth_ingest_t *out)
{
    get_u64(root, "seq", &c->ingest.seq);
    get_u64(root, "paired", &c->ingest.paired);
    get_u64(root, "skipped", &c->ingest.skipped);
    get_u64(root, "gaps", &c->ingest.gaps);
    if (out)
        *out = c->ingest;
}

/* Sends c->req as an ingest request: 0 with the counts read (get_ingest), or the error. */
static int call_ingest(worth_client *c, worth_ingest_t *out, uint64_t *seq)
{
    cJSON *root = NULL;
    int rc = wire_call(c, &root);
    if (rc == 0) {
        get_ingest(c, root, out);
        if (seq)
            *seq = c->ingest.seq;
    }
    cJSON_Delete(root);
    return rc;
}

/* Sends c->req (a bulk header ending in a newline) and count records of width doubles. */
static int call_bulk(worth_client *c, const double *records, size_t count, size_t width,
                     worth_ingest_t *out, uint64_t *seq)
{
    struct timespec dl;
    wire_deadline(&dl, c->timeout_ms);
    /* The header and the records go out together; worthd reads them as one stream. */
    int rc = wire_send(c, c->req.b, c->req.len, &dl);
    if (rc == 0)
        rc = wire_send(c, records, count * width * sizeof(double), &dl);
    if (rc == 0)
        rc = wire_recv_line(c, &dl);
    if (rc)
        return rc;
    cJSON *root = NULL;
    rc = wire_status(c, &root);
    if (rc == 0) {
        get_ingest(c, root, out);
        if (seq)
            *seq = c->ingest.seq;
    }
    cJSON_Delete(root);
    return rc;
}

void worth_last_ingest(const worth_client *c, worth_ingest_t *out)
{
    *out = c->ingest;
}

/* Sends c->req and reads the counts named ka and kb (kb may be NULL) of its reply. */
static int call_u64(worth_client *c, const char *ka, uint64_t *a, const char *kb, uint64_t *b)
{
    cJSON *root = NULL;
    int rc = wire_call(c, &root);
    if (rc == 0) {
        get_u64(root, ka, a);
        if (kb)
            get_u64(root, kb, b);
    }
    cJSON_Delete(root);
    return rc;
}

/* Sends {"op":OP,"model":MODEL} and hands back the reply line (owned by c). */
static int line_request(worth_client *c, const char *op, const char *model, const char **json)
{
    req_begin(c, op, model);
    jw_lit(&c->req, "}");
    int rc = wire_call(c, NULL);
    if (json)
        *json = c->line;
    return rc;
}

/* ---- models ------------------------------------------------------------------------------ */

int worth_model_create(worth_client *c, const char *spec_json, size_t *features)
{
    const char *p = spec_json;
    while (*p == ' ' || *p == '\t' || *p == '\n' || *p == '\r')
        p++;
    if (*p != '{')
        return wire_fail(c, WORTH_E_BAD_REQUEST, "the spec must be a JSON object");
    jw_reset(&c->req);
    jw_lit(&c->req, "{\"op\":\"model.create\",");
    /* The spec's own members follow (an empty object leaves a trailing comma: worthd says so). */
    jw_lit(&c->req, p + 1);
    uint64_t n = 0;
    int rc = call_u64(c, "features", &n, NULL, NULL);
    if (rc == 0 && features)
        *features = (size_t)n;
    return rc;
}

int worth_model_drop(worth_client *c, const char *model)
{
    req_begin(c, "model.drop", model);
    jw_lit(&c->req, "}");
    return wire_call(c, NULL);
}

int worth_model_info(worth_client *c, const char *model, const char **json)
{
    return line_request(c, model ? "model.get" : "model.list", model, json);
}

/* ---- transitions ------------------------------------------------------------------------- */

int worth_observe(worth_client *c, const char *model, size_t dims, const worth_transition *t,
                  uint64_t *seq)
{
    req_begin(c, "observe", model);
    jw_lit(&c->req, ",");
    req_transition(&c->req, dims, t);
    jw_lit(&c->req, "}");
    return call_ingest(c, NULL, seq);
}

void worth_set_batch_max(worth_client *c, size_t n)
{
    c->batch_max = n ? n : 1;
}

int worth_flush(worth_client *c, uint64_t *seq)
{
    if (c->batch_n == 0)
        return 0;
    req_begin(c, "observe", c->batch_model);
    jw_lit(&c->req, ",\"batch\":[");
    jw_raw(&c->req, c->batch.b, c->batch.len);
    jw_lit(&c->req, "]}");
    c->batch_n = 0;
    jw_reset(&c->batch);
    cJSON *root = NULL;
    int rc = wire_call(c, &root);
    if (rc == 0) {
        get_ingest(c, root, NULL);
        if (seq)
            *seq = c->ingest.seq;
    }
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
    jw_lit(&c->batch, c->batch_n ? ",{" : "{");
    req_transition(&c->batch, dims, t);
    jw_lit(&c->batch, "}");
    if (++c->batch_n >= c->batch_max)
        return worth_flush(c, seq);
    return 0;
}

int worth_observe_bulk(worth_client *c, const char *model, size_t dims, const double *records,
                       size_t count, int applied, uint64_t *seq)
{
    int rc = worth_observe_bulk_pseq(c, model, dims, records, count, NULL, 0, applied, NULL);
    if (rc == 0 && seq)
        *seq = c->ingest.seq;
    return rc;
}

int worth_observe_bulk_pseq(worth_client *c, const char *model, size_t dims, const double *records,
                            size_t count, const char *source, uint64_t pseq, int applied,
                            worth_ingest_t *out)
{
    req_begin(c, "observe.bulk", model);
    jw_fmt(&c->req, ",\"count\":%zu", count);
    req_opt_str(&c->req, "source", source);
    if (pseq)
        jw_fmt(&c->req, ",\"pseq\":%llu", (unsigned long long)pseq);
    if (applied)
        jw_lit(&c->req, ",\"ack\":\"applied\"");
    jw_lit(&c->req, "}\n");
    return call_bulk(c, records, count, 2 * dims + 2, out, NULL);
}

/* ---- samples ----------------------------------------------------------------------------- */

int worth_observe_samples(worth_client *c, const char *model, size_t dims, const worth_sample *s,
                          size_t n, worth_ingest_t *out)
{
    req_begin(c, "observe", model);
    if (n == 1) {
        jw_lit(&c->req, ",\"sample\":{");
        req_sample(&c->req, dims, s);
        jw_lit(&c->req, "}}");
    } else {
        jw_lit(&c->req, ",\"samples\":[");
        for (size_t i = 0; i < n; i++) {
            jw_lit(&c->req, i ? ",{" : "{");
            req_sample(&c->req, dims, &s[i]);
            jw_lit(&c->req, "}");
        }
        jw_lit(&c->req, "]}");
    }
    return call_ingest(c, out, NULL);
}

int worth_observe_samples_bulk(worth_client *c, const char *model, size_t dims, const char *source,
                               const double *records, size_t count, int applied,
                               worth_ingest_t *out)
{
    req_begin(c, "observe.bulk", model);
    jw_fmt(&c->req, ",\"form\":\"samples\",\"count\":%zu", count);
    req_opt_str(&c->req, "source", source);
    if (applied)
        jw_lit(&c->req, ",\"ack\":\"applied\"");
    jw_lit(&c->req, "}\n");
    return call_bulk(c, records, count, dims + 3, out, NULL);
}

/* ---- queries ----------------------------------------------------------------------------- */

int worth_value(worth_client *c, const char *model, const double *x, size_t dims,
                const char *estimator, worth_value_t *out)
{
    req_begin(c, "value", model);
    jw_lit(&c->req, ",\"x\":");
    req_vec(&c->req, x, dims);
    req_opt_str(&c->req, "estimator", estimator);
    jw_lit(&c->req, "}");
    cJSON *root = NULL;
    int rc = wire_call(c, &root);
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
    req_begin(c, "value", model);
    jw_lit(&c->req, ",\"xs\":[");
    for (size_t i = 0; i < count; i++) {
        if (i)
            jw_lit(&c->req, ",");
        req_vec(&c->req, xs + i * dims, dims);
    }
    jw_lit(&c->req, "]");
    req_opt_str(&c->req, "estimator", estimator);
    jw_lit(&c->req, "}");
    cJSON *root = NULL;
    int rc = wire_call(c, &root);
    if (rc == 0) {
        const cJSON *vs = cJSON_GetObjectItemCaseSensitive(root, "values");
        size_t i = 0;
        for (const cJSON *v = vs ? vs->child : NULL; v && i < count; v = v->next, i++)
            out[i] = cJSON_IsNumber(v) ? v->valuedouble : NAN;
        get_u64(root, "seq", seq);
    }
    cJSON_Delete(root);
    return rc;
}

int worth_stats(worth_client *c, const char *model, const char **json)
{
    return line_request(c, "stats", model, json);
}

int worth_status(worth_client *c, const char **json)
{
    return line_request(c, "status", NULL, json);
}

int worth_model_purge(worth_client *c, const char *model, const char **json)
{
    return line_request(c, "model.purge", model, json);
}

/* ---- checkpoints and history ------------------------------------------------------------- */

int worth_checkpoint(worth_client *c, const char *model, const char *label, int64_t *id,
                     uint64_t *seq)
{
    req_begin(c, "checkpoint", model);
    req_opt_str(&c->req, "label", label);
    jw_lit(&c->req, "}");
    uint64_t n = 0;
    int rc = call_u64(c, "checkpoint", &n, "seq", seq);
    if (rc == 0 && id)
        *id = (int64_t)n;
    return rc;
}

int worth_checkpoints(worth_client *c, const char *model, const char **json)
{
    return line_request(c, "checkpoints", model, json);
}

int worth_rollback(worth_client *c, const char *model, int64_t id, int replay, char exclude,
                   double lo, double hi, uint64_t *undone, uint64_t *replayed)
{
    req_begin(c, "rollback", model);
    jw_fmt(&c->req, ",\"checkpoint\":%lld", (long long)id);
    if (replay)
        jw_lit(&c->req, ",\"replay\":true");
    if (exclude == 's' || exclude == 't') {
        jw_lit(&c->req, exclude == 's' ? ",\"exclude\":{\"seq\":[" : ",\"exclude\":{\"t\":[");
        req_num(&c->req, lo);
        jw_lit(&c->req, ",");
        req_num(&c->req, hi);
        jw_lit(&c->req, "]}");
    }
    jw_lit(&c->req, "}");
    return call_u64(c, "undone", undone, "replayed", replayed);
}

int worth_backup(worth_client *c, const char *name, char *path, size_t path_len, uint64_t *bytes)
{
    req_begin(c, "backup", NULL);
    req_opt_str(&c->req, "name", name);
    jw_lit(&c->req, "}");
    cJSON *root = NULL;
    int rc = wire_call(c, &root);
    if (rc == 0)
        get_u64(root, "bytes", bytes);
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
    req_begin(c, "train", model);
    jw_lit(&c->req, ",\"estimator\":");
    jw_str(&c->req, estimator);
    jw_fmt(&c->req, ",\"passes\":%u}\n", passes);
    struct timespec dl;
    wire_deadline(&dl, c->timeout_ms);
    int rc = wire_send(c, c->req.b, c->req.len, &dl);
    while (rc == 0) {
        /* Each progress line restarts the clock: a long training is alive while it reports. */
        wire_deadline(&dl, c->timeout_ms);
        rc = wire_recv_line(c, &dl);
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
        rc = wire_status(c, &root);
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
