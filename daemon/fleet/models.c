/*
 * models.c - the models of a shard: built from their model.create, and the
 * learning of one message's transitions, with the windows of the model's
 * rollbacks left out.  Used by shard.c (the stream in order) and relearn.c
 * (a model read back from the stream).
 */
#include <cjson/cJSON.h>
#include <inttypes.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "common/say.h"
#include "fleet/fleet_impl.h"
#include "worth/errors.h"

struct fmodel *fmodel_find(struct shard *s, const char *name)
{
    for (size_t i = 0; i < s->n_models; i++)
        if (strcmp(s->models[i].name, name) == 0)
            return &s->models[i];
    return NULL;
}

void fmodel_free(struct fmodel *f)
{
    model_free(f->m);
    spec_free(f->spec);
    free(f->work);
    memset(f, 0, sizeof *f);
}

/* Builds a model from a parsed spec into a new slot of s.  Takes sp.  Returns the slot or
 * NULL (err filled). */
struct fmodel *fmodel_add(struct shard *s, spec_t *sp, char *err, size_t errlen)
{
    struct model *m = NULL;
    if (model_new(&sp->m, &m, err, errlen) != 0) {
        spec_free(sp);
        return NULL;
    }
    if (s->n_models == s->cap_models) {
        size_t cap = s->cap_models ? 2 * s->cap_models : 8;
        struct fmodel *g = realloc(s->models, cap * sizeof *g);
        if (!g) {
            snprintf(err, errlen, "out of memory");
            model_free(m);
            spec_free(sp);
            return NULL;
        }
        s->models = g;
        s->cap_models = cap;
    }
    struct fmodel *f = &s->models[s->n_models];
    memset(f, 0, sizeof *f);
    f->work = malloc(model_work_size(m) * sizeof(double));
    if (!f->work) {
        snprintf(err, errlen, "out of memory");
        model_free(m);
        spec_free(sp);
        return NULL;
    }
    snprintf(f->name, sizeof f->name, "%s", sp->name);
    f->spec = sp;
    f->m = m;
    s->n_models++;
    return f;
}

/* Reads a JSON array of numbers into v (at most FEAT_MAX_DIMS); returns its length or -1. */
static int read_vec(const cJSON *a, double *v)
{
    if (!cJSON_IsArray(a))
        return -1;
    int n = 0;
    for (const cJSON *e = a->child; e; e = e->next) {
        if (n == FEAT_MAX_DIMS || !cJSON_IsNumber(e))
            return -1;
        v[n++] = e->valuedouble;
    }
    return n;
}

/* One transition object (as `observe` takes it) into f's model.  Returns 0 or an error. */
static int apply_obs(struct node *nd, struct fmodel *f, const cJSON *o)
{
    const cJSON *jr = cJSON_GetObjectItemCaseSensitive(o, "r");
    const cJSON *jt = cJSON_GetObjectItemCaseSensitive(o, "terminal");
    const cJSON *js = cJSON_GetObjectItemCaseSensitive(o, "source");
    const cJSON *jd = cJSON_GetObjectItemCaseSensitive(o, "dt");
    const cJSON *jn = cJSON_GetObjectItemCaseSensitive(o, "x_next");
    int nx = read_vec(cJSON_GetObjectItemCaseSensitive(o, "x"), nd->x);
    if (nx < 0 || !cJSON_IsNumber(jr) || (jt && !cJSON_IsBool(jt)) || (js && !cJSON_IsString(js)) ||
        (jd && !cJSON_IsNumber(jd)))
        return WORTH_E_BAD_REQUEST;
    int terminal = jt && cJSON_IsTrue(jt);
    int nn = 0;
    if (jn && !cJSON_IsNull(jn)) {
        nn = read_vec(jn, nd->xn);
        if (nn < 0)
            return WORTH_E_BAD_REQUEST;
    } else if (!terminal)
        return WORTH_E_BAD_REQUEST;
    model_obs_t t = {
        .x = nd->x,
        .x_len = (size_t)nx,
        .r = jr->valuedouble,
        .x_next = terminal ? NULL : nd->xn,
        .x_next_len = (size_t)nn,
        .terminal = terminal,
        .source = js ? js->valuestring : NULL,
        .dt_s = jd ? jd->valuedouble : NAN,
    };
    char err[200];
    return model_observe(f->m, &t, err, sizeof err);
}

static int excluded(const struct fmodel *f, int by_time, double v)
{
    for (size_t i = 0; i < f->n_excl; i++)
        if (f->excl[i].by_time == by_time && v >= f->excl[i].lo && v <= f->excl[i].hi)
            return 1;
    return 0;
}

static void apply_one(struct node *nd, struct fmodel *f, const cJSON *o)
{
    const cJSON *t = cJSON_GetObjectItemCaseSensitive(o, "t");
    if (cJSON_IsNumber(t) && excluded(f, 1, t->valuedouble))
        f->excluded++;
    else if (apply_obs(nd, f, o) == 0)
        f->applied++;
    else
        f->rejected++;
}

void fmodel_learn(struct node *nd, struct fmodel *f, const cJSON *root, uint64_t seq)
{
    const cJSON *batch = cJSON_GetObjectItemCaseSensitive(root, "batch");
    if (excluded(f, 0, (double)seq)) {
        f->excluded += cJSON_IsArray(batch) ? (uint64_t)cJSON_GetArraySize(batch) : 1;
        return;
    }
    if (!cJSON_IsObject(root) || (batch && !cJSON_IsArray(batch))) {
        f->rejected++;
        return;
    }
    if (!batch) {
        apply_one(nd, f, root);
        return;
    }
    for (const cJSON *e = batch->child; e; e = e->next) {
        if (cJSON_IsObject(e))
            apply_one(nd, f, e);
        else
            f->rejected++;
    }
}

int fmodel_rebuild(struct fmodel *f)
{
    struct model *m = NULL;
    char err[256];
    if (model_new(&f->spec->m, &m, err, sizeof err) != 0)
        return -1;
    model_free(f->m);
    f->m = m;
    f->applied = f->rejected = f->excluded = 0;
    return 0;
}

void fmodel_create(struct shard *s, struct fmodel *f, const char *name, const cJSON *root,
                   uint64_t seq)
{
    char err[256];
    spec_t *sp = NULL;
    if (f) { /* a second create is refused, like model_exists on the single node */
        f->rejected++;
    } else if (spec_parse(root, &sp, err, sizeof err) != 0) {
        say_warn("fleet: shard %u seq %" PRIu64 ": model.create of %s refused: %s", s->id, seq,
                 name, err);
    } else if (strcmp(sp->name, name) != 0) {
        say_warn("fleet: shard %u seq %" PRIu64 ": model.create names %s on %s's subject", s->id,
                 seq, sp->name, name);
        spec_free(sp);
    } else if (!(f = fmodel_add(s, sp, err, sizeof err))) {
        say_warn("fleet: shard %u seq %" PRIu64 ": model %s not built: %s", s->id, seq, name, err);
    } else {
        f->create_seq = seq;
        say_info("fleet: model %s created on shard %u (seq %" PRIu64 ")", name, s->id, seq);
    }
}
