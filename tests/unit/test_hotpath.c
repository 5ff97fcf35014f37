/*
 * test_hotpath.c - the per-transition path allocates nothing.
 *
 * malloc, calloc, realloc and free of the learning library are wrapped at
 * link time (-Wl,--wrap) and counted.  A model with every estimator kind is
 * warmed up (each source's buffers are allocated when the source is first
 * seen, and the Monte Carlo buffer grows to its high-water mark), then 5000
 * further transitions and 1000 value queries must not allocate at all.
 * Allocations inside OpenBLAS and LAPACK are outside this check (they are not
 * linked through the wrapper); their single-threaded kernels and the
 * LAPACKE *_work calls used here take no heap memory.
 */
#include "testutil.h"

#include <stdlib.h>

#include "learn/model.h"
#include "learn/rng.h"

void *__real_malloc(size_t n);
void *__real_calloc(size_t c, size_t n);
void *__real_realloc(void *p, size_t n);
void __real_free(void *p);

static long counted;
static int counting;

void *__wrap_malloc(size_t n)
{
    counted += counting;
    return __real_malloc(n);
}

void *__wrap_calloc(size_t c, size_t n)
{
    counted += counting;
    return __real_calloc(c, n);
}

void *__wrap_realloc(void *p, size_t n)
{
    counted += counting;
    return __real_realloc(p, n);
}

void __wrap_free(void *p)
{
    counted += counting && p;
    __real_free(p);
}

#define D       3
#define SOURCES 4

static void no_allocation_per_transition(void **state)
{
    (void)state;
    double lo[D] = {0, -1, 10}, hi[D] = {1, 1, 20};
    feat_basis_t bases[3] = {
        {.kind = FEAT_BIAS},
        {.kind = FEAT_FOURIER, .order = 3, .couple = 2},
        {.kind = FEAT_TILES, .tilings = 4, .tiles = 5, .size = 64},
    };
    est_params_t est[EST_KIND_COUNT];
    const char *names[EST_KIND_COUNT];
    for (int k = 0; k < EST_KIND_COUNT; k++) {
        est_params_default(k, &est[k]);
        est[k].alpha = 0.001;
        est[k].forget = k == EST_RLS_TD ? 0.999 : 1.0;
        est[k].refit_every = 50; /* LAPACK solves happen inside the measured window */
        est[k].capacity = 500;
        names[k] = est_kind_name(k);
    }
    model_spec_t spec = {
        .feat = {.dims = D, .lo = lo, .hi = hi, .nbases = 3, .bases = bases},
        .gamma = 0.95,
        .gamma_per_s = 0.99,
        .n_est = EST_KIND_COUNT,
        .est = est,
        .est_names = names,
        .primary_auto = 1, /* the headline's choice runs on every transition too */
        .max_sources = SOURCES,
    };
    struct model *m = NULL;
    char err[200];
    assert_int_equal(model_new(&spec, &m, err, sizeof err), 0);
    static const char *const sources[SOURCES] = {"pump-1", "pump-2", "pump-3", "pump-4"};
    double *work = malloc(model_work_size(m) * sizeof *work);
    double values[EST_KIND_COUNT], sd[EST_KIND_COUNT];

    rng_t g;
    rng_init(&g, 4);
    double x[D], xn[D];
    for (int phase = 0; phase < 2; phase++) {
        counting = phase == 1;
        for (int t = 0; t < 5000; t++) {
            for (int j = 0; j < D; j++) {
                x[j] = lo[j] + (hi[j] - lo[j]) * rng_unit(&g);
                xn[j] = lo[j] + (hi[j] - lo[j]) * rng_unit(&g);
            }
            model_obs_t o = {
                .x = x,
                .x_len = D,
                .r = rng_unit(&g),
                .x_next = xn,
                .x_next_len = D,
                .terminal = t % 40 == 39, /* episodes of 40 steps per source */
                .source = sources[(t / 40) % SOURCES],
                .dt_s = t % 2 ? 60.0 : NAN,
            };
            assert_int_equal(model_observe(m, &o, err, sizeof err), 0);
            if (t % 5 == 0)
                assert_int_equal(model_value(m, x, D, values, sd, work), 0);
        }
    }
    counting = 0;
    if (counted)
        print_error("%ld allocator calls in 5000 transitions and 1000 queries\n", counted);
    assert_int_equal(counted, 0);
    model_counts_t c;
    model_counts(m, &c);
    assert_int_equal(c.applied, 10000);
    free(work);
    model_free(m);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(no_allocation_per_transition),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
