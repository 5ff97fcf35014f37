/*
 * test_est.c - the estimator interface, over every kind: determinism,
 * save/load/continue, reset, bad input leaving the state bit-identical,
 * corrupt and mismatched state, parameter validation, the divergence rule,
 * format 1 states, and the snapshot's size in the footprint.
 */
#include "testutil.h"

#include <stdlib.h>

#include "learn/est.h"
#include "est_v1_states.h"
#include "learn/rng.h"
#include "learn/ser.h"
#include "worth/errors.h"

#define N       6
#define SOURCES 3

static est_params_t params_for(enum est_kind k)
{
    est_params_t p;
    est_params_default(k, &p);
    p.alpha = 0.05;
    p.lambda = k == EST_TD_LAMBDA ? 0.7 : (k == EST_RLS_TD || k == EST_LSTD ? 0.5 : 0.0);
    p.nstep = 3;
    p.max_episode = 50;
    p.forget = k == EST_RLS_TD ? 0.99 : 1.0;
    p.refit_every = 7;
    p.capacity = 40;
    p.batch = 4;
    p.steps_per_obs = 2;
    p.decay = 100;
    p.seed = 99;
    return p;
}

static struct est *make(enum est_kind k)
{
    est_params_t p = params_for(k);
    struct est *e = NULL;
    char err[200];
    int rc = est_new(&p, N, SOURCES, &e, err, sizeof err);
    if (rc)
        print_error("est_new(%s): %s\n", est_kind_name(k), err);
    assert_int_equal(rc, 0);
    return e;
}

/* A reproducible stream: 3 interleaved sources, episodes of random length. */
static void feed(struct est *e, rng_t *g, int count)
{
    double phi[N], phin[N];
    for (int t = 0; t < count; t++) {
        for (int i = 0; i < N; i++) {
            phi[i] = rng_unit(g);
            phin[i] = rng_unit(g);
        }
        size_t src = (size_t)rng_below(g, SOURCES);
        int terminal = rng_below(g, 9) == 0;
        double r = rng_unit(g) - 0.3;
        assert_int_equal(est_observe(e, src, phi, r, phin, 0.9, terminal), 0);
    }
}

static uint8_t *save(const struct est *e, size_t *len)
{
    est_save(e, NULL, 0, len);
    uint8_t *buf = malloc(*len);
    assert_int_equal(est_save(e, buf, *len, len), 0);
    return buf;
}

static void assert_same_state(const struct est *a, const struct est *b)
{
    size_t la, lb;
    uint8_t *ba = save(a, &la), *bb = save(b, &lb);
    assert_int_equal(la, lb);
    assert_memory_equal(ba, bb, la);
    free(ba);
    free(bb);
}

static void deterministic_and_resumable(void **state)
{
    (void)state;
    for (int k = 0; k < EST_KIND_COUNT; k++) {
        struct est *a = make(k), *b = make(k), *c = make(k);
        rng_t ga, gb;
        rng_init(&ga, 5);
        rng_init(&gb, 5);
        feed(a, &ga, 300);
        feed(b, &gb, 300);
        assert_same_state(a, b);
        const double *w = est_weights(a);
        double norm = 0;
        for (int i = 0; i < N; i++) {
            assert_true(isfinite(w[i]));
            norm += fabs(w[i]);
        }
        assert_true(norm > 0); /* every kind has learnt something */

        /* Save a, load into a fresh c, continue both: same bits as never stopping. */
        size_t len;
        uint8_t *buf = save(a, &len);
        char err[200];
        assert_int_equal(est_load(c, buf, len, err, sizeof err), 0);
        assert_same_state(a, c);
        rng_t g2 = ga;
        feed(a, &ga, 200);
        feed(c, &g2, 200);
        assert_same_state(a, c);

        /* Reset gives the freshly built state. */
        struct est *fresh = make(k);
        est_reset(a);
        assert_same_state(a, fresh);
        free(buf);
        est_free(a);
        est_free(b);
        est_free(c);
        est_free(fresh);
    }
}

static void bad_input_leaves_state_unchanged(void **state)
{
    (void)state;
    for (int k = 0; k < EST_KIND_COUNT; k++) {
        struct est *e = make(k);
        rng_t g;
        rng_init(&g, 11);
        feed(e, &g, 50);
        size_t l0;
        uint8_t *before = save(e, &l0);

        double phi[N], phin[N];
        for (int i = 0; i < N; i++)
            phi[i] = phin[i] = 0.5;
        struct {
            int code;
            size_t src;
            double r, g;
            int where; /* 0 none, 1 NaN in phi, 2 Inf in phi_next, 3 phi_next NULL */
        } cases[] = {
            {WORTH_E_BAD_NUMBER, 0, NAN, 0.9, 0},      {WORTH_E_BAD_NUMBER, 0, INFINITY, 0.9, 0},
            {WORTH_E_BAD_NUMBER, 0, 1.0, 0.9, 1},      {WORTH_E_BAD_NUMBER, 0, 1.0, 0.9, 2},
            {WORTH_E_BAD_PARAM, 0, 1.0, 0.9, 3},       {WORTH_E_BAD_PARAM, 0, 1.0, 1.5, 0},
            {WORTH_E_BAD_PARAM, 0, 1.0, -0.1, 0},      {WORTH_E_BAD_PARAM, 0, 1.0, NAN, 0},
            {WORTH_E_BAD_PARAM, SOURCES, 1.0, 0.9, 0},
        };
        for (size_t c = 0; c < sizeof cases / sizeof cases[0]; c++) {
            double p1[N], p2[N];
            memcpy(p1, phi, sizeof p1);
            memcpy(p2, phin, sizeof p2);
            if (cases[c].where == 1)
                p1[3] = NAN;
            if (cases[c].where == 2)
                p2[5] = INFINITY;
            int rc = est_observe(e, cases[c].src, p1, cases[c].r, cases[c].where == 3 ? NULL : p2,
                                 cases[c].g, 0);
            if (rc != cases[c].code)
                print_error("kind %s case %zu: got %s\n", est_kind_name(k), c, worth_err_name(rc));
            assert_int_equal(rc, cases[c].code);
            size_t l1;
            uint8_t *after = save(e, &l1);
            assert_int_equal(l0, l1);
            assert_memory_equal(before, after, l0);
            free(after);
        }
        /* A terminal transition may omit phi_next. */
        assert_int_equal(est_observe(e, 0, phi, 1.0, NULL, 0.9, 1), 0);
        free(before);
        est_free(e);
    }
}

static void corrupt_and_mismatched_state(void **state)
{
    (void)state;
    char err[200];
    struct est *a = make(EST_RLS_TD), *b = make(EST_RLS_TD);
    rng_t g;
    rng_init(&g, 3);
    feed(a, &g, 40);
    size_t len, lb;
    uint8_t *buf = save(a, &len);
    uint8_t *orig = save(b, &lb);

    /* Every single flipped byte is caught (checksum or header), b unchanged. */
    for (size_t i = 0; i < len; i += 13) {
        buf[i] ^= 0x40;
        err[0] = 0;
        int rc = est_load(b, buf, len, err, sizeof err);
        assert_int_equal(rc, WORTH_E_CORRUPT);
        assert_true(strlen(err) > 0);
        buf[i] ^= 0x40;
    }
    assert_int_equal(est_load(b, buf, len - 1, err, sizeof err), WORTH_E_CORRUPT);
    assert_int_equal(est_load(b, buf, 10, err, sizeof err), WORTH_E_CORRUPT);
    size_t l2;
    uint8_t *now = save(b, &l2);
    assert_int_equal(l2, lb);
    assert_memory_equal(now, orig, lb);
    free(now);

    /* Other kind, other parameters, other size: mismatch. */
    struct est *td = make(EST_TD);
    assert_int_equal(est_load(td, buf, len, err, sizeof err), WORTH_E_MISMATCH);
    est_params_t p = params_for(EST_RLS_TD);
    p.forget = 0.98;
    struct est *other = NULL, *wide = NULL;
    assert_int_equal(est_new(&p, N, SOURCES, &other, err, sizeof err), 0);
    assert_int_equal(est_load(other, buf, len, err, sizeof err), WORTH_E_MISMATCH);
    p = params_for(EST_RLS_TD);
    assert_int_equal(est_new(&p, N + 1, SOURCES, &wide, err, sizeof err), 0);
    assert_int_equal(est_load(wide, buf, len, err, sizeof err), WORTH_E_MISMATCH);

    /* Sizing: a short buffer is refused and the needed size reported. */
    uint8_t small[8];
    size_t need = 0;
    assert_int_equal(est_save(a, small, sizeof small, &need), WORTH_E_TOO_LARGE);
    assert_int_equal(need, len);

    free(buf);
    free(orig);
    est_free(a);
    est_free(b);
    est_free(td);
    est_free(other);
    est_free(wide);
}

static void bad_parameters(void **state)
{
    (void)state;
    struct {
        enum est_kind kind;
        const char *field;
        double value;
        size_t n;
        int code;
    } cases[] = {
        {EST_TD, "alpha", 0, N, WORTH_E_BAD_PARAM},
        {EST_TD, "alpha", -1, N, WORTH_E_BAD_PARAM},
        {EST_TD, "alpha", NAN, N, WORTH_E_BAD_PARAM},
        {EST_TD, "init", INFINITY, N, WORTH_E_BAD_PARAM},
        {EST_TD, "alpha", 0.1, 0, WORTH_E_BAD_PARAM},
        {EST_TD_N, "nstep", 0, N, WORTH_E_BAD_PARAM},
        {EST_TD_LAMBDA, "lambda", 1.5, N, WORTH_E_BAD_PARAM},
        {EST_TD_LAMBDA, "lambda", -0.1, N, WORTH_E_BAD_PARAM},
        {EST_MC, "alpha", 0, N, WORTH_E_BAD_PARAM},
        {EST_MC, "max_episode", 0, N, WORTH_E_BAD_PARAM},
        {EST_RLS_TD, "forget", 0, N, WORTH_E_BAD_PARAM},
        {EST_RLS_TD, "forget", 1.01, N, WORTH_E_BAD_PARAM},
        {EST_RLS_TD, "delta", 0, N, WORTH_E_BAD_PARAM},
        {EST_RLS_TD, "trace_cap", -1, N, WORTH_E_BAD_PARAM},
        {EST_RLS_TD, "lambda", 2, N, WORTH_E_BAD_PARAM},
        {EST_RLS_TD, "forget", 1, 9000, WORTH_E_TOO_LARGE},
        {EST_LSTD, "ridge", -1, N, WORTH_E_BAD_PARAM},
        {EST_LSTD, "refit_every", 0, N, WORTH_E_BAD_PARAM},
        {EST_LSTD, "forget", 0, N, WORTH_E_BAD_PARAM},
        {EST_REPLAY, "capacity", 0, N, WORTH_E_BAD_PARAM},
        {EST_REPLAY, "batch", 100000, N, WORTH_E_BAD_PARAM},
        {EST_REPLAY, "tol", 0, N, WORTH_E_BAD_PARAM},
        {EST_REPLAY, "decay", -1, N, WORTH_E_BAD_PARAM},
    };
    for (size_t c = 0; c < sizeof cases / sizeof cases[0]; c++) {
        est_params_t p;
        est_params_default(cases[c].kind, &p);
        const char *f = cases[c].field;
        double v = cases[c].value;
        if (!strcmp(f, "alpha"))
            p.alpha = v;
        else if (!strcmp(f, "init"))
            p.init = v;
        else if (!strcmp(f, "nstep"))
            p.nstep = (unsigned)v;
        else if (!strcmp(f, "lambda"))
            p.lambda = v;
        else if (!strcmp(f, "max_episode"))
            p.max_episode = (unsigned)v;
        else if (!strcmp(f, "forget"))
            p.forget = v;
        else if (!strcmp(f, "delta"))
            p.delta = v;
        else if (!strcmp(f, "trace_cap"))
            p.trace_cap = v;
        else if (!strcmp(f, "ridge"))
            p.ridge = v;
        else if (!strcmp(f, "refit_every"))
            p.refit_every = (unsigned)v;
        else if (!strcmp(f, "capacity"))
            p.capacity = (unsigned)v;
        else if (!strcmp(f, "batch"))
            p.batch = (unsigned)v;
        else if (!strcmp(f, "tol"))
            p.tol = v;
        else if (!strcmp(f, "decay"))
            p.decay = v;
        struct est *sentinel = (struct est *)&p, *e = sentinel;
        char err[200] = "";
        int rc = est_new(&p, cases[c].n, 1, &e, err, sizeof err);
        if (rc != cases[c].code)
            print_error("case %zu (%s %s=%g): got %s\n", c, est_kind_name(cases[c].kind), f, v,
                        worth_err_name(rc));
        assert_int_equal(rc, cases[c].code);
        assert_true(e == sentinel);
        assert_true(strlen(err) > 0);
    }
    est_params_t p;
    est_params_default(EST_TD, &p);
    struct est *e = NULL;
    char err[100];
    assert_int_equal(est_new(&p, N, 0, &e, err, sizeof err), WORTH_E_BAD_PARAM);
    assert_int_equal(est_new(&p, N, EST_MAX_SOURCES + 1, &e, err, sizeof err), WORTH_E_BAD_PARAM);
    p.kind = EST_KIND_COUNT;
    assert_int_equal(est_new(&p, N, 1, &e, err, sizeof err), WORTH_E_BAD_PARAM);
}

static void names_and_optional_operations(void **state)
{
    (void)state;
    for (int k = 0; k < EST_KIND_COUNT; k++) {
        const char *name = est_kind_name(k);
        assert_non_null(name);
        assert_int_equal(est_kind_parse(name), k);
        struct est *e = make(k);
        double phi[N] = {1, 0, 0, 0, 0, 0}, sd = -1;
        int rc = est_sd(e, phi, &sd);
        assert_int_equal(rc, (k == EST_RLS_TD || k == EST_ENSEMBLE) ? 0 : WORTH_E_UNSUPPORTED);
        est_train_t rep;
        rc = est_train(e, &(est_train_opts_t){.passes = 2}, &rep);
        int trains = k == EST_LSTD || k == EST_REPLAY || k == EST_MLP || k == EST_ENSEMBLE;
        assert_int_equal(rc, trains ? 0 : WORTH_E_UNSUPPORTED);
        assert_int_equal(est_features(e), N);
        est_free(e);
    }
    assert_int_equal(est_kind_parse("nope"), -1);
    assert_null(est_kind_name(EST_KIND_COUNT));
}

/* ---- divergence (est.h) ---- */

/* One feature phi = phi' = 1, g = 0, td with alpha = 10: w <- w + 10 (r - w) = -9 w + 10 r, an
 * oscillation growing ninefold per step.  Returns the 1-based transition at which the
 * divergence rule must fire: the first whose V(x) = w exceeds 1e10 max(1, |r|) in size. */
static uint64_t blowup_step(double alpha, double r, double *w_max)
{
    double w = 0.0, bound = EST_DIVERGE_FACTOR * fmax(1.0, fabs(r));
    *w_max = 0;
    for (uint64_t t = 1;; t++) {
        double v = w;
        if (fabs(v) > bound)
            return t;
        w = w + alpha * (r + 0.0 * v - v); /* td.c's arithmetic */
        *w_max = fmax(*w_max, fabs(w));
    }
}

static struct est *make_td1(double alpha)
{
    est_params_t p;
    est_params_default(EST_TD, &p);
    p.alpha = alpha;
    struct est *e = NULL;
    char err[200];
    assert_int_equal(est_new(&p, 1, 2, &e, err, sizeof err), 0);
    return e;
}

/* Feeds e the blow-up stream until it diverges; checks every weight stays finite on the way. */
static uint64_t run_to_divergence(struct est *e, double r)
{
    double one[1] = {1.0};
    for (uint64_t t = 1; t < 1000; t++) {
        assert_int_equal(est_observe(e, 0, one, r, one, 0.0, 0), 0);
        assert_true(isfinite(est_weights(e)[0]));
        if (est_diverged(e))
            return t;
    }
    fail_msg("no divergence in 1000 transitions");
    return 0;
}

static void td_with_a_huge_step_diverges_deterministically(void **state)
{
    (void)state;
    double w_max;
    uint64_t want = blowup_step(10.0, 1.0, &w_max);
    print_message("alpha 10 diverges at transition %llu, |w| up to %g\n", (unsigned long long)want,
                  w_max);
    assert_true(want > 5 && want < 20);
    struct est *e = make_td1(10.0), *again = make_td1(10.0);
    assert_int_equal(run_to_divergence(e, 1.0), want);
    assert_int_equal(run_to_divergence(again, 1.0), want);
    assert_same_state(e, again);

    est_stats_t st;
    est_stats(e, &st);
    assert_int_equal(st.health, EST_HEALTH_DIVERGED);
    assert_string_equal(st.why, EST_WHY_BOUND);
    assert_int_equal(st.diverged_at, want);
    assert_int_equal(st.updates, want);
    /* Reset: the initial weight, no NaN anywhere; queries answer NAN. */
    assert_true(est_weights(e)[0] == 0.0);
    double one[1] = {1.0}, sd = 0;
    assert_true(isnan(est_value(e, one)));
    assert_true(isnan(est_last_value(e)));
    assert_true(isnan(est_last_td(e)));
    double snap[8];
    assert_int_equal(est_snap_size(e), 2);
    est_snap(e, snap);
    assert_true(snap[1] == 1.0);
    assert_true(isnan(est_snap_value(e, snap, one, &sd)));
    assert_true(isnan(sd));
    assert_true(isfinite(st.td_last) && isfinite(st.td_rms));

    /* Still validates exactly as before, and counts, but learns nothing. */
    size_t l0;
    uint8_t *before = save(e, &l0);
    assert_int_equal(est_observe(e, 0, one, NAN, one, 0.0, 0), WORTH_E_BAD_NUMBER);
    assert_int_equal(est_observe(e, 0, one, 1.0, one, 1.5, 0), WORTH_E_BAD_PARAM);
    assert_int_equal(est_observe(e, 2, one, 1.0, one, 0.5, 0), WORTH_E_BAD_PARAM);
    assert_int_equal(est_observe(e, 0, one, 1.0, NULL, 0.5, 0), WORTH_E_BAD_PARAM);
    size_t l1;
    uint8_t *after = save(e, &l1);
    assert_int_equal(l0, l1);
    assert_memory_equal(before, after, l0);
    free(before);
    free(after);
    for (int t = 0; t < 5; t++)
        assert_int_equal(est_observe(e, 1, one, 3.0, one, 0.5, t == 4), 0);
    est_stats_t st2;
    est_stats(e, &st2);
    assert_int_equal(st2.updates, want + 5);
    assert_int_equal(st2.diverged_at, want);
    assert_true(st2.td_last == st.td_last);
    assert_true(est_weights(e)[0] == 0.0);

    /* Save -> load keeps the flag, the reason and diverged_at. */
    struct est *c = make_td1(10.0);
    size_t len;
    uint8_t *buf = save(e, &len);
    char err[200];
    assert_int_equal(est_load(c, buf, len, err, sizeof err), 0);
    assert_true(est_diverged(c));
    est_stats(c, &st);
    assert_int_equal(st.health, EST_HEALTH_DIVERGED);
    assert_string_equal(st.why, EST_WHY_BOUND);
    assert_int_equal(st.diverged_at, want);
    assert_same_state(e, c);
    /* Only a reset brings it back. */
    est_reset(c);
    assert_false(est_diverged(c));
    est_stats(c, &st);
    assert_int_equal(st.health, EST_HEALTH_OK);
    assert_null(st.why);
    assert_int_equal(st.diverged_at, 0);
    assert_true(est_value(c, one) == 0.0);
    free(buf);
    est_free(e);
    est_free(again);
    est_free(c);
}

/*
 * The bound scales with the largest reward seen: rewards 1000 times larger give values 1000
 * times larger and the same divergence step; rewards below 1 keep the bound at 1e10, so the
 * oscillation takes longer to reach it.  Either way the weights are still far from overflow
 * (about 1e308) when it is caught.
 */
static void bound_scales_with_the_largest_reward(void **state)
{
    (void)state;
    const double rs[3] = {1.0, 1000.0, 1e-3};
    uint64_t at[3];
    for (int k = 0; k < 3; k++) {
        double w_max;
        at[k] = blowup_step(10.0, rs[k], &w_max);
        assert_below(w_max, 1e15 * fmax(1.0, rs[k]));
        struct est *e = make_td1(10.0);
        assert_int_equal(run_to_divergence(e, rs[k]), at[k]);
        est_stats_t st;
        est_stats(e, &st);
        assert_string_equal(st.why, EST_WHY_BOUND);
        est_free(e);
    }
    assert_int_equal(at[1], at[0]);
    assert_true(at[2] > at[0]);
}

/* A step so large that one update overflows: rule 1, at the first transition. */
static void non_finite_weights_diverge(void **state)
{
    (void)state;
    struct est *e = make_td1(1e300);
    double one[1] = {1.0};
    assert_int_equal(est_observe(e, 0, one, 1e10, one, 0.5, 0), 0);
    est_stats_t st;
    est_stats(e, &st);
    assert_int_equal(st.health, EST_HEALTH_DIVERGED);
    assert_string_equal(st.why, EST_WHY_NONFINITE);
    assert_int_equal(st.diverged_at, 1);
    assert_true(est_weights(e)[0] == 0.0);
    est_free(e);
}

static struct est *make_replay(double alpha, unsigned steps_per_obs)
{
    est_params_t p;
    est_params_default(EST_REPLAY, &p);
    p.alpha = alpha;
    p.capacity = 20;
    p.batch = 4;
    p.steps_per_obs = steps_per_obs;
    struct est *e = NULL;
    char err[200];
    assert_int_equal(est_new(&p, N, 1, &e, err, sizeof err), 0);
    return e;
}

/* Replay: diverging during a training resets it and says so; a diverged one does not train. */
static void replay_diverges_in_training(void **state)
{
    (void)state;
    struct est *e = make_replay(1e3, 0); /* observe only stores: training does the damage */
    rng_t g;
    rng_init(&g, 4);
    double phi[N], phin[N];
    for (int t = 0; t < 20; t++) {
        for (int i = 0; i < N; i++) {
            phi[i] = rng_unit(&g);
            phin[i] = rng_unit(&g);
        }
        assert_int_equal(est_observe(e, 0, phi, 1.0, phin, 0.9, 0), 0);
    }
    assert_false(est_diverged(e));
    est_train_t rep;
    assert_int_equal(est_train(e, &(est_train_opts_t){.passes = 1000}, &rep), WORTH_E_DIVERGED);
    assert_true(rep.steps > 0 && rep.steps < 1000 * 5); /* stopped once the weights broke */
    est_stats_t st;
    est_stats(e, &st);
    assert_int_equal(st.health, EST_HEALTH_DIVERGED);
    assert_string_equal(st.why, EST_WHY_NONFINITE);
    assert_int_equal(st.diverged_at, 20);
    for (int i = 0; i < N; i++)
        assert_true(est_weights(e)[i] == 0.0);
    /* Diverged: nothing is trained, nothing changes. */
    size_t l0, l1;
    uint8_t *before = save(e, &l0);
    assert_int_equal(est_train(e, &(est_train_opts_t){.passes = 3}, &rep), WORTH_E_DIVERGED);
    assert_int_equal(rep.steps, 0);
    uint8_t *after = save(e, &l1);
    assert_int_equal(l0, l1);
    assert_memory_equal(before, after, l0);
    free(before);
    free(after);
    est_free(e);

    /* Diverging in its background steps (inside est_observe) the same way. */
    e = make_replay(1e3, 2);
    uint64_t t = 0;
    while (!est_diverged(e) && t < 1000) {
        for (int i = 0; i < N; i++)
            phi[i] = phin[i] = 0.5;
        assert_int_equal(est_observe(e, 0, phi, 1.0, phin, 0.9, 0), 0);
        t++;
    }
    assert_true(est_diverged(e));
    assert_int_equal(est_train(e, &(est_train_opts_t){.passes = 3}, &rep), WORTH_E_DIVERGED);
    est_free(e);
}

/* ---- format 1 ---- */

#define V1_N       3
#define V1_SOURCES 2

/* The stream the format-1 states of est_v1_states.h were made with. */
static void feed_v1(struct est *e, rng_t *g, int count)
{
    double phi[V1_N], phin[V1_N];
    for (int t = 0; t < count; t++) {
        for (int i = 0; i < V1_N; i++) {
            phi[i] = rng_unit(g);
            phin[i] = rng_unit(g);
        }
        size_t src = (size_t)rng_below(g, V1_SOURCES);
        int terminal = rng_below(g, 9) == 0;
        double r = rng_unit(g) - 0.3;
        assert_int_equal(est_observe(e, src, phi, r, phin, 0.9, terminal), 0);
    }
}

static void check_v1(est_params_t *p, const unsigned char *v1, size_t len, const uint64_t *saved_w,
                     const uint64_t *after_w)
{
    struct est *e = NULL;
    char err[200];
    assert_int_equal(est_new(p, V1_N, V1_SOURCES, &e, err, sizeof err), 0);
    int rc = est_load(e, v1, len, err, sizeof err);
    if (rc)
        print_error("%s: %s\n", est_kind_name(p->kind), err);
    assert_int_equal(rc, 0);
    for (int i = 0; i < V1_N; i++) {
        uint64_t u;
        memcpy(&u, &est_weights(e)[i], sizeof u);
        assert_int_equal(u, saved_w[i]);
    }
    est_stats_t st;
    est_stats(e, &st);
    assert_int_equal(st.updates, 60);
    assert_int_equal(st.health, EST_HEALTH_OK);
    assert_int_equal(st.p_resets, 0);
    assert_false(est_diverged(e));
    /* Saved again it is format 2, and reloads to the same bytes. */
    size_t l2;
    uint8_t *b2 = save(e, &l2);
    assert_int_equal(b2[4], EST_FORMAT_VERSION);
    assert_true(l2 > len);
    struct est *c = NULL;
    assert_int_equal(est_new(p, V1_N, V1_SOURCES, &c, err, sizeof err), 0);
    assert_int_equal(est_load(c, b2, l2, err, sizeof err), 0);
    assert_same_state(e, c);
    /* It continues where the format-1 build left off (traces, buffers and RNG restored). */
    rng_t g;
    rng_init(&g, 2024);
    struct est *skip = NULL;
    assert_int_equal(est_new(p, V1_N, V1_SOURCES, &skip, err, sizeof err), 0);
    feed_v1(skip, &g, 60); /* only to advance g past the first 60 transitions */
    feed_v1(e, &g, 60);
    for (int i = 0; i < V1_N; i++) {
        double want;
        memcpy(&want, &after_w[i], sizeof want);
        assert_near(est_weights(e)[i], want, 1e-12);
    }
    free(b2);
    est_free(e);
    est_free(c);
    est_free(skip);
}

static void version_1_states_load(void **state)
{
    (void)state;
    est_params_t p;
    est_params_default(EST_RLS_TD, &p);
    p.lambda = 0.5;
    p.forget = 0.99;
    p.delta = 50;
    check_v1(&p, rls_v1, sizeof rls_v1, rls_w_saved, rls_w_after);
    est_params_default(EST_REPLAY, &p);
    p.alpha = 0.05;
    p.capacity = 16;
    p.batch = 4;
    p.steps_per_obs = 2;
    p.seed = 7;
    check_v1(&p, replay_v1, sizeof replay_v1, replay_w_saved, replay_w_after);
    est_params_default(EST_TD, &p);
    p.alpha = 0.05;
    check_v1(&p, td_v1, sizeof td_v1, td_w_saved, td_w_after);

    /* Versions outside 1..EST_FORMAT_VERSION are refused, even with a valid checksum. */
    const uint8_t versions[2] = {0, EST_FORMAT_VERSION + 1};
    for (int k = 0; k < 2; k++) {
        uint8_t bad[sizeof td_v1];
        memcpy(bad, td_v1, sizeof bad);
        bad[4] = versions[k];
        uint32_t crc = ser_crc32(bad, sizeof bad - 4);
        for (int i = 0; i < 4; i++)
            bad[sizeof bad - 4 + i] = (uint8_t)(crc >> (8 * i));
        struct est *e = NULL;
        char err[200] = "";
        assert_int_equal(est_new(&p, V1_N, V1_SOURCES, &e, err, sizeof err), 0);
        assert_int_equal(est_load(e, bad, sizeof bad, err, sizeof err), WORTH_E_CORRUPT);
        assert_non_null(strstr(err, "version"));
        est_free(e);
    }
}

/* The footprint counts two snapshots of est_snap_size doubles (the diverged flag included). */
static void footprint_counts_the_snapshots(void **state)
{
    (void)state;
    for (int k = 0; k < EST_KIND_COUNT; k++) {
        est_params_t p = params_for(k);
        struct est *e = make(k);
        double fp = est_footprint(&p, N, SOURCES);
        assert_true(fp >= 8.0 * (N + 2.0 * (double)est_snap_size(e)));
        est_free(e);
    }
    est_params_t p = params_for(EST_TD);
    assert_near(est_footprint(&p, N, SOURCES), 8.0 * (N + 2.0 * (N + 1)), 0);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(deterministic_and_resumable),
        cmocka_unit_test(bad_input_leaves_state_unchanged),
        cmocka_unit_test(corrupt_and_mismatched_state),
        cmocka_unit_test(bad_parameters),
        cmocka_unit_test(names_and_optional_operations),
        cmocka_unit_test(td_with_a_huge_step_diverges_deterministically),
        cmocka_unit_test(bound_scales_with_the_largest_reward),
        cmocka_unit_test(non_finite_weights_diverge),
        cmocka_unit_test(replay_diverges_in_training),
        cmocka_unit_test(version_1_states_load),
        cmocka_unit_test(footprint_counts_the_snapshots),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
