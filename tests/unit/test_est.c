/*
 * test_est.c - the estimator interface, over every kind: determinism,
 * save/load/continue, reset, bad input leaving the state bit-identical,
 * corrupt and mismatched state, and parameter validation.
 */
#include "testutil.h"

#include <stdlib.h>

#include "est.h"
#include "rng.h"
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
        assert_int_equal(rc, k == EST_RLS_TD ? 0 : WORTH_E_UNSUPPORTED);
        est_train_t rep;
        rc = est_train(e, &(est_train_opts_t){.passes = 2}, &rep);
        assert_int_equal(rc, (k == EST_LSTD || k == EST_REPLAY) ? 0 : WORTH_E_UNSUPPORTED);
        assert_int_equal(est_features(e), N);
        est_free(e);
    }
    assert_int_equal(est_kind_parse("nope"), -1);
    assert_null(est_kind_name(EST_KIND_COUNT));
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(deterministic_and_resumable),
        cmocka_unit_test(bad_input_leaves_state_unchanged),
        cmocka_unit_test(corrupt_and_mismatched_state),
        cmocka_unit_test(bad_parameters),
        cmocka_unit_test(names_and_optional_operations),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
