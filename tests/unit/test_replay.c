/*
 * test_replay.c - the replay trainer: convergence to the TD solution with a
 * report, a bounded buffer, seeded sampling and the progress callback.
 */
#include "testutil.h"

#include <stdlib.h>

#include "est.h"
#include "worth/errors.h"

#define N 3

static struct est *make(unsigned capacity, uint64_t seed, unsigned steps_per_obs)
{
    est_params_t p;
    est_params_default(EST_REPLAY, &p);
    p.alpha = 0.5;
    p.capacity = capacity;
    p.batch = 4;
    p.steps_per_obs = steps_per_obs;
    p.tol = 1e-9;
    p.seed = seed;
    struct est *e = NULL;
    char err[200];
    assert_int_equal(est_new(&p, N, 1, &e, err, sizeof err), 0);
    return e;
}

/* s0 -> s1 -> s2 -> end, reward 1 each, gamma 1: V = [3, 2, 1] (one-hot features). */
static void episode(struct est *e)
{
    double phi[N], phin[N];
    for (int s = 0; s < N; s++) {
        memset(phi, 0, sizeof phi);
        memset(phin, 0, sizeof phin);
        phi[s] = 1;
        if (s + 1 < N)
            phin[s + 1] = 1;
        assert_int_equal(est_observe(e, 0, phi, 1.0, phin, 1.0, s == N - 1), 0);
    }
}

struct progress {
    unsigned calls, last_pass;
    int ordered;
};

static void on_pass(void *ctx, unsigned pass, unsigned of, double change)
{
    struct progress *p = ctx;
    p->ordered &= pass == p->last_pass + 1 && of == 5000 && change >= 0;
    p->last_pass = pass;
    p->calls++;
}

static void trains_to_the_td_solution(void **state)
{
    (void)state;
    struct est *e = make(100, 1, 0);
    for (int k = 0; k < 10; k++)
        episode(e);
    struct progress pr = {0, 0, 1};
    est_train_t rep;
    assert_int_equal(est_train(e, 5000, on_pass, &pr, &rep), 0);
    print_message("converged=%d after %u passes, last change %g\n", rep.converged, rep.passes,
                  rep.change);
    assert_true(rep.converged);
    assert_true(rep.passes < 5000);
    assert_below(rep.change, 1e-9);
    assert_int_equal(pr.calls, rep.passes);
    assert_true(pr.ordered);
    const double want[N] = {3, 2, 1};
    for (int i = 0; i < N; i++)
        assert_near(est_weights(e)[i], want[i], 1e-6);
    est_free(e);
}

static void empty_buffer_does_not_train(void **state)
{
    (void)state;
    struct est *e = make(10, 1, 1);
    est_train_t rep;
    assert_int_equal(est_train(e, 10, NULL, NULL, &rep), 0);
    assert_int_equal(rep.passes, 0);
    assert_false(rep.converged);
    est_free(e);
}

static size_t state_size(const struct est *e)
{
    size_t len = 0;
    est_save(e, NULL, 0, &len);
    return len;
}

/* The buffer holds at most `capacity` transitions: the saved state stops growing. */
static void buffer_is_bounded(void **state)
{
    (void)state;
    struct est *e = make(6, 1, 1);
    episode(e);
    size_t three = state_size(e);
    episode(e);
    size_t six = state_size(e);
    for (int k = 0; k < 10; k++)
        episode(e);
    assert_true(six > three);
    assert_int_equal(state_size(e), six);
    est_free(e);
}

/* Different seeds draw different batches; the same seed the same ones (bit for bit). */
static void seeded_sampling(void **state)
{
    (void)state;
    struct est *a = make(50, 1, 2), *b = make(50, 1, 2), *c = make(50, 2, 2);
    for (int k = 0; k < 5; k++) {
        episode(a);
        episode(b);
        episode(c);
    }
    assert_memory_equal(est_weights(a), est_weights(b), N * sizeof(double));
    assert_memory_not_equal(est_weights(a), est_weights(c), N * sizeof(double));
    est_stats_t st;
    est_stats(a, &st);
    assert_int_equal(st.refits, 30); /* 15 transitions x 2 background steps */
    est_free(a);
    est_free(b);
    est_free(c);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(trains_to_the_td_solution),
        cmocka_unit_test(empty_buffer_does_not_train),
        cmocka_unit_test(buffer_is_bounded),
        cmocka_unit_test(seeded_sampling),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
