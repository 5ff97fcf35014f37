/*
 * test_rlsk.c - RLS-TD's kernels (learn/rlsk.h): every variant this CPU runs
 * computes P z, P'd and P - k u' (with and without the 1/mu scaling) to
 * within rounding of a plain double loop over the same numbers, at sizes that
 * leave every kind of vector tail (n mod 8 from 0 to 7); touches nothing
 * outside the n x n part of a padded P; fuses the downdate with the next
 * products and reads the diagonal it leaves bit for bit; gives the same bits
 * twice; and a WORTH_RLS_KERNEL naming no variant is refused by rlsk_named.
 */
#include "testutil.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "learn/rlsk.h"
#include "learn/rng.h"

static const char *const NAMES[] = {"portable", "compat", "avx512"};
static const size_t SIZES[] = {1, 2, 3, 4, 5, 6, 7, 8, 9, 15, 16, 17, 45, 65, 100};
#define PAD (-12345.0) /* what the padding of each row holds; a kernel must leave it */

struct mats {
    size_t n, ld;
    double *P, *z, *d, *k, *u;
};

static void fill(struct mats *a, size_t n, uint64_t seed)
{
    rng_t g;
    rng_init(&g, seed);
    a->n = n;
    a->ld = RLSK_LD(n);
    a->P = aligned_alloc(64, n * a->ld * sizeof(double) + 64);
    a->u = aligned_alloc(64, a->ld * sizeof(double) + 64);
    a->z = malloc(n * sizeof(double));
    a->d = malloc(n * sizeof(double));
    a->k = malloc(n * sizeof(double));
    for (size_t i = 0; i < n; i++) {
        for (size_t j = 0; j < a->ld; j++)
            a->P[i * a->ld + j] = j < n ? rng_unit(&g) - 0.5 : PAD;
        a->z[i] = rng_unit(&g);
        a->d[i] = rng_unit(&g) - 0.5;
        a->k[i] = rng_unit(&g) - 0.5;
    }
}

static void drop(struct mats *a)
{
    free(a->P);
    free(a->u);
    free(a->z);
    free(a->d);
    free(a->k);
}

/* |got - want| within 64 ulps of the sum of the magnitudes that made want. */
static void close_to(double got, double want, double scale)
{
    double tol = 64 * 2.220446049250313e-16 * (scale > 1e-300 ? scale : 1e-300);
    if (!(fabs(got - want) <= tol))
        fail_msg("got %.17g, want %.17g (tolerance %.3g)", got, want, tol);
}

/* One case: variant K at size n, inv_mu 1 or not; a.P, a.z, a.d, a.k and a.u are filled. */
typedef void (*case_fn)(const rlsk_t *K, struct mats *a, double inv_mu);

/* Runs check on every variant this CPU runs, every size, with and without forgetting. */
static void each_case(case_fn check, uint64_t seed)
{
    const double inv_mu[] = {1.0, 1.0 / 0.97};
    int ran = 0;
    for (size_t v = 0; v < sizeof NAMES / sizeof *NAMES; v++) {
        const rlsk_t *K = rlsk_named(NAMES[v]);
        if (!K)
            continue; /* this CPU cannot run it */
        ran++;
        for (size_t s = 0; s < sizeof SIZES / sizeof *SIZES; s++)
            for (size_t m = 0; m < 2; m++) {
                struct mats a;
                fill(&a, SIZES[s], seed + SIZES[s]);
                for (size_t j = 0; j < a.n; j++)
                    a.u[j] = a.d[j] * 1e-2;
                check(K, &a, inv_mu[m]);
                drop(&a);
            }
    }
    assert_true(ran >= 1); /* portable runs everywhere */
}

static void check_products(const rlsk_t *K, struct mats *a, double inv_mu)
{
    (void)inv_mu;
    size_t n = a->n, ld = a->ld;
    double *pz = malloc(n * sizeof *pz);
    K->products(n, ld, a->P, a->z, a->d, pz, a->u);
    for (size_t i = 0; i < n; i++) {
        double want = 0, scale = 0;
        for (size_t j = 0; j < n; j++) {
            want += a->P[i * ld + j] * a->z[j];
            scale += fabs(a->P[i * ld + j] * a->z[j]);
        }
        close_to(pz[i], want, scale);
        double wu = 0, su = 0; /* column i of P against d */
        for (size_t j = 0; j < n; j++) {
            wu += a->P[j * ld + i] * a->d[j];
            su += fabs(a->P[j * ld + i] * a->d[j]);
        }
        close_to(a->u[i], wu, su);
    }
    free(pz);
}

static void products_agree(void **state)
{
    (void)state;
    each_case(check_products, 100);
}

static void check_downdate(const rlsk_t *K, struct mats *a, double inv_mu)
{
    size_t n = a->n, ld = a->ld;
    double *before = malloc(n * ld * sizeof *before);
    memcpy(before, a->P, n * ld * sizeof *before);
    K->downdate(n, ld, a->P, a->k, a->u, inv_mu);
    for (size_t i = 0; i < n; i++) {
        for (size_t j = 0; j < n; j++) {
            double b = before[i * ld + j], t = a->k[i] * inv_mu * a->u[j];
            close_to(a->P[i * ld + j], b * inv_mu - t, fabs(b * inv_mu) + fabs(t));
        }
        for (size_t j = n; j < ld; j++)
            assert_true(a->P[i * ld + j] == PAD);
    }
    free(before);
}

static void downdate_agrees_and_keeps_padding(void **state)
{
    (void)state;
    each_case(check_downdate, 200);
}

/*
 * fused is downdate then products, bit for bit, and diag is the diagonal downdate leaves, bit
 * for bit: rls.c's deferred downdate rests on both.
 */
static void check_fused(const rlsk_t *K, struct mats *a, double inv_mu)
{
    size_t n = a->n, ld = a->ld;
    double *P2 = aligned_alloc(64, n * ld * sizeof(double) + 64);
    memcpy(P2, a->P, n * ld * sizeof *P2);
    double *pa = malloc(n * sizeof *pa), *pb = malloc(n * sizeof *pb);
    double *ua = aligned_alloc(64, ld * sizeof(double) + 64);
    double *ub = aligned_alloc(64, ld * sizeof(double) + 64);
    double *dg = malloc(n * sizeof *dg);
    K->diag(n, ld, a->P, a->k, a->u, inv_mu, dg);
    K->downdate(n, ld, a->P, a->k, a->u, inv_mu);
    K->products(n, ld, a->P, a->z, a->d, pa, ua);
    K->fused(n, ld, P2, a->k, a->u, inv_mu, a->z, a->d, pb, ub);
    assert_memory_equal(a->P, P2, n * ld * sizeof(double)); /* padding too */
    assert_memory_equal(pa, pb, n * sizeof *pa);
    assert_memory_equal(ua, ub, n * sizeof *ua);
    for (size_t i = 0; i < n; i++)
        assert_memory_equal(&dg[i], &a->P[i * ld + i], sizeof *dg);
    free(P2);
    free(pa);
    free(pb);
    free(ua);
    free(ub);
    free(dg);
}

static void fused_and_diag_are_exact(void **state)
{
    (void)state;
    each_case(check_fused, 300);
}

/* The same inputs give the same bits: no variant depends on anything but its arguments. */
static void same_bits_twice(void **state)
{
    (void)state;
    for (size_t v = 0; v < sizeof NAMES / sizeof *NAMES; v++) {
        const rlsk_t *K = rlsk_named(NAMES[v]);
        if (!K)
            continue;
        struct mats a, b;
        fill(&a, 65, 7);
        fill(&b, 65, 7);
        double pa[65], pb[65];
        for (int step = 0; step < 5; step++) {
            K->products(65, a.ld, a.P, a.z, a.d, pa, a.u);
            K->products(65, b.ld, b.P, b.z, b.d, pb, b.u);
            assert_memory_equal(pa, pb, sizeof pa);
            assert_memory_equal(a.u, b.u, 65 * sizeof(double));
            for (size_t i = 0; i < 65; i++)
                pa[i] = pb[i] = pa[i] * 1e-3;
            K->downdate(65, a.ld, a.P, pa, a.u, 1.0);
            K->downdate(65, b.ld, b.P, pb, b.u, 1.0);
            assert_memory_equal(a.P, b.P, 65 * a.ld * sizeof(double));
        }
        drop(&a);
        drop(&b);
    }
}

static void names(void **state)
{
    (void)state;
    assert_non_null(rlsk_named("portable"));
    assert_null(rlsk_named("sse9"));
    assert_null(rlsk_named(""));
    assert_null(rlsk_named(NULL));
    const rlsk_t *k = rlsk();
    assert_non_null(k);
    assert_ptr_equal(rlsk_named(k->name), k); /* the variant in use is one this CPU runs */
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(products_agree),
        cmocka_unit_test(downdate_agrees_and_keeps_padding),
        cmocka_unit_test(fused_and_diag_are_exact),
        cmocka_unit_test(same_bits_twice),
        cmocka_unit_test(names),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
