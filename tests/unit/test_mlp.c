/*
 * test_mlp.c - the value networks (learn/mlpnet.c, mlp.c, ensemble.c): the
 * backward pass against finite differences, determinism, save -> load ->
 * continue, and the parameter checks.
 */
#include "testutil.h"

#include "learn/est.h"
#include "learn/mlpnet.h"
#include "learn/rng.h"
#include "common/mem.h"
#include "worth/errors.h"

#define N 3 /* inputs */
#define B 5 /* batch of the gradient check */

static void random_fill(rng_t *r, double *v, size_t n, double lo, double hi)
{
    for (size_t i = 0; i < n; i++)
        v[i] = lo + (hi - lo) * rng_unit(r);
}

/*
 * Gradient check: L(w) = sum_i c_i V(x_i; w) for fixed c and x.  mlpnet_backward with err = c
 * must give dL/dw; compare every component with the central difference
 * (L(w + h e_j) - L(w - h e_j)) / 2h, h = 1e-6, whose error is O(h^2) ~ 1e-12 here.
 */
static void gradient_check(int relu)
{
    est_params_t p;
    est_params_default(EST_MLP, &p);
    p.hidden = (est_hidden_t){3, {7, 5, 4, 0}};
    p.act = relu ? EST_ACT_RELU : EST_ACT_TANH;
    mlpnet_t s;
    mlpnet_shape(&s, &p, N);
    assert_int_equal(s.params, 7 * 3 + 7 + 5 * 7 + 5 + 4 * 5 + 4 + 4 + 1);
    double *w = mem_alloc(s.params * sizeof *w), *grad = mem_alloc(s.params * sizeof *grad);
    double X[B * N], c[B], out[B], H[B * 16], work[2 * B * 7], vw[2 * 7];
    rng_t r;
    rng_init(&r, 11);
    mlpnet_init(&s, w, 5, 0.3);
    /* Nonzero biases: with the initial zero biases a ReLU unit whose inputs are all dead sits
     * exactly on its kink, where no difference quotient tells the one-sided slope. */
    for (size_t j = 0; j < s.params; j++)
        w[j] += 0.2 * (rng_unit(&r) - 0.5);
    random_fill(&r, X, B * N, -1, 1);
    random_fill(&r, c, B, -1, 1);
    mlpnet_forward(&s, w, X, B, H, out);
    /* The batch forward and the one-input value agree. */
    for (size_t i = 0; i < B; i++)
        assert_near(out[i], mlpnet_value(&s, w, X + i * N, vw), 1e-14);
    mlpnet_backward(&s, w, X, B, H, c, grad, work);
    double h = 1e-6, worst = 0;
    for (size_t j = 0; j < s.params; j++) {
        double keep = w[j], lp = 0, lm = 0;
        w[j] = keep + h;
        for (size_t i = 0; i < B; i++)
            lp += c[i] * mlpnet_value(&s, w, X + i * N, vw);
        w[j] = keep - h;
        for (size_t i = 0; i < B; i++)
            lm += c[i] * mlpnet_value(&s, w, X + i * N, vw);
        w[j] = keep;
        double fd = (lp - lm) / (2 * h);
        /* ReLU: a kink within h of a unit's input would spoil the difference; none is here
         * (random inputs), and the tolerance would show one. */
        assert_near(grad[j], fd, 1e-7 * (1 + fabs(fd)));
        if (fabs(grad[j] - fd) > worst)
            worst = fabs(grad[j] - fd);
    }
    printf("%s: %zu weights, largest |backward - finite difference| %.3g\n", relu ? "relu" : "tanh",
           s.params, worst);
    mem_free(w);
    mem_free(grad);
}

static void backward_matches_finite_differences_tanh(void **state)
{
    (void)state;
    gradient_check(0);
}

static void backward_matches_finite_differences_relu(void **state)
{
    (void)state;
    gradient_check(1);
}

/* Adam's first step moves every weight with a nonzero gradient by alpha against its sign. */
static void adam_first_step_is_alpha(void **state)
{
    (void)state;
    double w[3] = {1, 2, 3}, m[3] = {0}, v[3] = {0}, g[3] = {0.5, -4, 0};
    mlpnet_adam(3, w, m, v, g, 1, 0.01);
    assert_near(w[0], 1 - 0.01, 1e-9);
    assert_near(w[1], 2 + 0.01, 1e-9);
    assert_near(w[2], 3, 0);
    double c[2] = {3, 4};
    assert_near(mlpnet_clip(2, c, 1.0), 5.0, 1e-15);
    assert_near(c[0], 0.6, 1e-15);
    assert_near(c[1], 0.8, 1e-15);
}

static struct est *make(enum est_kind kind, uint64_t seed, unsigned nstep, unsigned target)
{
    est_params_t p;
    est_params_default(kind, &p);
    p.hidden = (est_hidden_t){2, {8, 6, 0, 0}};
    p.capacity = 50;
    p.batch = 6;
    p.seed = seed;
    p.nstep = nstep;
    p.target_every = target;
    p.clip = 0.5;
    p.decay = 100;
    if (kind == EST_ENSEMBLE)
        p.members = 3;
    struct est *e = NULL;
    char err[200] = "";
    int rc = est_new(&p, N, 2, &e, err, sizeof err);
    if (rc)
        print_error("est_new: %s\n", err);
    assert_int_equal(rc, 0);
    return e;
}

/* Transition t of a fixed stream over two sources, a terminal every 7th. */
static void feed(struct est *e, size_t from, size_t to)
{
    for (size_t t = from; t < to; t++) {
        double x[N], xn[N];
        for (size_t i = 0; i < N; i++) {
            x[i] = sin(0.37 * (double)t + (double)i);
            xn[i] = sin(0.37 * (double)(t + 1) + (double)i);
        }
        int term = t % 7 == 6;
        assert_int_equal(est_observe(e, t % 2, x, x[0] * x[1], term ? NULL : xn, 0.9, term), 0);
    }
}

static void same_bits(const struct est *a, const struct est *b)
{
    assert_int_equal(est_weight_count(a), est_weight_count(b));
    assert_memory_equal(est_weights(a), est_weights(b), est_weight_count(a) * sizeof(double));
}

static void check_resume(enum est_kind kind, unsigned nstep, unsigned target)
{
    struct est *a = make(kind, 7, nstep, target), *b = make(kind, 7, nstep, target);
    struct est *c = make(kind, 8, nstep, target);
    feed(a, 0, 60);
    feed(c, 0, 60);
    size_t len = 0;
    assert_int_equal(est_save(a, NULL, 0, &len), WORTH_E_TOO_LARGE);
    uint8_t *buf = mem_alloc(len);
    assert_int_equal(est_save(a, buf, len, &len), 0);
    char err[200] = "";
    assert_int_equal(est_load(b, buf, len, err, sizeof err), 0);
    same_bits(a, b);
    feed(a, 60, 130);
    feed(b, 60, 130);
    est_train_t ra, rb;
    assert_int_equal(est_train(a, &(est_train_opts_t){.passes = 2}, &ra), 0);
    assert_int_equal(est_train(b, &(est_train_opts_t){.passes = 2}, &rb), 0);
    assert_int_equal(ra.steps, rb.steps);
    assert_true(ra.steps > 0);
    same_bits(a, b);
    /* Another seed gives other weights. */
    assert_memory_not_equal(est_weights(a), est_weights(c), est_weight_count(a) * sizeof(double));
    est_stats_t st;
    est_stats(a, &st);
    assert_int_equal(st.updates, 130);
    /* A step after every transition once the buffer holds an entry (n - 1 transitions wait). */
    assert_true(st.refits > ra.steps + 100 && st.refits <= 130 + ra.steps);
    double x[N] = {0.1, 0.2, 0.3}, sd = 0;
    double v = est_value(a, x);
    assert_true(isfinite(v));
    /* The published snapshot answers as the estimator does. */
    double *snap = mem_alloc(est_snap_size(a) * sizeof *snap);
    est_snap(a, snap);
    double vs = est_snap_value(a, snap, x, &sd);
    assert_near(vs, v, 0);
    if (kind == EST_ENSEMBLE) {
        double sd2 = -1;
        assert_int_equal(est_sd(a, x, &sd2), 0);
        assert_near(sd, sd2, 0);
        assert_true(sd2 > 0);
    } else {
        assert_true(isnan(sd));
    }
    /* Reset gives the freshly built state back. */
    struct est *f = make(kind, 7, nstep, target);
    est_reset(a);
    same_bits(a, f);
    mem_free(snap);
    mem_free(buf);
    est_free(a);
    est_free(b);
    est_free(c);
    est_free(f);
}

static void mlp_resumes_bit_for_bit(void **state)
{
    (void)state;
    check_resume(EST_MLP, 1, 0);
}

static void mlp_nstep_target_resumes_bit_for_bit(void **state)
{
    (void)state;
    check_resume(EST_MLP, 3, 10);
}

static void ensemble_resumes_bit_for_bit(void **state)
{
    (void)state;
    check_resume(EST_ENSEMBLE, 2, 5);
}

/* A state of other parameters or a truncated state is refused, the estimator unchanged. */
static void load_refuses_mismatch(void **state)
{
    (void)state;
    struct est *a = make(EST_MLP, 7, 1, 0), *b = make(EST_MLP, 9, 1, 0);
    feed(a, 0, 20);
    size_t len = 0;
    est_save(a, NULL, 0, &len);
    uint8_t *buf = mem_alloc(len);
    assert_int_equal(est_save(a, buf, len, &len), 0);
    char err[200] = "";
    assert_int_equal(est_load(b, buf, len, err, sizeof err), WORTH_E_MISMATCH);
    assert_int_equal(est_load(b, buf, len - 9, err, sizeof err), WORTH_E_CORRUPT);
    mem_free(buf);
    est_free(a);
    est_free(b);
}

static void expect_refused(est_params_t *p, size_t n, int code, const char *part)
{
    struct est *e = NULL;
    char err[200] = "";
    assert_int_equal(est_new(p, n, 1, &e, err, sizeof err), code);
    assert_null(e);
    if (!strstr(err, part))
        print_error("message \"%s\" lacks \"%s\"\n", err, part);
    assert_non_null(strstr(err, part));
}

static void bad_parameters(void **state)
{
    (void)state;
    est_params_t p;
    est_params_default(EST_ENSEMBLE, &p);
    p.members = 1;
    expect_refused(&p, 4, WORTH_E_BAD_PARAM, "members must be 2..32");
    p.members = 33;
    expect_refused(&p, 4, WORTH_E_BAD_PARAM, "members must be 2..32");
    est_params_default(EST_MLP, &p);
    p.hidden = (est_hidden_t){0, {0}};
    expect_refused(&p, 4, WORTH_E_BAD_PARAM, "hidden must list 1..4");
    p.hidden = (est_hidden_t){2, {8, 0, 0, 0}};
    expect_refused(&p, 4, WORTH_E_BAD_PARAM, "hidden[1]: a layer's width must be 1..1024");
    p.hidden = (est_hidden_t){1, {8, 8, 0, 0}};
    expect_refused(&p, 4, WORTH_E_BAD_PARAM, "past the 1 layers");
    est_params_default(EST_MLP, &p);
    p.act = (enum est_act)7;
    expect_refused(&p, 4, WORTH_E_BAD_PARAM, "activation must be tanh or relu");
    est_params_default(EST_MLP, &p);
    p.clip = -1;
    expect_refused(&p, 4, WORTH_E_BAD_PARAM, "clip must be finite and >= 0");
    est_params_default(EST_MLP, &p);
    p.nstep = 0;
    expect_refused(&p, 4, WORTH_E_BAD_PARAM, "n must be 1..1000");
    est_params_default(EST_MLP, &p);
    p.alpha = 0;
    expect_refused(&p, 4, WORTH_E_BAD_PARAM, "alpha must be");
    est_params_default(EST_ENSEMBLE, &p);
    p.members = 32;
    p.hidden = (est_hidden_t){4, {1024, 1024, 1024, 1024}};
    expect_refused(&p, 4, WORTH_E_TOO_LARGE, "weights, over the limit");
    /* The footprint counts the buffer, the moments and every member's network. */
    est_params_default(EST_ENSEMBLE, &p);
    double f = est_footprint(&p, 10, 1);
    mlpnet_t s;
    mlpnet_shape(&s, &p, 10);
    assert_true(f >= 8.0 * (p.capacity * 20.0 + 5.0 * 3 * s.params));
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(backward_matches_finite_differences_tanh),
        cmocka_unit_test(backward_matches_finite_differences_relu),
        cmocka_unit_test(adam_first_step_is_alpha),
        cmocka_unit_test(mlp_resumes_bit_for_bit),
        cmocka_unit_test(mlp_nstep_target_resumes_bit_for_bit),
        cmocka_unit_test(ensemble_resumes_bit_for_bit),
        cmocka_unit_test(load_refuses_mismatch),
        cmocka_unit_test(bad_parameters),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
