/*
 * test_boyan.c - LSTD and RLS-TD on Boyan's chain (Boyan 2002), where both
 * must recover the exact linear value function w = [-24, -16, -8, 0].
 */
#include "testutil.h"

#include "boyan.h"
#include "learn/est.h"
#include "learn/rng.h"
#include "worth/errors.h"

static struct est *make(enum est_kind kind, double lambda, double ridge, double delta,
                        unsigned refit_every)
{
    est_params_t p;
    est_params_default(kind, &p);
    p.lambda = lambda;
    p.ridge = ridge;
    p.delta = delta;
    p.forget = 1.0;
    p.refit_every = refit_every;
    struct est *e = NULL;
    char err[200];
    assert_int_equal(est_new(&p, BOYAN_N, 1, &e, err, sizeof err), 0);
    return e;
}

/* One transition s -> s2 of the chain. */
static void step(struct est *e, int s, int s2)
{
    double phi[BOYAN_N], phin[BOYAN_N];
    boyan_phi(s, phi);
    boyan_phi(s2, phin);
    double r = s == 1 ? -2.0 : -3.0;
    assert_int_equal(est_observe(e, 0, phi, r, phin, 1.0, s2 == 0), 0);
}

/*
 * The deterministic data set that takes every branch once: for s = 12 down to
 * 2, s -> s-1 then s -> s-2; then 1 -> 0.  Its empirical model is the chain's
 * true model, so LSTD(0) must return the true weights (Boyan 2002).
 */
static void lstd_recovers_exact_weights(void **state)
{
    (void)state;
    struct est *e = make(EST_LSTD, 0.0, 0.0, 1, 1000000);
    for (int s = 12; s >= 2; s--) {
        step(e, s, s - 1);
        step(e, s, s - 2);
    }
    step(e, 1, 0);
    est_train_t rep;
    assert_int_equal(est_train(e, &(est_train_opts_t){.passes = 1}, &rep), 0);
    const double *w = est_weights(e);
    for (int i = 0; i < BOYAN_N; i++)
        assert_near(w[i], boyan_w[i], 1e-9);
    est_stats_t st;
    est_stats(e, &st);
    assert_int_equal(st.guarded, 0); /* solved by LU, no fallback */
    est_free(e);
}

/*
 * With w0 = 0 and mu = 1, RLS-TD(0) started from P0 = delta I equals ridge
 * LSTD(0) with eps = 1/delta after every step (Sherman-Morrison on
 * A + I/delta); checked on the same data set, delta = 100, eps = 0.01.
 */
static void rls_equals_ridge_lstd_every_step(void **state)
{
    (void)state;
    struct est *rls = make(EST_RLS_TD, 0.0, 0.0, 100.0, 1);
    struct est *lstd = make(EST_LSTD, 0.0, 0.01, 1, 1);
    int steps = 0;
    for (int s = 12; s >= 1; s--) {
        for (int b = 1; b <= (s >= 2 ? 2 : 1); b++) {
            step(rls, s, s - b);
            step(lstd, s, s - b);
            steps++;
            const double *wr = est_weights(rls), *wl = est_weights(lstd);
            for (int i = 0; i < BOYAN_N; i++)
                assert_near(wr[i], wl[i], 1e-9);
        }
    }
    assert_int_equal(steps, 23);
    est_free(rls);
    est_free(lstd);
}

/* 1000 sampled episodes: LSTD(lambda), lambda in {0, 0.5, 1}, and RLS-TD within 0.5 of w. */
static void sampled_episodes(void **state)
{
    (void)state;
    struct est *e[4] = {
        make(EST_LSTD, 0.0, 1e-6, 1, 1000),
        make(EST_LSTD, 0.5, 1e-6, 1, 1000),
        make(EST_LSTD, 1.0, 1e-6, 1, 1000),
        make(EST_RLS_TD, 0.0, 0.0, 100.0, 1),
    };
    rng_t g;
    rng_init(&g, 2002);
    for (int ep = 0; ep < 1000; ep++) {
        int s = 12;
        while (s > 0) {
            int s2 = s == 1 ? 0 : s - 1 - (int)rng_below(&g, 2);
            for (int k = 0; k < 4; k++)
                step(e[k], s, s2);
            s = s2;
        }
    }
    for (int k = 0; k < 4; k++) {
        est_train_t rep;
        if (k < 3)
            assert_int_equal(est_train(e[k], &(est_train_opts_t){.passes = 1}, &rep), 0);
        const double *w = est_weights(e[k]);
        for (int i = 0; i < BOYAN_N; i++)
            assert_near(w[i], boyan_w[i], 0.5);
        est_free(e[k]);
    }
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(lstd_recovers_exact_weights),
        cmocka_unit_test(rls_equals_ridge_lstd_every_step),
        cmocka_unit_test(sampled_episodes),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
