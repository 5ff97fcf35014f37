/*
 * test_random_walk.c - tabular TD(0) on the 5-state random walk of Sutton &
 * Barto, Reinforcement Learning: An Introduction, 2nd ed., Example 6.2.
 *
 * States A..E, every episode starts in C, each step moves left or right with
 * probability 1/2; leaving A ends with reward 0, leaving E with reward +1;
 * gamma = 1.  True values: 1/6, 2/6, 3/6, 4/6, 5/6.  Values start at 0.5
 * (weights init 0.5 with one-hot features).
 */
#include "testutil.h"

#include "learn/est.h"
#include "learn/rng.h"

#define S 5

static struct est *make(double alpha)
{
    est_params_t p;
    est_params_default(EST_TD, &p);
    p.alpha = alpha;
    p.init = 0.5;
    struct est *e = NULL;
    char err[200];
    assert_int_equal(est_new(&p, S, 1, &e, err, sizeof err), 0);
    return e;
}

static void onehot(int s, double *phi)
{
    memset(phi, 0, S * sizeof *phi);
    phi[s] = 1.0;
}

static void episode(struct est *e, rng_t *g)
{
    double phi[S], phin[S];
    int s = 2;
    for (;;) {
        int s2 = s + (rng_below(g, 2) ? 1 : -1);
        onehot(s, phi);
        if (s2 < 0 || s2 >= S) {
            assert_int_equal(est_observe(e, 0, phi, s2 >= S ? 1.0 : 0.0, NULL, 1.0, 1), 0);
            return;
        }
        onehot(s2, phin);
        assert_int_equal(est_observe(e, 0, phi, 0.0, phin, 1.0, 0), 0);
        s = s2;
    }
}

static double rms_error(const struct est *e)
{
    const double *w = est_weights(e);
    double sum = 0;
    for (int s = 0; s < S; s++) {
        double err = w[s] - (s + 1) / 6.0;
        sum += err * err;
    }
    return sqrt(sum / S);
}

/*
 * After one episode from V = 0.5 only the last state moved, by alpha/2 towards
 * its terminal reward, whichever end the walk left by; so the RMS error is
 * exactly sqrt(((1/3 - alpha/2)^2 + 1/6) / 5) (derived from Example 6.2's
 * set-up: initial errors -1/3, -1/6, 0, 1/6, 1/3).
 */
static void one_episode_closed_form(void **state)
{
    (void)state;
    const double alphas[] = {0.05, 0.1, 0.15};
    for (size_t a = 0; a < 3; a++) {
        double alpha = alphas[a];
        double expect = sqrt((pow(1.0 / 3 - alpha / 2, 2) + 1.0 / 6) / 5);
        for (uint64_t seed = 1; seed <= 20; seed++) {
            rng_t g;
            rng_init(&g, seed);
            struct est *e = make(alpha);
            episode(e, &g);
            assert_near(rms_error(e), expect, 1e-12);
            est_free(e);
        }
    }
}

/*
 * Sutton & Barto (2nd ed.), Figure 6.2 (right): after 100 episodes, averaged
 * over 100 runs, TD(0) with alpha 0.05 and 0.1 has an RMS error under 0.1.
 */
static void hundred_episodes_hundred_runs(void **state)
{
    (void)state;
    const double alphas[] = {0.05, 0.1};
    for (size_t a = 0; a < 2; a++) {
        double total = 0;
        for (uint64_t run = 0; run < 100; run++) {
            rng_t g;
            rng_init(&g, 1000 + run);
            struct est *e = make(alphas[a]);
            for (int ep = 0; ep < 100; ep++)
                episode(e, &g);
            total += rms_error(e);
            est_free(e);
        }
        double mean = total / 100;
        print_message("alpha %.2f: mean RMS error after 100 episodes over 100 runs %.4f\n",
                      alphas[a], mean);
        assert_below(mean, 0.1);
        assert_below(0.01, mean); /* and it has not collapsed to zero: still a sampled estimate */
    }
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(one_episode_closed_form),
        cmocka_unit_test(hundred_episodes_hundred_runs),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
