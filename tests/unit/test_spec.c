/*
 * test_spec.c - model.create requests into spec_t (daemon/proto/spec.h):
 * every basis and estimator kind with its parameters and defaults, specs that
 * model_new accepts with the right feature count, the canonical text
 * re-parsing to an identical spec (doubles bit for bit), the exact code and
 * the field path of every refused request, *out untouched on error.  Runs
 * under ASan in tests/run, which also catches leaks on the error paths.
 *
 * Requests are written with single quotes for readability; json() turns them
 * into double quotes before cJSON_Parse.
 */
#include "testutil.h"

#include <cjson/cJSON.h>

#include "learn/model.h"
#include "core/spec.h"
#include "worth/errors.h"

static spec_t *const SENTINEL = (spec_t *)(uintptr_t)0x5bec1;

/* 63 and 64 bytes of [A-Za-z0-9._-]. */
#define N63 "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789."
#define N64 N63 "x"

/* Parses text with ' for " (owned by the caller, cJSON_Delete). */
static cJSON *json(const char *text)
{
    char *t = strdup(text);
    for (char *p = t; *p; p++)
        if (*p == '\'')
            *p = '"';
    cJSON *j = cJSON_Parse(t);
    if (!j)
        print_error("test JSON does not parse: %s\n", t);
    free(t);
    assert_non_null(j);
    return j;
}

static spec_t *parse_ok(const char *text)
{
    cJSON *j = json(text);
    spec_t *s = NULL;
    char err[256] = "";
    int rc = spec_parse(j, &s, err, sizeof err);
    if (rc)
        print_error("spec_parse: %s: %s\n", worth_err_name(rc), err);
    assert_int_equal(rc, 0);
    assert_non_null(s);
    cJSON_Delete(j);
    return s;
}

/* Builds the model from s, checks its feature count, frees it. */
static void model_accepts(const spec_t *s, size_t features)
{
    struct model *m = NULL;
    char err[256] = "";
    int rc = model_new(&s->m, &m, err, sizeof err);
    if (rc)
        print_error("model_new: %s: %s\n", worth_err_name(rc), err);
    assert_int_equal(rc, 0);
    assert_int_equal(model_features(m), features);
    assert_int_equal(model_n_est(m), s->m.n_est);
    assert_int_equal(model_primary(m), s->m.primary);
    for (size_t i = 0; i < s->m.n_est; i++)
        assert_string_equal(model_est_name(m, i), s->est_names[i]);
    model_free(m);
}

/* Fails unless a and b have the same bits; prints both. */
#define assert_same_double(a, b)                                                                   \
    do {                                                                                           \
        double a_ = (a), b_ = (b);                                                                 \
        if (memcmp(&a_, &b_, sizeof a_) != 0) {                                                    \
            print_error("%s = %a, %s = %a\n", #a, a_, #b, b_);                                     \
            fail();                                                                                \
        }                                                                                          \
    } while (0)

static void assert_same_params(const est_params_t *a, const est_params_t *b)
{
    assert_int_equal(a->kind, b->kind);
    assert_same_double(a->alpha, b->alpha);
    assert_same_double(a->init, b->init);
    assert_same_double(a->lambda, b->lambda);
    assert_int_equal(a->nstep, b->nstep);
    assert_int_equal(a->horizon, b->horizon);
    assert_int_equal(a->max_episode, b->max_episode);
    assert_same_double(a->forget, b->forget);
    assert_same_double(a->delta, b->delta);
    assert_int_equal(a->guard, b->guard);
    assert_same_double(a->trace_cap, b->trace_cap);
    assert_same_double(a->ridge, b->ridge);
    assert_int_equal(a->refit_every, b->refit_every);
    assert_int_equal(a->capacity, b->capacity);
    assert_int_equal(a->batch, b->batch);
    assert_int_equal(a->steps_per_obs, b->steps_per_obs);
    assert_same_double(a->decay, b->decay);
    assert_same_double(a->tol, b->tol);
    assert_int_equal(a->seed, b->seed);
    assert_int_equal(a->hidden.count, b->hidden.count);
    for (int l = 0; l < EST_MLP_MAX_LAYERS; l++)
        assert_int_equal(a->hidden.width[l], b->hidden.width[l]);
    assert_int_equal(a->act, b->act);
    assert_int_equal(a->target_every, b->target_every);
    assert_same_double(a->clip, b->clip);
    assert_int_equal(a->members, b->members);
}

static void assert_same_basis(const feat_basis_t *a, const feat_basis_t *b)
{
    assert_int_equal(a->kind, b->kind);
    assert_int_equal(a->degree, b->degree);
    assert_int_equal(a->order, b->order);
    assert_int_equal(a->couple, b->couple);
    assert_int_equal(a->centers, b->centers);
    assert_same_double(a->width, b->width);
    assert_int_equal(a->tilings, b->tilings);
    assert_int_equal(a->tiles, b->tiles);
    assert_int_equal(a->size, b->size);
}

/* The model_spec_t points into the spec_t's own arrays. */
static void assert_wired(const spec_t *s)
{
    assert_ptr_equal(s->m.feat.lo, s->lo);
    assert_ptr_equal(s->m.feat.hi, s->hi);
    assert_ptr_equal(s->m.feat.bases, s->bases);
    assert_ptr_equal(s->m.est, s->est);
    assert_ptr_equal(s->m.est_names, s->est_name_ptrs);
    for (size_t i = 0; i < s->m.n_est; i++)
        assert_ptr_equal(s->est_name_ptrs[i], s->est_names[i]);
    assert_non_null(s->canonical);
}

static void assert_same_spec(const spec_t *a, const spec_t *b)
{
    assert_wired(a);
    assert_wired(b);
    assert_string_equal(a->name, b->name);
    assert_int_equal(a->m.feat.dims, b->m.feat.dims);
    for (size_t i = 0; i < a->m.feat.dims; i++) {
        assert_same_double(a->lo[i], b->lo[i]);
        assert_same_double(a->hi[i], b->hi[i]);
    }
    assert_int_equal(a->m.feat.nbases, b->m.feat.nbases);
    for (size_t i = 0; i < a->m.feat.nbases; i++)
        assert_same_basis(&a->bases[i], &b->bases[i]);
    assert_int_equal(a->m.feat.max_features, b->m.feat.max_features);
    assert_same_double(a->m.gamma, b->m.gamma);
    assert_same_double(a->m.gamma_per_s, b->m.gamma_per_s);
    assert_int_equal(a->m.n_est, b->m.n_est);
    for (size_t i = 0; i < a->m.n_est; i++) {
        assert_string_equal(a->est_names[i], b->est_names[i]);
        assert_same_params(&a->est[i], &b->est[i]);
    }
    assert_int_equal(a->m.primary, b->m.primary);
    assert_int_equal(a->m.primary_auto, b->m.primary_auto);
    assert_int_equal(a->m.max_sources, b->m.max_sources);
    assert_string_equal(a->canonical, b->canonical);
}

/* Re-parses s's canonical text with an op added and checks the result is s again. */
static void assert_round_trip(const spec_t *s)
{
    cJSON *j = cJSON_Parse(s->canonical);
    if (!j)
        print_error("canonical text does not parse: %s\n", s->canonical);
    assert_non_null(j);
    assert_null(cJSON_GetObjectItemCaseSensitive(j, "op"));
    cJSON_AddStringToObject(j, "op", "model.create");
    spec_t *t = NULL;
    char err[256] = "";
    int rc = spec_parse(j, &t, err, sizeof err);
    if (rc)
        print_error("re-parse of %s: %s: %s\n", s->canonical, worth_err_name(rc), err);
    assert_int_equal(rc, 0);
    assert_same_spec(s, t);
    spec_free(t);
    cJSON_Delete(j);
}

/* Every basis and every kind, with parameters away from their defaults. */
static const char FULL[] =
    "{'op':'model.create','id':7,'model':'" N63 "','dims':3,'gamma':0.99,'gamma_per_s':0.5,"
    "'ranges':[[0,12],[-1,1],[100,400.5]],"
    "'features':[{'basis':'bias'},{'basis':'raw'},{'basis':'poly','degree':2},"
    "{'basis':'fourier','order':2,'couple':1},{'basis':'rbf','centers':3,'width':0.25},"
    "{'basis':'tiles','tilings':4,'tiles':5,'size':64}],"
    "'estimators':[{'name':'td','kind':'td','alpha':0.05,'init':1.5},"
    "{'name':'tdn','kind':'td_n','alpha':0.02,'n':3},"
    "{'name':'tdl','kind':'td_lambda','lambda':0.7},"
    "{'name':'mc','kind':'mc','horizon':10,'max_episode':500},"
    "{'name':'rls','kind':'rls_td','lambda':0.5,'forget':0.995,'delta':10,'guard':'trace',"
    "'trace_cap':1000},"
    "{'name':'lstd','kind':'lstd','ridge':0.001,'forget':0.999,'refit_every':50},"
    "{'name':'" N63 "','kind':'replay','alpha':0.1,'capacity':500,'batch':16,'steps_per_obs':2,"
    "'decay':1000,'tol':1e-6,'seed':42},"
    "{'name':'net','kind':'mlp','alpha':0.002,'n':2,'hidden':[16,8,4],'activation':'relu',"
    "'target_every':50,'clip':5,'capacity':300,'batch':8,'seed':3},"
    "{'name':'ens','kind':'ensemble','members':3,'hidden':[8],'capacity':200,'batch':4}],"
    "'primary':'rls','max_sources':8,'max_features':2000}";

static void every_basis_and_kind(void **state)
{
    (void)state;
    spec_t *s = parse_ok(FULL);
    assert_wired(s);
    assert_string_equal(s->name, N63);
    assert_int_equal(s->m.feat.dims, 3);
    assert_same_double(s->m.gamma, 0.99);
    assert_same_double(s->m.gamma_per_s, 0.5);
    const double lo[3] = {0, -1, 100}, hi[3] = {12, 1, 400.5};
    for (int i = 0; i < 3; i++) {
        assert_same_double(s->lo[i], lo[i]);
        assert_same_double(s->hi[i], hi[i]);
    }

    const feat_basis_t bases[6] = {
        {.kind = FEAT_BIAS},
        {.kind = FEAT_RAW},
        {.kind = FEAT_POLY, .degree = 2},
        {.kind = FEAT_FOURIER, .order = 2, .couple = 1},
        {.kind = FEAT_RBF, .centers = 3, .width = 0.25},
        {.kind = FEAT_TILES, .tilings = 4, .tiles = 5, .size = 64},
    };
    assert_int_equal(s->m.feat.nbases, 6);
    for (int i = 0; i < 6; i++)
        assert_same_basis(&s->bases[i], &bases[i]);
    assert_int_equal(s->m.feat.max_features, 2000);

    est_params_t p[9];
    for (int k = 0; k < 9; k++)
        est_params_default((enum est_kind)k, &p[k]);
    p[0].alpha = 0.05, p[0].init = 1.5;
    p[1].alpha = 0.02, p[1].nstep = 3;
    p[2].lambda = 0.7;
    p[3].horizon = 10, p[3].max_episode = 500;
    p[4].lambda = 0.5, p[4].forget = 0.995, p[4].delta = 10, p[4].guard = EST_GUARD_TRACE;
    p[4].trace_cap = 1000;
    p[5].ridge = 0.001, p[5].forget = 0.999, p[5].refit_every = 50;
    p[6].alpha = 0.1, p[6].capacity = 500, p[6].batch = 16, p[6].steps_per_obs = 2;
    p[6].decay = 1000, p[6].tol = 1e-6, p[6].seed = 42;
    p[7].alpha = 0.002, p[7].nstep = 2, p[7].hidden = (est_hidden_t){3, {16, 8, 4, 0}};
    p[7].act = EST_ACT_RELU, p[7].target_every = 50, p[7].clip = 5, p[7].capacity = 300;
    p[7].batch = 8, p[7].seed = 3;
    p[8].members = 3, p[8].hidden = (est_hidden_t){1, {8, 0, 0, 0}}, p[8].capacity = 200;
    p[8].batch = 4;
    const char *names[9] = {"td", "tdn", "tdl", "mc", "rls", "lstd", N63, "net", "ens"};
    assert_int_equal(s->m.n_est, 9);
    for (int i = 0; i < 9; i++) {
        assert_string_equal(s->est_names[i], names[i]);
        assert_string_equal(s->m.est_names[i], names[i]);
        assert_same_params(&s->est[i], &p[i]);
    }
    assert_int_equal(s->m.primary, 4);
    assert_int_equal(s->m.max_sources, 8);

    /* bias 1 + raw 3 + poly C(5,2)-1 = 9 + fourier 3*2 = 6 + rbf 3^3 = 27 + tiles 64. */
    model_accepts(s, 1 + 3 + 9 + 6 + 27 + 64);
    assert_round_trip(s);
    spec_free(s);
}

/* Only name and kind: every parameter takes est_params_default's value. */
static void estimator_defaults(void **state)
{
    (void)state;
    for (int k = 0; k < EST_KIND_COUNT; k++) {
        char text[512];
        snprintf(text, sizeof text,
                 "{'model':'m','dims':1,'gamma':0,'ranges':[[0,1]],"
                 "'features':[{'basis':'fourier','order':3}],"
                 "'estimators':[{'name':'e','kind':'%s'}]}",
                 est_kind_name((enum est_kind)k));
        spec_t *s = parse_ok(text);
        est_params_t def;
        est_params_default((enum est_kind)k, &def);
        assert_int_equal(s->m.n_est, 1);
        assert_same_params(&s->est[0], &def);
        /* Top-level defaults are filled in, not left at 0. */
        assert_same_double(s->m.gamma, 0);
        assert_same_double(s->m.gamma_per_s, 0);
        assert_int_equal(s->m.primary, 0);
        assert_int_equal(s->m.max_sources, MODEL_DEFAULT_SOURCES);
        assert_int_equal(s->m.feat.max_features, FEAT_DEFAULT_MAX);
        assert_int_equal(s->bases[0].couple, 0);
        assert_int_equal(s->bases[0].order, 3);
        model_accepts(s, 3);
        assert_round_trip(s);
        spec_free(s);
    }
}

/* The canonical text holds exactly the parameters protocol.md lists for each kind and basis. */
static void canonical_lists_every_parameter(void **state)
{
    (void)state;
    static const char *const est_keys[EST_KIND_COUNT][16] = {
        [EST_TD] = {"name", "kind", "alpha", "init"},
        [EST_TD_N] = {"name", "kind", "alpha", "n", "init"},
        [EST_TD_LAMBDA] = {"name", "kind", "alpha", "lambda", "init"},
        [EST_MC] = {"name", "kind", "alpha", "horizon", "max_episode", "init"},
        [EST_RLS_TD] = {"name", "kind", "lambda", "forget", "delta", "guard", "trace_cap", "init"},
        [EST_LSTD] = {"name", "kind", "lambda", "ridge", "forget", "refit_every", "init"},
        [EST_REPLAY] = {"name", "kind", "alpha", "capacity", "batch", "steps_per_obs", "decay",
                        "tol", "seed", "init"},
        [EST_MLP] = {"name", "kind", "alpha", "n", "capacity", "batch", "steps_per_obs", "decay",
                     "tol", "seed", "hidden", "activation", "target_every", "clip", "init"},
        [EST_ENSEMBLE] = {"name", "kind", "alpha", "n", "capacity", "batch", "steps_per_obs",
                          "decay", "tol", "seed", "hidden", "activation", "target_every", "clip",
                          "members", "init"},
    };
    static const char *const basis_keys[6][4] = {
        {"basis"},
        {"basis"},
        {"basis", "degree"},
        {"basis", "order", "couple"},
        {"basis", "centers", "width"},
        {"basis", "tilings", "tiles", "size"},
    };
    spec_t *s = parse_ok(FULL);
    cJSON *j = cJSON_Parse(s->canonical);
    assert_non_null(j);

    static const char *const top[] = {"model",       "dims",         "gamma",      "gamma_per_s",
                                      "ranges",      "features",     "estimators", "primary",
                                      "max_sources", "max_features", "diagnostics"};
    assert_int_equal(cJSON_GetArraySize(j), sizeof top / sizeof top[0]);
    const cJSON *dg = cJSON_GetObjectItemCaseSensitive(j, "diagnostics");
    /* horizon, window, false_alarm_transitions (no period_s here), drift_k, drift_batch,
     * drift_burn_in, on_drift, and the four input checks' */
    static const char *const dkeys[] = {"horizon",
                                        "window",
                                        "false_alarm_transitions",
                                        "drift_k",
                                        "drift_batch",
                                        "drift_burn_in",
                                        "on_drift",
                                        "frozen_periods",
                                        "frozen_tolerance",
                                        "out_of_range_periods",
                                        "silent_periods"};
    assert_int_equal(cJSON_GetArraySize(dg), sizeof dkeys / sizeof dkeys[0]);
    for (size_t i = 0; i < sizeof dkeys / sizeof dkeys[0]; i++)
        assert_non_null(cJSON_GetObjectItemCaseSensitive(dg, dkeys[i]));
    assert_true(cJSON_GetObjectItemCaseSensitive(dg, "false_alarm_transitions")->valuedouble ==
                1e6);
    for (size_t i = 0; i < sizeof top / sizeof top[0]; i++)
        assert_non_null(cJSON_GetObjectItemCaseSensitive(j, top[i]));
    assert_string_equal(cJSON_GetObjectItemCaseSensitive(j, "primary")->valuestring, "rls");

    cJSON *ests = cJSON_GetObjectItemCaseSensitive(j, "estimators");
    assert_int_equal(cJSON_GetArraySize(ests), EST_KIND_COUNT);
    for (int k = 0; k < EST_KIND_COUNT; k++) {
        cJSON *e = cJSON_GetArrayItem(ests, k);
        int n = 0;
        while (n < 16 && est_keys[k][n]) {
            if (!cJSON_GetObjectItemCaseSensitive(e, est_keys[k][n]))
                print_error("kind %s lacks %s\n", est_kind_name((enum est_kind)k), est_keys[k][n]);
            assert_non_null(cJSON_GetObjectItemCaseSensitive(e, est_keys[k][n]));
            n++;
        }
        assert_int_equal(cJSON_GetArraySize(e), n);
    }
    cJSON *rls = cJSON_GetArrayItem(ests, EST_RLS_TD);
    assert_string_equal(cJSON_GetObjectItemCaseSensitive(rls, "guard")->valuestring, "trace");
    /* A default appears as a number: td_lambda's alpha 0.01. */
    assert_same_double(
        cJSON_GetObjectItemCaseSensitive(cJSON_GetArrayItem(ests, EST_TD_LAMBDA), "alpha")
            ->valuedouble,
        0.01);

    cJSON *feats = cJSON_GetObjectItemCaseSensitive(j, "features");
    assert_int_equal(cJSON_GetArraySize(feats), 6);
    for (int b = 0; b < 6; b++) {
        cJSON *f = cJSON_GetArrayItem(feats, b);
        int n = 0;
        while (n < 4 && basis_keys[b][n]) {
            assert_non_null(cJSON_GetObjectItemCaseSensitive(f, basis_keys[b][n]));
            n++;
        }
        assert_int_equal(cJSON_GetArraySize(f), n);
    }
    cJSON_Delete(j);
    spec_free(s);

    /* Without gamma_per_s the canonical text has none (0 is not a valid value). */
    s = parse_ok("{'model':'m','dims':1,'gamma':1,'ranges':[[0,1]],'features':[{'basis':'raw'}],"
                 "'estimators':[{'name':'e','kind':'td'}]}");
    j = cJSON_Parse(s->canonical);
    assert_null(cJSON_GetObjectItemCaseSensitive(j, "gamma_per_s"));
    assert_int_equal(cJSON_GetObjectItemCaseSensitive(j, "max_sources")->valuedouble, 16);
    assert_int_equal(cJSON_GetObjectItemCaseSensitive(j, "max_features")->valuedouble, 4096);
    /* No primary given: "auto" (the headline is chosen, learn/health.h). */
    assert_string_equal(cJSON_GetObjectItemCaseSensitive(j, "primary")->valuestring, "auto");
    assert_int_equal(s->m.primary_auto, 1);
    cJSON_Delete(j);
    spec_free(s);

    /* "auto" given is the same; a stored spec that names its primary keeps it. */
    s = parse_ok("{'model':'m','dims':1,'gamma':1,'ranges':[[0,1]],'features':[{'basis':'raw'}],"
                 "'estimators':[{'name':'e','kind':'td'},{'name':'f','kind':'td'}],"
                 "'primary':'auto'}");
    assert_int_equal(s->m.primary_auto, 1);
    assert_int_equal(s->m.primary, 0);
    spec_free(s);
    s = parse_ok("{'model':'m','dims':1,'gamma':1,'ranges':[[0,1]],'features':[{'basis':'raw'}],"
                 "'estimators':[{'name':'e','kind':'td'},{'name':'f','kind':'td'}],"
                 "'primary':'f'}");
    assert_int_equal(s->m.primary_auto, 0);
    assert_int_equal(s->m.primary, 1);
    j = cJSON_Parse(s->canonical);
    assert_string_equal(cJSON_GetObjectItemCaseSensitive(j, "primary")->valuestring, "f");
    cJSON_Delete(j);
    spec_free(s);
    /* An estimator named "auto" keeps the word's old meaning: that estimator. */
    s = parse_ok("{'model':'m','dims':1,'gamma':1,'ranges':[[0,1]],'features':[{'basis':'raw'}],"
                 "'estimators':[{'name':'e','kind':'td'},{'name':'auto','kind':'td'}],"
                 "'primary':'auto'}");
    assert_int_equal(s->m.primary_auto, 0);
    assert_int_equal(s->m.primary, 1);
    spec_free(s);
}

/* Doubles that 15 significant digits would not give back, extremes and -0. */
static void canonical_round_trips_every_bit(void **state)
{
    (void)state;
    spec_t *s = parse_ok(
        "{'model':'m','dims':3,'gamma':0.30000000000000004,'gamma_per_s':0.99999999999999989,"
        "'ranges':[[-0.0,5e-324],[1e-300,1.7976931348623157e308],[0.1,0.30000000000000004]],"
        "'features':[{'basis':'rbf','centers':2,'width':0.33333333333333331},"
        "{'basis':'fourier','order':255,'couple':1}],"
        "'estimators':[{'name':'a','kind':'td','alpha':0.30000000000000004,"
        "'init':-1.2345678901234567e-200},"
        "{'name':'b','kind':'replay','seed':9007199254740992,'tol':2.2250738585072014e-308,"
        "'capacity':4294967295,'decay':123456789.123456789},"
        "{'name':'c','kind':'rls_td','trace_cap':1e300,'guard':'none','delta':0.1}],"
        "'primary':'c','max_sources':1024,'max_features':1048576}");
    assert_same_double(s->m.gamma, 0.1 + 0.2);
    assert_true(signbit(s->lo[0]));
    assert_int_equal(s->est[1].seed, UINT64_C(9007199254740992));
    assert_int_equal(s->est[1].capacity, 4294967295u);
    assert_int_equal(s->est[2].guard, EST_GUARD_NONE);
    assert_round_trip(s);
    spec_free(s);
}

/* Ranges that only model_new checks come back from it, with the estimator's name. */
static void model_new_reports_the_rest(void **state)
{
    (void)state;
    static const struct {
        const char *est, *feat;
        int code;
    } cases[] = {
        {"{'name':'x','kind':'td','alpha':-1}", "{'basis':'bias'}", WORTH_E_BAD_PARAM},
        {"{'name':'x','kind':'td_n','n':0}", "{'basis':'bias'}", WORTH_E_BAD_PARAM},
        {"{'name':'x','kind':'rls_td','forget':1.5}", "{'basis':'bias'}", WORTH_E_BAD_PARAM},
        {"{'name':'x','kind':'replay','batch':20,'capacity':10}", "{'basis':'bias'}",
         WORTH_E_BAD_PARAM},
        {"{'name':'x','kind':'td'}", "{'basis':'rbf','centers':100,'width':1}", WORTH_E_TOO_LARGE},
        {"{'name':'x','kind':'td'}", "{'basis':'tiles','tilings':1,'tiles':1,'size':5000}",
         WORTH_E_TOO_LARGE},
    };
    for (size_t c = 0; c < sizeof cases / sizeof cases[0]; c++) {
        char text[512];
        snprintf(text, sizeof text,
                 "{'model':'m','dims':2,'gamma':0.9,'ranges':[[0,1],[0,1]],'features':[%s],"
                 "'estimators':[%s]}",
                 cases[c].feat, cases[c].est);
        spec_t *s = parse_ok(text);
        struct model *m = NULL;
        char err[256] = "";
        int rc = model_new(&s->m, &m, err, sizeof err);
        if (rc != cases[c].code)
            print_error("case %zu: model_new gave %s (%s)\n", c, worth_err_name(rc), err);
        assert_int_equal(rc, cases[c].code);
        assert_null(m);
        spec_free(s);
    }
}

/* Fragments of a valid request; BUT_X is every required field except X. */
#define MODEL       "'model':'m'"
#define DIMS        "'dims':2"
#define GAMMA       "'gamma':0.9"
#define RANGES      "'ranges':[[0,1],[0,1]]"
#define FEATS       "'features':[{'basis':'bias'}]"
#define ESTS        "'estimators':[{'name':'a','kind':'td'}]"
#define REQ(fields) "{'op':'model.create','id':'r1'," fields "}"
#define ALL         MODEL "," DIMS "," GAMMA "," RANGES "," FEATS "," ESTS
#define BUT_MODEL   DIMS "," GAMMA "," RANGES "," FEATS "," ESTS
#define BUT_DIMS    MODEL "," GAMMA "," RANGES "," FEATS "," ESTS
#define BUT_GAMMA   MODEL "," DIMS "," RANGES "," FEATS "," ESTS
#define BUT_RANGES  MODEL "," DIMS "," GAMMA "," FEATS "," ESTS
#define BUT_FEATS   MODEL "," DIMS "," GAMMA "," RANGES "," ESTS
#define BUT_ESTS    MODEL "," DIMS "," GAMMA "," RANGES "," FEATS
/* A request with these bases / estimators. */
#define F(bases)  REQ(BUT_FEATS ",'features':[" bases "]")
#define E(ests)   REQ(BUT_ESTS ",'estimators':[" ests "]")
#define E1        "{'name':'a','kind':'td'}"
#define E4        E1 "," E1 "," E1 "," E1
#define TWO_BIAS  "{'basis':'bias'},{'basis':'bias'}"
#define RLS(more) E(E1 ",{'name':'b','kind':'rls_td'," more "}")

static const struct {
    const char *json;
    int code;
    const char *msg; /* a substring of the message: the field's path */
} bad[] = {
    /* the request itself */
    {"[1,2]", WORTH_E_BAD_REQUEST, "request must be a JSON object"},
    {"'model.create'", WORTH_E_BAD_REQUEST, "request must be a JSON object"},
    {REQ(ALL ",'foo':1"), WORTH_E_BAD_REQUEST, "request: unknown field \"foo\""},
    {REQ(ALL ",'Model':'m'"), WORTH_E_BAD_REQUEST, "unknown field \"Model\""},
    {REQ(ALL ",'\\u0001k':1"), WORTH_E_BAD_REQUEST, "unknown field \"?k\""},
    {REQ(ALL ",'" N64 "':1"), WORTH_E_BAD_REQUEST,
     "unknown field \"abcdefghijklmnopqrstuvwxyzABCDEF...\""},
    {REQ(ALL ",'gamma':0.5"), WORTH_E_BAD_REQUEST, "request: field \"gamma\" appears twice"},
    {REQ(ALL ",'estimators':[]"), WORTH_E_BAD_REQUEST, "field \"estimators\" appears twice"},
    /* model */
    {REQ(BUT_MODEL), WORTH_E_BAD_REQUEST, "model is required"},
    {REQ(BUT_MODEL ",'model':5"), WORTH_E_BAD_REQUEST, "model must be a string"},
    {REQ(BUT_MODEL ",'model':null"), WORTH_E_BAD_REQUEST, "model must be a string"},
    {REQ(BUT_MODEL ",'model':''"), WORTH_E_BAD_PARAM, "model must be 1..63 bytes"},
    {REQ(BUT_MODEL ",'model':'a b'"), WORTH_E_BAD_PARAM, "model must be"},
    {REQ(BUT_MODEL ",'model':'a/b'"), WORTH_E_BAD_PARAM, "model must be"},
    {REQ(BUT_MODEL ",'model':'\xc3\xa9t\xc3\xa9'"), WORTH_E_BAD_PARAM, "model must be"},
    {REQ(BUT_MODEL ",'model':'" N64 "'"), WORTH_E_BAD_PARAM, "model must be"},
    /* dims */
    {REQ(BUT_DIMS), WORTH_E_BAD_REQUEST, "dims is required"},
    {REQ(BUT_DIMS ",'dims':true"), WORTH_E_BAD_REQUEST, "dims must be a number"},
    {REQ(BUT_DIMS ",'dims':[2]"), WORTH_E_BAD_REQUEST, "dims must be a number"},
    {REQ(BUT_DIMS ",'dims':'2'"), WORTH_E_BAD_NUMBER, "dims must be a finite number"},
    {REQ(BUT_DIMS ",'dims':null"), WORTH_E_BAD_NUMBER, "dims must be a finite number"},
    {REQ(BUT_DIMS ",'dims':1e400"), WORTH_E_BAD_NUMBER, "dims must be a finite number"},
    {REQ(BUT_DIMS ",'dims':1.5"), WORTH_E_BAD_PARAM, "dims must be an integer"},
    {REQ(BUT_DIMS ",'dims':0"), WORTH_E_BAD_PARAM, "dims must be an integer >= 1"},
    {REQ(BUT_DIMS ",'dims':-3"), WORTH_E_BAD_PARAM, "dims must be an integer >= 1"},
    {REQ(BUT_DIMS ",'dims':65"), WORTH_E_TOO_LARGE, "dims must be at most 64"},
    {REQ(BUT_DIMS ",'dims':1e300"), WORTH_E_TOO_LARGE, "dims must be at most 64"},
    /* gamma, gamma_per_s */
    {REQ(BUT_GAMMA), WORTH_E_BAD_REQUEST, "gamma is required"},
    {REQ(BUT_GAMMA ",'gamma':[0.9]"), WORTH_E_BAD_REQUEST, "gamma must be a number"},
    {REQ(BUT_GAMMA ",'gamma':false"), WORTH_E_BAD_REQUEST, "gamma must be a number"},
    {REQ(BUT_GAMMA ",'gamma':'NaN'"), WORTH_E_BAD_NUMBER, "gamma must be a finite number"},
    {REQ(BUT_GAMMA ",'gamma':1e400"), WORTH_E_BAD_NUMBER, "gamma must be a finite number"},
    {REQ(BUT_GAMMA ",'gamma':-1e400"), WORTH_E_BAD_NUMBER, "gamma must be a finite number"},
    {REQ(BUT_GAMMA ",'gamma':1.5"), WORTH_E_BAD_PARAM, "gamma must be in [0, 1]"},
    {REQ(BUT_GAMMA ",'gamma':-0.1"), WORTH_E_BAD_PARAM, "gamma must be in [0, 1]"},
    {REQ(ALL ",'gamma_per_s':0"), WORTH_E_BAD_PARAM, "gamma_per_s must be in (0, 1]"},
    {REQ(ALL ",'gamma_per_s':1.01"), WORTH_E_BAD_PARAM, "gamma_per_s must be in (0, 1]"},
    {REQ(ALL ",'gamma_per_s':1e400"), WORTH_E_BAD_NUMBER, "gamma_per_s must be a finite number"},
    {REQ(ALL ",'gamma_per_s':null"), WORTH_E_BAD_NUMBER, "gamma_per_s must be a finite number"},
    {REQ(ALL ",'gamma_per_s':{}"), WORTH_E_BAD_REQUEST, "gamma_per_s must be a number"},
    /* ranges */
    {REQ(BUT_RANGES), WORTH_E_BAD_REQUEST, "ranges is required"},
    {REQ(BUT_RANGES ",'ranges':{}"), WORTH_E_BAD_REQUEST, "ranges must be an array"},
    {REQ(BUT_RANGES ",'ranges':[[0,1]]"), WORTH_E_BAD_DIMENSION, "ranges has 1 pairs, dims is 2"},
    {REQ(BUT_RANGES ",'ranges':[]"), WORTH_E_BAD_DIMENSION, "ranges has 0 pairs"},
    {REQ(BUT_RANGES ",'ranges':[[0,1],[0,1],[0,1]]"), WORTH_E_BAD_DIMENSION, "ranges has 3 pairs"},
    {REQ(BUT_RANGES ",'ranges':[[0,1],[0]]"), WORTH_E_BAD_REQUEST, "ranges[1] must be a pair"},
    {REQ(BUT_RANGES ",'ranges':[[0,1],[0,1,2]]"), WORTH_E_BAD_REQUEST, "ranges[1] must be a pair"},
    {REQ(BUT_RANGES ",'ranges':[5,[0,1]]"), WORTH_E_BAD_REQUEST, "ranges[0] must be a pair"},
    {REQ(BUT_RANGES ",'ranges':[[0,1],{'lo':0,'hi':1}]"), WORTH_E_BAD_REQUEST, "ranges[1] must be"},
    {REQ(BUT_RANGES ",'ranges':[[0,1],[0,true]]"), WORTH_E_BAD_REQUEST,
     "ranges[1][1] must be a number"},
    {REQ(BUT_RANGES ",'ranges':[[0,1e400],[0,1]]"), WORTH_E_BAD_NUMBER,
     "ranges[0][1] must be a finite number"},
    {REQ(BUT_RANGES ",'ranges':[[null,1],[0,1]]"), WORTH_E_BAD_NUMBER,
     "ranges[0][0] must be a finite number"},
    {REQ(BUT_RANGES ",'ranges':[[0,1],['-Infinity',1]]"), WORTH_E_BAD_NUMBER, "ranges[1][0]"},
    {REQ(BUT_RANGES ",'ranges':[[0,1],[1,1]]"), WORTH_E_BAD_PARAM,
     "ranges[1]: lo must be below hi"},
    {REQ(BUT_RANGES ",'ranges':[[2,1],[0,1]]"), WORTH_E_BAD_PARAM,
     "ranges[0]: lo must be below hi"},
    /* features */
    {REQ(BUT_FEATS), WORTH_E_BAD_REQUEST, "features is required"},
    {REQ(BUT_FEATS ",'features':{'basis':'bias'}"), WORTH_E_BAD_REQUEST,
     "features must be an array"},
    {F(""), WORTH_E_BAD_PARAM, "features must hold at least one basis"},
    {F("'bias'"), WORTH_E_BAD_REQUEST, "features[0] must be an object"},
    {F("{'basis':'bias'},null"), WORTH_E_BAD_REQUEST, "features[1] must be an object"},
    {F("{'basis':'bias'},{'basis':'rbf','centers':3,'widht':0.2}"), WORTH_E_BAD_REQUEST,
     "features[1]: unknown field \"widht\""},
    {F("{'basis':'raw','basis':'bias'}"), WORTH_E_BAD_REQUEST,
     "features[0]: field \"basis\" appears twice"},
    {F("{'basis':'poly','degree':2,'degree':3}"), WORTH_E_BAD_REQUEST,
     "features[0]: field \"degree\" appears twice"},
    {F("{}"), WORTH_E_BAD_REQUEST, "features[0].basis is required"},
    {F("{'degree':2}"), WORTH_E_BAD_REQUEST, "features[0].basis is required"},
    {F("{'basis':3}"), WORTH_E_BAD_REQUEST, "features[0].basis must be a string"},
    {F("{'basis':'spline'}"), WORTH_E_BAD_PARAM, "features[0].basis: unknown basis \"spline\""},
    {F("{'basis':'Bias'}"), WORTH_E_BAD_PARAM, "unknown basis \"Bias\""},
    {F("{'basis':'bias','degree':2}"), WORTH_E_BAD_REQUEST,
     "features[0]: field \"degree\" does not apply to basis bias"},
    {F("{'basis':'rbf','centers':2,'width':1,'size':4}"), WORTH_E_BAD_REQUEST,
     "field \"size\" does not apply to basis rbf"},
    {F("{'basis':'poly'}"), WORTH_E_BAD_REQUEST, "features[0].degree is required"},
    {F("{'basis':'poly','degree':0}"), WORTH_E_BAD_PARAM,
     "features[0].degree must be an integer 1..255"},
    {F("{'basis':'poly','degree':256}"), WORTH_E_BAD_PARAM, "features[0].degree must be"},
    {F("{'basis':'poly','degree':2.5}"), WORTH_E_BAD_PARAM, "features[0].degree must be"},
    {F("{'basis':'poly','degree':'2'}"), WORTH_E_BAD_NUMBER, "features[0].degree must be a finite"},
    {F("{'basis':'poly','degree':true}"), WORTH_E_BAD_REQUEST,
     "features[0].degree must be a number"},
    {F("{'basis':'fourier'}"), WORTH_E_BAD_REQUEST, "features[0].order is required"},
    {F("{'basis':'fourier','order':0}"), WORTH_E_BAD_PARAM, "features[0].order must be"},
    {F("{'basis':'fourier','order':3,'couple':3}"), WORTH_E_BAD_PARAM,
     "features[0].couple must be an integer 0..2"},
    {F("{'basis':'fourier','order':3,'couple':-1}"), WORTH_E_BAD_PARAM, "features[0].couple"},
    {F("{'basis':'fourier','order':3,'couple':null}"), WORTH_E_BAD_NUMBER, "features[0].couple"},
    {F("{'basis':'rbf','width':0.2}"), WORTH_E_BAD_REQUEST, "features[0].centers is required"},
    {F("{'basis':'rbf','centers':3}"), WORTH_E_BAD_REQUEST, "features[0].width is required"},
    {F("{'basis':'rbf','centers':0,'width':0.2}"), WORTH_E_BAD_PARAM, "features[0].centers"},
    {F("{'basis':'rbf','centers':4294967296,'width':0.2}"), WORTH_E_BAD_PARAM,
     "features[0].centers must be an integer 1..4294967295"},
    {F("{'basis':'rbf','centers':3,'width':0}"), WORTH_E_BAD_PARAM,
     "features[0].width must be > 0"},
    {F("{'basis':'rbf','centers':3,'width':-1}"), WORTH_E_BAD_PARAM, "features[0].width"},
    {F("{'basis':'rbf','centers':3,'width':1e400}"), WORTH_E_BAD_NUMBER, "features[0].width"},
    {F("{'basis':'tiles','tilings':2,'tiles':4}"), WORTH_E_BAD_REQUEST,
     "features[0].size is required"},
    {F("{'basis':'tiles','tiles':4,'size':8}"), WORTH_E_BAD_REQUEST,
     "features[0].tilings is required"},
    {F("{'basis':'tiles','tilings':1025,'tiles':4,'size':8}"), WORTH_E_BAD_PARAM,
     "features[0].tilings must be an integer 1..1024"},
    {F("{'basis':'tiles','tilings':2,'tiles':1048577,'size':8}"), WORTH_E_BAD_PARAM,
     "features[0].tiles must be an integer 1..1048576"},
    {F("{'basis':'tiles','tilings':2,'tiles':4,'size':0}"), WORTH_E_BAD_PARAM,
     "features[0].size must be"},
    {REQ(BUT_FEATS ",'features':[" TWO_BIAS "],'max_features':1"), WORTH_E_TOO_LARGE,
     "features: 2 bases exceed the feature limit 1"},
    /* estimators */
    {REQ(BUT_ESTS), WORTH_E_BAD_REQUEST, "estimators is required"},
    {REQ(BUT_ESTS ",'estimators':" E1), WORTH_E_BAD_REQUEST, "estimators must be an array"},
    {E(""), WORTH_E_BAD_PARAM, "estimators must hold 1..16 estimators"},
    {E(E4 "," E4 "," E4 "," E4 "," E1), WORTH_E_BAD_PARAM, "estimators must hold 1..16"},
    {E("5"), WORTH_E_BAD_REQUEST, "estimators[0] must be an object"},
    {E(E1 ",[]"), WORTH_E_BAD_REQUEST, "estimators[1] must be an object"},
    {E("{'kind':'td'}"), WORTH_E_BAD_REQUEST, "estimators[0].name is required"},
    {E("{'name':7,'kind':'td'}"), WORTH_E_BAD_REQUEST, "estimators[0].name must be a string"},
    {E("{'name':'','kind':'td'}"), WORTH_E_BAD_PARAM, "estimators[0].name must be 1..63 bytes"},
    {E("{'name':'" N64 "','kind':'td'}"), WORTH_E_BAD_PARAM, "estimators[0].name must be 1..63"},
    {E(E1 ",{'name':'b','kind':'mc'},{'name':'a','kind':'mc'}"), WORTH_E_BAD_PARAM,
     "estimators[2].name: \"a\" is already the name of estimators[0]"},
    {E("{'name':'a'}"), WORTH_E_BAD_REQUEST, "estimators[0].kind is required"},
    {E("{'name':'a','kind':5}"), WORTH_E_BAD_REQUEST, "estimators[0].kind must be a string"},
    {E("{'name':'a','kind':'sarsa'}"), WORTH_E_BAD_PARAM,
     "estimators[0].kind: unknown kind \"sarsa\""},
    {E("{'name':'a','kind':'td','alpah':0.1}"), WORTH_E_BAD_REQUEST,
     "estimators[0]: unknown field \"alpah\""},
    {E("{'name':'a','kind':'td','nstep':3}"), WORTH_E_BAD_REQUEST, "unknown field \"nstep\""},
    {E("{'name':'a','kind':'td','alpha':0.1,'alpha':0.2}"), WORTH_E_BAD_REQUEST,
     "estimators[0]: field \"alpha\" appears twice"},
    {E("{'name':'a','kind':'td','name':'b'}"), WORTH_E_BAD_REQUEST,
     "estimators[0]: field \"name\" appears twice"},
    {E("{'name':'a','kind':'td','forget':0.9}"), WORTH_E_BAD_REQUEST,
     "estimators[0]: field \"forget\" does not apply to kind td"},
    {E("{'name':'a','kind':'td','n':3}"), WORTH_E_BAD_REQUEST, "field \"n\" does not apply"},
    {E("{'name':'a','kind':'td_n','lambda':0.5}"), WORTH_E_BAD_REQUEST,
     "field \"lambda\" does not apply to kind td_n"},
    {E("{'name':'a','kind':'td_lambda','horizon':5}"), WORTH_E_BAD_REQUEST,
     "field \"horizon\" does not apply to kind td_lambda"},
    {E("{'name':'a','kind':'mc','seed':5}"), WORTH_E_BAD_REQUEST,
     "field \"seed\" does not apply to kind mc"},
    {RLS("'alpha':0.1"), WORTH_E_BAD_REQUEST,
     "estimators[1]: field \"alpha\" does not apply to kind rls_td"},
    {RLS("'ridge':0.1"), WORTH_E_BAD_REQUEST, "field \"ridge\" does not apply to kind rls_td"},
    {E("{'name':'a','kind':'lstd','guard':'none'}"), WORTH_E_BAD_REQUEST,
     "field \"guard\" does not apply to kind lstd"},
    {E("{'name':'a','kind':'lstd','delta':1}"), WORTH_E_BAD_REQUEST,
     "field \"delta\" does not apply to kind lstd"},
    {E("{'name':'a','kind':'replay','n':2}"), WORTH_E_BAD_REQUEST,
     "field \"n\" does not apply to kind replay"},
    {E("{'name':'a','kind':'replay','lambda':0.5}"), WORTH_E_BAD_REQUEST,
     "field \"lambda\" does not apply to kind replay"},
    {RLS("'forget':true"), WORTH_E_BAD_REQUEST, "estimators[1].forget must be a number"},
    {RLS("'forget':'x'"), WORTH_E_BAD_NUMBER, "estimators[1].forget must be a finite number"},
    {RLS("'forget':null"), WORTH_E_BAD_NUMBER, "estimators[1].forget must be a finite number"},
    {RLS("'delta':1e400"), WORTH_E_BAD_NUMBER, "estimators[1].delta must be a finite number"},
    {RLS("'trace_cap':[1]"), WORTH_E_BAD_REQUEST, "estimators[1].trace_cap must be a number"},
    {RLS("'guard':'always'"), WORTH_E_BAD_PARAM,
     "estimators[1].guard must be \"regularise\", \"trace\" or \"none\""},
    {RLS("'guard':'Trace'"), WORTH_E_BAD_PARAM, "estimators[1].guard must be"},
    {RLS("'guard':1"), WORTH_E_BAD_REQUEST, "estimators[1].guard must be a string"},
    {E("{'name':'a','kind':'td','alpha':-1e400}"), WORTH_E_BAD_NUMBER,
     "estimators[0].alpha must be a finite number"},
    {E("{'name':'a','kind':'td','init':'NaN'}"), WORTH_E_BAD_NUMBER,
     "estimators[0].init must be a finite number"},
    {E("{'name':'a','kind':'td_n','n':-1}"), WORTH_E_BAD_PARAM,
     "estimators[0].n must be an integer 0..4294967295"},
    {E("{'name':'a','kind':'td_n','n':2.5}"), WORTH_E_BAD_PARAM, "estimators[0].n must be"},
    {E("{'name':'a','kind':'td_n','n':4294967296}"), WORTH_E_BAD_PARAM, "estimators[0].n must be"},
    {E("{'name':'a','kind':'mc','horizon':1e10}"), WORTH_E_BAD_PARAM, "estimators[0].horizon"},
    {E("{'name':'a','kind':'mc','max_episode':-5}"), WORTH_E_BAD_PARAM,
     "estimators[0].max_episode"},
    {E("{'name':'a','kind':'lstd','refit_every':0.5}"), WORTH_E_BAD_PARAM,
     "estimators[0].refit_every"},
    {E("{'name':'a','kind':'replay','capacity':'10'}"), WORTH_E_BAD_NUMBER,
     "estimators[0].capacity must be a finite number"},
    {E("{'name':'a','kind':'replay','batch':-32}"), WORTH_E_BAD_PARAM, "estimators[0].batch"},
    {E("{'name':'a','kind':'replay','steps_per_obs':1e20}"), WORTH_E_BAD_PARAM,
     "estimators[0].steps_per_obs"},
    {E("{'name':'a','kind':'replay','seed':-1}"), WORTH_E_BAD_PARAM,
     "estimators[0].seed must be an integer 0..9007199254740992"},
    {E("{'name':'a','kind':'replay','seed':9007199254740994}"), WORTH_E_BAD_PARAM,
     "estimators[0].seed must be"},
    {E("{'name':'a','kind':'replay','seed':1.5}"), WORTH_E_BAD_PARAM, "estimators[0].seed"},
    {E("{'name':'a','kind':'replay','tol':false}"), WORTH_E_BAD_REQUEST,
     "estimators[0].tol must be a number"},
    /* mlp and ensemble */
    {E("{'name':'a','kind':'mlp','hidden':32}"), WORTH_E_BAD_REQUEST,
     "estimators[0].hidden must be an array of layer widths"},
    {E("{'name':'a','kind':'mlp','hidden':[]}"), WORTH_E_BAD_PARAM,
     "estimators[0].hidden must list 1..4 layer widths"},
    {E("{'name':'a','kind':'mlp','hidden':[8,8,8,8,8]}"), WORTH_E_BAD_PARAM,
     "estimators[0].hidden must list 1..4 layer widths"},
    {E("{'name':'a','kind':'mlp','hidden':[8,0]}"), WORTH_E_BAD_PARAM,
     "estimators[0].hidden[1] must be an integer 1..1024"},
    {E("{'name':'a','kind':'mlp','hidden':[2000]}"), WORTH_E_BAD_PARAM,
     "estimators[0].hidden[0] must be an integer 1..1024"},
    {E("{'name':'a','kind':'mlp','hidden':[8.5]}"), WORTH_E_BAD_PARAM,
     "estimators[0].hidden[0] must be an integer"},
    {E("{'name':'a','kind':'mlp','hidden':['8']}"), WORTH_E_BAD_NUMBER,
     "estimators[0].hidden[0] must be a finite number"},
    {E("{'name':'a','kind':'mlp','activation':'sigmoid'}"), WORTH_E_BAD_PARAM,
     "estimators[0].activation must be \"tanh\" or \"relu\""},
    {E("{'name':'a','kind':'mlp','activation':1}"), WORTH_E_BAD_REQUEST,
     "estimators[0].activation must be a string"},
    {E("{'name':'a','kind':'mlp','members':3}"), WORTH_E_BAD_REQUEST,
     "field \"members\" does not apply to kind mlp"},
    {E("{'name':'a','kind':'td','hidden':[4]}"), WORTH_E_BAD_REQUEST,
     "field \"hidden\" does not apply to kind td"},
    {E("{'name':'a','kind':'ensemble','members':-1}"), WORTH_E_BAD_PARAM,
     "estimators[0].members must be an integer"},
    /* primary, max_sources, max_features */
    {REQ(ALL ",'primary':'zz'"), WORTH_E_BAD_PARAM,
     "primary: no estimator is named \"zz\" (give a name or \"auto\")"},
    {REQ(ALL ",'primary':'A'"), WORTH_E_BAD_PARAM, "primary: no estimator is named \"A\""},
    {REQ(ALL ",'primary':0"), WORTH_E_BAD_REQUEST, "primary must be a string"},
    {REQ(ALL ",'max_sources':0"), WORTH_E_BAD_PARAM, "max_sources must be an integer 1..1024"},
    {REQ(ALL ",'max_sources':1025"), WORTH_E_BAD_PARAM, "max_sources must be an integer 1..1024"},
    {REQ(ALL ",'max_sources':2.5"), WORTH_E_BAD_PARAM, "max_sources must be"},
    {REQ(ALL ",'max_sources':'16'"), WORTH_E_BAD_NUMBER, "max_sources must be a finite number"},
    {REQ(ALL ",'max_sources':true"), WORTH_E_BAD_REQUEST, "max_sources must be a number"},
    {REQ(ALL ",'max_features':0"), WORTH_E_BAD_PARAM, "max_features must be an integer 1..1048576"},
    {REQ(ALL ",'max_features':1048577"), WORTH_E_BAD_PARAM, "max_features must be"},
    {REQ(ALL ",'max_features':-5"), WORTH_E_BAD_PARAM, "max_features must be"},
    {REQ(ALL ",'max_features':1e400"), WORTH_E_BAD_NUMBER, "max_features must be a finite"},
    {REQ(ALL ",'max_features':[]"), WORTH_E_BAD_REQUEST, "max_features must be a number"},
};

static void refused_with_exact_code(void **state)
{
    (void)state;
    /* The fragments do make a valid request. */
    spec_t *ok = parse_ok(REQ(ALL ",'primary':'a','max_sources':1,'max_features':1"));
    model_accepts(ok, 1);
    spec_free(ok);

    for (size_t c = 0; c < sizeof bad / sizeof bad[0]; c++) {
        cJSON *j = json(bad[c].json);
        spec_t *out = SENTINEL;
        char err[256];
        memset(err, 0, sizeof err);
        int rc = spec_parse(j, &out, err, sizeof err);
        if (rc != bad[c].code || !strstr(err, bad[c].msg) || out != SENTINEL)
            print_error("case %zu %s\n  got %s \"%s\"\n  want %s \"%s\"\n", c, bad[c].json,
                        worth_err_name(rc), err, worth_err_name(bad[c].code), bad[c].msg);
        assert_int_equal(rc, bad[c].code);
        assert_non_null(strstr(err, bad[c].msg));
        assert_ptr_equal(out, SENTINEL);
        /* No message buffer at all is fine too. */
        assert_int_equal(spec_parse(j, &out, NULL, 0), bad[c].code);
        assert_ptr_equal(out, SENTINEL);
        cJSON_Delete(j);
    }
}

/* A short buffer truncates the message and still terminates it. */
static void short_message_buffer(void **state)
{
    (void)state;
    cJSON *j = json(E("{'name':'a','kind':'td','forget':0.9}"));
    spec_t *out = SENTINEL;
    char err[8];
    memset(err, 'x', sizeof err);
    assert_int_equal(spec_parse(j, &out, err, sizeof err), WORTH_E_BAD_REQUEST);
    assert_string_equal(err, "estimat");
    assert_ptr_equal(out, SENTINEL);
    cJSON_Delete(j);
}

static void names(void **state)
{
    (void)state;
    assert_true(spec_name_ok("a"));
    assert_true(spec_name_ok("station-1.pump_2"));
    assert_true(spec_name_ok(N63));
    assert_true(spec_name_ok("..."));
    assert_false(spec_name_ok(N64));
    assert_false(spec_name_ok(""));
    assert_false(spec_name_ok(NULL));
    assert_false(spec_name_ok("a b"));
    assert_false(spec_name_ok("a/b"));
    assert_false(spec_name_ok("a\nb"));
    assert_false(spec_name_ok("caf\xc3\xa9"));
    spec_free(NULL);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(every_basis_and_kind),
        cmocka_unit_test(estimator_defaults),
        cmocka_unit_test(canonical_lists_every_parameter),
        cmocka_unit_test(canonical_round_trips_every_bit),
        cmocka_unit_test(model_new_reports_the_rest),
        cmocka_unit_test(refused_with_exact_code),
        cmocka_unit_test(short_message_buffer),
        cmocka_unit_test(names),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
