/*
 * fields.c - reading a request's members: types, ranges, vectors, names.
 *
 * Loop thread, on the request's cJSON tree (allocated from the arena, gone
 * when the request is done).  Each helper either yields a valid value or
 * answers the request with the stable code of what is wrong; none of them
 * changes anything else.
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

/* Returns 1 when obj has two members of the same name (cJSON keeps both). */
int fld_dup_key(const cJSON *obj, const char **which)
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
int fld_only_keys(const cJSON *obj, const char *const *allowed, const char **bad)
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
const char *fld_string(struct req *rq, const char *name)
{
    const cJSON *f = field(rq->root, name);
    if (!cJSON_IsString(f) || !f->valuestring) {
        FAIL(rq, WORTH_E_BAD_REQUEST, "\"%s\" must be a string", name);
        return NULL;
    }
    return f->valuestring;
}

/* Looks up the model named by the request's "model"; replies and returns NULL on failure. */
struct learner *fld_model(struct req *rq)
{
    const char *name = fld_string(rq, "model");
    if (!name)
        return NULL;
    struct learner *l = reg_find_model(rq->p, name, NULL);
    const struct quarantined *dm = l ? NULL : reg_find_damaged(rq->p, name, NULL);
    if (dm)
        reg_reply_damaged(rq->p, rq->c, rq->id, dm);
    else if (!l)
        FAIL(rq, WORTH_E_NO_SUCH_MODEL, "no model named \"%.64s\"", name);
    return l;
}

/* The quarantined model the request's "model" names, or NULL (then nothing is answered). */
const struct quarantined *fld_damaged(struct req *rq)
{
    const cJSON *f = field(rq->root, "model");
    return cJSON_IsString(f) && f->valuestring ? reg_find_damaged(rq->p, f->valuestring, NULL)
                                               : NULL;
}

/*
 * Reads an optional number; returns 1 (value in *v, or *v untouched when
 * absent) or 0 with code and message set.
 */
int fld_number(const cJSON *obj, const char *name, double *v, int *code, char *err, size_t errlen,
               const char *where)
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
int fld_vector(const cJSON *arr, size_t n, double *out, const char *name, int *code, char *err,
               size_t errlen, const char *where)
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

int fld_state(const cJSON *v, const spec_meta_t *meta, double *out, const char *name, int *code,
              char *err, size_t errlen, const char *where)
{
    if (!cJSON_IsObject(v))
        return fld_vector(v, meta->dims, out, name, code, err, errlen, where);
    if (!meta->named) {
        *code = WORTH_E_BAD_REQUEST;
        snprintf(err, errlen,
                 "%s\"%s\" names dimensions, but the model's have no names: send an array of %zu "
                 "numbers",
                 where, name, meta->dims);
        return 0;
    }
    unsigned char seen[FEAT_MAX_DIMS] = {0};
    size_t got = 0;
    for (const cJSON *e = v->child; e; e = e->next) {
        int i = e->string ? spec_dim_find(meta, e->string) : -1;
        if (i < 0) {
            *code = WORTH_E_BAD_DIMENSION;
            snprintf(err, errlen, "%s%s: the model has no dimension \"%.64s\"", where, name,
                     e->string ? e->string : "");
            return 0;
        }
        if (seen[i]) {
            *code = WORTH_E_BAD_REQUEST;
            snprintf(err, errlen, "%s%s.%s appears twice", where, name, e->string);
            return 0;
        }
        if (!cJSON_IsNumber(e) || !isfinite(e->valuedouble)) {
            *code = WORTH_E_BAD_NUMBER;
            snprintf(err, errlen, "%s%s.%s is not a finite number", where, name, e->string);
            return 0;
        }
        out[i] = e->valuedouble;
        seen[i] = 1;
        got++;
    }
    for (size_t i = 0; got < meta->dims && i < meta->dims; i++)
        if (!seen[i]) {
            *code = WORTH_E_BAD_DIMENSION;
            snprintf(err, errlen, "%s%s lacks dimension \"%s\" (%zu of the model's %zu given)",
                     where, name, meta->names[i], got, meta->dims);
            return 0;
        }
    return 1;
}

void fld_ensure_scratch(struct proto *p, size_t n_est)
{
    (void)n_est;
    if (!p->vals) {
        p->vals = mem_calloc(MODEL_MAX_EST, sizeof *p->vals);
        p->sds = mem_calloc(MODEL_MAX_EST, sizeof *p->sds);
    }
}

/* Remembers the request's id on the connection for a reply that comes later. */
void fld_keep_id(struct req *rq)
{
    proto_conn_t *pc = pconn(rq->c);
    pc->has_id = rq->id != NULL;
    if (rq->id)
        snprintf(pc->id, sizeof pc->id, "%s", rq->id);
}

/* Parks the request until l frees space; nothing has been changed. */
int fld_park(struct learner *l)
{
    queue_want_space(learner_queue(l));
    return PROTO_PARK;
}
