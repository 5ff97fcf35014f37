/*
 * test_rls.c - RLS-TD specifics: the gain-denominator guard, the uncertainty
 * it reports, and tracking with a forgetting factor.  (The LSTD identity,
 * Boyan's chain and wind-up are in tests/reference/.)
 */
#include "testutil.h"

#include <stdlib.h>

#include "est.h"
#include "rng.h"
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

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(zero_denominator_is_guarded),
        cmocka_unit_test(negative_denominator_is_applied),
        cmocka_unit_test(sd_reflects_data),
        cmocka_unit_test(forgetting_tracks_a_change),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
