/*
 * test_drift.c - the CUSUM drift alarm: its threshold rule against a published
 * table and a Monte Carlo of the plain CUSUM, its measured false-alarm rate
 * against the stated one on stationary errors (independent, and
 * autocorrelated), whatever their scale; the change's onset, the alarm's
 * clearing, and save/load.
 */
#include "testutil.h"

#include "learn/drift.h"
#include "learn/rng.h"
#include "worth/errors.h"

/* A standard normal draw (Box-Muller) from the seeded generator. */
static double normal(rng_t *g)
{
    double u = rng_unit(g), v = rng_unit(g);
    return sqrt(-2.0 * log(1.0 - u)) * cos(6.283185307179586 * v);
}

/*
 * Two-sided CUSUM in-control ARL for k = 0.5, from the table in D. C. Montgomery,
 * Introduction to Statistical Quality Control (the CUSUM chapter, the ARL performance of the
 * tabular CUSUM): h = 4 -> 168, h = 5 -> 465.  Values from memory.  Siegmund's
 * approximation must be within 3% of them.
 */
static void siegmund_against_montgomery(void **state)
{
    (void)state;
    assert_near(drift_arl(4.0, 0.5), 168.0, 0.03 * 168.0);
    assert_near(drift_arl(5.0, 0.5), 465.0, 0.03 * 465.0);
    /* Out of control (one-sided, shift of 1 sd), the same table: h = 4 -> 8.38, h = 5 -> 10.4
     * (from memory); Siegmund's is within 10% there. */
    assert_near(drift_arl1(4.0, 0.5, 1.0), 8.38, 0.1 * 8.38);
    assert_near(drift_arl1(5.0, 0.5, 1.0), 10.4, 0.1 * 10.4);
}

/* The mean run length of a plain two-sided CUSUM on iid N(0, 1), known mean and sd. */
static double mc_arl(double h, double k, int runs, uint64_t seed)
{
    rng_t g;
    rng_init(&g, seed);
    double total = 0;
    for (int i = 0; i < runs; i++) {
        double up = 0, dn = 0;
        long n = 0;
        while (up <= h && dn <= h) {
            double z = normal(&g);
            up = fmax(0.0, up + z - k);
            dn = fmax(0.0, dn - z - k);
            n++;
        }
        total += (double)n;
    }
    return total / runs;
}

/*
 * Monte Carlo of the CUSUM the approximation describes: 4000 runs each, whose mean has a
 * standard error of about ARL/sqrt(4000) = 1.6%; Siegmund's must be within 5%.
 */
static void siegmund_against_monte_carlo(void **state)
{
    (void)state;
    const double hs[3] = {3.0, 4.0, 5.0};
    for (int i = 0; i < 3; i++) {
        double mc = mc_arl(hs[i], 0.5, 4000, 7 + (uint64_t)i), th = drift_arl(hs[i], 0.5);
        print_message("k 0.5, h %.0f: Monte Carlo ARL0 %.1f, Siegmund %.1f\n", hs[i], mc, th);
        assert_near(th, mc, 0.05 * mc);
    }
}

static void threshold_inverts_the_arl(void **state)
{
    (void)state;
    const double arls[4] = {20, 200, 1e4, 1e9};
    for (int i = 0; i < 4; i++) {
        double h = drift_threshold(arls[i], 0.5);
        assert_near(drift_arl(h, 0.5), arls[i], 1e-6 * arls[i]);
    }
    assert_true(drift_threshold(1e6, 0.5) > drift_threshold(1e4, 0.5));
}

static struct drift *make(double arl0)
{
    drift_params_t p;
    drift_params_default(&p);
    p.arl0 = arl0;
    char err[200];
    assert_int_equal(drift_check(&p, err, sizeof err), 0);
    return drift_new(&p);
}

#define RUNS    20
#define RUN_LEN 40000
#define ARL0    2000.0

/*
 * Stationary errors of mean `mean` and scale `scale`, with lag-1 autocorrelation phi (an
 * AR(1) series); returns the alarms per armed transition over RUNS seeded runs.
 */
static double false_alarm_rate(double mean, double scale, double phi)
{
    uint64_t alarms = 0, armed = 0;
    for (uint64_t seed = 1; seed <= RUNS; seed++) {
        struct drift *d = make(ARL0);
        rng_t g;
        rng_init(&g, 1000 + seed);
        double e = normal(&g) / sqrt(1.0 - phi * phi);
        for (uint64_t t = 1; t <= RUN_LEN; t++) {
            e = phi * e + normal(&g);
            drift_observe(d, t, mean + scale * e);
            diag_drift_t dr;
            drift_get(d, &dr);
            armed += dr.armed;
        }
        diag_drift_t dr;
        drift_get(d, &dr);
        alarms += dr.alarms;
        drift_free(d);
    }
    double rate = (double)alarms / (double)armed;
    print_message("phi %.2f, scale %g: %llu alarms in %llu armed transitions: one per %.0f "
                  "(stated %.0f)\n",
                  phi, scale, (unsigned long long)alarms, (unsigned long long)armed, 1.0 / rate,
                  ARL0);
    return rate;
}

/*
 * The stated rate holds within a factor of 2: 20 seeded runs of 40,000 transitions at a
 * stated 2,000 transitions between false alarms (about 390 expected alarms).
 */
static void false_alarm_rate_independent_errors(void **state)
{
    (void)state;
    double rate = false_alarm_rate(0.0, 1.0, 0.0);
    assert_true(rate > 0.5 / ARL0 && rate < 2.0 / ARL0);
}

/* Whatever the scale and offset of the error (a reward in W or in MW). */
static void false_alarm_rate_any_scale(void **state)
{
    (void)state;
    double rate = false_alarm_rate(-37.0, 2.5e4, 0.0);
    assert_true(rate > 0.5 / ARL0 && rate < 2.0 / ARL0);
    rate = false_alarm_rate(1e3, 1e-2, 0.0); /* an offset of 100,000 sd */
    assert_true(rate > 0.5 / ARL0 && rate < 2.0 / ARL0);
}

/* Autocorrelated errors (lag-1 correlation 0.6, as a slow plant's TD errors are). */
static void false_alarm_rate_autocorrelated_errors(void **state)
{
    (void)state;
    double rate = false_alarm_rate(0.0, 1.0, 0.6);
    assert_true(rate > 0.5 / ARL0 && rate < 2.0 / ARL0);
}

/*
 * A shift of 0.5 sd in the mean of iid errors at step 20,000 (stated ARL0 one million):
 * no alarm before it, an alarm after, dated within 150 steps of the shift in every one of
 * 20 runs; the shift ends at 30,000 and the alarm clears within 1,000 steps of it.
 */
static void onset_and_clearing(void **state)
{
    (void)state;
    uint64_t worst_onset = 0, worst_delay = 0, worst_clear = 0;
    for (uint64_t seed = 1; seed <= RUNS; seed++) {
        struct drift *d = make(1e6);
        rng_t g;
        rng_init(&g, seed);
        uint64_t alarm = 0, clear = 0;
        for (uint64_t t = 1; t <= 40000; t++) {
            double shift = t > 20000 && t <= 30000 ? 0.5 : 0.0;
            int rc = drift_observe(d, t, shift + normal(&g));
            if (rc == 1 && !alarm)
                alarm = t;
            if (rc == 2 && alarm && !clear)
                clear = t;
        }
        diag_drift_t dr;
        drift_get(d, &dr);
        assert_true(alarm > 20000);
        assert_int_equal(dr.alarms, 1);
        assert_int_equal(dr.clears, 1);
        assert_false(dr.active);
        assert_int_equal(dr.side, 1);
        uint64_t err = dr.last_onset > 20001 ? dr.last_onset - 20001 : 20001 - dr.last_onset;
        worst_onset = err > worst_onset ? err : worst_onset;
        worst_delay = alarm - 20000 > worst_delay ? alarm - 20000 : worst_delay;
        assert_true(clear > 30000);
        worst_clear = clear - 30000 > worst_clear ? clear - 30000 : worst_clear;
        drift_free(d);
    }
    print_message("shift of 0.5 sd: detected within %llu steps, onset dated within %llu, "
                  "cleared within %llu steps of its end\n",
                  (unsigned long long)worst_delay, (unsigned long long)worst_onset,
                  (unsigned long long)worst_clear);
    assert_true(worst_onset <= 150);
    assert_true(worst_delay <= 1000);
    assert_true(worst_clear <= 1000);
}

/* Saved mid-run (mid-batch, alarm active) and loaded, it goes on to the same bits. */
static void save_load_continues_the_same(void **state)
{
    (void)state;
    struct drift *a = make(2000), *b = make(2000);
    rng_t g;
    rng_init(&g, 5);
    uint64_t t = 1;
    for (; t <= 12345; t++)
        drift_observe(a, t, normal(&g) + (t > 9000 ? 1.0 : 0.0));
    diag_drift_t da;
    drift_get(a, &da);
    assert_true(da.active);
    uint8_t buf[512];
    ser_w w = {buf, sizeof buf, 0};
    drift_save(a, &w);
    assert_true(ser_fits(&w));
    ser_r r = {buf, w.len, 0, 0};
    assert_int_equal(drift_load(b, &r, 3), 0);
    assert_int_equal(r.pos, w.len);
    for (; t <= 30000; t++) {
        double x = normal(&g);
        assert_int_equal(drift_observe(a, t, x), drift_observe(b, t, x));
    }
    diag_drift_t db;
    drift_get(a, &da);
    drift_get(b, &db);
    assert_memory_equal(&da, &db, sizeof da);
    /* A cut-short state is refused. */
    ser_r cut = {buf, w.len - 8, 0, 0};
    assert_int_equal(drift_load(b, &cut, 3), -1);
    drift_free(a);
    drift_free(b);
}

static void bad_parameters(void **state)
{
    (void)state;
    char err[200];
    drift_params_t p;
    drift_params_default(&p);
    p.batch = 0;
    assert_int_equal(drift_check(&p, err, sizeof err), WORTH_E_BAD_PARAM);
    drift_params_default(&p);
    p.k = 0;
    assert_int_equal(drift_check(&p, err, sizeof err), WORTH_E_BAD_PARAM);
    drift_params_default(&p);
    p.burn_in = 9 * p.batch;
    assert_int_equal(drift_check(&p, err, sizeof err), WORTH_E_BAD_PARAM);
    drift_params_default(&p);
    p.arl0 = 99;
    assert_int_equal(drift_check(&p, err, sizeof err), WORTH_E_BAD_PARAM);
    p.arl0 = INFINITY;
    assert_int_equal(drift_check(&p, err, sizeof err), WORTH_E_BAD_PARAM);
    p.arl0 = NAN;
    assert_int_equal(drift_check(&p, err, sizeof err), WORTH_E_BAD_PARAM);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(siegmund_against_montgomery),
        cmocka_unit_test(siegmund_against_monte_carlo),
        cmocka_unit_test(threshold_inverts_the_arl),
        cmocka_unit_test(false_alarm_rate_independent_errors),
        cmocka_unit_test(false_alarm_rate_any_scale),
        cmocka_unit_test(false_alarm_rate_autocorrelated_errors),
        cmocka_unit_test(onset_and_clearing),
        cmocka_unit_test(save_load_continues_the_same),
        cmocka_unit_test(bad_parameters),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
