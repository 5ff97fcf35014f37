/*
 * spec_meta.c - the parts of a model.create spec that say what a person
 * reads and how samples pair: named dimensions with units and ranges, the
 * reward's unit, the control period and the sample rules (spec.h's
 * spec_meta_t; schema/protocol.md, "Samples").
 *
 * Loop thread (and recovery, re-reading a stored spec).  It must print back
 * exactly what it parses: the canonical text is parsed again at every start.
 */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "common/fail.h"
#include "common/mem.h"
#include "core/spec.h"
#include "core/spec_impl.h"
#include "worth/errors.h"

/* 1 when s is 1..SPEC_UNIT_MAX printable ASCII bytes (a unit, shown beside numbers). */
static int unit_ok(const char *s)
{
    size_t n = strlen(s);
    if (n < 1 || n > SPEC_UNIT_MAX)
        return 0;
    for (size_t i = 0; i < n; i++)
        if (s[i] < 0x20 || s[i] > 0x7e)
            return 0;
    return 1;
}

int spec_dim_find(const spec_meta_t *meta, const char *name)
{
    for (size_t i = 0; meta->named && i < meta->dims; i++)
        if (strcmp(meta->names[i], name) == 0)
            return (int)i;
    return -1;
}

/* "dims": [{"name", "unit", "range"}, ...]: names, units and ranges together. */
int spec_parse_named_dims(const cJSON *req, const cJSON *arr, spec_t *s, char *err, size_t errlen)
{
    static const struct field dim_fields[] = {
        {"name", F_OTHER, 0, 0, 0, 0, 0},
        {"unit", F_OTHER, 0, 0, 0, 0, 0},
        {"range", F_OTHER, 0, 0, 0, 0, 0},
    };
    char path[ELEM_MAX_LEN], fp[PATH_MAX_LEN], sb[SHOW_MAX + 4];
    int n = cJSON_GetArraySize(arr), rc;
    if (n < 1)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "dims must name at least one dimension");
    if (n > FEAT_MAX_DIMS)
        return err_fail(err, errlen, WORTH_E_TOO_LARGE, "dims must be at most %d", FEAT_MAX_DIMS);
    if (!cJSON_IsObject(arr->child))
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST,
                        "dims must be a number, or an array of named dimensions {\"name\", "
                        "\"unit\", \"range\"}");
    if (cJSON_GetObjectItemCaseSensitive(req, "ranges"))
        return err_fail(
            err, errlen, WORTH_E_BAD_REQUEST,
            "named dims carry their own ranges: give \"range\" in each, not \"ranges\"");
    size_t dims = (size_t)n;
    s->meta.dims = dims;
    s->meta.named = 1;
    s->lo = mem_calloc(dims, sizeof *s->lo);
    s->hi = mem_calloc(dims, sizeof *s->hi);
    size_t i = 0;
    const cJSON *it;
    cJSON_ArrayForEach(it, arr)
    {
        snprintf(path, sizeof path, "dims[%zu]", i);
        if (!cJSON_IsObject(it))
            return err_fail(err, errlen, WORTH_E_BAD_REQUEST,
                            "%s must be an object {\"name\", \"unit\", \"range\"}", path);
        if ((rc = spec_check_keys(it, dim_fields, 3, path, err, errlen)))
            return rc;
        const char *name = NULL, *unit = NULL;
        snprintf(fp, sizeof fp, "%s.name", path);
        if ((rc = spec_get_string(cJSON_GetObjectItemCaseSensitive(it, "name"), fp, &name, err,
                                  errlen)))
            return rc;
        if (!spec_name_ok(name))
            return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                            "%s must be 1..%d bytes of [A-Za-z0-9._-]", fp, MODEL_NAME_MAX);
        for (size_t k = 0; k < i; k++)
            if (strcmp(s->meta.names[k], name) == 0)
                return err_fail(err, errlen, WORTH_E_BAD_PARAM, "%s: \"%s\" names two dimensions",
                                fp, spec_show(name, sb));
        snprintf(s->meta.names[i], sizeof s->meta.names[i], "%s", name);
        const cJSON *u = cJSON_GetObjectItemCaseSensitive(it, "unit");
        if (u) {
            snprintf(fp, sizeof fp, "%s.unit", path);
            if ((rc = spec_get_string(u, fp, &unit, err, errlen)))
                return rc;
            if (!unit_ok(unit))
                return err_fail(err, errlen, WORTH_E_BAD_PARAM, "%s must be 1..%d printable bytes",
                                fp, SPEC_UNIT_MAX);
            snprintf(s->meta.units[i], sizeof s->meta.units[i], "%s", unit);
        }
        const cJSON *range = cJSON_GetObjectItemCaseSensitive(it, "range");
        if (!cJSON_IsArray(range) || cJSON_GetArraySize(range) != 2)
            return err_fail(err, errlen, range ? WORTH_E_BAD_REQUEST : WORTH_E_BAD_REQUEST,
                            "%s.range must be a pair [lo, hi]", path);
        snprintf(fp, sizeof fp, "%s.range[0]", path);
        if ((rc = spec_get_double(range->child, fp, &s->lo[i], err, errlen)))
            return rc;
        snprintf(fp, sizeof fp, "%s.range[1]", path);
        if ((rc = spec_get_double(range->child->next, fp, &s->hi[i], err, errlen)))
            return rc;
        if (!(s->lo[i] < s->hi[i]))
            return err_fail(err, errlen, WORTH_E_BAD_PARAM, "%s.range: lo must be below hi", path);
        i++;
    }
    return 0;
}

/* reward_unit, period_s and samples {reward, max_gap_periods | max_gap_s}. */
int spec_parse_plant(const cJSON *req, spec_t *s, char *err, size_t errlen)
{
    static const struct field sample_fields[] = {
        {"reward", F_OTHER, 0, 0, 0, 0, 0},
        {"max_gap_periods", F_OTHER, 0, 0, 0, 0, 0},
        {"max_gap_s", F_OTHER, 0, 0, 0, 0, 0},
    };
    const cJSON *it;
    const char *str;
    int rc;
    s->meta.max_gap_s = INFINITY;
    if ((it = cJSON_GetObjectItemCaseSensitive(req, "reward_unit"))) {
        if ((rc = spec_get_string(it, "reward_unit", &str, err, errlen)))
            return rc;
        if (!unit_ok(str))
            return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                            "reward_unit must be 1..%d printable bytes", SPEC_UNIT_MAX);
        snprintf(s->meta.reward_unit, sizeof s->meta.reward_unit, "%s", str);
    }
    if ((it = cJSON_GetObjectItemCaseSensitive(req, "period_s"))) {
        if ((rc = spec_get_double(it, "period_s", &s->meta.period_s, err, errlen)))
            return rc;
        if (!(s->meta.period_s > 0))
            return err_fail(err, errlen, WORTH_E_BAD_PARAM, "period_s must be > 0");
    }
    double periods = 3; /* the default gap, when the period is known */
    const cJSON *sm = cJSON_GetObjectItemCaseSensitive(req, "samples");
    if (sm) {
        if (!cJSON_IsObject(sm))
            return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "samples must be an object");
        if ((rc = spec_check_keys(sm, sample_fields, 3, "samples", err, errlen)))
            return rc;
        if ((it = cJSON_GetObjectItemCaseSensitive(sm, "reward"))) {
            if ((rc = spec_get_string(it, "samples.reward", &str, err, errlen)))
                return rc;
            if (strcmp(str, "next") != 0 && strcmp(str, "same") != 0)
                return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                                "samples.reward must be \"next\" or \"same\"");
            s->meta.reward_same = strcmp(str, "same") == 0;
        }
        const cJSON *gp = cJSON_GetObjectItemCaseSensitive(sm, "max_gap_periods");
        const cJSON *gs = cJSON_GetObjectItemCaseSensitive(sm, "max_gap_s");
        if (gp && gs)
            return err_fail(err, errlen, WORTH_E_BAD_REQUEST,
                            "give samples.max_gap_periods or samples.max_gap_s, not both");
        if (gp) {
            if ((rc = spec_get_double(gp, "samples.max_gap_periods", &periods, err, errlen)))
                return rc;
            if (!(periods > 0))
                return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                                "samples.max_gap_periods must be > 0");
            if (!(s->meta.period_s > 0))
                return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                                "samples.max_gap_periods needs period_s");
        }
        if (gs) {
            if ((rc = spec_get_double(gs, "samples.max_gap_s", &s->meta.max_gap_s, err, errlen)))
                return rc;
            if (!(s->meta.max_gap_s > 0))
                return err_fail(err, errlen, WORTH_E_BAD_PARAM, "samples.max_gap_s must be > 0");
            return 0;
        }
    }
    if (s->meta.period_s > 0)
        s->meta.max_gap_s = periods * s->meta.period_s;
    return 0;
}

/* Adds "dims" to root: the count, or the named dimensions with units and ranges. */
int spec_print_dims(cJSON *root, const spec_t *s)
{
    const model_spec_t *m = &s->m;
    int bad = 0;
    const spec_meta_t *mt = &s->meta;
    if (mt->named) {
        cJSON *dims = cJSON_AddArrayToObject(root, "dims");
        bad |= dims ? 0 : -1;
        for (size_t i = 0; dims && i < m->feat.dims; i++) {
            cJSON *d = cJSON_CreateObject(), *range = NULL;
            if (!d || !cJSON_AddItemToArray(dims, d)) {
                cJSON_Delete(d);
                bad = -1;
                break;
            }
            bad |= cJSON_AddStringToObject(d, "name", mt->names[i]) ? 0 : -1;
            if (mt->units[i][0])
                bad |= cJSON_AddStringToObject(d, "unit", mt->units[i]) ? 0 : -1;
            range = cJSON_AddArrayToObject(d, "range");
            bad |= range ? 0 : -1;
            if (range) {
                bad |= spec_add_double(range, NULL, s->lo[i]);
                bad |= spec_add_double(range, NULL, s->hi[i]);
            }
        }
    } else {
        bad |= spec_add_u64(root, "dims", m->feat.dims);
    }
    return bad;
}

/* Adds reward_unit, period_s and samples to root when they were given. */
int spec_print_plant(cJSON *root, const spec_t *s)
{
    const spec_meta_t *mt = &s->meta;
    int bad = 0;
    if (mt->reward_unit[0])
        bad |= cJSON_AddStringToObject(root, "reward_unit", mt->reward_unit) ? 0 : -1;
    if (mt->period_s > 0)
        bad |= spec_add_double(root, "period_s", mt->period_s);
    if (mt->reward_same || isfinite(mt->max_gap_s)) {
        cJSON *sm = cJSON_AddObjectToObject(root, "samples");
        bad |= sm ? 0 : -1;
        if (sm) {
            bad |=
                cJSON_AddStringToObject(sm, "reward", mt->reward_same ? "same" : "next") ? 0 : -1;
            if (isfinite(mt->max_gap_s))
                bad |= spec_add_double(sm, "max_gap_s", mt->max_gap_s);
        }
    }
    return bad;
}

int spec_get_hidden(const cJSON *it, const char *path, est_hidden_t *out, char *err, size_t errlen)
{
    if (!cJSON_IsArray(it))
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST,
                        "%s must be an array of layer widths, e.g. [32, 32]", path);
    int n = cJSON_GetArraySize(it);
    if (n < 1 || n > EST_MLP_MAX_LAYERS)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "%s must list 1..%d layer widths", path,
                        EST_MLP_MAX_LAYERS);
    est_hidden_t h = {(unsigned)n, {0}};
    char ep[PATH_MAX_LEN + ELEM_MAX_LEN];
    const cJSON *w;
    unsigned i = 0;
    cJSON_ArrayForEach(w, it)
    {
        uint64_t u = 0;
        snprintf(ep, sizeof ep, "%s[%u]", path, i);
        int rc = spec_get_int(w, ep, 1, EST_MLP_MAX_WIDTH, &u, err, errlen);
        if (rc)
            return rc;
        h.width[i++] = (unsigned)u;
    }
    *out = h;
    return 0;
}
