/*
 * test_windup.c - covariance wind-up of RLS-TD with a forgetting factor.
 *
 * With mu < 1 the recursion P = (P - k d'P)/mu inflates every direction of P
 * by 1/mu per step, and only directions the regressors excite are shrunk
 * back; under low excitation the rest grows like mu^-t until it overflows
 * (see e.g. Astrom & Wittenmark, Adaptive Control, 2nd ed., section 11.2, on
 * "estimator windup").  Here the features stay for 10,000 steps in a
 * 2-dimensional subspace of R^4 and mu = 0.95: the plain recursion must blow
 * up, so that rls.c's re-regularisation (guard 3: a diagonal entry of P
 * beyond delta / DBL_EPSILON sends P back to delta I) catches it again and
 * again; both guards must keep trace(P) bounded, never needing guard 3, with
 * finite weights that still find the TD solution inside the excited
 * subspace.  Halfway through, the true value function changes: the
 * regularised guard (Gunnarsson 1996) keeps forgetting in the excited
 * directions and tracks the change; the trace guard is shown to lose most of
 * its tracking, which is why it is not the default.
 */
#include "testutil.h"

#include <float.h>

#include "learn/est.h"
#include "learn/rng.h"

#define N     4
#define STEPS 10000

struct run {
    double trace_p;
    double trace_max; /* the largest trace(P) after any step */
    int finite;
    double fit_err; /* max |V(x) - V_true(x)| over the last transitions' states */
    uint64_t guarded;
    uint64_t p_resets;
};

static struct run run(enum est_guard guard, int switch_at)
{
    est_params_t p;
    est_params_default(EST_RLS_TD, &p);
    p.forget = 0.95;
    p.delta = 1000.0;
    p.guard = guard;
    struct est *e = NULL;
    char err[200];
    assert_int_equal(est_new(&p, N, 1, &e, err, sizeof err), 0);

    /* A fixed, non-axis-aligned basis B (4 x 2) of the excited subspace. */
    const double B[N][2] = {{0.6, 0.1}, {0.3, -0.5}, {-0.2, 0.7}, {0.5, 0.4}};
    double w_true[N] = {1.0, -2.0, 0.5, 3.0};
    rng_t g;
    rng_init(&g, 1996);
    double phi[N], phin[N], gamma = 0.9;
    struct run out = {.finite = 1};
    est_stats_t st;
    for (int t = 0; t < STEPS; t++) {
        if (t == switch_at)
            for (int i = 0; i < N; i++)
                w_true[i] = -w_true[i] + 1.0;
        double a0 = rng_unit(&g), a1 = rng_unit(&g), b0 = rng_unit(&g), b1 = rng_unit(&g);
        double v = 0, vn = 0;
        for (int i = 0; i < N; i++) {
            phi[i] = B[i][0] * a0 + B[i][1] * a1;
            phin[i] = B[i][0] * b0 + B[i][1] * b1;
            v += w_true[i] * phi[i];
            vn += w_true[i] * phin[i];
        }
        /* Rewards consistent with V = w_true . phi, so the TD solution is exact. */
        assert_int_equal(est_observe(e, 0, phi, v - gamma * vn, phin, gamma, 0), 0);
        est_stats(e, &st);
        out.trace_max = fmax(out.trace_max, st.trace_p);
        if (t >= STEPS - 100) {
            double diff = fabs(est_value(e, phi) - v);
            out.fit_err = isfinite(diff) ? fmax(out.fit_err, diff) : INFINITY;
        }
    }
    est_stats(e, &st);
    out.trace_p = st.trace_p;
    out.guarded = st.guarded;
    out.p_resets = st.p_resets;
    for (int i = 0; i < N; i++)
        out.finite &= isfinite(est_weights(e)[i]);
    est_free(e);
    return out;
}

static void unguarded_recursion_blows_up(void **state)
{
    (void)state;
    struct run r = run(EST_GUARD_NONE, -1);
    double ceiling = 1000.0 / DBL_EPSILON; /* delta / DBL_EPSILON, rls.c's guard 3 */
    print_message("unguarded: trace(P) up to %g, %llu covariance resets in %d steps\n", r.trace_max,
                  (unsigned long long)r.p_resets, STEPS);
    /* 0.95^-t passes 2^52 after about 700 steps: P winds up to the ceiling ... */
    assert_true(r.trace_max > 0.5 * ceiling);
    /* ... and is reset each time, about every 700 steps, so it never overflows. */
    assert_true(r.p_resets >= 10);
    assert_true(isfinite(r.trace_p) && fabs(r.trace_p) <= N * ceiling);
    assert_true(r.finite);
}

static void guards_keep_p_bounded(void **state)
{
    (void)state;
    enum est_guard guards[2] = {EST_GUARD_REGULARISE, EST_GUARD_TRACE};
    for (int k = 0; k < 2; k++) {
        struct run r = run(guards[k], -1);
        print_message("guard %d: trace(P) = %g (prior %g), %llu steps guarded, fit error %g\n",
                      guards[k], r.trace_p, N * 1000.0, (unsigned long long)r.guarded, r.fit_err);
        assert_true(isfinite(r.trace_p));
        assert_below(r.trace_max, 10 * N * 1000.0); /* within ten times the prior's trace */
        assert_int_equal(r.p_resets, 0);
        assert_true(r.finite);
        /*
         * The excited subspace is learnt.  What remains is the prior's pull: the
         * regularised guard never forgets I/delta, which weighs about
         * (1-mu)/delta against the data's information; 0.2% here.
         */
        assert_below(r.fit_err, 5e-3);
    }
}

static void regularised_guard_keeps_tracking(void **state)
{
    (void)state;
    struct run reg = run(EST_GUARD_REGULARISE, STEPS / 2);
    struct run tr = run(EST_GUARD_TRACE, STEPS / 2);
    print_message("after a change at step %d: fit error regularise %g, trace %g\n", STEPS / 2,
                  reg.fit_err, tr.fit_err);
    assert_below(reg.fit_err, 5e-3);
    assert_below(100 * reg.fit_err, tr.fit_err);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(unguarded_recursion_blows_up),
        cmocka_unit_test(guards_keep_p_bounded),
        cmocka_unit_test(regularised_guard_keeps_tracking),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
