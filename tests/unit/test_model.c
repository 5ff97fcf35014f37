/*
 * test_model.c - the value model (daemon/learn/model.h): construction and
 * queries, validation of transitions (exact codes, model bit-identical after a
 * rejection), spec errors, per-step and per-second discounting, terminal
 * transitions, counters, model_value, save/load round trips, corrupted and
 * mismatched states, model_reset, the footprint checked before building, and
 * a diverging estimator that must not disturb the others or the diagnostics.
 */
#include "testutil.h"

#include "learn/model.h"
#include "learn/ser.h"
#include "worth/errors.h"

static struct model *const SENTINEL = (struct model *)(uintptr_t)0x40de1;

/* The standard model: dims 2, bias + 3x3 rbf, gamma 0.9, td and rls_td. */
static const double LO[2] = {-1.0, 0.0}, HI[2] = {1.0, 10.0};
static const feat_basis_t BASES[2] = {
    {.kind = FEAT_BIAS},
    {.kind = FEAT_RBF, .centers = 3, .width = 0.3},
};
static const char *const NAMES[2] = {"td", "rls"};

typedef struct fixture {
    est_params_t est[MODEL_MAX_EST + 1];
    const char *names[MODEL_MAX_EST + 1];
    model_spec_t spec;
} fixture;

static void std_fixture(fixture *fx)
{
    memset(fx, 0, sizeof *fx);
    est_params_default(EST_TD, &fx->est[0]);
    fx->est[0].alpha = 0.1;
    est_params_default(EST_RLS_TD, &fx->est[1]);
    fx->names[0] = NAMES[0];
    fx->names[1] = NAMES[1];
    fx->spec = (model_spec_t){
        .feat = {.dims = 2, .lo = LO, .hi = HI, .nbases = 2, .bases = BASES},
        .gamma = 0.9,
        .gamma_per_s = 0.0,
        .n_est = 2,
        .est = fx->est,
        .est_names = fx->names,
        .primary = 1,
        .max_sources = 3,
    };
}

static struct model *build(const model_spec_t *spec)
{
    struct model *m = NULL;
    char err[256] = "";
    int rc = model_new(spec, &m, err, sizeof err);
    if (rc != 0)
        print_error("model_new failed: %d (%s)\n", rc, err);
    assert_int_equal(rc, 0);
    assert_non_null(m);
    return m;
}

static struct model *build_std(void)
{
    fixture fx;
    std_fixture(&fx);
    return build(&fx.spec);
}

/* Returns model_save's bytes (malloc'd) and their size in *len. */
static uint8_t *saved(const struct model *m, size_t *len)
{
    size_t n = 0;
    model_save(m, NULL, 0, &n);
    assert_true(n > 0);
    uint8_t *buf = malloc(n);
    assert_non_null(buf);
    assert_int_equal(model_save(m, buf, n, len), 0);
    assert_int_equal(*len, n);
    return buf;
}

/* Fails unless m's saved bytes equal (buf, len). */
static void assert_state(const struct model *m, const uint8_t *buf, size_t len)
{
    size_t n;
    uint8_t *now = saved(m, &n);
    assert_int_equal(n, len);
    assert_memory_equal(now, buf, len);
    free(now);
}

static model_obs_t obs(const double *x, double r, const double *xn, int terminal, const char *src)
{
    return (model_obs_t){.x = x,
                         .x_len = 2,
                         .r = r,
                         .x_next = xn,
                         .x_next_len = xn ? 2 : 0,
                         .terminal = terminal,
                         .source = src,
                         .dt_s = NAN};
}

static void observe_ok(struct model *m, const model_obs_t *t)
{
    char err[256] = "";
    int rc = model_observe(m, t, err, sizeof err);
    if (rc != 0)
        print_error("model_observe failed: %d (%s)\n", rc, err);
    assert_int_equal(rc, 0);
}

/* A deterministic stream of k transitions starting at step i0, from two sources. */
static void feed(struct model *m, int i0, int k)
{
    for (int i = i0; i < i0 + k; i++) {
        double x[2] = {sin(0.37 * i), 5.0 + 4.0 * cos(0.21 * i)};
        double xn[2] = {sin(0.37 * (i + 1)), 5.0 + 4.0 * cos(0.21 * (i + 1))};
        model_obs_t t = obs(x, x[0] - 0.1 * x[1], xn, i % 17 == 16, i % 3 ? "unit-a" : NULL);
        if (i % 5 == 0)
            t.dt_s = 0.5 + (i % 4);
        observe_ok(m, &t);
    }
}

/* ---- construction ---- */

static void built_model_answers_queries(void **state)
{
    (void)state;
    struct model *m = build_std();
    assert_int_equal(model_dims(m), 2);
    assert_int_equal(model_features(m), 1 + 9);
    assert_int_equal(model_n_est(m), 2);
    assert_int_equal(model_primary(m), 1);
    assert_string_equal(model_est_name(m, 0), "td");
    assert_string_equal(model_est_name(m, 1), "rls");
    assert_null(model_est_name(m, 2));
    assert_int_equal(model_est_find(m, "td"), 0);
    assert_int_equal(model_est_find(m, "rls"), 1);
    assert_int_equal(model_est_find(m, "rls_td"), -1);
    assert_int_equal(model_est_find(m, ""), -1);
    assert_non_null(model_est(m, 0));
    assert_non_null(model_est(m, 1));
    assert_null(model_est(m, 2));
    assert_int_equal(est_params(model_est(m, 0))->kind, EST_TD);
    assert_int_equal(est_params(model_est(m, 1))->kind, EST_RLS_TD);
    assert_int_equal(est_features(model_est(m, 1)), 10);
    assert_int_equal(feat_count(model_feat(m)), 10);
    model_counts_t c;
    memset(&c, 0xff, sizeof c);
    model_counts(m, &c);
    assert_true(c.applied == 0);
    assert_true(c.clipped == 0);
    assert_int_equal(c.sources, 0);
    model_free(m);
    model_free(NULL);
}

/* ---- validation of transitions ---- */

static void expect_rejected(struct model *m, const model_obs_t *t, int code, const char *what)
{
    size_t len;
    uint8_t *before = saved(m, &len);
    char err[256];
    memset(err, 0, sizeof err);
    int rc = model_check(m, t, err, sizeof err);
    if (rc != code)
        print_error("%s: model_check expected %d, got %d (%s)\n", what, code, rc, err);
    assert_int_equal(rc, code);
    assert_true(strlen(err) > 0);
    memset(err, 0, sizeof err);
    rc = model_observe(m, t, err, sizeof err);
    if (rc != code)
        print_error("%s: model_observe expected %d, got %d (%s)\n", what, code, rc, err);
    assert_int_equal(rc, code);
    assert_true(strlen(err) > 0);
    assert_state(m, before, len);
    free(before);
}

static void bad_transitions_leave_the_model_unchanged(void **state)
{
    (void)state;
    struct model *m = build_std();
    feed(m, 0, 20); /* non-trivial state, sources "" and "unit-a" in use */
    const double x[2] = {0.2, 3.0}, xn[2] = {0.3, 4.0}, x3[3] = {0.2, 3.0, 1.0};
    model_obs_t t;

    t = obs(x, 1.0, xn, 0, NULL);
    t.x_len = 1;
    expect_rejected(m, &t, WORTH_E_BAD_DIMENSION, "x of length 1");
    t = obs(x3, 1.0, xn, 0, NULL);
    t.x_len = 3;
    expect_rejected(m, &t, WORTH_E_BAD_DIMENSION, "x of length 3");
    t = obs(x, 1.0, xn, 0, NULL);
    t.x_len = 0;
    expect_rejected(m, &t, WORTH_E_BAD_DIMENSION, "x of length 0");
    t = obs(NULL, 1.0, xn, 0, NULL);
    expect_rejected(m, &t, WORTH_E_BAD_DIMENSION, "x NULL");
    t = obs(x, 1.0, xn, 0, NULL);
    t.x_next_len = 1;
    expect_rejected(m, &t, WORTH_E_BAD_DIMENSION, "x_next of length 1");
    t = obs(x, 1.0, x3, 0, NULL);
    t.x_next_len = 3;
    expect_rejected(m, &t, WORTH_E_BAD_DIMENSION, "x_next of length 3");
    t = obs(x, 1.0, NULL, 0, NULL);
    expect_rejected(m, &t, WORTH_E_BAD_DIMENSION, "x_next missing, not terminal");

    const double bad_vals[3] = {NAN, INFINITY, -INFINITY};
    for (int i = 0; i < 3; i++) {
        double bx[2] = {0.2, bad_vals[i]}, bxn[2] = {bad_vals[i], 4.0};
        t = obs(bx, 1.0, xn, 0, NULL);
        expect_rejected(m, &t, WORTH_E_BAD_NUMBER, "x not finite");
        t = obs(x, 1.0, bxn, 0, NULL);
        expect_rejected(m, &t, WORTH_E_BAD_NUMBER, "x_next not finite");
        t = obs(x, bad_vals[i], xn, 0, NULL);
        expect_rejected(m, &t, WORTH_E_BAD_NUMBER, "r not finite");
        t = obs(bx, 1.0, NULL, 1, NULL);
        expect_rejected(m, &t, WORTH_E_BAD_NUMBER, "x not finite, terminal");
    }
    const double bad_dt[4] = {-1.0, -1e-300, INFINITY, -INFINITY};
    for (int i = 0; i < 4; i++) {
        t = obs(x, 1.0, xn, 0, NULL);
        t.dt_s = bad_dt[i];
        expect_rejected(m, &t, WORTH_E_BAD_NUMBER, "dt negative or infinite");
    }

    char longname[MODEL_NAME_MAX + 2];
    memset(longname, 's', sizeof longname - 1);
    longname[MODEL_NAME_MAX + 1] = '\0';
    t = obs(x, 1.0, xn, 0, longname);
    expect_rejected(m, &t, WORTH_E_BAD_PARAM, "source name of 64 bytes");

    /* max_sources 3: "" and "unit-a" are in use; a name of exactly 63 bytes takes the third. */
    longname[MODEL_NAME_MAX] = '\0';
    t = obs(x, 1.0, xn, 0, longname);
    assert_int_equal(model_check(m, &t, NULL, 0), 0);
    observe_ok(m, &t);
    t = obs(x, 1.0, xn, 0, "unit-b");
    expect_rejected(m, &t, WORTH_E_TOO_MANY_SOURCES, "a fourth source");
    /* Known sources are still welcome. */
    t = obs(x, 1.0, xn, 0, "unit-a");
    observe_ok(m, &t);
    t = obs(x, 1.0, xn, 0, "");
    observe_ok(m, &t);
    t = obs(x, 1.0, xn, 0, longname);
    observe_ok(m, &t);
    model_counts_t c;
    model_counts(m, &c);
    assert_int_equal(c.sources, 3);
    assert_true(c.applied == 24);
    model_free(m);
}

static void model_check_accepts_without_changing(void **state)
{
    (void)state;
    struct model *m = build_std();
    feed(m, 0, 5);
    size_t len;
    uint8_t *before = saved(m, &len);
    const double x[2] = {0.2, 3.0}, xn[2] = {0.3, 4.0};
    model_obs_t t = obs(x, 1.0, xn, 0, "new-source");
    t.dt_s = 0.0;
    char err[64];
    assert_int_equal(model_check(m, &t, err, sizeof err), 0);
    assert_state(m, before, len);
    free(before);
    model_free(m);
}

/* ---- spec errors ---- */

static void expect_spec_fail(const model_spec_t *spec, int code, const char *what,
                             const char *needle)
{
    struct model *m = SENTINEL;
    char err[256];
    memset(err, 0, sizeof err);
    int rc = model_new(spec, &m, err, sizeof err);
    if (rc != code)
        print_error("%s: expected %d, got %d (%s)\n", what, code, rc, err);
    assert_int_equal(rc, code);
    assert_ptr_equal(m, SENTINEL);
    assert_true(strlen(err) > 0);
    if (needle && !strstr(err, needle)) {
        print_error("%s: message \"%s\" does not name \"%s\"\n", what, err, needle);
        fail();
    }
}

static void bad_specs_are_refused(void **state)
{
    (void)state;
    fixture fx;
    const double bad_gamma[] = {-0.1, 1.0000001, NAN, INFINITY};
    for (size_t i = 0; i < sizeof bad_gamma / sizeof bad_gamma[0]; i++) {
        std_fixture(&fx);
        fx.spec.gamma = bad_gamma[i];
        expect_spec_fail(&fx.spec, WORTH_E_BAD_PARAM, "gamma outside [0, 1]", NULL);
    }
    const double bad_gps[] = {-0.5, 1.5, NAN, INFINITY, -INFINITY};
    for (size_t i = 0; i < sizeof bad_gps / sizeof bad_gps[0]; i++) {
        std_fixture(&fx);
        fx.spec.gamma_per_s = bad_gps[i];
        expect_spec_fail(&fx.spec, WORTH_E_BAD_PARAM, "gamma_per_s outside (0, 1]", NULL);
    }
    /* The edges are fine. */
    const double ok_g[] = {0.0, 1.0};
    for (int i = 0; i < 2; i++) {
        std_fixture(&fx);
        fx.spec.gamma = ok_g[i];
        fx.spec.gamma_per_s = ok_g[i] == 0.0 ? 1.0 : 1e-9;
        model_free(build(&fx.spec));
    }

    std_fixture(&fx);
    fx.spec.n_est = 0;
    expect_spec_fail(&fx.spec, WORTH_E_BAD_PARAM, "no estimator", NULL);

    std_fixture(&fx);
    static char many[MODEL_MAX_EST + 1][8];
    for (int i = 0; i <= MODEL_MAX_EST; i++) {
        est_params_default(EST_TD, &fx.est[i]);
        snprintf(many[i], sizeof many[i], "e%d", i);
        fx.names[i] = many[i];
    }
    fx.spec.n_est = MODEL_MAX_EST + 1;
    expect_spec_fail(&fx.spec, WORTH_E_BAD_PARAM, "17 estimators", NULL);
    fx.spec.n_est = MODEL_MAX_EST;
    struct model *m = build(&fx.spec);
    assert_int_equal(model_n_est(m), MODEL_MAX_EST);
    assert_int_equal(model_est_find(m, "e15"), 15);
    model_free(m);

    std_fixture(&fx);
    fx.names[1] = "td";
    expect_spec_fail(&fx.spec, WORTH_E_BAD_PARAM, "duplicate names", "td");
    std_fixture(&fx);
    fx.names[0] = "";
    expect_spec_fail(&fx.spec, WORTH_E_BAD_PARAM, "empty name", NULL);
    char longname[MODEL_NAME_MAX + 2];
    memset(longname, 'n', sizeof longname - 1);
    longname[MODEL_NAME_MAX + 1] = '\0';
    std_fixture(&fx);
    fx.names[1] = longname;
    expect_spec_fail(&fx.spec, WORTH_E_BAD_PARAM, "name of 64 bytes", NULL);
    longname[MODEL_NAME_MAX] = '\0';
    m = build(&fx.spec);
    assert_string_equal(model_est_name(m, 1), longname);
    model_free(m);

    std_fixture(&fx);
    fx.spec.primary = 2;
    expect_spec_fail(&fx.spec, WORTH_E_BAD_PARAM, "primary out of range", NULL);

    std_fixture(&fx);
    fx.names[0] = "fast_td";
    fx.est[0].alpha = 0.0;
    expect_spec_fail(&fx.spec, WORTH_E_BAD_PARAM, "alpha 0", "fast_td");
    std_fixture(&fx);
    fx.names[1] = "my_rls";
    fx.est[1].delta = -1.0;
    expect_spec_fail(&fx.spec, WORTH_E_BAD_PARAM, "rls delta < 0", "my_rls");

    std_fixture(&fx);
    fx.spec.max_sources = EST_MAX_SOURCES + 1;
    expect_spec_fail(&fx.spec, WORTH_E_BAD_PARAM, "too many source slots", NULL);

    /* Errors of the feature map come through. */
    std_fixture(&fx);
    fx.spec.feat.dims = 0;
    expect_spec_fail(&fx.spec, WORTH_E_BAD_PARAM, "dims 0", NULL);
    std_fixture(&fx);
    const feat_basis_t huge = {.kind = FEAT_FOURIER, .order = 9};
    fx.spec.feat.bases = &huge;
    fx.spec.feat.nbases = 1;
    static double lo20[20], hi20[20];
    for (int i = 0; i < 20; i++)
        hi20[i] = 1.0;
    fx.spec.feat.lo = lo20;
    fx.spec.feat.hi = hi20;
    fx.spec.feat.dims = 20;
    expect_spec_fail(&fx.spec, WORTH_E_TOO_LARGE, "fourier 9 on 20 dims", NULL);
}

/* ---- discounting ---- */

/* A model of one dimension, a bias feature only and one TD(0) estimator (alpha 0.5, w0 = 1). */
static struct model *bias_model(double gamma, double gamma_per_s)
{
    static const double lo[1] = {0.0}, hi[1] = {1.0};
    static const feat_basis_t bias = {.kind = FEAT_BIAS};
    static est_params_t p;
    est_params_default(EST_TD, &p);
    p.alpha = 0.5;
    p.init = 1.0;
    static const char *const name[1] = {"td"};
    model_spec_t s = {.feat = {.dims = 1, .lo = lo, .hi = hi, .nbases = 1, .bases = &bias},
                      .gamma = gamma,
                      .gamma_per_s = gamma_per_s,
                      .n_est = 1,
                      .est = &p,
                      .est_names = name,
                      .primary = 0};
    return build(&s);
}

static double bias_weight(const struct model *m)
{
    return est_weights(model_est(m, 0))[0];
}

/* The last TD error r + g V(x') - V(x) of the model's estimator 0. */
static double td_last(const struct model *m)
{
    est_stats_t st;
    est_stats(model_est(m, 0), &st);
    return st.td_last;
}

static model_obs_t obs1(const double *x, double r, const double *xn, double dt)
{
    return (model_obs_t){
        .x = x, .x_len = 1, .r = r, .x_next = xn, .x_next_len = xn ? 1 : 0, .dt_s = dt};
}

static void discount_per_second_and_per_step(void **state)
{
    (void)state;
    /*
     * Bias-only TD(0): V = w, phi = phi' = 1, so w += alpha (r + g w - w).
     * Expected values by hand from that rule with alpha = 0.5, w0 = 1.
     */
    const double x[1] = {0.3}, xn[1] = {0.7};
    struct model *m = bias_model(0.9, 0.5);

    /* dt = 2: g = 0.5^2 = 0.25; w = 1 + 0.5 (0 + 0.25 - 1) = 0.625. */
    model_obs_t t = obs1(x, 0.0, xn, 2.0);
    observe_ok(m, &t);
    assert_near(bias_weight(m), 0.625, 1e-15);
    assert_near(td_last(m), -0.75, 1e-15);
    /* dt = 1, r = 1: g = 0.5; w = 0.625 + 0.5 (1 + 0.3125 - 0.625) = 0.96875. */
    t = obs1(x, 1.0, xn, 1.0);
    observe_ok(m, &t);
    assert_near(bias_weight(m), 0.96875, 1e-15);

    /* Without dt the per-step gamma: w = 1 + 0.5 (0 + 0.9 - 1) = 0.95. */
    model_reset(m);
    assert_near(bias_weight(m), 1.0, 0);
    t = obs1(x, 0.0, xn, NAN);
    observe_ok(m, &t);
    assert_near(bias_weight(m), 0.95, 1e-15);

    /* dt = 0: g = 0.5^0 = 1, so with r = 0 nothing moves. */
    model_reset(m);
    t = obs1(x, 0.0, xn, 0.0);
    observe_ok(m, &t);
    assert_near(bias_weight(m), 1.0, 0);

    /* dt = 0.5: g = sqrt(0.5); w = 1 + 0.5 (sqrt(0.5) - 1). */
    model_reset(m);
    t = obs1(x, 0.0, xn, 0.5);
    observe_ok(m, &t);
    assert_near(bias_weight(m), 1.0 + 0.5 * (sqrt(0.5) - 1.0), 1e-15);
    model_free(m);

    /* Without a per-second discount dt is ignored: g = gamma = 0.9 -> 0.95. */
    m = bias_model(0.9, 0.0);
    t = obs1(x, 0.0, xn, 2.0);
    observe_ok(m, &t);
    assert_near(bias_weight(m), 0.95, 1e-15);
    model_free(m);

    /* gamma 0: w = 1 + 0.5 (2 - 1) = 1.5. */
    m = bias_model(0.0, 0.0);
    t = obs1(x, 2.0, xn, NAN);
    observe_ok(m, &t);
    assert_near(bias_weight(m), 1.5, 1e-15);
    model_free(m);
}

/* ---- terminal transitions ---- */

static void terminal_ignores_x_next(void **state)
{
    (void)state;
    const double x[1] = {0.3}, xn[1] = {0.7};
    /* Terminal: V(x') = 0, so w = 1 + 0.5 (2 - 1) = 1.5 whatever gamma is. */
    struct model *a = bias_model(0.9, 0.5), *b = bias_model(0.9, 0.5);
    model_obs_t t = obs1(x, 2.0, NULL, 3.0);
    t.terminal = 1;
    assert_int_equal(model_check(a, &t, NULL, 0), 0);
    observe_ok(a, &t);
    assert_near(bias_weight(a), 1.5, 1e-15);

    /* The same with an x_next present: it is not used. */
    t = obs1(x, 2.0, xn, 3.0);
    t.terminal = 1;
    observe_ok(b, &t);
    assert_near(bias_weight(b), 1.5, 1e-15);
    size_t la, lb;
    uint8_t *sa = saved(a, &la), *sb = saved(b, &lb);
    assert_int_equal(la, lb);
    assert_memory_equal(sa, sb, la);
    free(sa);
    free(sb);
    model_free(a);
    model_free(b);

    /* In the standard model too: both estimators accept a terminal without x_next. */
    struct model *m = build_std();
    feed(m, 0, 3);
    const double x2[2] = {0.5, 5.0};
    model_obs_t t2 = obs(x2, 1.0, NULL, 1, "unit-a");
    observe_ok(m, &t2);
    model_counts_t c;
    model_counts(m, &c);
    assert_true(c.applied == 4);
    model_free(m);
}

/* ---- counters ---- */

static void counters_count(void **state)
{
    (void)state;
    struct model *m = build_std();
    model_counts_t c;
    /* Ranges [-1, 1] x [0, 10]. */
    const double in[2] = {0.0, 5.0}, lo_out[2] = {-2.0, 5.0}, hi_out[2] = {0.0, 11.0},
                 both_out[2] = {5.0, -20.0};

    model_obs_t t = obs(lo_out, 0.0, hi_out, 0, NULL);
    observe_ok(m, &t);
    model_counts(m, &c);
    assert_true(c.applied == 1);
    assert_true(c.clipped == 2); /* one in x, one in x_next */
    assert_int_equal(c.sources, 1);

    t = obs(in, 0.0, in, 0, "a");
    observe_ok(m, &t);
    model_counts(m, &c);
    assert_true(c.applied == 2);
    assert_true(c.clipped == 2);
    assert_int_equal(c.sources, 2);

    t = obs(both_out, 0.0, both_out, 0, "a");
    observe_ok(m, &t);
    model_counts(m, &c);
    assert_true(c.applied == 3);
    assert_true(c.clipped == 6);
    assert_int_equal(c.sources, 2);

    /* A terminal without x_next: only x is evaluated. */
    t = obs(both_out, 0.0, NULL, 1, "b");
    observe_ok(m, &t);
    model_counts(m, &c);
    assert_true(c.applied == 4);
    assert_true(c.clipped == 8);
    assert_int_equal(c.sources, 3);

    /* A rejected transition counts nothing. */
    t = obs(both_out, NAN, both_out, 0, "a");
    assert_int_equal(model_observe(m, &t, NULL, 0), WORTH_E_BAD_NUMBER);
    model_counts(m, &c);
    assert_true(c.applied == 4);
    assert_true(c.clipped == 8);

    /* Reset forgets everything: the state equals a fresh model's. */
    model_reset(m);
    model_counts(m, &c);
    assert_true(c.applied == 0);
    assert_true(c.clipped == 0);
    assert_int_equal(c.sources, 0);
    struct model *fresh = build_std();
    size_t lf;
    uint8_t *sf = saved(fresh, &lf);
    assert_state(m, sf, lf);
    free(sf);
    model_free(fresh);
    model_free(m);
}

/* ---- model_value ---- */

static void value_of_every_estimator(void **state)
{
    (void)state;
    struct model *m = build_std();
    size_t nw = model_work_size(m);
    assert_true(nw >= model_features(m));
    double *work = malloc((nw + 4) * sizeof *work);
    assert_non_null(work);
    for (int i = 0; i < 4; i++)
        work[nw + i] = -777.0;
    const double x[2] = {0.25, 7.5};
    double values[3] = {-1, -1, 42.0}, sd[3] = {-1, -1, 42.0};

    /* Fresh: every weight is the default init 0. */
    assert_int_equal(model_value(m, x, 2, values, sd, work), 0);
    assert_near(values[0], 0.0, 0);
    assert_near(values[1], 0.0, 0);
    assert_true(isnan(sd[0]));

    feed(m, 0, 60);
    assert_int_equal(model_value(m, x, 2, values, sd, work), 0);
    assert_true(isnan(sd[0]));    /* td has no sd */
    assert_true(isfinite(sd[1])); /* rls_td has one */
    assert_true(sd[1] >= 0);
    assert_true(values[2] == 42.0 && sd[2] == 42.0); /* n_est entries only */
    for (int i = 0; i < 4; i++)
        assert_true(work[nw + i] == -777.0);

    /* The values are w . phi(x) of each estimator. */
    const struct feat *f = model_feat(m);
    size_t n = feat_count(f);
    double *phi = malloc(n * sizeof *phi), *fw = malloc(feat_work_size(f) * sizeof *fw);
    assert_non_null(phi);
    assert_non_null(fw);
    feat_eval(f, x, phi, fw);
    for (size_t i = 0; i < 2; i++) {
        const double *w = est_weights(model_est(m, i));
        double v = 0;
        for (size_t k = 0; k < n; k++)
            v += w[k] * phi[k];
        assert_near(values[i], v, 1e-12 * (1 + fabs(v)));
        assert_near(values[i], est_value(model_est(m, i), phi), 0);
    }
    double sd1;
    assert_int_equal(est_sd(model_est(m, 1), phi, &sd1), 0);
    assert_near(sd[1], sd1, 0);
    assert_true(values[0] != 0.0); /* it learnt something */

    /* sd may be NULL. */
    double v2[2];
    assert_int_equal(model_value(m, x, 2, v2, NULL, work), 0);
    assert_memory_equal(v2, values, sizeof v2);

    /* Bad length and non-finite input; the model is const, values untouched. */
    double untouched[2] = {123.0, 456.0};
    assert_int_equal(model_value(m, x, 1, untouched, NULL, work), WORTH_E_BAD_DIMENSION);
    assert_int_equal(model_value(m, x, 3, untouched, NULL, work), WORTH_E_BAD_DIMENSION);
    const double xnan[2] = {0.25, NAN}, xinf[2] = {-INFINITY, 1.0};
    assert_int_equal(model_value(m, xnan, 2, untouched, NULL, work), WORTH_E_BAD_NUMBER);
    assert_int_equal(model_value(m, xinf, 2, untouched, NULL, work), WORTH_E_BAD_NUMBER);
    assert_true(untouched[0] == 123.0 && untouched[1] == 456.0);
    free(phi);
    free(fw);
    free(work);
    model_free(m);
}

/* ---- persistence ---- */

static void save_load_continues_identically(void **state)
{
    (void)state;
    struct model *a = build_std(), *b = build_std();
    feed(a, 0, 50);
    size_t len;
    uint8_t *buf = saved(a, &len);

    /* Sizing call: needs len, reports it; a short buffer is too_large and not overrun. */
    size_t need = 0;
    model_save(a, NULL, 0, &need);
    assert_int_equal(need, len);
    uint8_t *small = malloc(len + 16);
    assert_non_null(small);
    memset(small, 0xa5, len + 16);
    size_t got = 0;
    assert_int_equal(model_save(a, small, len - 1, &got), WORTH_E_TOO_LARGE);
    assert_int_equal(got, len);
    for (size_t i = len - 1; i < len + 16; i++)
        assert_int_equal(small[i], 0xa5);
    free(small);

    char err[256] = "";
    int rc = model_load(b, buf, len, err, sizeof err);
    if (rc)
        print_error("model_load: %d (%s)\n", rc, err);
    assert_int_equal(rc, 0);
    assert_state(b, buf, len);
    model_counts_t ca, cb;
    model_counts(a, &ca);
    model_counts(b, &cb);
    assert_true(ca.applied == cb.applied && ca.clipped == cb.clipped);
    assert_int_equal(ca.sources, cb.sources);

    feed(a, 50, 30);
    feed(b, 50, 30);
    size_t la, lb;
    uint8_t *sa = saved(a, &la), *sb = saved(b, &lb);
    assert_int_equal(la, lb);
    assert_memory_equal(sa, sb, la);

    /* And the same values. */
    double wa[64], wb[64], va[2], vb[2], sda[2], sdb[2];
    assert_true(model_work_size(a) <= 64);
    const double x[2] = {-0.4, 2.5};
    assert_int_equal(model_value(a, x, 2, va, sda, wa), 0);
    assert_int_equal(model_value(b, x, 2, vb, sdb, wb), 0);
    assert_memory_equal(va, vb, sizeof va);
    assert_memory_equal(sda + 1, sdb + 1, sizeof sda[1]);

    free(buf);
    free(sa);
    free(sb);
    model_free(a);
    model_free(b);
}

/* A replay's callback: counts its calls, each after the diagnostics took exactly that many. */
struct after_count {
    struct model *m;
    uint64_t calls, out_of_order;
};

static void count_after(void *ctx)
{
    struct after_count *a = ctx;
    model_counts_t cn;
    model_counts(a->m, &cn);
    a->calls++;
    a->out_of_order += cn.applied != a->calls;
}

/*
 * model_replay learns on worker threads, yet must give model_observe's bits:
 * every kind of estimator, two sources, terminals, per-second discounts, and
 * more transitions than its ring of chunks holds, for 0 (auto), 1, 2 and 5
 * workers, with a flush on the way (everything pushed learnt when it
 * returns).  The callback runs once per transition, in order.  A refused
 * transition ends the replay with everything before it learnt.
 */
static void replay_equals_observe(void **state)
{
    (void)state;
    fixture fx;
    std_fixture(&fx);
    enum est_kind kinds[] = {EST_TD, EST_RLS_TD, EST_REPLAY, EST_LSTD, EST_TD_LAMBDA, EST_TD_N,
                             EST_MC};
    static const char *const names[] = {"td", "rls", "replay", "lstd", "tdl", "tdn", "mc"};
    size_t ne = sizeof kinds / sizeof kinds[0];
    for (size_t i = 0; i < ne; i++) {
        est_params_default(kinds[i], &fx.est[i]);
        fx.names[i] = names[i];
    }
    fx.est[1].forget = 0.999; /* the regularised guard too */
    fx.spec.n_est = ne;
    fx.spec.gamma_per_s = 0.8;
    fx.spec.primary_auto = 1; /* the headline's choice is in the saved bytes too */
    struct model *want = build(&fx.spec);
    const int k = 2500;
    feed(want, 0, k);
    size_t len;
    uint8_t *buf = saved(want, &len);
    health_head_t hd;
    model_head(want, &hd);
    assert_true(hd.switches > 0); /* it moved at least once: a real choice was replayed */

    unsigned threads[] = {0, 1, 2, 5};
    for (size_t c = 0; c < sizeof threads / sizeof threads[0]; c++) {
        struct model *m = build(&fx.spec);
        struct model_replay *r = model_replay_new(m, threads[c], 0);
        struct after_count ac = {.m = m};
        model_replay_set_after(r, count_after, &ac);
        for (int i = 0; i < k; i++) {
            if (i == 1001) {
                model_replay_flush(r);
                assert_int_equal(ac.calls, 1001);
            }
            double x[2] = {sin(0.37 * i), 5.0 + 4.0 * cos(0.21 * i)};
            double xn[2] = {sin(0.37 * (i + 1)), 5.0 + 4.0 * cos(0.21 * (i + 1))};
            model_obs_t t = obs(x, x[0] - 0.1 * x[1], xn, i % 17 == 16, i % 3 ? "unit-a" : NULL);
            if (i % 5 == 0)
                t.dt_s = 0.5 + (i % 4);
            char err[256] = "";
            assert_int_equal(model_replay_push(r, &t, err, sizeof err), 0);
        }
        model_replay_end(r);
        assert_int_equal(ac.calls, k);
        assert_int_equal(ac.out_of_order, 0);
        assert_state(m, buf, len);

        /* A bad transition: refused, the ones before it learnt. */
        model_reset(m);
        r = model_replay_new(m, threads[c], 0);
        double x[2] = {0.1, 1.0}, bad[2] = {NAN, 1.0};
        model_obs_t t = obs(x, 1.0, x, 0, NULL);
        char err[256] = "";
        for (int i = 0; i < 3; i++)
            assert_int_equal(model_replay_push(r, &t, err, sizeof err), 0);
        t.x_next = bad;
        assert_int_equal(model_replay_push(r, &t, err, sizeof err), WORTH_E_BAD_NUMBER);
        model_replay_end(r);
        model_counts_t cn;
        model_counts(m, &cn);
        assert_int_equal(cn.applied, 3);
        model_free(m);
    }
    free(buf);
    model_free(want);
}

static void expect_load_fail(struct model *m, const uint8_t *buf, size_t len, int code,
                             const char *what)
{
    size_t blen;
    uint8_t *before = saved(m, &blen);
    char err[256];
    memset(err, 0, sizeof err);
    int rc = model_load(m, buf, len, err, sizeof err);
    if (rc != code)
        print_error("%s: expected %d, got %d (%s)\n", what, code, rc, err);
    assert_int_equal(rc, code);
    assert_true(strlen(err) > 0);
    assert_state(m, before, blen);
    free(before);
}

/* Rewrites the trailing CRC-32 of a model state after an edit. */
static void reseal(uint8_t *buf, size_t len)
{
    ser_w w = {buf + len - 4, 4, 0};
    ser_put_u32(&w, ser_crc32(buf, len - 4));
}

static void corrupted_state_is_refused(void **state)
{
    (void)state;
    struct model *a = build_std(), *b = build_std();
    feed(a, 0, 40);
    feed(b, 100, 7); /* b has its own, different state */
    size_t len;
    uint8_t *buf = saved(a, &len);
    uint8_t *copy = malloc(len);
    assert_non_null(copy);

    /* Every single flipped byte is caught (CRC-32 detects all single-byte errors). */
    for (size_t i = 0; i < len; i++) {
        memcpy(copy, buf, len);
        copy[i] ^= 0x5a;
        char what[64];
        snprintf(what, sizeof what, "byte %zu of %zu flipped", i, len);
        expect_load_fail(b, copy, len, WORTH_E_CORRUPT, what);
    }
    /* Cut short, empty, one byte too many. */
    expect_load_fail(b, buf, len - 1, WORTH_E_CORRUPT, "cut by one byte");
    expect_load_fail(b, buf, 0, WORTH_E_CORRUPT, "empty");
    expect_load_fail(b, buf, 8, WORTH_E_CORRUPT, "8 bytes");
    uint8_t *longer = malloc(len + 1);
    assert_non_null(longer);
    memcpy(longer, buf, len);
    longer[len] = 0;
    expect_load_fail(b, longer, len + 1, WORTH_E_CORRUPT, "one byte appended");

    /* Sealed with a valid CRC but wrong inside. */
    memcpy(longer, buf, len - 4);
    longer[len - 4] = 0;
    reseal(longer, len + 1);
    expect_load_fail(b, longer, len + 1, WORTH_E_CORRUPT, "trailing byte, resealed");

    memcpy(copy, buf, len);
    copy[4] = MODEL_FORMAT_VERSION + 1; /* a format from a newer build */
    reseal(copy, len);
    expect_load_fail(b, copy, len, WORTH_E_CORRUPT, "newer version, resealed");

    memcpy(copy, buf, len);
    copy[4] = 0; /* older than any format written */
    reseal(copy, len);
    expect_load_fail(b, copy, len, WORTH_E_CORRUPT, "version 0, resealed");

    /* Header: magic, version, n_est, n_src, applied, clipped (32 bytes); then sources. */
    memcpy(copy, buf, len);
    copy[32] = 200; /* first source name length > MODEL_NAME_MAX */
    reseal(copy, len);
    expect_load_fail(b, copy, len, WORTH_E_CORRUPT, "source name length 200, resealed");

    /*
     * Damage estimator 1's blob (its own CRC no longer matches) and reseal the
     * model: estimator 0 loads first, so the model must roll it back.
     */
    ser_r r = {buf, len - 4, 0, 0};
    r.pos = 12;
    uint32_t nsrc = ser_get_u32(&r);
    r.pos = 32;
    for (uint32_t i = 0; i < nsrc; i++) {
        uint32_t sl = ser_get_u32(&r);
        r.pos += sl;
    }
    uint64_t l0 = ser_get_u64(&r);
    r.pos += (size_t)l0;
    uint64_t l1 = ser_get_u64(&r);
    assert_int_equal(r.err, 0);
    assert_true(r.pos + l1 < len - 4); /* the diagnostics' state follows the estimators */
    memcpy(copy, buf, len);
    copy[r.pos + l1 / 2] ^= 1;
    reseal(copy, len);
    expect_load_fail(b, copy, len, WORTH_E_CORRUPT, "estimator 1 damaged, model resealed");

    /* The intact state still loads afterwards. */
    assert_int_equal(model_load(b, buf, len, NULL, 0), 0);
    assert_state(b, buf, len);

    free(longer);
    free(copy);
    free(buf);
    model_free(a);
    model_free(b);
}

static void mismatched_state_is_refused(void **state)
{
    (void)state;
    struct model *a = build_std();
    feed(a, 0, 30);
    size_t len;
    uint8_t *buf = saved(a, &len);
    fixture fx;

    /* One estimator instead of two. */
    std_fixture(&fx);
    fx.spec.n_est = 1;
    fx.spec.primary = 0;
    struct model *m = build(&fx.spec);
    feed(m, 3, 4);
    expect_load_fail(m, buf, len, WORTH_E_MISMATCH, "one estimator");
    model_free(m);

    /* Two estimators, the second of another kind. */
    std_fixture(&fx);
    est_params_default(EST_TD_LAMBDA, &fx.est[1]);
    m = build(&fx.spec);
    feed(m, 3, 4);
    expect_load_fail(m, buf, len, WORTH_E_MISMATCH, "td + td_lambda");
    model_free(m);

    /* Same kinds, other parameters of the second estimator (loaded after the first). */
    std_fixture(&fx);
    fx.est[1].forget = 0.99;
    m = build(&fx.spec);
    feed(m, 3, 4);
    expect_load_fail(m, buf, len, WORTH_E_MISMATCH, "rls forget 0.99");
    model_free(m);

    /* Another feature count. */
    std_fixture(&fx);
    fx.spec.feat.nbases = 1;
    m = build(&fx.spec);
    feed(m, 3, 4);
    expect_load_fail(m, buf, len, WORTH_E_MISMATCH, "bias only");
    model_free(m);

    /* Fewer source slots than the state uses (a uses 2). */
    std_fixture(&fx);
    fx.spec.max_sources = 1;
    m = build(&fx.spec);
    const double x[2] = {0.0, 1.0};
    model_obs_t t = obs(x, 1.0, x, 0, NULL);
    observe_ok(m, &t);
    expect_load_fail(m, buf, len, WORTH_E_MISMATCH, "one source slot");
    model_free(m);

    free(buf);
    model_free(a);
}

/* A published snapshot answers exactly as the live estimators did when it was taken. */
static void snapshot_answers_like_the_model(void **state)
{
    (void)state;
    struct model *m = build_std();
    feed(m, 0, 40);
    double *snap = malloc(model_snap_size(m) * sizeof *snap);
    double *work = malloc(model_work_size(m) * sizeof *work);
    model_snap(m, snap);
    double x[2] = {0.3, 4.0}, live[2], live_sd[2], from[2], from_sd[2];
    assert_int_equal(model_value(m, x, 2, live, live_sd, work), 0);
    assert_int_equal(model_snap_value(m, snap, x, 2, from, from_sd, work), 0);
    for (int i = 0; i < 2; i++) {
        assert_memory_equal(&live[i], &from[i], sizeof(double));
        if (isnan(live_sd[i]))
            assert_true(isnan(from_sd[i]));
        else
            assert_near(from_sd[i], live_sd[i], 0);
    }
    /* Learning more changes the model, not the snapshot. */
    feed(m, 40, 40);
    double again[2];
    assert_int_equal(model_snap_value(m, snap, x, 2, again, from_sd, work), 0);
    assert_memory_equal(again, from, sizeof again);
    assert_int_equal(model_snap_value(m, snap, x, 1, again, NULL, work), WORTH_E_BAD_DIMENSION);
    free(snap);
    free(work);
    model_free(m);
}

/* model_footprint bounds what the model holds; model_new refuses over max_bytes, allocating
 * nothing. */
static void footprint_is_checked_before_building(void **state)
{
    (void)state;
    fixture fx;
    std_fixture(&fx);
    size_t n = 10; /* bias + 3x3 rbf */
    double all = model_footprint(&fx.spec, n);
    /* Dropping the rls_td estimator removes exactly its share (P, and P in two snapshots), its
     * column in the diagnostics' return buffers and its results in the replay's chunks. */
    fx.spec.n_est = 1;
    fx.spec.primary = 0;
    double td_only = model_footprint(&fx.spec, n);
    double rls = est_footprint(&fx.est[1], n, 3);
    diag_params_t dp;
    diag_params_default(0.9, &dp);
    double diag_col = diag_footprint(&dp, 2, 3) - diag_footprint(&dp, 1, 3);
    assert_true(diag_col > 0);
    size_t dims = fx.spec.feat.dims;
    double replay_col = model_replay_footprint(dims, n, 2) - model_replay_footprint(dims, n, 1);
    assert_true(replay_col > 0);
    assert_near(all - td_only, rls + diag_col + replay_col, 1e-6);
    /* The replay's ring of chunks is counted, and holds at least two chunks' features. */
    assert_true(model_replay_footprint(dims, n, 1) >= 2.0 * 16 * 2 * n * sizeof(double));
    assert_true(rls >= 3.0 * n * n * sizeof(double));
    /* A 8192-feature rls_td holds three 512 MiB matrices. */
    assert_true(est_footprint(&fx.est[1], 8192, 1) >= 3.0 * 8192 * 8192 * 8);
    /* Replay: capacity records of 2n + 1 doubles. */
    est_params_t rp;
    est_params_default(EST_REPLAY, &rp);
    rp.capacity = 1000;
    assert_true(est_footprint(&rp, n, 1) >= 1000.0 * (2 * n + 1) * 8);
    /* mc: max_episode steps per source, each source counted. */
    est_params_t mc;
    est_params_default(EST_MC, &mc);
    assert_true(est_footprint(&mc, n, 16) >= 16.0 * mc.max_episode * n * 8);
    assert_true(est_footprint(&mc, n, 16) > 15.0 * est_footprint(&mc, n, 1));

    std_fixture(&fx);
    fx.spec.base_bytes = 4096;
    fx.spec.max_bytes = all + 4096 - 1;
    struct model *m = SENTINEL;
    char err[256] = "";
    assert_int_equal(model_new(&fx.spec, &m, err, sizeof err), WORTH_E_TOO_LARGE);
    assert_ptr_equal(m, SENTINEL);
    assert_non_null(strstr(err, "MiB"));
    fx.spec.max_bytes = all + 4096;
    m = build(&fx.spec);
    assert_int_equal(model_features(m), n);
    model_free(m);
}

/* Returns est_save's bytes of e (malloc'd) and their size in *len. */
static uint8_t *est_bytes(const struct est *e, size_t *len)
{
    est_save(e, NULL, 0, len);
    uint8_t *buf = malloc(*len);
    assert_int_equal(est_save(e, buf, *len, len), 0);
    return buf;
}

static void assert_same_est(const struct est *a, const struct est *b)
{
    size_t la, lb;
    uint8_t *ba = est_bytes(a, &la), *bb = est_bytes(b, &lb);
    assert_int_equal(la, lb);
    assert_memory_equal(ba, bb, la);
    free(ba);
    free(bb);
}

/*
 * "wild" (td with alpha 1e300) beside the standard td and rls_td: its first update puts its
 * weights near 1e300, so that the second overflows them and it diverges there.  The other two learn
 * exactly as they do in a model without it; the diagnostics (spread, realised figures, drift) are
 * bit for bit those of that model; queries answer NAN for it alone; model_replay gives the same
 * bits with any number of workers; save -> load keeps the flag.
 */
static void diverging_estimator_leaves_the_others_alone(void **state)
{
    (void)state;
    fixture fx, alone;
    std_fixture(&alone);
    alone.spec.primary = 0;
    std_fixture(&fx);
    est_params_default(EST_TD, &fx.est[0]);
    fx.est[0].alpha = 1e300;
    fx.est[1] = alone.est[0];
    fx.est[2] = alone.est[1];
    const char *names[3] = {"wild", "td", "rls"};
    for (int i = 0; i < 3; i++)
        fx.names[i] = names[i];
    fx.spec.n_est = 3;
    fx.spec.primary = 1;
    struct model *m = build(&fx.spec), *ref = build(&alone.spec);
    feed(m, 0, 1);
    assert_int_equal(model_diverged(m), 0);
    feed(m, 1, 299);
    feed(ref, 0, 300);
    assert_int_equal(model_diverged(m), 1);
    assert_true(model_est_diverged(m, 0));
    assert_false(model_est_diverged(m, 1));
    assert_false(model_est_diverged(m, 2));
    assert_false(model_est_diverged(m, 3));
    est_stats_t st;
    est_stats(model_est(m, 0), &st);
    assert_int_equal(st.health, EST_HEALTH_DIVERGED);
    assert_string_equal(st.why, EST_WHY_NONFINITE);
    assert_int_equal(st.diverged_at, 2);
    assert_int_equal(st.updates, 300);

    /* The others, and the diagnostics, as if it had never been there. */
    assert_same_est(model_est(m, 1), model_est(ref, 0));
    assert_same_est(model_est(m, 2), model_est(ref, 1));
    const struct diag *dm = model_diag(m), *dr = model_diag(ref);
    assert_true(diag_spread(dm) == diag_spread(dr));
    assert_true(diag_spread(dr) > 0);
    for (size_t k = 0; k < 2; k++) {
        diag_est_t a, b;
        diag_est(dm, k + 1, &a);
        diag_est(dr, k, &b);
        assert_true(b.n > 0);
        assert_memory_equal(&a, &b, sizeof a);
    }
    diag_est_t w;
    diag_est(dm, 0, &w);
    assert_int_equal(w.n, 0);
    diag_drift_t da, db;
    diag_drift(dm, &da);
    diag_drift(dr, &db);
    assert_int_equal(da.alarms, db.alarms);
    assert_int_equal(da.last_alarm, db.last_alarm);
    assert_int_equal(da.armed, db.armed);
    assert_true(da.statistic == db.statistic);

    /* Queries: NAN for it, the others' answers unchanged; live and from a snapshot. */
    double *work = malloc(model_work_size(m) * sizeof *work);
    double *snap = malloc(model_snap_size(m) * sizeof *snap);
    model_snap(m, snap);
    double x[2] = {0.3, 4.0}, v[3], sd[3], rv[2], rsd[2];
    assert_int_equal(model_value(ref, x, 2, rv, rsd, work), 0);
    for (int live = 0; live < 2; live++) {
        if (live)
            assert_int_equal(model_value(m, x, 2, v, sd, work), 0);
        else
            assert_int_equal(model_snap_value(m, snap, x, 2, v, sd, work), 0);
        assert_true(isnan(v[0]) && isnan(sd[0]));
        assert_memory_equal(v + 1, rv, sizeof rv);
        assert_true(isnan(sd[1]) && isnan(rsd[0]));
        assert_true(sd[2] == rsd[1] && sd[2] > 0);
    }
    for (size_t i = 0; i < model_snap_size(m); i++)
        assert_true(isfinite(snap[i]));

    /* model_replay: the same bits, on 0 (auto), 1, 2 and 3 workers. */
    size_t len;
    uint8_t *buf = saved(m, &len);
    unsigned threads[] = {0, 1, 2, 3};
    for (size_t c = 0; c < sizeof threads / sizeof threads[0]; c++) {
        struct model *r = build(&fx.spec);
        struct model_replay *rp = model_replay_new(r, threads[c], 0);
        for (int i = 0; i < 300; i++) {
            double xi[2] = {sin(0.37 * i), 5.0 + 4.0 * cos(0.21 * i)};
            double xn[2] = {sin(0.37 * (i + 1)), 5.0 + 4.0 * cos(0.21 * (i + 1))};
            model_obs_t t = obs(xi, xi[0] - 0.1 * xi[1], xn, i % 17 == 16, i % 3 ? "unit-a" : NULL);
            if (i % 5 == 0)
                t.dt_s = 0.5 + (i % 4);
            char err[256] = "";
            assert_int_equal(model_replay_push(rp, &t, err, sizeof err), 0);
        }
        model_replay_end(rp);
        assert_state(r, buf, len);
        model_free(r);
    }

    /* Save -> load keeps the flag; a reset clears it. */
    struct model *l = build(&fx.spec);
    char err[256] = "";
    assert_int_equal(model_load(l, buf, len, err, sizeof err), 0);
    assert_int_equal(model_diverged(l), 1);
    assert_true(model_est_diverged(l, 0));
    model_reset(l);
    assert_int_equal(model_diverged(l), 0);
    free(buf);
    free(snap);
    free(work);
    model_free(l);
    model_free(m);
    model_free(ref);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(built_model_answers_queries),
        cmocka_unit_test(snapshot_answers_like_the_model),
        cmocka_unit_test(bad_transitions_leave_the_model_unchanged),
        cmocka_unit_test(model_check_accepts_without_changing),
        cmocka_unit_test(bad_specs_are_refused),
        cmocka_unit_test(footprint_is_checked_before_building),
        cmocka_unit_test(discount_per_second_and_per_step),
        cmocka_unit_test(terminal_ignores_x_next),
        cmocka_unit_test(counters_count),
        cmocka_unit_test(value_of_every_estimator),
        cmocka_unit_test(save_load_continues_identically),
        cmocka_unit_test(replay_equals_observe),
        cmocka_unit_test(corrupted_state_is_refused),
        cmocka_unit_test(mismatched_state_is_refused),
        cmocka_unit_test(diverging_estimator_leaves_the_others_alone),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
