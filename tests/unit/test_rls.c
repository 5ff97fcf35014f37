/*
 * test_rls.c - RLS-TD specifics: the gain-denominator guard, the uncertainty
 * it reports (never 0 from a broken P), tracking with a forgetting factor, and
 * the covariance reset of a wound-up P with the health it reports.  (The LSTD
 * identity, Boyan's chain and wind-up are in tests/reference/; a format-1
 * state loading is in test_est.)
 */
#include "testutil.h"

#include <stdlib.h>

#include "learn/est.h"
#include "learn/rng.h"
#include "worth/errors.h"

static struct est *make(size_t n, double mu, double delta)
{
    est_params_t p;
    est_params_default(EST_RLS_TD, &p);
    p.forget = mu;
    p.delta = delta;
    struct est *e = NULL;
    char err[200];
    assert_int_equal(est_new(&p, n, 1, &e, err, sizeof err), 0);
    return e;
}

/*
 * With P = delta I and lambda = 0 the denominator is mu + delta phi.(phi - g phi');
 * phi = [1, 0], g = 1, phi' = [1 + mu/delta, 0] makes it exactly 0.  The step
 * must leave w and P alone and be counted.
 */
static void zero_denominator_is_guarded(void **state)
{
    (void)state;
    double mu = 1.0, delta = 4.0; /* exact binary fractions: den is exactly 0 */
    struct est *e = make(2, mu, delta);
    double phi[2] = {1, 0}, phin[2] = {1 + mu / delta, 0};
    est_stats_t before, after;
    est_stats(e, &before);
    assert_int_equal(est_observe(e, 0, phi, 5.0, phin, 1.0, 0), 0);
    est_stats(e, &after);
    assert_int_equal(after.guarded, 1);
    assert_int_equal(after.updates, 1);
    assert_near(after.trace_p, before.trace_p, 0);
    assert_near(est_weights(e)[0], 0.0, 0);
    est_free(e);
}

/*
 * A negative denominator is a legitimate Sherman-Morrison step of the
 * instrumental recursion (A + z d' passes through singular): it is applied,
 * and the weights still equal ridge LSTD with eps = 1/delta.  Here
 * phi' = [2, 0] gives den = 1 + 4 (1 - 2) = -3.
 */
static void negative_denominator_is_applied(void **state)
{
    (void)state;
    struct est *e = make(2, 1.0, 4.0);
    est_params_t p;
    est_params_default(EST_LSTD, &p);
    p.ridge = 1.0 / 4.0;
    p.refit_every = 1;
    struct est *lstd = NULL;
    char err[100];
    assert_int_equal(est_new(&p, 2, 1, &lstd, err, sizeof err), 0);
    double phi[2] = {1, 0}, phin[2] = {2, 0};
    assert_int_equal(est_observe(e, 0, phi, 5.0, phin, 1.0, 0), 0);
    assert_int_equal(est_observe(lstd, 0, phi, 5.0, phin, 1.0, 0), 0);
    est_stats_t st;
    est_stats(e, &st);
    assert_int_equal(st.guarded, 0);
    /* (1/4 + 1*(1-2)) w = 5  =>  w = -20/3 */
    assert_near(est_weights(e)[0], -20.0 / 3.0, 1e-12);
    assert_near(est_weights(e)[0], est_weights(lstd)[0], 1e-12);
    est_free(e);
    est_free(lstd);
}

/*
 * sd(x) = sqrt(s2 phi'P phi): noisy rewards on state A only.  The sd at A
 * shrinks as data grows; at B, never visited, it stays larger.
 */
static void sd_reflects_data(void **state)
{
    (void)state;
    struct est *e = make(2, 1.0, 100.0);
    rng_t g;
    rng_init(&g, 8);
    double a[2] = {1, 0}, b[2] = {0, 1}, sd10 = 0, sd1000 = 0, sdb = 0;
    for (int t = 1; t <= 1000; t++) {
        double r = 1.0 + (rng_unit(&g) - 0.5); /* terminal, noise sd 0.29 */
        assert_int_equal(est_observe(e, 0, a, r, NULL, 0.9, 1), 0);
        if (t == 10)
            assert_int_equal(est_sd(e, a, &sd10), 0);
    }
    assert_int_equal(est_sd(e, a, &sd1000), 0);
    assert_int_equal(est_sd(e, b, &sdb), 0);
    print_message("sd at A after 10: %g, after 1000: %g; at unvisited B: %g\n", sd10, sd1000, sdb);
    assert_true(isfinite(sd1000) && sd1000 > 0);
    assert_below(sd1000, sd10);
    assert_below(10 * sd1000, sdb);
    /* Standard error of a mean of 1000 draws with sd 1/sqrt(12): about 0.0091. */
    assert_near(sd1000, 1.0 / sqrt(12.0) / sqrt(1000.0), 0.002);
    est_free(e);
}

/*
 * With mu = 0.9 the estimate follows a step change in the reward; with mu = 1
 * it averages.  The regularised guard keeps the prior I/delta: against the
 * data's information 1/(1-mu) = 10 it leaves w = 3 * 10 / (10 + 1/delta).
 */
static void forgetting_tracks_a_change(void **state)
{
    (void)state;
    struct est *fast = make(1, 0.9, 100.0), *slow = make(1, 1.0, 100.0);
    double phi[1] = {1};
    for (int t = 0; t < 400; t++) {
        double r = t < 200 ? 1.0 : 3.0;
        assert_int_equal(est_observe(fast, 0, phi, r, NULL, 0.9, 1), 0);
        assert_int_equal(est_observe(slow, 0, phi, r, NULL, 0.9, 1), 0);
    }
    assert_near(est_weights(fast)[0], 3.0 * 10 / (10 + 1 / 100.0), 1e-6);
    assert_near(est_weights(slow)[0], 2.0, 0.01);
    est_free(fast);
    est_free(slow);
}

/*
 * Guard none, mu = 1/2, and a third feature that is always 0: row and column 3
 * of P take no part in any update, so P_33 = delta 2^t exactly after t
 * updates.  It passes the ceiling delta / DBL_EPSILON = delta 2^52 at t = 53,
 * where P goes back to delta I; again at t = 106.  Health is unhealthy for
 * 10 n = 30 updates from each reset on.  The sd in the unexcited direction
 * grows with P but is never 0, and the weights stay finite throughout.
 */
static void wound_up_p_is_reset(void **state)
{
    (void)state;
    est_params_t p;
    est_params_default(EST_RLS_TD, &p);
    p.forget = 0.5;
    p.delta = 100.0;
    p.guard = EST_GUARD_NONE;
    struct est *e = NULL;
    char err[200];
    assert_int_equal(est_new(&p, 3, 1, &e, err, sizeof err), 0);
    rng_t g;
    rng_init(&g, 53);
    double phi[3] = {0}, phin[3] = {0}, e3[3] = {0, 0, 1};
    for (uint64_t t = 1; t <= 120; t++) {
        phi[0] = rng_unit(&g);
        phi[1] = rng_unit(&g);
        phin[0] = rng_unit(&g);
        phin[1] = rng_unit(&g);
        double r = rng_unit(&g) - 0.5;
        assert_int_equal(est_observe(e, 0, phi, r, phin, 0.9, t % 10 == 0), 0);
        est_stats_t st;
        est_stats(e, &st);
        uint64_t resets = t >= 106 ? 2 : t >= 53 ? 1 : 0;
        uint64_t since = t >= 106 ? t - 106 : t - 53;
        int unhealthy = resets > 0 && since < 30;
        if (st.p_resets != resets || st.health != (unhealthy ? EST_HEALTH_UNHEALTHY : 0))
            print_error("t %llu: p_resets %llu, health %d\n", (unsigned long long)t,
                        (unsigned long long)st.p_resets, st.health);
        assert_int_equal(st.p_resets, resets);
        assert_int_equal(st.health, unhealthy ? EST_HEALTH_UNHEALTHY : EST_HEALTH_OK);
        if (unhealthy)
            assert_string_equal(st.why, EST_WHY_P_RESET);
        else
            assert_null(st.why);
        if (t == 52)
            assert_near(st.trace_p, 100.0 * ldexp(1.0, 52), 1e3 * ldexp(1.0, 52));
        if (t == 53 || t == 106)
            assert_near(st.trace_p, 300.0, 0); /* just reset: delta I */
        const double *w = est_weights(e);
        assert_true(isfinite(w[0]) && isfinite(w[1]));
        assert_true(w[2] == 0.0);
        double sd = 0;
        assert_int_equal(est_sd(e, e3, &sd), 0);
        assert_true(isfinite(sd) && sd > 0);
        if (t == 60) {
            /* Saved and loaded, the reset record (and so the health) carries over. */
            size_t len = 0;
            est_save(e, NULL, 0, &len);
            uint8_t *buf = malloc(len);
            assert_int_equal(est_save(e, buf, len, &len), 0);
            struct est *c = NULL;
            assert_int_equal(est_new(&p, 3, 1, &c, err, sizeof err), 0);
            assert_int_equal(est_load(c, buf, len, err, sizeof err), 0);
            est_stats_t sc;
            est_stats(c, &sc);
            assert_int_equal(sc.p_resets, 1);
            assert_int_equal(sc.health, EST_HEALTH_UNHEALTHY);
            free(buf);
            est_free(c);
        }
    }
    est_free(e);

    /* The regularised guard never needs the reset on the same stream. */
    p.guard = EST_GUARD_REGULARISE;
    assert_int_equal(est_new(&p, 3, 1, &e, err, sizeof err), 0);
    rng_init(&g, 53);
    for (int t = 1; t <= 120; t++) {
        phi[0] = rng_unit(&g);
        phi[1] = rng_unit(&g);
        phin[0] = rng_unit(&g);
        phin[1] = rng_unit(&g);
        assert_int_equal(est_observe(e, 0, phi, rng_unit(&g) - 0.5, phin, 0.9, t % 10 == 0), 0);
    }
    est_stats_t st;
    est_stats(e, &st);
    assert_int_equal(st.p_resets, 0);
    assert_int_equal(st.health, EST_HEALTH_OK);
    est_free(e);
}

/*
 * sd is sqrt(s2 phi'P phi) only when phi'P phi is a number >= 0: a P holding NaN or
 * infinities, or an indefinite one, gives NAN (null on the wire), never 0 ("certain").
 * Checked on the published snapshot: w (2), the diverged flag, s2, then P row-major.
 */
static void sd_from_a_broken_p_is_nan(void **state)
{
    (void)state;
    struct est *e = make(2, 1.0, 100.0);
    double a[2] = {1, 0}, both[2] = {1, 1};
    for (int t = 0; t < 20; t++)
        assert_int_equal(est_observe(e, 0, a, t % 2 ? 1.5 : 0.5, NULL, 0.9, 1), 0);
    assert_int_equal(est_snap_size(e), 2 + 1 + 1 + 4);
    double snap[8], bad[8], sd;
    est_snap(e, snap);
    assert_true(snap[2] == 0.0 && snap[3] > 0);
    est_snap_value(e, snap, both, &sd);
    assert_true(isfinite(sd) && sd > 0);

    const double broken[4][4] = {
        {NAN, 0, 0, 1},      /* NaN on the diagonal */
        {1, INFINITY, 0, 1}, /* an infinite entry */
        {-1, 0, 0, -1},      /* negative definite */
        {1, -5, 0, 1},       /* positive diagonal, phi'P phi = 1 - 5 + 1 < 0 at [1, 1] */
    };
    for (int k = 0; k < 4; k++) {
        memcpy(bad, snap, sizeof bad);
        memcpy(bad + 4, broken[k], sizeof broken[k]);
        double v = est_snap_value(e, bad, both, &sd);
        if (!isnan(sd))
            print_error("case %d: sd %g\n", k, sd);
        assert_true(isnan(sd));
        assert_true(isfinite(v)); /* the value itself does not depend on P */
    }
    /* The indefinite P still answers where phi'P phi >= 0: at [1, 0] it is P_00 = 1. */
    est_snap_value(e, bad, a, &sd);
    assert_near(sd, sqrt(snap[3]), 1e-15);
    est_free(e);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(zero_denominator_is_guarded),
        cmocka_unit_test(negative_denominator_is_applied),
        cmocka_unit_test(sd_reflects_data),
        cmocka_unit_test(forgetting_tracks_a_change),
        cmocka_unit_test(wound_up_p_is_reset),
        cmocka_unit_test(sd_from_a_broken_p_is_nan),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
