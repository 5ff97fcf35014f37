/*
 * test_lstd.c - batch LSTD specifics: refit schedule, the least-squares
 * fallback on a singular system, exponential forgetting of A and b, and a
 * training cancelled before its solve.
 */
#include "testutil.h"

#include <stdlib.h>

#include "learn/est.h"
#include "worth/errors.h"

static struct est *make(size_t n, double ridge, double forget, unsigned refit_every)
{
    est_params_t p;
    est_params_default(EST_LSTD, &p);
    p.ridge = ridge;
    p.forget = forget;
    p.refit_every = refit_every;
    struct est *e = NULL;
    char err[200];
    assert_int_equal(est_new(&p, n, 1, &e, err, sizeof err), 0);
    return e;
}

static void refits_on_schedule_and_on_train(void **state)
{
    (void)state;
    struct est *e = make(1, 0.0, 1.0, 5);
    double phi[1] = {1};
    for (int t = 1; t <= 7; t++) {
        assert_int_equal(est_observe(e, 0, phi, 2.0, NULL, 0.9, 1), 0);
        /* Weights move only at the 5th transition. */
        assert_near(est_weights(e)[0], t < 5 ? 0.0 : 2.0, 1e-12);
    }
    est_stats_t st;
    est_stats(e, &st);
    assert_int_equal(st.refits, 1);
    est_train_t rep;
    assert_int_equal(est_train(e, &(est_train_opts_t){.passes = 3}, &rep), 0);
    assert_int_equal(rep.passes, 1);
    assert_int_equal(rep.steps, 1);
    assert_false(rep.cancelled);
    assert_true(rep.converged);
    est_stats(e, &st);
    assert_int_equal(st.refits, 2);
    est_free(e);
}

/*
 * Duplicated features make A singular (ridge 0): A = k [[1,1],[1,1]], b = 2k [1,1].
 * The minimum-norm least-squares solution is w = [1, 1]; the fallback is counted.
 */
static void singular_system_falls_back_to_least_squares(void **state)
{
    (void)state;
    struct est *e = make(2, 0.0, 1.0, 1000);
    double phi[2] = {1, 1};
    for (int t = 0; t < 10; t++)
        assert_int_equal(est_observe(e, 0, phi, 2.0, NULL, 1.0, 1), 0);
    est_train_t rep;
    assert_int_equal(est_train(e, &(est_train_opts_t){.passes = 1}, &rep), 0);
    assert_near(est_weights(e)[0], 1.0, 1e-10);
    assert_near(est_weights(e)[1], 1.0, 1e-10);
    est_stats_t st;
    est_stats(e, &st);
    assert_int_equal(st.guarded, 1);
    est_free(e);
}

/*
 * Reward 1 for 1000 transitions, then 3 for 1000.  Without forgetting LSTD
 * gives the mean, 2; with beta = 0.99 the old data weighs 0.99^1000 ~ 4e-5.
 */
static void forgetting_weights_recent_data(void **state)
{
    (void)state;
    struct est *keep = make(1, 1e-9, 1.0, 2000), *forget = make(1, 1e-9, 0.99, 2000);
    double phi[1] = {1};
    for (int t = 0; t < 2000; t++) {
        double r = t < 1000 ? 1.0 : 3.0;
        assert_int_equal(est_observe(keep, 0, phi, r, NULL, 0.9, 1), 0);
        assert_int_equal(est_observe(forget, 0, phi, r, NULL, 0.9, 1), 0);
    }
    assert_near(est_weights(keep)[0], 2.0, 1e-9);
    assert_near(est_weights(forget)[0], 3.0, 1e-3);
    est_free(keep);
    est_free(forget);
}

/* The solve cannot be cut: a cancel set before it means no solve, and nothing changes. */
static void cancel_before_the_solve(void **state)
{
    (void)state;
    struct est *e = make(1, 0.0, 1.0, 1000);
    double phi[1] = {1};
    for (int t = 0; t < 4; t++)
        assert_int_equal(est_observe(e, 0, phi, 2.0, NULL, 0.9, 1), 0);
    size_t len = 0, len2 = 0;
    est_save(e, NULL, 0, &len);
    uint8_t *before = malloc(len), *after = malloc(len);
    assert_int_equal(est_save(e, before, len, &len), 0);
    atomic_int cancel = 1;
    est_train_t rep;
    est_train_opts_t o = {.passes = 1, .cancel = &cancel};
    assert_int_equal(est_train(e, &o, &rep), WORTH_E_CANCELLED);
    assert_int_equal(rep.steps, 0);
    assert_int_equal(rep.passes, 0);
    assert_true(rep.cancelled);
    assert_int_equal(est_save(e, after, len, &len2), 0);
    assert_int_equal(len2, len);
    assert_memory_equal(before, after, len);
    assert_near(est_weights(e)[0], 0.0, 0);
    /* Cleared, the same call solves. */
    atomic_store(&cancel, 0);
    assert_int_equal(est_train(e, &o, &rep), 0);
    assert_int_equal(rep.steps, 1);
    assert_near(est_weights(e)[0], 2.0, 1e-12);
    free(before);
    free(after);
    est_free(e);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(refits_on_schedule_and_on_train),
        cmocka_unit_test(singular_system_falls_back_to_least_squares),
        cmocka_unit_test(forgetting_weights_recent_data),
        cmocka_unit_test(cancel_before_the_solve),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
