/*
 * test_health.c - the verdicts and the headline's hysteresis, on diagnostics
 * fed by hand (gamma 0, horizon 1: each return is its reward, known at once),
 * with the estimators' counters made up.
 */
#include "testutil.h"

#include <math.h>
#include <string.h>

#include "learn/diag.h"
#include "learn/health.h"
#include "worth/errors.h"

static struct diag *make_diag(size_t n_est)
{
    diag_params_t p;
    diag_params_default(0.0, &p);
    p.horizon = 1;
    struct diag *d = NULL;
    char err[100];
    assert_int_equal(diag_new(&p, n_est, 1, &d, err, sizeof err), 0);
    return d;
}

static void td_params(est_params_t *p, size_t n)
{
    for (size_t i = 0; i < n; i++)
        est_params_default(EST_TD, &p[i]);
}

/* Counters of a sound td estimator after t updates. */
static void stats_at(est_stats_t *st, size_t n, uint64_t t)
{
    memset(st, 0, n * sizeof *st);
    for (size_t i = 0; i < n; i++) {
        st[i].updates = t;
        st[i].health = EST_HEALTH_OK;
    }
}

/* One transition: estimator k errs by e[k] (sign alternating with t), the return is 1. */
static void step(struct diag *d, struct health *h, est_stats_t *st, uint64_t t, const double *e,
                 size_t n)
{
    double pred[4];
    double sign = (t % 2) ? 1.0 : -1.0;
    for (size_t k = 0; k < n; k++)
        pred[k] = 1.0 + sign * e[k];
    diag_observe(d, 0, pred, 1.0, 0.0, 0, 0.0);
    stats_at(st, n, t);
    health_update(h, st, d);
}

/*
 * Two estimators of about the same quality that take turns being a little
 * better (5% of the error, blocks of 300 transitions): the lower windowed RMS
 * changes hands many times, so a headline without hysteresis would flap; with
 * it, the headline never moves.
 */
static void no_flap_on_small_fluctuations(void **state)
{
    (void)state;
    est_params_t p[2];
    td_params(p, 2);
    struct diag *d = make_diag(2);
    struct health *h = health_new(2, 4, 1, 0, p);
    est_stats_t st[2];
    unsigned leader_changes = 0;
    size_t leader = 0;
    for (uint64_t t = 1; t <= 20000; t++) {
        double e[2] = {1.0, (t / 300) % 2 ? 0.95 : 1.05};
        step(d, h, st, t, e, 2);
        diag_est_t a, b;
        diag_est(d, 0, &a);
        diag_est(d, 1, &b);
        size_t now = b.rms_window < a.rms_window ? 1 : 0;
        if (t > HEALTH_MIN_RETURNS && now != leader) {
            leader_changes++;
            leader = now;
        }
    }
    /* The naive rule ("lowest RMS now") would have switched this often. */
    assert_true(leader_changes >= 20);
    health_head_t hd;
    const char *names[2] = {"a", "b"};
    health_head(h, st, d, names, &hd);
    assert_int_equal(hd.switches, 0);
    assert_int_equal(hd.index, 0);
    health_free(h);
    diag_free(d);
}

/*
 * A clearly better estimator takes over, but only after it has led by the
 * margin for HEALTH_HOLD transitions running.
 */
static void a_sustained_lead_takes_over_after_the_hold(void **state)
{
    (void)state;
    est_params_t p[2];
    td_params(p, 2);
    struct diag *d = make_diag(2);
    struct health *h = health_new(2, 4, 1, 0, p);
    est_stats_t st[2];
    uint64_t t = 0, lead_from = 0, moved_at = 0;
    for (t = 1; t <= 3000; t++) {
        double e[2] = {1.0, 1.0};
        step(d, h, st, t, e, 2);
    }
    assert_int_equal(health_headline(h), 0);
    for (; t <= 10000 && !moved_at; t++) {
        double e[2] = {1.0, 0.5};
        step(d, h, st, t, e, 2);
        diag_est_t a, b;
        diag_est(d, 0, &a);
        diag_est(d, 1, &b);
        if (!lead_from && b.rms_window < (1.0 - HEALTH_MARGIN) * a.rms_window)
            lead_from = t;
        if (health_headline(h) == 1)
            moved_at = t;
    }
    assert_true(lead_from > 0);
    assert_int_equal(moved_at - lead_from + 1, HEALTH_HOLD);
    health_free(h);
    diag_free(d);
}

/* A headline that stops being ok is left at once; a diverged one is never chosen. */
static void an_unsound_headline_is_left_at_once(void **state)
{
    (void)state;
    est_params_t p[2];
    td_params(p, 2);
    struct diag *d = make_diag(2);
    struct health *h = health_new(2, 4, 1, 0, p);
    est_stats_t st[2];
    for (uint64_t t = 1; t <= 200; t++) {
        double e[2] = {1.0, 1.2};
        step(d, h, st, t, e, 2);
    }
    assert_int_equal(health_headline(h), 0);
    double pred[2] = {1.0, 1.0};
    diag_observe(d, 0, pred, 1.0, 0.0, 0, 0.0);
    stats_at(st, 2, 201);
    st[0].health = EST_HEALTH_DIVERGED;
    health_update(h, st, d);
    assert_int_equal(health_headline(h), 1);
    health_est_t v;
    const char *names[2] = {"a", "b"};
    health_est(h, 0, st, d, names, &v);
    assert_int_equal(v.state, HEALTH_DIVERGED);
    assert_int_equal(v.estimate, 0);
    health_free(h);
    diag_free(d);
}

/* Warming by kind, and unhealthy next to a far better estimator, with reasons. */
static void verdicts_and_reasons(void **state)
{
    (void)state;
    est_params_t p[4];
    est_params_default(EST_TD, &p[0]);
    est_params_default(EST_LSTD, &p[1]);
    est_params_default(EST_RLS_TD, &p[2]);
    p[2].forget = 0.999; /* 3 / (1 - forget) = 3000 updates to wash the prior out */
    est_params_default(EST_TD, &p[3]);
    struct diag *d = make_diag(4);
    struct health *h = health_new(4, 4, 1, 0, p);
    est_stats_t st[4];
    const char *names[4] = {"td", "lstd", "rls", "bad"};
    for (uint64_t t = 1; t <= 100; t++) {
        double e[4] = {0.1, 0.1, 0.1, 5.0};
        step(d, h, st, t, e, 4);
    }
    health_est_t v;
    health_est(h, 1, st, d, names, &v);
    assert_int_equal(v.state, HEALTH_WARMING);
    assert_int_equal(v.estimate, 0);
    assert_non_null(strstr(v.why, "no solve yet"));
    health_est(h, 2, st, d, names, &v);
    assert_int_equal(v.state, HEALTH_WARMING);
    assert_int_equal(v.estimate, 1);
    assert_non_null(strstr(v.why, "100 of 3000 updates"));
    health_est(h, 3, st, d, names, &v);
    assert_int_equal(v.state, HEALTH_UNHEALTHY);
    assert_non_null(strstr(v.why, "50.0 x that of td (0.1), the best"));
    health_est(h, 0, st, d, names, &v);
    assert_int_equal(v.state, HEALTH_OK);
    assert_string_equal(v.why, "");
    /* Few returns: warming, whatever the kind. */
    struct diag *d2 = make_diag(4);
    health_est(h, 0, st, d2, names, &v);
    assert_int_equal(v.state, HEALTH_WARMING);
    assert_non_null(strstr(v.why, "0 of 50 realised returns"));
    health_free(h);
    diag_free(d);
    diag_free(d2);
}

/* An lstd solve that fell back to least squares (guarded) makes it unhealthy for two
 * refit periods, then it is ok again. */
static void near_singular_lstd_is_unhealthy_for_a_while(void **state)
{
    (void)state;
    est_params_t p[2];
    est_params_default(EST_TD, &p[0]);
    est_params_default(EST_LSTD, &p[1]); /* refit_every 100 */
    struct diag *d = make_diag(2);
    struct health *h = health_new(2, 4, 1, 0, p);
    est_stats_t st[2];
    const char *names[2] = {"td", "lstd"};
    health_est_t v;
    uint64_t guarded = 0;
    for (uint64_t t = 1; t <= 700; t++) {
        double e[2] = {1.0, 1.0}, pred[2];
        for (size_t k = 0; k < 2; k++)
            pred[k] = 1.0 + ((t % 2) ? e[k] : -e[k]);
        diag_observe(d, 0, pred, 1.0, 0.0, 0, 0.0);
        stats_at(st, 2, t);
        st[1].refits = t / 100;
        if (t == 300)
            guarded = 1; /* the solve at update 300 fell back */
        st[1].guarded = guarded;
        health_update(h, st, d);
        health_est(h, 1, st, d, names, &v);
        if (t >= 300 && t < 500) {
            assert_int_equal(v.state, HEALTH_UNHEALTHY);
            assert_non_null(strstr(v.why, "its solve at update 300 was near-singular"));
        } else if (t > HEALTH_MIN_RETURNS && t >= 100) {
            assert_int_equal(v.state, HEALTH_OK);
        }
    }
    health_free(h);
    diag_free(d);
}

/* The headline's state saves and loads; a bad index is refused. */
static void save_load(void **state)
{
    (void)state;
    est_params_t p[2];
    td_params(p, 2);
    struct diag *d = make_diag(2);
    struct health *h = health_new(2, 4, 1, 0, p), *g = health_new(2, 4, 1, 0, p);
    est_stats_t st[2];
    for (uint64_t t = 1; t <= 3000; t++) {
        double e[2] = {1.0, t > 1000 ? 0.3 : 1.0};
        step(d, h, st, t, e, 2);
    }
    assert_int_equal(health_headline(h), 1);
    uint8_t buf[128];
    ser_w w = {buf, sizeof buf, 0};
    health_save(h, &w);
    ser_r r = {buf, w.len, 0, 0};
    assert_int_equal(health_load(g, &r), 0);
    assert_int_equal(health_headline(g), 1);
    buf[0] = 7; /* headline index 7 of 2 */
    ser_r r2 = {buf, w.len, 0, 0};
    assert_int_equal(health_load(g, &r2), -1);
    health_free(h);
    health_free(g);
    diag_free(d);
}

/*
 * A diagnostics state in model format 2 (before sds, coverage and the
 * histogram), written field by field as that format laid it out, loads; its
 * pending steps are then scored without an sd.
 */
static void format_2_diagnostics_load(void **state)
{
    (void)state;
    diag_params_t p;
    diag_params_default(0.5, &p);
    p.horizon = 3;
    struct diag *d = NULL;
    char err[100];
    assert_int_equal(diag_new(&p, 1, 2, &d, err, sizeof err), 0);
    uint8_t buf[512];
    ser_w w = {buf, sizeof buf, 0};
    ser_put_u64(&w, 2); /* step */
    ser_put_u64(&w, 2); /* source 0: two pending steps, front 0 */
    ser_put_u64(&w, 0);
    double e[2][3] = {{1.0, 1.0, 0.5}, {2.0, 1.0, 0.5}}; /* prediction, r, g */
    ser_put_f64v(&w, e[0], 3);
    ser_put_f64v(&w, e[1], 3);
    ser_put_u64(&w, 0); /* source 1: none */
    ser_put_u64(&w, 0);
    ser_put_u64(&w, 0); /* estimator 0: n, sum, sumsq, ew, ewsq, ew_w */
    for (int i = 0; i < 5; i++)
        ser_put_f64(&w, 0.0);
    ser_put_f64(&w, 0.0); /* spread */
    ser_put_f64(&w, 0.0);
    ser_put_u64(&w, 0); /* drift: k, 8 doubles, 5 counters */
    double v[8] = {0, 0, 0, 1, 0, 0, 0, 0};
    ser_put_f64v(&w, v, 8);
    for (int i = 0; i < 5; i++)
        ser_put_u64(&w, 0);
    assert_true(ser_fits(&w));
    ser_r r = {buf, w.len, 0, 0};
    assert_int_equal(diag_load(d, &r, 2), 0);
    assert_int_equal(r.pos, w.len);
    /* The third step fills the window: the oldest return is 1 + .5 + .25 = 1.75. */
    double pred = 0.0, sd = 0.5;
    diag_observe_sd(d, 0, &pred, &sd, 1.0, 0.5, 0, NULL, 0);
    diag_est_t x;
    diag_est(d, 0, &x);
    assert_int_equal(x.n, 1);
    assert_true(fabs(x.bias - (1.0 - 1.75)) < 1e-15);
    assert_true(x.sd_n == 0.0); /* the loaded step had no sd */
    diag_free(d);
}

/*
 * Coverage and the 95% interval on errors of a known distribution: the error
 * is uniform on [-1, 1] (rng), so |e| / RMS has its 95% quantile at
 * 0.95 * sqrt(3) = 1.645 (RMS = 1/sqrt(3); worked by hand), V +- 2 RMS
 * covers every return, and an sd of 0.5 covers half within 1 sd and all
 * within 2.
 */
static void coverage_on_uniform_errors(void **state)
{
    (void)state;
    struct diag *d = make_diag(1);
    uint64_t s = 12345;
    for (int t = 0; t < 20000; t++) {
        s = s * 6364136223846793005ull + 1442695040888963407ull;
        double u = (double)(s >> 11) / 9007199254740992.0 * 2.0 - 1.0;
        double pred = 1.0 + u, sd = 0.5;
        diag_observe_sd(d, 0, &pred, &sd, 1.0, 0.0, 0, NULL, 0);
    }
    diag_est_t x;
    diag_est(d, 0, &x);
    assert_true(fabs(x.k95 - 0.95 * sqrt(3.0)) < 0.08);
    assert_true(fabs(x.cover_95 - 0.95) < 0.03);
    assert_true(x.cover_rms2 > 0.999);
    assert_true(fabs(x.cover_sd1 - 0.5) < 0.06);
    assert_true(x.cover_sd2 > 0.999);
    assert_true(fabs(x.half95 - x.k95 * x.rms_window) < 1e-12);
    diag_free(d);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(no_flap_on_small_fluctuations),
        cmocka_unit_test(a_sustained_lead_takes_over_after_the_hold),
        cmocka_unit_test(an_unsound_headline_is_left_at_once),
        cmocka_unit_test(verdicts_and_reasons),
        cmocka_unit_test(near_singular_lstd_is_unhealthy_for_a_while),
        cmocka_unit_test(save_load),
        cmocka_unit_test(format_2_diagnostics_load),
        cmocka_unit_test(coverage_on_uniform_errors),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
