/*
 * spec.c - a model.create request checked field by field into a spec_t.
 *
 * Runs on the loop thread, once per model.create.  It owns nothing after it
 * returns except the spec_t it hands over, whose arrays and canonical text
 * come from mem_alloc: the request's cJSON tree and every cJSON temporary made
 * here live in the per-request arena (the daemon's cJSON hooks), which is
 * reset after the reply, so a spec_t must never keep a cJSON pointer.  It must
 * never let a value through that a cast would silently change (a negative or
 * huge count into an unsigned, a fraction into an integer, 1e400 into a
 * double), never accept a field it does not know (a misspelt parameter would
 * otherwise fall back to its default without a word) and never report an
 * error without naming the field's path.  Ranges that model_new checks with a
 * clear message (alpha > 0, lambda in [0, 1], ...) are left to it; the daemon
 * calls model_new right after and reports its error.
 *
 * Numbers follow the protocol: null or a string where a number is expected
 * is bad_number (JSON encoders write NaN and infinities that way), as is a
 * number that overflows a double; any other type is bad_request.
 *
 * The canonical text prints every double with the fewest digits (15 to 17)
 * that read back to the same bits: cJSON's own printer settles for 15 digits
 * when they come within an epsilon, so 0.1 + 0.2 would come back as 0.3.
 */
#include "core/spec.h"

#include <inttypes.h>
#include <limits.h>
#include <math.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "common/fail.h"
#include "core/spec_impl.h"
#include "common/mem.h"
#include "worth/errors.h"

/* Largest seed accepted: above 2^53 a JSON number no longer holds every integer. */
#define SEED_MAX 9007199254740992.0

static const struct field top_fields[] = {
    {"op", F_OTHER, 0, 0, 0, 0, 0},          {"id", F_OTHER, 0, 0, 0, 0, 0},
    {"model", F_OTHER, 0, 0, 0, 0, 0},       {"dims", F_OTHER, 0, 0, 0, 0, 0},
    {"gamma", F_OTHER, 0, 0, 0, 0, 0},       {"gamma_per_s", F_OTHER, 0, 0, 0, 0, 0},
    {"ranges", F_OTHER, 0, 0, 0, 0, 0},      {"features", F_OTHER, 0, 0, 0, 0, 0},
    {"estimators", F_OTHER, 0, 0, 0, 0, 0},  {"primary", F_OTHER, 0, 0, 0, 0, 0},
    {"max_sources", F_OTHER, 0, 0, 0, 0, 0}, {"max_features", F_OTHER, 0, 0, 0, 0, 0},
    {"diagnostics", F_OTHER, 0, 0, 0, 0, 0}, {"reward_unit", F_OTHER, 0, 0, 0, 0, 0},
    {"period_s", F_OTHER, 0, 0, 0, 0, 0},    {"samples", F_OTHER, 0, 0, 0, 0, 0},
};
#define NTOP (sizeof top_fields / sizeof top_fields[0])

/* Basis names, indexed by enum feat_kind. */
static const char *const basis_names[] = {"bias", "raw", "poly", "fourier", "rbf", "tiles"};
#define NBASIS (sizeof basis_names / sizeof basis_names[0])

#define BK(k)   (1u << (k))
#define BOFF(m) offsetof(feat_basis_t, m)
/* Ranges as protocol.md gives them; feat_new checks them again. */
static const struct field basis_fields[] = {
    {"basis", F_OTHER, 0, 0, 1, 0, 0},
    {"degree", F_UINT, BOFF(degree), BK(FEAT_POLY), 1, 1, 255},
    {"order", F_UINT, BOFF(order), BK(FEAT_FOURIER), 1, 1, 255},
    {"couple", F_UINT, BOFF(couple), BK(FEAT_FOURIER), 0, 0, -1},
    {"centers", F_UINT, BOFF(centers), BK(FEAT_RBF), 1, 1, UINT_MAX},
    {"width", F_DOUBLE, BOFF(width), BK(FEAT_RBF), 1, 0, 0},
    {"tilings", F_UINT, BOFF(tilings), BK(FEAT_TILES), 1, 1, FEAT_MAX_TILINGS},
    {"tiles", F_UINT, BOFF(tiles), BK(FEAT_TILES), 1, 1, FEAT_MAX_TILES},
    {"size", F_UINT, BOFF(size), BK(FEAT_TILES), 1, 1, UINT_MAX},
};
#define NBASISF (sizeof basis_fields / sizeof basis_fields[0])

#define EK(k)   (1u << (k))
#define EOFF(m) offsetof(est_params_t, m)
#define EK_NET  (EK(EST_MLP) | EK(EST_ENSEMBLE))
#define EK_ALPHA                                                                                   \
    (EK(EST_TD) | EK(EST_TD_N) | EK(EST_TD_LAMBDA) | EK(EST_MC) | EK(EST_REPLAY) | EK_NET)
#define EK_BUF (EK(EST_REPLAY) | EK_NET)
#define EK_ALL ((1u << EST_KIND_COUNT) - 1)
/* Estimator fields in the order of protocol.md's table; init last. */
static const struct field est_fields[] = {
    {"name", F_OTHER, 0, EK_ALL, 0, 0, 0},
    {"kind", F_OTHER, 0, EK_ALL, 0, 0, 0},
    {"alpha", F_DOUBLE, EOFF(alpha), EK_ALPHA, 0, 0, 0},
    {"n", F_UINT, EOFF(nstep), EK(EST_TD_N) | EK_NET, 0, 0, UINT_MAX},
    {"lambda", F_DOUBLE, EOFF(lambda), EK(EST_TD_LAMBDA) | EK(EST_RLS_TD) | EK(EST_LSTD), 0, 0, 0},
    {"horizon", F_UINT, EOFF(horizon), EK(EST_MC), 0, 0, UINT_MAX},
    {"max_episode", F_UINT, EOFF(max_episode), EK(EST_MC), 0, 0, UINT_MAX},
    {"ridge", F_DOUBLE, EOFF(ridge), EK(EST_LSTD), 0, 0, 0},
    {"forget", F_DOUBLE, EOFF(forget), EK(EST_RLS_TD) | EK(EST_LSTD), 0, 0, 0},
    {"delta", F_DOUBLE, EOFF(delta), EK(EST_RLS_TD), 0, 0, 0},
    {"guard", F_GUARD, EOFF(guard), EK(EST_RLS_TD), 0, 0, 0},
    {"trace_cap", F_DOUBLE, EOFF(trace_cap), EK(EST_RLS_TD), 0, 0, 0},
    {"refit_every", F_UINT, EOFF(refit_every), EK(EST_LSTD), 0, 0, UINT_MAX},
    {"capacity", F_UINT, EOFF(capacity), EK_BUF, 0, 0, UINT_MAX},
    {"batch", F_UINT, EOFF(batch), EK_BUF, 0, 0, UINT_MAX},
    {"steps_per_obs", F_UINT, EOFF(steps_per_obs), EK_BUF, 0, 0, UINT_MAX},
    {"decay", F_DOUBLE, EOFF(decay), EK_BUF, 0, 0, 0},
    {"tol", F_DOUBLE, EOFF(tol), EK_BUF, 0, 0, 0},
    {"seed", F_U64, EOFF(seed), EK_BUF, 0, 0, SEED_MAX},
    {"hidden", F_HIDDEN, EOFF(hidden), EK_NET, 0, 0, 0},
    {"activation", F_ACT, EOFF(act), EK_NET, 0, 0, 0},
    {"target_every", F_UINT, EOFF(target_every), EK_NET, 0, 0, UINT_MAX},
    {"clip", F_DOUBLE, EOFF(clip), EK_NET, 0, 0, 0},
    {"members", F_UINT, EOFF(members), EK(EST_ENSEMBLE), 0, 0, UINT_MAX},
    {"init", F_DOUBLE, EOFF(init), EK_ALL, 0, 0, 0},
};
#define NESTF (sizeof est_fields / sizeof est_fields[0])

/* Guard names, indexed by enum est_guard; activation names, by enum est_act. */
static const char *const guard_names[] = {"regularise", "trace", "none"};
static const char *const act_names[] = {"tanh", "relu"};

/*
 * Copies at most SHOW_MAX bytes of a client's string into buf (SHOW_MAX + 4
 * bytes) for a message: printable ASCII only (others, quotes and backslashes
 * become '?'), so an echoed key can neither break the reply's UTF-8 nor run
 * on for a megabyte.
 */
const char *spec_show(const char *s, char *buf)
{
    size_t i = 0;
    for (; s[i] && i < SHOW_MAX; i++) {
        unsigned char c = (unsigned char)s[i];
        buf[i] = (c >= 0x20 && c < 0x7f && c != '"' && c != '\\') ? (char)c : '?';
    }
    if (s[i]) {
        memcpy(buf + i, "...", 3);
        i += 3;
    }
    buf[i] = 0;
    return buf;
}

static int find_field(const struct field *t, size_t n, const char *name)
{
    for (size_t i = 0; i < n; i++)
        if (strcmp(t[i].name, name) == 0)
            return (int)i;
    return -1;
}

/*
 * Refuses a key of obj that is not in t (n <= 32 entries) or that appears
 * twice: cJSON keeps both copies and a lookup would silently see the first.
 * Linear in the number of keys, since an unknown key stops the scan.
 */
int spec_check_keys(const cJSON *obj, const struct field *t, size_t n, const char *path, char *err,
                    size_t errlen)
{
    uint32_t seen = 0;
    char sb[SHOW_MAX + 4];
    const cJSON *it;
    cJSON_ArrayForEach(it, obj)
    {
        int i = it->string ? find_field(t, n, it->string) : -1;
        if (i < 0)
            return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "%s: unknown field \"%s\"", path,
                            spec_show(it->string ? it->string : "", sb));
        if (seen & (1u << i))
            return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "%s: field \"%s\" appears twice",
                            path, t[i].name);
        seen |= 1u << i;
    }
    return 0;
}

/* A number: missing or of another type is bad_request; null, a string or non-finite bad_number. */
int spec_get_double(const cJSON *it, const char *path, double *out, char *err, size_t errlen)
{
    if (!it)
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "%s is required", path);
    if (cJSON_IsNull(it) || cJSON_IsString(it))
        return err_fail(err, errlen, WORTH_E_BAD_NUMBER, "%s must be a finite number", path);
    if (!cJSON_IsNumber(it))
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "%s must be a number", path);
    if (!isfinite(it->valuedouble))
        return err_fail(err, errlen, WORTH_E_BAD_NUMBER, "%s must be a finite number", path);
    *out = it->valuedouble;
    return 0;
}

/* An integral number in [lo, hi] (hi <= 2^53), else as get_double or bad_param. */
int spec_get_int(const cJSON *it, const char *path, double lo, double hi, uint64_t *out, char *err,
                 size_t errlen)
{
    double v = 0;
    int rc = spec_get_double(it, path, &v, err, errlen);
    if (rc)
        return rc;
    if (v != floor(v) || v < lo || v > hi)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "%s must be an integer %.0f..%.0f", path,
                        lo, hi);
    *out = (uint64_t)v;
    return 0;
}

/* A string field; missing or not a string is bad_request. */
int spec_get_string(const cJSON *it, const char *path, const char **out, char *err, size_t errlen)
{
    if (!it)
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "%s is required", path);
    if (!cJSON_IsString(it) || !it->valuestring)
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "%s must be a string", path);
    *out = it->valuestring;
    return 0;
}

/* Reads parameter f of an object into the struct at dst; dims bounds "up to dims" ranges. */
static int get_param(const struct field *f, const cJSON *it, const char *path, size_t dims,
                     void *dst, char *err, size_t errlen)
{
    char *p = (char *)dst + f->off;
    uint64_t u = 0;
    double d;
    const char *s = NULL;
    int rc;
    switch (f->type) {
    case F_DOUBLE:
        if ((rc = spec_get_double(it, path, &d, err, errlen)))
            return rc;
        memcpy(p, &d, sizeof d);
        return 0;
    case F_UINT:
        if ((rc = spec_get_int(it, path, f->lo, f->hi < 0 ? (double)dims : f->hi, &u, err, errlen)))
            return rc;
        unsigned uv = (unsigned)u;
        memcpy(p, &uv, sizeof uv);
        return 0;
    case F_U64:
        if ((rc = spec_get_int(it, path, f->lo, f->hi, &u, err, errlen)))
            return rc;
        memcpy(p, &u, sizeof u);
        return 0;
    case F_GUARD:
        if ((rc = spec_get_string(it, path, &s, err, errlen)))
            return rc;
        for (size_t g = 0; g < sizeof guard_names / sizeof guard_names[0]; g++) {
            if (strcmp(s, guard_names[g]) == 0) {
                enum est_guard gv = (enum est_guard)g;
                memcpy(p, &gv, sizeof gv);
                return 0;
            }
        }
        return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                        "%s must be \"regularise\", \"trace\" or \"none\"", path);
    case F_ACT:
        if ((rc = spec_get_string(it, path, &s, err, errlen)))
            return rc;
        for (size_t a = 0; a < sizeof act_names / sizeof act_names[0]; a++) {
            if (strcmp(s, act_names[a]) == 0) {
                enum est_act av = (enum est_act)a;
                memcpy(p, &av, sizeof av);
                return 0;
            }
        }
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "%s must be \"tanh\" or \"relu\"", path);
    case F_HIDDEN:
        return spec_get_hidden(it, path, (est_hidden_t *)(void *)p, err, errlen);
    case F_OTHER:
        break;
    }
    CHECK(!"parameter of no type");
    return WORTH_E_INTERNAL;
}

/*
 * The fields of one kind's object, after check_keys: a field of the table
 * that does not apply to kind is bad_request, the others are read (required
 * ones must be there).  Fields 0..first-1 are the caller's (basis, name, kind).
 */
static int get_params(const cJSON *obj, const struct field *t, size_t n, size_t first,
                      unsigned kind, const char *what, const char *path, size_t dims, void *dst,
                      char *err, size_t errlen)
{
    char fp[PATH_MAX_LEN];
    for (size_t i = first; i < n; i++) {
        const cJSON *it = cJSON_GetObjectItemCaseSensitive(obj, t[i].name);
        if (!(t[i].kinds & (1u << kind))) {
            if (it)
                return err_fail(err, errlen, WORTH_E_BAD_REQUEST,
                                "%s: field \"%s\" does not apply to %s", path, t[i].name, what);
            continue;
        }
        if (!it && !t[i].required)
            continue;
        snprintf(fp, sizeof fp, "%s.%s", path, t[i].name);
        int rc = get_param(&t[i], it, fp, dims, dst, err, errlen);
        if (rc)
            return rc;
    }
    return 0;
}

static int parse_ranges(const cJSON *req, spec_t *s, size_t dims, char *err, size_t errlen)
{
    const cJSON *ranges = cJSON_GetObjectItemCaseSensitive(req, "ranges");
    if (!ranges)
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "ranges is required");
    if (!cJSON_IsArray(ranges))
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST,
                        "ranges must be an array of [lo, hi] pairs");
    int n = cJSON_GetArraySize(ranges);
    if (n < 0 || (size_t)n != dims)
        return err_fail(err, errlen, WORTH_E_BAD_DIMENSION, "ranges has %d pairs, dims is %zu", n,
                        dims);
    s->lo = mem_calloc(dims, sizeof *s->lo);
    s->hi = mem_calloc(dims, sizeof *s->hi);
    size_t i = 0;
    const cJSON *pair;
    char path[PATH_MAX_LEN];
    cJSON_ArrayForEach(pair, ranges)
    {
        if (!cJSON_IsArray(pair) || cJSON_GetArraySize(pair) != 2)
            return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "ranges[%zu] must be a pair [lo, hi]",
                            i);
        int rc;
        snprintf(path, sizeof path, "ranges[%zu][0]", i);
        if ((rc = spec_get_double(pair->child, path, &s->lo[i], err, errlen)))
            return rc;
        snprintf(path, sizeof path, "ranges[%zu][1]", i);
        if ((rc = spec_get_double(pair->child->next, path, &s->hi[i], err, errlen)))
            return rc;
        if (!(s->lo[i] < s->hi[i]))
            return err_fail(err, errlen, WORTH_E_BAD_PARAM, "ranges[%zu]: lo must be below hi", i);
        i++;
    }
    return 0;
}

static int parse_features(const cJSON *req, spec_t *s, size_t dims, size_t cap, char *err,
                          size_t errlen)
{
    const cJSON *feats = cJSON_GetObjectItemCaseSensitive(req, "features");
    if (!feats)
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "features is required");
    if (!cJSON_IsArray(feats))
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "features must be an array of bases");
    int n = cJSON_GetArraySize(feats);
    if (n < 1)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "features must hold at least one basis");
    /* Every basis gives at least one feature: more bases than max_features cannot fit. */
    if ((size_t)n > cap)
        return err_fail(err, errlen, WORTH_E_TOO_LARGE,
                        "features: %d bases exceed the feature limit %zu", n, cap);
    s->bases = mem_calloc((size_t)n, sizeof *s->bases);
    size_t i = 0;
    const cJSON *b;
    char path[ELEM_MAX_LEN], fp[PATH_MAX_LEN], sb[SHOW_MAX + 4];
    cJSON_ArrayForEach(b, feats)
    {
        int rc;
        snprintf(path, sizeof path, "features[%zu]", i);
        if (!cJSON_IsObject(b))
            return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "%s must be an object", path);
        if ((rc = spec_check_keys(b, basis_fields, NBASISF, path, err, errlen)))
            return rc;
        const char *name = NULL;
        snprintf(fp, sizeof fp, "%s.basis", path);
        if ((rc = spec_get_string(cJSON_GetObjectItemCaseSensitive(b, "basis"), fp, &name, err,
                                  errlen)))
            return rc;
        size_t k = 0;
        while (k < NBASIS && strcmp(name, basis_names[k]) != 0)
            k++;
        if (k == NBASIS)
            return err_fail(err, errlen, WORTH_E_BAD_PARAM, "%s: unknown basis \"%s\"", fp,
                            spec_show(name, sb));
        feat_basis_t *fb = &s->bases[i];
        fb->kind = (enum feat_kind)k;
        char what[32];
        snprintf(what, sizeof what, "basis %s", basis_names[k]);
        if ((rc = get_params(b, basis_fields, NBASISF, 1, (unsigned)k, what, path, dims, fb, err,
                             errlen)))
            return rc;
        if (fb->kind == FEAT_RBF && !(fb->width > 0))
            return err_fail(err, errlen, WORTH_E_BAD_PARAM, "%s.width must be > 0", path);
        i++;
    }
    s->m.feat.nbases = i;
    return 0;
}

static int parse_estimators(const cJSON *req, spec_t *s, char *err, size_t errlen)
{
    const cJSON *ests = cJSON_GetObjectItemCaseSensitive(req, "estimators");
    if (!ests)
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "estimators is required");
    if (!cJSON_IsArray(ests))
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "estimators must be an array");
    int n = cJSON_GetArraySize(ests);
    if (n < 1 || n > MODEL_MAX_EST)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "estimators must hold 1..%d estimators",
                        MODEL_MAX_EST);
    s->est = mem_calloc((size_t)n, sizeof *s->est);
    s->est_names = mem_calloc((size_t)n, sizeof *s->est_names);
    s->est_name_ptrs = mem_calloc((size_t)n, sizeof *s->est_name_ptrs);
    size_t i = 0;
    const cJSON *e;
    char path[ELEM_MAX_LEN], fp[PATH_MAX_LEN], sb[SHOW_MAX + 4];
    cJSON_ArrayForEach(e, ests)
    {
        int rc;
        snprintf(path, sizeof path, "estimators[%zu]", i);
        if (!cJSON_IsObject(e))
            return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "%s must be an object", path);
        if ((rc = spec_check_keys(e, est_fields, NESTF, path, err, errlen)))
            return rc;
        const char *name = NULL, *kname = NULL; /* set before use; -O3 cannot see it */
        snprintf(fp, sizeof fp, "%s.name", path);
        if ((rc = spec_get_string(cJSON_GetObjectItemCaseSensitive(e, "name"), fp, &name, err,
                                  errlen)))
            return rc;
        size_t len = strlen(name);
        if (len < 1 || len > MODEL_NAME_MAX)
            return err_fail(err, errlen, WORTH_E_BAD_PARAM, "%s must be 1..%d bytes", fp,
                            MODEL_NAME_MAX);
        for (size_t j = 0; j < i; j++)
            if (strcmp(name, s->est_names[j]) == 0)
                return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                                "%s: \"%s\" is already the name of estimators[%zu]", fp,
                                spec_show(name, sb), j);
        memcpy(s->est_names[i], name, len + 1);
        s->est_name_ptrs[i] = s->est_names[i];
        snprintf(fp, sizeof fp, "%s.kind", path);
        if ((rc = spec_get_string(cJSON_GetObjectItemCaseSensitive(e, "kind"), fp, &kname, err,
                                  errlen)))
            return rc;
        int k = est_kind_parse(kname);
        if (k < 0)
            return err_fail(err, errlen, WORTH_E_BAD_PARAM, "%s: unknown kind \"%s\"", fp,
                            spec_show(kname, sb));
        est_params_default((enum est_kind)k, &s->est[i]);
        char what[32];
        snprintf(what, sizeof what, "kind %s", est_kind_name((enum est_kind)k));
        if ((rc = get_params(e, est_fields, NESTF, 2, (unsigned)k, what, path, 0, &s->est[i], err,
                             errlen)))
            return rc;
        i++;
    }
    s->m.n_est = i;
    return 0;
}

/* Shortest of %.15g..%.17g that reads back to the same double (finite v). */
static void fmt_double(double v, char *buf, size_t len)
{
    /* XXX: snprintf and strtod follow LC_NUMERIC; the daemon keeps the C locale. */
    for (int prec = 15; prec < 17; prec++) {
        snprintf(buf, len, "%.*g", prec, v);
        if (strtod(buf, NULL) == v)
            return;
    }
    snprintf(buf, len, "%.17g", v);
}

/* Adds a raw number to obj under key, or to the array obj when key is NULL; 0 or -1. */
static int add_raw(cJSON *obj, const char *key, const char *text)
{
    cJSON *it = cJSON_CreateRaw(text);
    if (!it)
        return -1;
    if (key ? !cJSON_AddItemToObject(obj, key, it) : !cJSON_AddItemToArray(obj, it)) {
        cJSON_Delete(it);
        return -1;
    }
    return 0;
}

int spec_add_double(cJSON *obj, const char *key, double v)
{
    char buf[40];
    fmt_double(v, buf, sizeof buf);
    return add_raw(obj, key, buf);
}

int spec_add_u64(cJSON *obj, const char *key, uint64_t v)
{
    char buf[24];
    snprintf(buf, sizeof buf, "%" PRIu64, v);
    return add_raw(obj, key, buf);
}

/* Adds every field of t from `first` that applies to kind, read from the struct at src. */
static int add_params(cJSON *obj, const struct field *t, size_t n, size_t first, unsigned kind,
                      const void *src)
{
    int bad = 0;
    for (size_t i = first; i < n; i++) {
        if (!(t[i].kinds & (1u << kind)))
            continue;
        const char *p = (const char *)src + t[i].off;
        double d;
        unsigned u;
        uint64_t q;
        enum est_guard g;
        enum est_act a;
        switch (t[i].type) {
        case F_DOUBLE:
            memcpy(&d, p, sizeof d);
            bad |= spec_add_double(obj, t[i].name, d);
            break;
        case F_UINT:
            memcpy(&u, p, sizeof u);
            bad |= spec_add_u64(obj, t[i].name, u);
            break;
        case F_U64:
            memcpy(&q, p, sizeof q);
            bad |= spec_add_u64(obj, t[i].name, q);
            break;
        case F_GUARD:
            memcpy(&g, p, sizeof g);
            CHECK((unsigned)g < sizeof guard_names / sizeof guard_names[0]);
            bad |= cJSON_AddStringToObject(obj, t[i].name, guard_names[g]) ? 0 : -1;
            break;
        case F_ACT:
            memcpy(&a, p, sizeof a);
            CHECK((unsigned)a < sizeof act_names / sizeof act_names[0]);
            bad |= cJSON_AddStringToObject(obj, t[i].name, act_names[a]) ? 0 : -1;
            break;
        case F_HIDDEN: {
            est_hidden_t h;
            memcpy(&h, p, sizeof h);
            cJSON *arr = cJSON_AddArrayToObject(obj, t[i].name);
            bad |= arr ? 0 : -1;
            for (unsigned l = 0; arr && l < h.count && l < EST_MLP_MAX_LAYERS; l++)
                bad |= spec_add_u64(arr, NULL, h.width[l]);
            break;
        }
        case F_OTHER:
            break;
        }
    }
    return bad;
}

/*
 * The spec as compact JSON text with every default filled in (owned, free
 * with mem_free), or NULL when cJSON runs out of memory.  Keys in the order of
 * protocol.md; gamma_per_s only when set, since 0 (none) is not a valid value.
 */
static char *canonical(const spec_t *s)
{
    const model_spec_t *m = &s->m;
    int bad = 0;
    cJSON *root = cJSON_CreateObject();
    if (!root)
        return NULL;
    bad |= cJSON_AddStringToObject(root, "model", s->name) ? 0 : -1;
    const spec_meta_t *mt = &s->meta;
    bad |= spec_print_dims(root, s);
    bad |= spec_add_double(root, "gamma", m->gamma);
    if (m->gamma_per_s != 0)
        bad |= spec_add_double(root, "gamma_per_s", m->gamma_per_s);
    bad |= spec_print_plant(root, s);
    cJSON *ranges = mt->named ? NULL : cJSON_AddArrayToObject(root, "ranges");
    bad |= ranges || mt->named ? 0 : -1;
    for (size_t i = 0; ranges && i < m->feat.dims; i++) {
        cJSON *pair = cJSON_CreateArray();
        if (!pair || !cJSON_AddItemToArray(ranges, pair)) {
            cJSON_Delete(pair);
            bad = -1;
            break;
        }
        bad |= spec_add_double(pair, NULL, s->lo[i]);
        bad |= spec_add_double(pair, NULL, s->hi[i]);
    }
    cJSON *feats = cJSON_AddArrayToObject(root, "features");
    bad |= feats ? 0 : -1;
    for (size_t i = 0; feats && i < m->feat.nbases; i++) {
        cJSON *b = cJSON_CreateObject();
        if (!b || !cJSON_AddItemToArray(feats, b)) {
            cJSON_Delete(b);
            bad = -1;
            break;
        }
        const feat_basis_t *fb = &s->bases[i];
        bad |= cJSON_AddStringToObject(b, "basis", basis_names[fb->kind]) ? 0 : -1;
        bad |= add_params(b, basis_fields, NBASISF, 1, fb->kind, fb);
    }
    cJSON *ests = cJSON_AddArrayToObject(root, "estimators");
    bad |= ests ? 0 : -1;
    for (size_t i = 0; ests && i < m->n_est; i++) {
        cJSON *e = cJSON_CreateObject();
        if (!e || !cJSON_AddItemToArray(ests, e)) {
            cJSON_Delete(e);
            bad = -1;
            break;
        }
        bad |= cJSON_AddStringToObject(e, "name", s->est_names[i]) ? 0 : -1;
        bad |= cJSON_AddStringToObject(e, "kind", est_kind_name(s->est[i].kind)) ? 0 : -1;
        bad |= add_params(e, est_fields, NESTF, 2, s->est[i].kind, &s->est[i]);
    }
    const char *head = m->primary_auto ? "auto" : s->est_names[m->primary];
    bad |= cJSON_AddStringToObject(root, "primary", head) ? 0 : -1;
    bad |= spec_add_u64(root, "max_sources", m->max_sources);
    bad |= spec_add_u64(root, "max_features", m->feat.max_features);
    bad |= spec_print_diag(root, s);

    char *text = bad ? NULL : cJSON_PrintUnformatted(root);
    cJSON_Delete(root);
    if (!text)
        return NULL;
    char *out = mem_strdup(text);
    cJSON_free(text);
    return out;
}

int spec_name_ok(const char *name)
{
    if (!name)
        return 0;
    size_t i = 0;
    for (; name[i]; i++) {
        char c = name[i];
        if (i >= MODEL_NAME_MAX || !((c >= 'A' && c <= 'Z') || (c >= 'a' && c <= 'z') ||
                                     (c >= '0' && c <= '9') || c == '.' || c == '_' || c == '-'))
            return 0;
    }
    return i > 0;
}

/* Everything but the arrays; the top-level fields in the order of protocol.md. */
static int parse(const cJSON *req, size_t feat_limit, spec_t *s, char *err, size_t errlen)
{
    int rc;
    const char *name = NULL;
    uint64_t u = 0;
    double d;
    const cJSON *it;

    if (!cJSON_IsObject(req))
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "request must be a JSON object");
    if ((rc = spec_check_keys(req, top_fields, NTOP, "request", err, errlen)))
        return rc;

    if ((rc = spec_get_string(cJSON_GetObjectItemCaseSensitive(req, "model"), "model", &name, err,
                              errlen)))
        return rc;
    if (!spec_name_ok(name))
        return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                        "model must be 1..%d bytes of [A-Za-z0-9._-]", MODEL_NAME_MAX);
    memcpy(s->name, name, strlen(name) + 1);

    /* dims: a count, or named dimensions carrying their ranges. */
    const cJSON *dj = cJSON_GetObjectItemCaseSensitive(req, "dims");
    size_t dims;
    if (cJSON_IsArray(dj)) {
        if ((rc = spec_parse_named_dims(req, dj, s, err, errlen)))
            return rc;
        dims = s->meta.dims;
    } else {
        /* bad_param below 1 or fractional, too_large above the hard limit. */
        if ((rc = spec_get_double(dj, "dims", &d, err, errlen)))
            return rc;
        if (d != floor(d) || d < 1)
            return err_fail(err, errlen, WORTH_E_BAD_PARAM, "dims must be an integer >= 1");
        if (d > FEAT_MAX_DIMS)
            return err_fail(err, errlen, WORTH_E_TOO_LARGE, "dims must be at most %d",
                            FEAT_MAX_DIMS);
        dims = (size_t)d;
        s->meta.dims = dims;
    }
    s->m.feat.dims = dims;

    if ((rc = spec_get_double(cJSON_GetObjectItemCaseSensitive(req, "gamma"), "gamma", &s->m.gamma,
                              err, errlen)))
        return rc;
    if (!(s->m.gamma >= 0 && s->m.gamma <= 1))
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "gamma must be in [0, 1]");
    if ((it = cJSON_GetObjectItemCaseSensitive(req, "gamma_per_s"))) {
        if ((rc = spec_get_double(it, "gamma_per_s", &s->m.gamma_per_s, err, errlen)))
            return rc;
        if (!(s->m.gamma_per_s > 0 && s->m.gamma_per_s <= 1))
            return err_fail(err, errlen, WORTH_E_BAD_PARAM, "gamma_per_s must be in (0, 1]");
    }

    if (!s->meta.named && (rc = parse_ranges(req, s, dims, err, errlen)))
        return rc;
    if ((rc = spec_parse_plant(req, s, err, errlen)))
        return rc;

    /* Read before features: it bounds the number of bases. */
    s->m.feat.max_features = FEAT_DEFAULT_MAX < feat_limit ? FEAT_DEFAULT_MAX : feat_limit;
    if ((it = cJSON_GetObjectItemCaseSensitive(req, "max_features"))) {
        if ((rc = spec_get_int(it, "max_features", 1, FEAT_HARD_MAX, &u, err, errlen)))
            return rc;
        if (u > feat_limit)
            return err_fail(err, errlen, WORTH_E_TOO_LARGE,
                            "max_features %llu exceeds the daemon's limit %zu (--max-features)",
                            (unsigned long long)u, feat_limit);
        s->m.feat.max_features = (size_t)u;
    }
    if ((rc = parse_features(req, s, dims, s->m.feat.max_features, err, errlen)))
        return rc;

    if ((rc = parse_estimators(req, s, err, errlen)))
        return rc;

    /* Default "auto" (health.h); a stored spec names its primary, an estimator "auto" wins. */
    s->m.primary = 0, s->m.primary_auto = 1;
    if ((it = cJSON_GetObjectItemCaseSensitive(req, "primary"))) {
        char sb[SHOW_MAX + 4];
        if ((rc = spec_get_string(it, "primary", &name, err, errlen)))
            return rc;
        size_t i = 0;
        while (i < s->m.n_est && strcmp(name, s->est_names[i]) != 0)
            i++;
        if (i == s->m.n_est && strcmp(name, "auto") != 0)
            return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                            "primary: no estimator is named \"%s\" (give a name or \"auto\")",
                            spec_show(name, sb));
        s->m.primary_auto = i == s->m.n_est, s->m.primary = i == s->m.n_est ? 0 : i;
    }

    s->m.max_sources = MODEL_DEFAULT_SOURCES;
    if ((it = cJSON_GetObjectItemCaseSensitive(req, "max_sources"))) {
        if ((rc = spec_get_int(it, "max_sources", 1, EST_MAX_SOURCES, &u, err, errlen)))
            return rc;
        s->m.max_sources = (size_t)u;
    }
    return spec_parse_diag(cJSON_GetObjectItemCaseSensitive(req, "diagnostics"), s, err, errlen);
}

int spec_parse(const cJSON *req, spec_t **out, char *err, size_t errlen)
{
    return spec_parse_within(req, FEAT_HARD_MAX, out, err, errlen);
}

int spec_parse_within(const cJSON *req, size_t feat_limit, spec_t **out, char *err, size_t errlen)
{
    spec_t *s = mem_calloc(1, sizeof *s);
    int rc = parse(req, feat_limit, s, err, errlen);
    if (rc)
        goto out_free_spec;
    s->m.feat.lo = s->lo;
    s->m.feat.hi = s->hi;
    s->m.feat.bases = s->bases;
    s->m.est = s->est;
    s->m.est_names = s->est_name_ptrs;
    s->m.diag = &s->diag;
    for (size_t i = 0; i < s->meta.dims && i < FEAT_MAX_DIMS; i++) {
        s->meta.lo[i] = s->lo ? s->lo[i] : -INFINITY;
        s->meta.hi[i] = s->hi ? s->hi[i] : INFINITY;
    }
    s->canonical = canonical(s);
    if (!s->canonical) {
        rc = err_fail(err, errlen, WORTH_E_NO_MEMORY, "out of memory printing the spec");
        goto out_free_spec;
    }
    *out = s;
    return 0;

out_free_spec:
    spec_free(s);
    return rc;
}

void spec_free(spec_t *s)
{
    if (!s)
        return;
    mem_free(s->lo);
    mem_free(s->hi);
    mem_free(s->bases);
    mem_free(s->est);
    mem_free(s->est_names);
    mem_free(s->est_name_ptrs);
    mem_free(s->canonical);
    mem_free(s);
}
