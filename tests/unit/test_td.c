/*
 * test_td.c - the step-size estimators: TD(0), n-step TD and gradient Monte
 * Carlo, against targets worked out by hand on a 4-state chain (one-hot
 * features, so with alpha = 1 a weight becomes exactly its target).
 */
#include "testutil.h"

#include "learn/est.h"
#include "worth/errors.h"

#define N 4

static struct est *make(enum est_kind kind, double alpha, unsigned nstep, unsigned horizon,
                        unsigned max_episode, size_t sources)
{
    est_params_t p;
    est_params_default(kind, &p);
    p.alpha = alpha;
    p.nstep = nstep;
    p.horizon = horizon;
    p.max_episode = max_episode;
    struct est *e = NULL;
    char err[200];
    assert_int_equal(est_new(&p, N, sources, &e, err, sizeof err), 0);
    return e;
}

static void onehot(int s, double *phi)
{
    memset(phi, 0, N * sizeof *phi);
    if (s >= 0 && s < N)
        phi[s] = 1.0;
}

/* Episode s0 -> s1 -> s2 -> s3 -> end with rewards 1, 2, 3, 4 and gamma 0.5. */
static void chain(struct est *e, size_t src)
{
    double phi[N], phin[N];
    for (int s = 0; s < N; s++) {
        onehot(s, phi);
        onehot(s + 1, phin);
        assert_int_equal(est_observe(e, src, phi, s + 1.0, phin, 0.5, s == N - 1), 0);
    }
}

static void td0_one_step_by_hand(void **state)
{
    (void)state;
    est_params_t p;
    est_params_default(EST_TD, &p);
    p.alpha = 0.1;
    p.init = 0.2;
    struct est *e = NULL;
    char err[100];
    assert_int_equal(est_new(&p, 2, 1, &e, err, sizeof err), 0);
    double phi[2] = {1, 0}, phin[2] = {0, 1};
    /* delta = 1 + 0.5*0.2 - 0.2 = 0.9; w0 += 0.1*0.9 */
    assert_int_equal(est_observe(e, 0, phi, 1.0, phin, 0.5, 0), 0);
    assert_near(est_weights(e)[0], 0.29, 1e-15);
    assert_near(est_weights(e)[1], 0.2, 0);
    est_stats_t st;
    est_stats(e, &st);
    assert_near(st.td_last, 0.9, 1e-15);
    assert_int_equal(st.updates, 1);
    est_free(e);
}

/*
 * 3-step TD, alpha 1.  At the third transition s0 gets 1 + .5*2 + .25*3 +
 * .125*V(s3) = 2.75; the terminal transition flushes s1: 2 + .5*3 + .25*4 =
 * 4.5, s2: 3 + .5*4 = 5, s3: 4.
 */
static void nstep_targets_and_flush(void **state)
{
    (void)state;
    struct est *e = make(EST_TD_N, 1.0, 3, 0, 1, 1);
    double phi[N], phin[N];
    for (int s = 0; s < 3; s++) {
        onehot(s, phi);
        onehot(s + 1, phin);
        assert_int_equal(est_observe(e, 0, phi, s + 1.0, phin, 0.5, 0), 0);
        if (s < 2)
            assert_near(est_weights(e)[0], 0.0, 0); /* nothing before n rewards are known */
    }
    assert_near(est_weights(e)[0], 2.75, 1e-15);
    onehot(3, phi);
    assert_int_equal(est_observe(e, 0, phi, 4.0, NULL, 0.5, 1), 0);
    const double want[N] = {2.75, 4.5, 5.0, 4.0};
    for (int i = 0; i < N; i++)
        assert_near(est_weights(e)[i], want[i], 1e-15);
    est_free(e);
}

/* Returns of the chain: G0 = 1 + .5*2 + .25*3 + .125*4 = 3.25, G1 = 4.5, G2 = 5, G3 = 4. */
static void monte_carlo_episode_by_hand(void **state)
{
    (void)state;
    struct est *e = make(EST_MC, 1.0, 1, 0, 100, 1);
    double phi[N], phin[N];
    for (int s = 0; s < 3; s++) {
        onehot(s, phi);
        onehot(s + 1, phin);
        assert_int_equal(est_observe(e, 0, phi, s + 1.0, phin, 0.5, 0), 0);
    }
    for (int i = 0; i < N; i++)
        assert_near(est_weights(e)[i], 0.0, 0); /* nothing before the episode ends */
    onehot(3, phi);
    assert_int_equal(est_observe(e, 0, phi, 4.0, NULL, 0.5, 1), 0);
    const double want[N] = {3.25, 4.5, 5.0, 4.0};
    for (int i = 0; i < N; i++)
        assert_near(est_weights(e)[i], want[i], 1e-15);
    est_free(e);
}

/*
 * Truncated returns, H = 2, on a continuing cycle 0 -> 1 -> 2 -> 3 -> 0 with
 * reward = state + 1 and gamma 0.5: state s gets r_s + 0.5 r_{s+1}.
 */
static void monte_carlo_truncated_horizon(void **state)
{
    (void)state;
    struct est *e = make(EST_MC, 1.0, 1, 2, 1, 1);
    double phi[N], phin[N];
    for (int t = 0; t < 8; t++) {
        int s = t % N;
        onehot(s, phi);
        onehot((s + 1) % N, phin);
        assert_int_equal(est_observe(e, 0, phi, s + 1.0, phin, 0.5, 0), 0);
    }
    for (int s = 0; s < N; s++) {
        double want = (s + 1.0) + 0.5 * (((s + 1) % N) + 1.0);
        assert_near(est_weights(e)[s], want, 1e-15);
    }
    est_free(e);
}

/* An episode longer than max_episode is cut and each cut is counted as guarded. */
static void monte_carlo_long_episode_is_cut(void **state)
{
    (void)state;
    struct est *e = make(EST_MC, 1.0, 1, 0, 2, 1);
    chain(e, 0);
    est_stats_t st;
    est_stats(e, &st);
    assert_int_equal(st.guarded, 2); /* steps 2 and 3 each pushed out the oldest state */
    /* s0 was cut after two rewards: 1 + .5*2. */
    assert_near(est_weights(e)[0], 2.0, 1e-15);
    est_free(e);
}

/* Interleaved sources keep separate buffers: same result as feeding them one after another. */
static void sources_do_not_mix(void **state)
{
    (void)state;
    enum est_kind kinds[3] = {EST_TD_N, EST_MC, EST_TD_LAMBDA};
    for (int k = 0; k < 3; k++) {
        /* Source 0 walks states 0,1; source 1 walks states 2,3 (disjoint features). */
        struct est *a = make(kinds[k], 0.5, 2, 0, 100, 2), *b = make(kinds[k], 0.5, 2, 0, 100, 2);
        double phi[N], phin[N];
        for (int t = 0; t < 2; t++)
            for (size_t src = 0; src < 2; src++) {
                int s = (int)src * 2 + t;
                onehot(s, phi);
                onehot(s + 1, phin);
                assert_int_equal(est_observe(a, src, phi, 1.0 + s, phin, 0.9, t == 1), 0);
            }
        for (size_t src = 0; src < 2; src++)
            for (int t = 0; t < 2; t++) {
                int s = (int)src * 2 + t;
                onehot(s, phi);
                onehot(s + 1, phin);
                assert_int_equal(est_observe(b, src, phi, 1.0 + s, phin, 0.9, t == 1), 0);
            }
        for (int i = 0; i < N; i++)
            assert_near(est_weights(a)[i], est_weights(b)[i], 1e-15);
        double norm = 0;
        for (int i = 0; i < N; i++)
            norm += fabs(est_weights(a)[i]);
        assert_true(norm > 0);
        est_free(a);
        est_free(b);
    }
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(td0_one_step_by_hand),
        cmocka_unit_test(nstep_targets_and_flush),
        cmocka_unit_test(monte_carlo_episode_by_hand),
        cmocka_unit_test(monte_carlo_truncated_horizon),
        cmocka_unit_test(monte_carlo_long_episode_is_cut),
        cmocka_unit_test(sources_do_not_mix),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
