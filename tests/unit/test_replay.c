/*
 * test_replay.c - the replay trainer: convergence to the TD solution with a
 * report, a bounded buffer, seeded sampling, the progress callback, and
 * trainings capped (max_steps) or cancelled, which must leave the same bits.
 */
#include "testutil.h"

#include <pthread.h>
#include <stdlib.h>
#include <time.h>

#include "learn/est.h"
#include "learn/rng.h"
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
    assert_int_equal(
        est_train(e, &(est_train_opts_t){.passes = 5000, .progress = on_pass, .ctx = &pr}, &rep),
        0);
    print_message("converged=%d after %u passes, last change %g\n", rep.converged, rep.passes,
                  rep.change);
    assert_true(rep.converged);
    assert_false(rep.cancelled);
    assert_true(rep.passes < 5000);
    assert_int_equal(rep.steps, (uint64_t)rep.passes * 8); /* 30 entries, batches of 4 */
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
    assert_int_equal(est_train(e, &(est_train_opts_t){.passes = 10}, &rep), 0);
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

static uint8_t *save(const struct est *e, size_t *len)
{
    est_save(e, NULL, 0, len);
    uint8_t *buf = malloc(*len);
    assert_int_equal(est_save(e, buf, *len, len), 0);
    return buf;
}

/* Fails unless a and b save the same bytes (weights, buffer, step count and RNG state). */
static void assert_same_state(const struct est *a, const struct est *b)
{
    size_t la, lb;
    uint8_t *ba = save(a, &la), *bb = save(b, &lb);
    assert_int_equal(la, lb);
    assert_memory_equal(ba, bb, la);
    free(ba);
    free(bb);
}

/* A replay estimator over N features with rewards that never let the training converge. */
static struct est *make_noisy(unsigned capacity)
{
    struct est *e = make(capacity, 3, 0);
    rng_t g;
    rng_init(&g, 17);
    double phi[N], phin[N];
    for (unsigned t = 0; t < capacity; t++) {
        for (int i = 0; i < N; i++) {
            phi[i] = rng_unit(&g);
            phin[i] = rng_unit(&g);
        }
        assert_int_equal(est_observe(e, 0, phi, rng_unit(&g) - 0.5, phin, 0.9, t % 7 == 6), 0);
    }
    return e;
}

struct cancel_at {
    atomic_int flag;
    unsigned after_pass;
    atomic_int passes;
};

static void cancel_after_pass(void *ctx, unsigned pass, unsigned of, double change)
{
    (void)of;
    (void)change;
    struct cancel_at *c = ctx;
    atomic_store(&c->passes, (int)pass);
    if (pass == c->after_pass)
        atomic_store(&c->flag, 1);
}

/* Cancelled after two passes (from the progress callback): the same bits as max_steps. */
static void cancel_equals_max_steps(void **state)
{
    (void)state;
    struct est *a = make_noisy(30), *b = make_noisy(30);
    assert_same_state(a, b);
    struct cancel_at c = {.after_pass = 2};
    est_train_opts_t o = {
        .passes = 100, .progress = cancel_after_pass, .ctx = &c, .cancel = &c.flag};
    est_train_t ra, rb;
    assert_int_equal(est_train(a, &o, &ra), WORTH_E_CANCELLED);
    assert_true(ra.cancelled);
    assert_int_equal(ra.steps, 2 * 8);
    assert_int_equal(ra.passes, 2);
    assert_int_equal(est_train(b, &(est_train_opts_t){.passes = 100, .max_steps = ra.steps}, &rb),
                     0);
    assert_false(rb.cancelled);
    assert_int_equal(rb.steps, ra.steps);
    assert_same_state(a, b);
    /* And both go on alike. */
    assert_int_equal(est_train(a, &(est_train_opts_t){.passes = 3}, &ra), 0);
    assert_int_equal(est_train(b, &(est_train_opts_t){.passes = 3}, &rb), 0);
    assert_same_state(a, b);
    est_free(a);
    est_free(b);
}

/* Waits until the training has run a pass, then cancels it at whatever step it is on. */
static void *cancel_soon(void *arg)
{
    struct cancel_at *c = arg;
    struct timespec ms = {0, 1000000};
    while (atomic_load(&c->passes) < 1)
        nanosleep(&ms, NULL);
    ms.tv_nsec = 5000000;
    nanosleep(&ms, NULL);
    atomic_store(&c->flag, 1);
    return NULL;
}

/* Cancelled by another thread mid-pass: the bits equal a training with max_steps = steps. */
static void cancel_from_another_thread(void **state)
{
    (void)state;
    struct est *a = make_noisy(3000), *b = make_noisy(3000);
    struct cancel_at c = {.after_pass = 0};
    pthread_t th;
    assert_int_equal(pthread_create(&th, NULL, cancel_soon, &c), 0);
    est_train_opts_t o = {
        .passes = 10000000, .progress = cancel_after_pass, .ctx = &c, .cancel = &c.flag};
    est_train_t ra, rb;
    assert_int_equal(est_train(a, &o, &ra), WORTH_E_CANCELLED);
    pthread_join(th, NULL);
    print_message("cancelled after %llu steps (%u passes of 750 begun)\n",
                  (unsigned long long)ra.steps, ra.passes);
    assert_true(ra.cancelled);
    assert_true(ra.steps >= 750);
    assert_int_equal(
        est_train(b, &(est_train_opts_t){.passes = 10000000, .max_steps = ra.steps}, &rb), 0);
    assert_int_equal(rb.steps, ra.steps);
    assert_int_equal(rb.passes, ra.passes);
    assert_same_state(a, b);
    est_free(a);
    est_free(b);
}

/* A cancel set before the start: no step, the same bytes, WORTH_E_CANCELLED. */
static void cancel_before_start(void **state)
{
    (void)state;
    struct est *a = make_noisy(30), *b = make_noisy(30);
    atomic_int cancel = 1;
    struct progress pr = {0, 0, 1};
    est_train_t rep;
    est_train_opts_t o = {.passes = 5, .progress = on_pass, .ctx = &pr, .cancel = &cancel};
    assert_int_equal(est_train(a, &o, &rep), WORTH_E_CANCELLED);
    assert_true(rep.cancelled);
    assert_int_equal(rep.steps, 0);
    assert_int_equal(rep.passes, 0);
    assert_int_equal(pr.calls, 0);
    assert_same_state(a, b);
    est_free(a);
    est_free(b);
}

/* max_steps cuts a pass short: exactly that many steps, no progress call for the cut pass. */
static void max_steps_cuts_a_pass(void **state)
{
    (void)state;
    struct est *e = make_noisy(30);
    struct progress pr = {0, 0, 1};
    est_train_t rep;
    est_stats_t st;
    est_stats(e, &st);
    uint64_t before = st.refits;
    est_train_opts_t o = {.passes = 5000, .max_steps = 8 + 3, .progress = on_pass, .ctx = &pr};
    assert_int_equal(est_train(e, &o, &rep), 0);
    assert_int_equal(rep.steps, 11);
    assert_int_equal(rep.passes, 2);
    assert_false(rep.converged);
    assert_false(rep.cancelled);
    assert_int_equal(pr.calls, 1);
    est_stats(e, &st);
    assert_int_equal(st.refits - before, 11);
    est_free(e);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(trains_to_the_td_solution),
        cmocka_unit_test(empty_buffer_does_not_train),
        cmocka_unit_test(buffer_is_bounded),
        cmocka_unit_test(seeded_sampling),
        cmocka_unit_test(cancel_equals_max_steps),
        cmocka_unit_test(cancel_from_another_thread),
        cmocka_unit_test(cancel_before_start),
        cmocka_unit_test(max_steps_cuts_a_pass),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
