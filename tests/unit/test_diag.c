/*
 * test_diag.c - realised-return checks and the CUSUM drift alarm (drift.c) as the
 * diagnostics drive it, against returns worked out by hand, and the alarm on a simulated chain whose
 * reward shifts at a known step (20 seeded runs), and a diverged estimator (a
 * NAN prediction) left out of every figure.
 */
#include "testutil.h"

#include <stdlib.h>

#include "learn/diag.h"
#include "learn/model.h"
#include "learn/rng.h"
#include "worth/errors.h"

static struct diag *make(double gamma, unsigned horizon, size_t n_est)
{
    diag_params_t p;
    diag_params_default(gamma, &p);
    p.horizon = horizon;
    struct diag *d = NULL;
    char err[100];
    assert_int_equal(diag_new(&p, n_est, 2, &d, err, sizeof err), 0);
    return d;
}

/*
 * An episode of rewards 1, 2, 3 with gamma 0.5: returns 1 + .5*2 + .25*3 =
 * 2.75, 2 + .5*3 = 3.5, 3.  Estimator 0 predicts 3 everywhere, estimator 1
 * predicts exactly.  Errors of 0: 0.25, -0.5, 0 -> bias -1/12, RMS
 * sqrt((0.0625 + 0.25)/3).
 */
static void episodic_returns_by_hand(void **state)
{
    (void)state;
    struct diag *d = make(0.5, 0, 2);
    const double G[3] = {2.75, 3.5, 3.0};
    for (int t = 0; t < 3; t++) {
        double pred[2] = {3.0, G[t]};
        diag_observe(d, 0, pred, t + 1.0, 0.5, t == 2, 0.0);
        diag_est_t e;
        diag_est(d, 0, &e);
        assert_int_equal(e.n, t == 2 ? 3 : 0); /* nothing is known before the episode ends */
    }
    diag_est_t e0, e1;
    diag_est(d, 0, &e0);
    diag_est(d, 1, &e1);
    assert_near(e0.bias, -0.25 / 3, 1e-15);
    assert_near(e0.rms, sqrt((0.0625 + 0.25) / 3), 1e-15);
    assert_near(e1.rms, 0.0, 1e-15);
    assert_near(e1.bias, 0.0, 1e-15);
    /* The spread of the predictions: |3 - G| averaged, 0.25, 0.5, 0. */
    assert_true(diag_spread(d) > 0);
    diag_free(d);
}

/*
 * Continuing, gamma 0.5: the automatic horizon is the least H with
 * 0.5^H < 1e-3, i.e. 10.  With reward 1 every step the truncated return is
 * sum_{k<10} 0.5^k = 2 (1 - 2^-10); a prediction of 2 errs by 2^-9.
 */
static void truncated_returns_after_the_horizon(void **state)
{
    (void)state;
    struct diag *d = make(0.5, 0, 1);
    assert_int_equal(diag_horizon(d), 10);
    double pred[1] = {2.0};
    for (int t = 0; t < 30; t++)
        diag_observe(d, 1, pred, 1.0, 0.5, 0, 0.0);
    diag_est_t e;
    diag_est(d, 0, &e);
    assert_int_equal(e.n, 21); /* steps 0..20 have 10 rewards after them */
    assert_near(e.bias, ldexp(1.0, -9), 1e-15);
    assert_near(e.rms_window, ldexp(1.0, -9), 1e-15);
    diag_free(d);
}

/*
 * The O(1) window (two-stack queue of affine maps) against returns summed
 * directly, term by term, over a long stream: two interleaved sources,
 * rewards in [-5, 5), discounts in [0.8, 1) varying per step, episodes
 * ending at random.  Estimator 0 predicts 0 (its error is -G), estimator 1
 * predicts 1.  Then a save in the middle of a window reloads into a state that
 * goes on to the same bits as the uninterrupted one.
 */
#define W_H 37
#define W_STEPS 6000
static void window_matches_direct_sums_and_reloads_exactly(void **state)
{
    (void)state;
    struct diag *d = make(0.9, W_H, 2), *e = make(0.9, W_H, 2);
    static double hr[2][W_STEPS], hg[2][W_STEPS];
    size_t hn[2] = {0, 0}, done[2] = {0, 0};
    double n = 0, sum = 0, sumsq = 0;
    rng_t rg;
    rng_init(&rg, 7);
    uint8_t *buf = NULL;
    for (int t = 0; t < W_STEPS; t++) {
        size_t src = rng_below(&rg, 2);
        double r = 10.0 * rng_unit(&rg) - 5.0, g = 0.8 + 0.2 * rng_unit(&rg);
        int term = rng_below(&rg, 150) == 0;
        double pred[2] = {0.0, 1.0};
        diag_observe(d, src, pred, r, g, term, 0.0);
        if (t >= W_STEPS / 2)
            diag_observe(e, src, pred, r, g, term, 0.0);
        hr[src][hn[src]] = r;
        hg[src][hn[src]] = g;
        hn[src]++;
        /* Returns now complete: a full window, or all pending ones at a terminal. */
        while (done[src] < hn[src] && (term || hn[src] - done[src] >= W_H)) {
            double G = 0, disc = 1;
            size_t end = term ? hn[src] : done[src] + W_H;
            for (size_t i = done[src]; i < end; i++) {
                G += disc * hr[src][i];
                disc *= hg[src][i];
            }
            n++;
            sum += -G;
            sumsq += G * G;
            done[src]++;
        }
        if (t == W_STEPS / 2 - 1) {
            /* Mid-window: save d and load the bytes into e. */
            ser_w w = {NULL, 0, 0};
            diag_save(d, &w);
            buf = malloc(w.len);
            assert_non_null(buf);
            ser_w w2 = {buf, w.len, 0};
            diag_save(d, &w2);
            assert_true(ser_fits(&w2));
            ser_r rd = {buf, w2.len, 0, 0};
            assert_int_equal(diag_load(e, &rd, MODEL_FORMAT_VERSION), 0);
            assert_int_equal(rd.pos, w2.len);
        }
    }
    diag_est_t a, b;
    diag_est(d, 0, &a);
    assert_int_equal(a.n, (uint64_t)n);
    assert_true(n > 5000);
    assert_near(a.bias, sum / n, 1e-12 * (1 + fabs(sum / n)));
    assert_near(a.rms, sqrt(sumsq / n), 1e-12 * sqrt(sumsq / n));
    for (size_t k = 0; k < 2; k++) {
        diag_est(d, k, &a);
        diag_est(e, k, &b);
        assert_memory_equal(&a, &b, sizeof a);
    }
    free(buf);
    diag_free(d);
    diag_free(e);
}

static void bad_parameters(void **state)
{
    (void)state;
    diag_params_t p;
    diag_params_default(0.9, &p);
    struct diag *d = NULL;
    char err[100];
    p.window = 0;
    assert_int_equal(diag_new(&p, 1, 1, &d, err, sizeof err), WORTH_E_BAD_PARAM);
    diag_params_default(0.9, &p);
    p.drift.k = 0;
    assert_int_equal(diag_new(&p, 1, 1, &d, err, sizeof err), WORTH_E_BAD_PARAM);
    diag_params_default(0.9, &p);
    p.drift.burn_in = 1;
    assert_int_equal(diag_new(&p, 1, 1, &d, err, sizeof err), WORTH_E_BAD_PARAM);
    assert_null(d);
}

/* A standard normal draw (Box-Muller) from the seeded generator. */
static double normal(rng_t *g)
{
    double u = rng_unit(g), v = rng_unit(g);
    return sqrt(-2.0 * log(1.0 - u)) * cos(6.283185307179586 * v);
}

#define SHIFT_AT 4000
#define RUN_LEN  6000
/* The detection delay this test holds the alarm to (drift.h defaults: a stated 10^6
 * transitions between false alarms, batches of 10, k = 0.5; seen: at most 60 steps). */
#define MAX_DELAY 400

/*
 * A 5-state cycle with one-hot features and TD(0) (alpha 0.02, gamma 0.9);
 * rewards N(0, 1) until step SHIFT_AT, N(1, 1) after: a sensor offset.  Over
 * 20 seeded runs the alarm must never fire before the shift and must fire
 * within MAX_DELAY steps after it.
 */
static void drift_alarm_on_a_reward_shift(void **state)
{
    (void)state;
    double lo[1] = {0}, hi[1] = {4};
    feat_basis_t basis = {.kind = FEAT_RBF, .centers = 5, .width = 0.05};
    est_params_t ep;
    est_params_default(EST_TD, &ep);
    ep.alpha = 0.02;
    const char *names[1] = {"td"};
    model_spec_t spec = {
        .feat = {.dims = 1, .lo = lo, .hi = hi, .nbases = 1, .bases = &basis},
        .gamma = 0.9,
        .n_est = 1,
        .est = &ep,
        .est_names = names,
    };
    uint64_t worst = 0;
    for (uint64_t seed = 1; seed <= 20; seed++) {
        struct model *m = NULL;
        char err[200];
        assert_int_equal(model_new(&spec, &m, err, sizeof err), 0);
        rng_t g;
        rng_init(&g, seed);
        uint64_t fired_at = 0;
        for (int t = 0; t < RUN_LEN && !fired_at; t++) {
            double x[1] = {t % 5}, xn[1] = {(t + 1) % 5};
            double r = normal(&g) + (t >= SHIFT_AT ? 1.0 : 0.0);
            model_obs_t o = {
                .x = x, .x_len = 1, .r = r, .x_next = xn, .x_next_len = 1, .dt_s = NAN};
            assert_int_equal(model_observe(m, &o, err, sizeof err), 0);
            diag_drift_t dr;
            diag_drift(model_diag(m), &dr);
            if (dr.alarms)
                fired_at = dr.last_alarm;
        }
        if (fired_at && fired_at <= SHIFT_AT)
            print_error("seed %llu: false alarm at step %llu (shift at %d)\n",
                        (unsigned long long)seed, (unsigned long long)fired_at, SHIFT_AT);
        assert_true(fired_at > SHIFT_AT);
        uint64_t delay = fired_at - SHIFT_AT;
        if (delay > worst)
            worst = delay;
        model_free(m);
    }
    print_message("20 runs: no false alarm; detection delay at most %llu steps\n",
                  (unsigned long long)worst);
    assert_true(worst <= MAX_DELAY);
}

/* Returns d's saved bytes (malloc'd) and their size in *len. */
static uint8_t *diag_bytes(const struct diag *d, size_t *len)
{
    ser_w w = {NULL, 0, 0};
    diag_save(d, &w);
    uint8_t *buf = malloc(w.len);
    assert_non_null(buf);
    ser_w w2 = {buf, w.len, 0};
    diag_save(d, &w2);
    assert_true(ser_fits(&w2));
    *len = w2.len;
    return buf;
}

/*
 * Three estimators, the third diverged from the first transition (NAN predictions): the
 * spread and the other two's figures are those of a diagnostics that never had it, bit for
 * bit; the third is never scored; and no NaN reaches the saved state.
 */
static void diverged_estimator_is_left_out(void **state)
{
    (void)state;
    struct diag *three = make(0.9, 20, 3), *two = make(0.9, 20, 2);
    rng_t g;
    rng_init(&g, 31);
    for (int t = 0; t < 500; t++) {
        double a = rng_unit(&g), b = 3 * rng_unit(&g), r = rng_unit(&g) - 0.5;
        int term = rng_below(&g, 25) == 0;
        double p3[3] = {a, b, NAN}, p2[2] = {a, b};
        diag_observe(three, 0, p3, r, 0.9, term, r - a);
        diag_observe(two, 0, p2, r, 0.9, term, r - a);
    }
    assert_true(diag_spread(three) == diag_spread(two));
    assert_true(diag_spread(two) > 0);
    for (size_t k = 0; k < 2; k++) {
        diag_est_t x, y;
        diag_est(three, k, &x);
        diag_est(two, k, &y);
        assert_true(x.n > 400);
        assert_memory_equal(&x, &y, sizeof x);
    }
    diag_est_t z;
    diag_est(three, 2, &z);
    assert_int_equal(z.n, 0);
    assert_true(z.rms == 0.0 && z.bias == 0.0);
    diag_drift_t d3, d2;
    diag_drift(three, &d3);
    diag_drift(two, &d2);
    assert_int_equal(d3.alarms, d2.alarms);
    assert_int_equal(d3.armed, d2.armed);
    assert_true(d3.statistic == d2.statistic);
    /* The saved state holds numbers only (the ring keeps 0 for the missing prediction). */
    size_t len;
    uint8_t *buf = diag_bytes(three, &len);
    assert_int_equal(len % 8, 0);
    for (size_t i = 0; i < len; i += 8) {
        /* Every field diag_save writes is 8 bytes wide (counters are small: no NaN pattern). */
        double v;
        memcpy(&v, buf + i, sizeof v);
        assert_false(isnan(v));
    }
    free(buf);
    diag_free(three);
    diag_free(two);
}

/*
 * An estimator that diverges mid-run: its realised figures freeze at that transition
 * (returns completed later are not scored for it, even for states it predicted before),
 * while the others go on; every estimator out means no spread sample at all.
 */
static void realised_figures_freeze_at_divergence(void **state)
{
    (void)state;
    struct diag *d = make(0.5, 0, 2);
    double pred[2];
    for (int t = 0; t < 10; t++) { /* one episode of 10, both scored */
        pred[0] = pred[1] = 1.0;
        diag_observe(d, 0, pred, 1.0, 0.5, t == 9, 0.0);
    }
    for (int t = 0; t < 5; t++) { /* a second, estimator 1 dies in its middle */
        pred[0] = 1.0;
        pred[1] = t < 2 ? 1.0 : NAN;
        diag_observe(d, 0, pred, 1.0, 0.5, t == 4, 0.0);
    }
    diag_est_t e0, e1;
    diag_est(d, 0, &e0);
    diag_est(d, 1, &e1);
    assert_int_equal(e0.n, 15);
    assert_int_equal(e1.n, 10);
    double spread = diag_spread(d);
    pred[0] = pred[1] = NAN;
    for (int t = 0; t < 50; t++)
        diag_observe(d, 0, pred, 1.0, 0.5, t % 10 == 9, NAN);
    assert_true(diag_spread(d) == spread);
    diag_est(d, 0, &e0);
    assert_int_equal(e0.n, 15);
    diag_free(d);
}

/* A NAN TD error (a diverged primary) leaves the drift test alone: it never arms on them. */
static void nan_td_leaves_the_drift_test_alone(void **state)
{
    (void)state;
    struct diag *d = make(0.9, 0, 1);
    double pred[1] = {0.0};
    for (int t = 0; t < 2000; t++)
        diag_observe(d, 0, pred, 1.0, 0.9, 0, NAN);
    diag_drift_t dr;
    diag_drift(d, &dr);
    assert_false(dr.armed);
    assert_int_equal(dr.alarms, 0);
    assert_true(dr.statistic == 0.0);
    for (int t = 0; t < 1100; t++) /* the default burn-in is 1000 */
        diag_observe(d, 0, pred, 1.0, 0.9, 0, (t % 2) - 0.5);
    diag_drift(d, &dr);
    assert_true(dr.armed);
    diag_free(d);
}

/*
 * Two estimators, each with its detector on its own TD error: estimator 1's errors shift by
 * 3 sd at step 3000, estimator 0's never do.  While the headline is 0 the alarm stays down
 * (detector 1 alarms on its own); when the headline moves to 1 the alarm is raised on that
 * step, dated at detector 1's onset; back on 0 it clears.  The saved state holds both
 * detectors and the followed one: a reload saves the same bytes and follows the same.
 */
static void the_alarm_follows_the_headline(void **state)
{
    (void)state;
    struct diag *d = make(0.9, 20, 2);
    rng_t g;
    rng_init(&g, 7);
    double pred[2] = {0, 0};
    int raised = 0, cleared = 0;
    uint64_t raised_at = 0;
    for (int t = 0; t < 6000; t++) {
        double td[2] = {normal(&g), normal(&g) + (t >= 3000 ? 3.0 : 0.0)};
        size_t head = t < 4000 ? 0 : (t < 5000 ? 1 : 0);
        int rc = diag_observe_sd(d, 0, pred, NULL, 0.0, 0.9, 0, td, head);
        if (t < 4000)
            assert_int_equal(rc, 0); /* detector 1 alarms, the alarm does not: 0 leads */
        if (rc == 1) {
            raised++;
            raised_at = (uint64_t)t + 1;
        }
        if (rc == 2) {
            cleared++;
            assert_int_equal(t, 5000); /* the step the headline moves back */
        }
        if (t == 3999) {
            diag_drift_t own;
            diag_drift_est(d, 1, &own);
            assert_true(own.alarms >= 1 && own.active);
            assert_int_equal(diag_drift_followed(d), 0);
        }
    }
    assert_int_equal(raised, 1);
    assert_int_equal(raised_at, 4001); /* the first step with headline 1 */
    assert_int_equal(cleared, 1);
    diag_drift_t dr;
    diag_drift(d, &dr);
    assert_int_equal(dr.alarms, 1);
    assert_int_equal(dr.clears, 1);
    assert_false(dr.active);
    /* dated at detector 1's onset: within a few batches of the shift */
    assert_true(dr.last_onset > 3000 - 10 && dr.last_onset <= 3000 + 50);
    size_t len, len2;
    uint8_t *buf = diag_bytes(d, &len);
    struct diag *e = make(0.9, 20, 2);
    ser_r rd = {buf, len, 0, 0};
    assert_int_equal(diag_load(e, &rd, MODEL_FORMAT_VERSION), 0);
    assert_int_equal(rd.pos, len);
    uint8_t *buf2 = diag_bytes(e, &len2);
    assert_int_equal(len, len2);
    assert_memory_equal(buf, buf2, len);
    diag_drift_t de;
    diag_drift(e, &de);
    assert_memory_equal(&dr, &de, sizeof dr);
    free(buf);
    free(buf2);
    diag_free(d);
    diag_free(e);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(episodic_returns_by_hand),
        cmocka_unit_test(truncated_returns_after_the_horizon),
        cmocka_unit_test(window_matches_direct_sums_and_reloads_exactly),
        cmocka_unit_test(bad_parameters),
        cmocka_unit_test(drift_alarm_on_a_reward_shift),
        cmocka_unit_test(diverged_estimator_is_left_out),
        cmocka_unit_test(realised_figures_freeze_at_divergence),
        cmocka_unit_test(nan_td_leaves_the_drift_test_alone),
        cmocka_unit_test(the_alarm_follows_the_headline),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
