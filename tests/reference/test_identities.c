/*
 * test_identities.c - exact identities between estimators (van Seijen &
 * Sutton 2014, "True online TD(lambda)", ICML; van Seijen et al. 2016, JMLR 17):
 * true online TD(0) is TD(0); true online TD(1) at the end of an episode
 * equals one gradient Monte Carlo sweep over that episode from the weights at
 * its start.  And, by construction of the n-step target, 1-step TD is TD(0).
 */
#include "testutil.h"

#include "learn/est.h"
#include "learn/rng.h"

#define N 5

static struct est *make(enum est_kind kind, double alpha, double lambda)
{
    est_params_t p;
    est_params_default(kind, &p);
    p.alpha = alpha;
    p.lambda = lambda;
    p.nstep = 1;
    p.init = 0.3;
    struct est *e = NULL;
    char err[200];
    assert_int_equal(est_new(&p, N, 1, &e, err, sizeof err), 0);
    return e;
}

/* Feeds the same episode of length len (random features in [0,1)) to every estimator. */
static void episode(struct est **e, int ne, rng_t *g, int len, double gamma)
{
    double phi[N], phin[N];
    for (int i = 0; i < N; i++)
        phi[i] = rng_unit(g);
    for (int t = 0; t < len; t++) {
        for (int i = 0; i < N; i++)
            phin[i] = rng_unit(g);
        double r = 2 * rng_unit(g) - 1;
        int terminal = t == len - 1;
        for (int k = 0; k < ne; k++)
            assert_int_equal(est_observe(e[k], 0, phi, r, phin, gamma, terminal), 0);
        memcpy(phi, phin, sizeof phi);
    }
}

static void assert_weights_near(const struct est *a, const struct est *b, double tol)
{
    for (int i = 0; i < N; i++)
        assert_near(est_weights(a)[i], est_weights(b)[i], tol);
}

static void true_online_td0_is_td0(void **state)
{
    (void)state;
    struct est *e[3] = {make(EST_TD, 0.1, 0), make(EST_TD_LAMBDA, 0.1, 0.0),
                        make(EST_TD_N, 0.1, 0)};
    rng_t g;
    rng_init(&g, 77);
    for (int ep = 0; ep < 50; ep++) {
        episode(e, 3, &g, 1 + (int)rng_below(&g, 30), 0.95);
        assert_weights_near(e[1], e[0], 1e-12);
        /* 1-step TD performs the same arithmetic as TD(0): bit-identical. */
        assert_memory_equal(est_weights(e[2]), est_weights(e[0]), N * sizeof(double));
    }
    for (int k = 0; k < 3; k++)
        est_free(e[k]);
}

static void true_online_td1_is_monte_carlo(void **state)
{
    (void)state;
    const double gammas[] = {1.0, 0.9};
    for (int gi = 0; gi < 2; gi++) {
        struct est *e[2] = {make(EST_MC, 0.05, 0), make(EST_TD_LAMBDA, 0.05, 1.0)};
        rng_t g;
        rng_init(&g, 2014);
        double moved = 0;
        for (int ep = 0; ep < 40; ep++) {
            double before = est_weights(e[0])[0];
            episode(e, 2, &g, 2 + (int)rng_below(&g, 25), gammas[gi]);
            moved += fabs(est_weights(e[0])[0] - before);
            /* At every episode end the two agree (they may differ inside an episode). */
            assert_weights_near(e[1], e[0], 1e-10);
        }
        assert_true(moved > 0.1); /* the weights really moved */
        est_free(e[0]);
        est_free(e[1]);
    }
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(true_online_td0_is_td0),
        cmocka_unit_test(true_online_td1_is_monte_carlo),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
