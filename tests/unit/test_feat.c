/*
 * test_feat.c - feature maps (daemon/learn/feat.h): feature counts of every
 * basis and their concatenation, values at hand-chosen points (normalisation,
 * poly, fourier, rbf, tile coding), clipping, spec errors (codes, message,
 * *out untouched, no huge allocation) and no writes past phi or the workspace.
 */
#include "testutil.h"

#include <sys/resource.h>
#include <time.h>

#include "learn/feat.h"
#include "worth/errors.h"

/* Doubles of guard after every buffer handed to feat_eval. */
#define GUARD_N 8
static const double GUARD = -12345.625;

static struct feat *const SENTINEL = (struct feat *)(uintptr_t)0x5e47;

/* Ranges [0, 1] in every dimension (inputs are then already normalised). */
static double unit_lo[FEAT_MAX_DIMS + 1], unit_hi[FEAT_MAX_DIMS + 1];

static int setup_ranges(void **state)
{
    (void)state;
    for (size_t i = 0; i <= FEAT_MAX_DIMS; i++) {
        unit_lo[i] = 0.0;
        unit_hi[i] = 1.0;
    }
    return 0;
}

static feat_spec_t unit_spec(size_t dims, const feat_basis_t *bases, size_t nbases)
{
    feat_spec_t s = {.dims = dims,
                     .lo = unit_lo,
                     .hi = unit_hi,
                     .nbases = nbases,
                     .bases = bases,
                     .max_features = 0};
    return s;
}

/* Builds a map that must be accepted. */
static struct feat *build(const feat_spec_t *spec)
{
    struct feat *f = NULL;
    char err[256] = "";
    int rc = feat_new(spec, &f, err, sizeof err);
    if (rc != 0)
        print_error("feat_new failed: %d (%s)\n", rc, err);
    assert_int_equal(rc, 0);
    assert_non_null(f);
    return f;
}

/* Number of features of a one-basis map over unit ranges. */
static size_t count_of(size_t dims, feat_basis_t b)
{
    feat_spec_t s = unit_spec(dims, &b, 1);
    struct feat *f = build(&s);
    size_t n = feat_count(f);
    assert_int_equal(feat_dims(f), dims);
    feat_free(f);
    return n;
}

/*
 * Evaluates x into phi (n doubles) with guard doubles after phi and after the
 * workspace; checks the guards and returns feat_eval's clip count.
 */
static size_t eval_guarded(const struct feat *f, const double *x, double *phi)
{
    size_t n = feat_count(f), nw = feat_work_size(f);
    double *p = malloc((n + GUARD_N) * sizeof *p);
    double *w = malloc((nw + GUARD_N) * sizeof *w);
    assert_non_null(p);
    assert_non_null(w);
    for (size_t i = 0; i < GUARD_N; i++) {
        p[n + i] = GUARD;
        w[nw + i] = GUARD;
    }
    size_t clipped = feat_eval(f, x, p, w);
    for (size_t i = 0; i < GUARD_N; i++) {
        assert_true(p[n + i] == GUARD);
        assert_true(w[nw + i] == GUARD);
    }
    memcpy(phi, p, n * sizeof *phi);
    free(p);
    free(w);
    return clipped;
}

/* ---- counts ---- */

static void counts_of_every_basis(void **state)
{
    (void)state;
    assert_int_equal(count_of(1, (feat_basis_t){.kind = FEAT_BIAS}), 1);
    assert_int_equal(count_of(7, (feat_basis_t){.kind = FEAT_BIAS}), 1);
    assert_int_equal(count_of(1, (feat_basis_t){.kind = FEAT_RAW}), 1);
    assert_int_equal(count_of(5, (feat_basis_t){.kind = FEAT_RAW}), 5);

    /* Monomials of total degree 1..p in D variables: C(D+p, p) - 1. */
    assert_int_equal(count_of(2, (feat_basis_t){.kind = FEAT_POLY, .degree = 2}), 5);  /* 6-1 */
    assert_int_equal(count_of(3, (feat_basis_t){.kind = FEAT_POLY, .degree = 3}), 19); /* 20-1 */
    assert_int_equal(count_of(1, (feat_basis_t){.kind = FEAT_POLY, .degree = 4}), 4);  /* 5-1 */
    assert_int_equal(count_of(4, (feat_basis_t){.kind = FEAT_POLY, .degree = 2}), 14); /* 15-1 */
    assert_int_equal(count_of(3, (feat_basis_t){.kind = FEAT_POLY, .degree = 1}), 3);

    /* Fourier without cap: (k+1)^D - 1 (the zero vector is excluded). */
    assert_int_equal(count_of(2, (feat_basis_t){.kind = FEAT_FOURIER, .order = 3}), 15);
    assert_int_equal(count_of(3, (feat_basis_t){.kind = FEAT_FOURIER, .order = 2}), 26);
    assert_int_equal(count_of(1, (feat_basis_t){.kind = FEAT_FOURIER, .order = 5}), 5);
    /* couple = D is the same as no cap. */
    assert_int_equal(count_of(3, (feat_basis_t){.kind = FEAT_FOURIER, .order = 2, .couple = 3}),
                     26);
    /* couple = 1: D * k. */
    assert_int_equal(count_of(3, (feat_basis_t){.kind = FEAT_FOURIER, .order = 4, .couple = 1}),
                     12);
    /* couple = 2, D = 3, k = 2: C(3,1)*2 + C(3,2)*2^2 = 6 + 12 = 18. */
    assert_int_equal(count_of(3, (feat_basis_t){.kind = FEAT_FOURIER, .order = 2, .couple = 2}),
                     18);

    /* rbf: centres^D. */
    feat_basis_t rbf = {.kind = FEAT_RBF, .centers = 3, .width = 0.2};
    assert_int_equal(count_of(2, rbf), 9);
    rbf.centers = 4;
    assert_int_equal(count_of(3, rbf), 64);
    rbf.centers = 1;
    assert_int_equal(count_of(5, rbf), 1);

    /* tiles: the hashed table size. */
    assert_int_equal(
        count_of(2, (feat_basis_t){.kind = FEAT_TILES, .tilings = 8, .tiles = 10, .size = 97}), 97);
}

static void concatenation_adds_counts_in_order(void **state)
{
    (void)state;
    const double lo[2] = {-1.0, 10.0}, hi[2] = {1.0, 20.0};
    const feat_basis_t bases[] = {
        {.kind = FEAT_BIAS},
        {.kind = FEAT_RAW},
        {.kind = FEAT_POLY, .degree = 2},
    };
    feat_spec_t s = {.dims = 2, .lo = lo, .hi = hi, .nbases = 3, .bases = bases};
    struct feat *f = build(&s);
    assert_int_equal(feat_count(f), 1 + 2 + 5);
    assert_int_equal(feat_dims(f), 2);

    /* x = (0, 12.5) normalises to u = ((0+1)/2, (12.5-10)/10) = (0.5, 0.25). */
    const double x[2] = {0.0, 12.5};
    double phi[8];
    assert_int_equal(eval_guarded(f, x, phi), 0);
    assert_near(phi[0], 1.0, 0); /* bias first */
    assert_near(phi[1], 0.5, 0); /* then raw */
    assert_near(phi[2], 0.25, 0);
    assert_near(phi[3], 0.25, 1e-15); /* then poly: u1 (exponents (0,1)) */
    assert_near(phi[7], 0.25, 1e-15); /* ... last (2,0): u0^2 */
    feat_free(f);

    /* The other order: raw before bias. */
    const feat_basis_t rev[] = {{.kind = FEAT_RAW}, {.kind = FEAT_BIAS}};
    s.bases = rev;
    s.nbases = 2;
    f = build(&s);
    assert_int_equal(feat_count(f), 3);
    assert_int_equal(eval_guarded(f, x, phi), 0);
    assert_near(phi[0], 0.5, 0);
    assert_near(phi[1], 0.25, 0);
    assert_near(phi[2], 1.0, 0);
    feat_free(f);
}

/* ---- values ---- */

static void normalisation_uses_declared_ranges(void **state)
{
    (void)state;
    const double lo[3] = {-4.0, 100.0, -1e-3}, hi[3] = {4.0, 300.0, 1e-3};
    const feat_basis_t raw = {.kind = FEAT_RAW};
    feat_spec_t s = {.dims = 3, .lo = lo, .hi = hi, .nbases = 1, .bases = &raw};
    struct feat *f = build(&s);
    double phi[3];

    const double at_lo[3] = {-4.0, 100.0, -1e-3};
    assert_int_equal(eval_guarded(f, at_lo, phi), 0);
    for (int i = 0; i < 3; i++)
        assert_near(phi[i], 0.0, 0);

    const double at_hi[3] = {4.0, 300.0, 1e-3};
    assert_int_equal(eval_guarded(f, at_hi, phi), 0);
    for (int i = 0; i < 3; i++)
        assert_near(phi[i], 1.0, 1e-15);

    /* (x - lo) / (hi - lo): (2+4)/8 = 0.75, (150-100)/200 = 0.25, (0+1e-3)/2e-3 = 0.5. */
    const double mid[3] = {2.0, 150.0, 0.0};
    assert_int_equal(eval_guarded(f, mid, phi), 0);
    assert_near(phi[0], 0.75, 1e-15);
    assert_near(phi[1], 0.25, 1e-15);
    assert_near(phi[2], 0.5, 1e-15);
    feat_free(f);
}

static void poly_monomials_in_generator_order(void **state)
{
    (void)state;
    /*
     * gen_poly: exponents of dimension 0 outermost, last dimension fastest,
     * each ascending, zero vector skipped.  D = 2, p = 2 gives
     * (0,1) (0,2) (1,0) (1,1) (2,0).
     */
    const feat_basis_t b = {.kind = FEAT_POLY, .degree = 2};
    feat_spec_t s = unit_spec(2, &b, 1);
    struct feat *f = build(&s);
    const double x[2] = {0.5, 0.25};
    double phi[5];
    assert_int_equal(eval_guarded(f, x, phi), 0);
    const double want[5] = {0.25, 0.0625, 0.5, 0.125, 0.25};
    for (int i = 0; i < 5; i++)
        assert_near(phi[i], want[i], 1e-15);
    feat_free(f);

    /*
     * D = 3, p = 3 at u = (0.5, 0.25, 0.75): spot-check a few of the 19 in
     * generator order: first (0,0,1) = u2, (0,0,2), (0,0,3), (0,1,0) = u1,
     * (0,1,1), (0,1,2), (0,2,0), (0,2,1), (0,3,0), (1,0,0) = u0 at index 9,
     * last (3,0,0) = u0^3 at index 18.
     */
    const feat_basis_t b3 = {.kind = FEAT_POLY, .degree = 3};
    s = unit_spec(3, &b3, 1);
    f = build(&s);
    const double x3[3] = {0.5, 0.25, 0.75};
    double phi3[19];
    assert_int_equal(eval_guarded(f, x3, phi3), 0);
    assert_near(phi3[0], 0.75, 1e-15);
    assert_near(phi3[1], 0.5625, 1e-15);
    assert_near(phi3[2], 0.421875, 1e-15);
    assert_near(phi3[3], 0.25, 1e-15);
    assert_near(phi3[4], 0.1875, 1e-15);   /* u1 u2 */
    assert_near(phi3[5], 0.140625, 1e-15); /* u1 u2^2 */
    assert_near(phi3[8], 0.015625, 1e-15); /* u1^3 */
    assert_near(phi3[9], 0.5, 1e-15);      /* u0 */
    assert_near(phi3[18], 0.125, 1e-15);   /* u0^3 */
    feat_free(f);
}

static void fourier_cosines_at_a_point(void **state)
{
    (void)state;
    /*
     * gen_fourier order: c0 outermost, last dimension fastest, zero vector
     * skipped.  D = 2, k = 2: (0,1) (0,2) (1,0) (1,1) (1,2) (2,0) (2,1) (2,2).
     * At u = (0.5, 0.25), c.u = 0.25, 0.5, 0.5, 0.75, 1, 1, 1.25, 1.5.
     */
    const feat_basis_t b = {.kind = FEAT_FOURIER, .order = 2};
    feat_spec_t s = unit_spec(2, &b, 1);
    struct feat *f = build(&s);
    const double x[2] = {0.5, 0.25};
    double phi[8];
    assert_int_equal(eval_guarded(f, x, phi), 0);
    const double r2 = sqrt(0.5);
    const double want[8] = {r2, 0.0, 0.0, -r2, -1.0, -1.0, -r2, 0.0};
    for (int i = 0; i < 8; i++)
        assert_near(phi[i], want[i], 1e-15);
    feat_free(f);

    /* couple = 1: only single-dimension terms (0,1) (0,2) (1,0) (2,0). */
    const feat_basis_t b1 = {.kind = FEAT_FOURIER, .order = 2, .couple = 1};
    s = unit_spec(2, &b1, 1);
    f = build(&s);
    const double x1[2] = {1.0 / 3.0, 0.1};
    double phi1[4];
    assert_int_equal(eval_guarded(f, x1, phi1), 0);
    const double pi = 3.14159265358979323846;
    assert_near(phi1[0], cos(pi * 0.1), 1e-15);
    assert_near(phi1[1], cos(pi * 0.2), 1e-15);
    assert_near(phi1[2], 0.5, 1e-15);  /* cos(pi/3) */
    assert_near(phi1[3], -0.5, 1e-15); /* cos(2 pi/3) */
    feat_free(f);
}

static void rbf_is_gaussian_around_grid_centres(void **state)
{
    (void)state;
    /*
     * D = 2, 3 centres per dimension at 0, 0.5, 1 (index k = 3 i0 + i1, last
     * dimension fastest), width w = 0.2.  At u = (0.5, 1) we sit on centre
     * (1, 2), k = 5.
     */
    const double w = 0.2;
    const feat_basis_t b = {.kind = FEAT_RBF, .centers = 3, .width = w};
    feat_spec_t s = unit_spec(2, &b, 1);
    struct feat *f = build(&s);
    const double x[2] = {0.5, 1.0};
    double phi[9];
    assert_int_equal(eval_guarded(f, x, phi), 0);
    assert_near(phi[5], 1.0, 0);
    const double ctr[3] = {0.0, 0.5, 1.0};
    for (int i0 = 0; i0 < 3; i0++)
        for (int i1 = 0; i1 < 3; i1++) {
            double d2 = (x[0] - ctr[i0]) * (x[0] - ctr[i0]) + (x[1] - ctr[i1]) * (x[1] - ctr[i1]);
            double want = exp(-d2 / (2 * w * w));
            assert_near(phi[3 * i0 + i1], want, 1e-14 * want); /* exp(a) exp(b) vs exp(a+b) */
        }
    /* Two values by hand: centre (0,0): d^2 = 1.25 -> e^-15.625; (1,1): d^2 = 0.25 -> e^-3.125. */
    assert_near(phi[0], exp(-15.625), 1e-20);
    assert_near(phi[4], exp(-3.125), 1e-15);

    /* Off-grid point u = (0.1, 0.7): feature of centre (0, 0.5) is exp(-(0.01+0.04)/0.08). */
    const double y[2] = {0.1, 0.7};
    assert_int_equal(eval_guarded(f, y, phi), 0);
    assert_near(phi[1], exp(-0.625), 1e-15);
    feat_free(f);
}

static double overlap(const double *a, const double *b, size_t n)
{
    double s = 0;
    for (size_t i = 0; i < n; i++)
        s += a[i] < b[i] ? a[i] : b[i];
    return s;
}

static void tiles_activate_one_tile_per_tiling(void **state)
{
    (void)state;
    enum { T = 8, SIZE = 4096 };
    const feat_basis_t b = {.kind = FEAT_TILES, .tilings = T, .tiles = 10, .size = SIZE};
    feat_spec_t s = unit_spec(2, &b, 1);
    struct feat *f = build(&s), *g = build(&s);
    static double pa[SIZE], pb[SIZE], pc[SIZE];

    /* Sum == T everywhere (collisions add), entries are non-negative integers. */
    for (int i = 0; i <= 20; i++)
        for (int j = 0; j <= 20; j++) {
            const double x[2] = {i / 20.0, j / 20.0};
            assert_int_equal(eval_guarded(f, x, pa), 0);
            double sum = 0;
            for (size_t k = 0; k < SIZE; k++) {
                assert_true(pa[k] >= 0 && pa[k] == floor(pa[k]));
                sum += pa[k];
            }
            assert_near(sum, T, 0);
            /* Deterministic: a second map from the same spec agrees bit for bit. */
            assert_int_equal(eval_guarded(g, x, pb), 0);
            assert_memory_equal(pa, pb, sizeof pa);
        }

    /* Close points share most active tiles, far points few. */
    const double a[2] = {0.431, 0.617}, near_a[2] = {0.432, 0.618}, far[2] = {0.95, 0.05};
    eval_guarded(f, a, pa);
    eval_guarded(f, near_a, pb);
    eval_guarded(f, far, pc);
    double close_ov = overlap(pa, pb, SIZE), far_ov = overlap(pa, pc, SIZE);
    assert_below(T - 3, close_ov);
    assert_below(far_ov, 2);
    /* The same point shares all T. */
    assert_near(overlap(pa, pa, SIZE), T, 0);
    feat_free(f);
    feat_free(g);

    /* size 1: every tiling collides into the one feature, which then holds T. */
    const feat_basis_t one = {.kind = FEAT_TILES, .tilings = T, .tiles = 4, .size = 1};
    s = unit_spec(3, &one, 1);
    f = build(&s);
    const double x3[3] = {0.2, 0.9, 0.5};
    double p1[1];
    eval_guarded(f, x3, p1);
    assert_near(p1[0], T, 0);
    feat_free(f);
}

/* ---- clipping ---- */

static void clipping_is_reported(void **state)
{
    (void)state;
    const double lo[3] = {0.0, -1.0, 10.0}, hi[3] = {1.0, 1.0, 20.0};
    const feat_basis_t bases[] = {{.kind = FEAT_RAW}, {.kind = FEAT_BIAS}};
    feat_spec_t s = {.dims = 3, .lo = lo, .hi = hi, .nbases = 2, .bases = bases};
    struct feat *f = build(&s);
    double phi[4];

    const double x[3] = {-5.0, 0.0, 1e9};
    assert_int_equal(eval_guarded(f, x, phi), 2);
    assert_near(phi[0], 0.0, 0);
    assert_near(phi[1], 0.5, 0);
    assert_near(phi[2], 1.0, 0);
    assert_near(phi[3], 1.0, 0);

    const double all[3] = {2.0, -1.5, 9.999};
    assert_int_equal(eval_guarded(f, all, phi), 3);
    assert_near(phi[0], 1.0, 0);
    assert_near(phi[1], 0.0, 0);
    assert_near(phi[2], 0.0, 0);

    /* The bounds themselves are inside. */
    const double edge[3] = {1.0, -1.0, 20.0};
    assert_int_equal(eval_guarded(f, edge, phi), 0);
    feat_free(f);

    /* Clipped inputs evaluate exactly like the bound for a nonlinear basis too. */
    const feat_basis_t rb = {.kind = FEAT_RBF, .centers = 2, .width = 0.3};
    s = (feat_spec_t){.dims = 3, .lo = lo, .hi = hi, .nbases = 1, .bases = &rb};
    f = build(&s);
    double pc[8], pe[8];
    const double out[3] = {-3.0, 7.0, 15.0}, bound[3] = {0.0, 1.0, 15.0};
    assert_int_equal(eval_guarded(f, out, pc), 2);
    assert_int_equal(eval_guarded(f, bound, pe), 0);
    assert_memory_equal(pc, pe, sizeof pc);
    feat_free(f);
}

/* ---- errors ---- */

/* Expects feat_new to fail with code, a message, and *out untouched. */
static void expect_fail(const feat_spec_t *spec, int code, const char *what)
{
    struct feat *f = SENTINEL;
    char err[256];
    memset(err, 0, sizeof err);
    int rc = feat_new(spec, &f, err, sizeof err);
    if (rc != code)
        print_error("%s: expected %d (%s), got %d (%s)\n", what, code, worth_err_name(code), rc,
                    err);
    assert_int_equal(rc, code);
    assert_ptr_equal(f, SENTINEL);
    if (strlen(err) == 0)
        print_error("%s: empty error message\n", what);
    assert_true(strlen(err) > 0);
}

static void bad_specs_are_refused(void **state)
{
    (void)state;
    const feat_basis_t bias = {.kind = FEAT_BIAS};
    feat_spec_t s = unit_spec(0, &bias, 1);
    expect_fail(&s, WORTH_E_BAD_PARAM, "dims 0");
    s = unit_spec(FEAT_MAX_DIMS + 1, &bias, 1);
    expect_fail(&s, WORTH_E_TOO_LARGE, "dims 65");
    s = unit_spec(FEAT_MAX_DIMS, &bias, 1);
    feat_free(build(&s)); /* the limit itself is fine */

    s = unit_spec(2, &bias, 0);
    expect_fail(&s, WORTH_E_BAD_PARAM, "no basis");

    s = unit_spec(1, &bias, 1);
    s.max_features = (size_t)FEAT_HARD_MAX + 1;
    expect_fail(&s, WORTH_E_BAD_PARAM, "max_features above the hard max");

    /* Ranges. */
    double lo[2] = {0.0, 0.0}, hi[2] = {1.0, 1.0};
    s = (feat_spec_t){.dims = 2, .lo = lo, .hi = hi, .nbases = 1, .bases = &bias};
    feat_free(build(&s));
    hi[1] = 0.0;
    expect_fail(&s, WORTH_E_BAD_PARAM, "lo == hi");
    hi[1] = -1.0;
    expect_fail(&s, WORTH_E_BAD_PARAM, "lo > hi");
    hi[1] = NAN;
    expect_fail(&s, WORTH_E_BAD_PARAM, "hi NaN");
    hi[1] = 1.0;
    lo[0] = NAN;
    expect_fail(&s, WORTH_E_BAD_PARAM, "lo NaN");
    lo[0] = -INFINITY;
    expect_fail(&s, WORTH_E_BAD_PARAM, "lo -inf");
    lo[0] = 0.0;
    hi[0] = INFINITY;
    expect_fail(&s, WORTH_E_BAD_PARAM, "hi inf");
    lo[0] = -1e308;
    hi[0] = 1e308; /* hi - lo overflows */
    expect_fail(&s, WORTH_E_BAD_PARAM, "span overflows");
    lo[0] = 0.0;
    hi[0] = 1.0;

    /* Basis parameters. */
    struct {
        feat_basis_t b;
        const char *what;
    } bad[] = {
        {{.kind = FEAT_POLY, .degree = 0}, "poly degree 0"},
        {{.kind = FEAT_FOURIER, .order = 0}, "fourier order 0"},
        {{.kind = FEAT_FOURIER, .order = 2, .couple = 3}, "fourier couple > dims"},
        {{.kind = FEAT_RBF, .centers = 0, .width = 0.2}, "rbf centers 0"},
        {{.kind = FEAT_RBF, .centers = 3, .width = 0.0}, "rbf width 0"},
        {{.kind = FEAT_RBF, .centers = 3, .width = -0.1}, "rbf width < 0"},
        {{.kind = FEAT_RBF, .centers = 3, .width = NAN}, "rbf width NaN"},
        {{.kind = FEAT_RBF, .centers = 3, .width = INFINITY}, "rbf width inf"},
        {{.kind = FEAT_TILES, .tilings = 0, .tiles = 4, .size = 64}, "tiles 0 tilings"},
        {{.kind = FEAT_TILES, .tilings = 4, .tiles = 0, .size = 64}, "tiles 0 tiles"},
        {{.kind = FEAT_TILES, .tilings = 4, .tiles = 4, .size = 0}, "tiles size 0"},
        /* tilings bound the offset table and the cost of evaluation: refused, not allocated */
        {{.kind = FEAT_TILES, .tilings = 0xffffffffu, .tiles = 4, .size = 64},
         "tiles 2^32 tilings"},
        {{.kind = FEAT_TILES, .tilings = FEAT_MAX_TILINGS + 1, .tiles = 4, .size = 64},
         "tiles too many tilings"},
        {{.kind = FEAT_TILES, .tilings = 4, .tiles = FEAT_MAX_TILES + 1, .size = 64},
         "tiles too many tiles"},
        {{.kind = (enum feat_kind)99}, "unknown kind"},
    };
    for (size_t i = 0; i < sizeof bad / sizeof bad[0]; i++) {
        /* Alone, and after a valid basis. */
        s = unit_spec(2, &bad[i].b, 1);
        expect_fail(&s, WORTH_E_BAD_PARAM, bad[i].what);
        const feat_basis_t two[2] = {bias, bad[i].b};
        s = unit_spec(2, two, 2);
        expect_fail(&s, WORTH_E_BAD_PARAM, bad[i].what);
    }
}

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return ts.tv_sec + ts.tv_nsec * 1e-9;
}

static long max_rss_kib(void)
{
    struct rusage ru;
    getrusage(RUSAGE_SELF, &ru);
    return ru.ru_maxrss;
}

static void huge_bases_are_too_large_and_cheap(void **state)
{
    (void)state;
    struct {
        size_t dims;
        feat_basis_t b;
        size_t max;
        const char *what;
    } big[] = {
        {20, {.kind = FEAT_FOURIER, .order = 9}, 0, "fourier 9 on 20 dims (10^20 - 1)"},
        {64, {.kind = FEAT_FOURIER, .order = 255}, FEAT_HARD_MAX, "fourier 255 on 64 dims"},
        {64,
         {.kind = FEAT_FOURIER, .order = 255, .couple = 2},
         FEAT_HARD_MAX,
         "fourier 255 couple 2 on 64 dims"},
        {12, {.kind = FEAT_RBF, .centers = 10, .width = 0.1}, 0, "rbf 10 centres on 12 dims"},
        {64,
         {.kind = FEAT_RBF, .centers = 0xffffffffu, .width = 0.1},
         FEAT_HARD_MAX,
         "rbf 2^32-1 centres on 64 dims"},
        {40, {.kind = FEAT_POLY, .degree = 40}, 0, "poly 40 on 40 dims"},
        {64, {.kind = FEAT_POLY, .degree = 255}, FEAT_HARD_MAX, "poly 255 on 64 dims"},
        {2,
         {.kind = FEAT_TILES, .tilings = 4, .tiles = 4, .size = FEAT_DEFAULT_MAX + 1},
         0,
         "tiles size over the default max"},
        {2,
         {.kind = FEAT_TILES, .tilings = 4, .tiles = 4, .size = 0xffffffffu},
         FEAT_HARD_MAX,
         "tiles size 2^32-1"},
    };
    long rss0 = max_rss_kib();
    double t0 = now_s();
    for (size_t i = 0; i < sizeof big / sizeof big[0]; i++) {
        feat_spec_t s = unit_spec(big[i].dims, &big[i].b, 1);
        s.max_features = big[i].max;
        expect_fail(&s, WORTH_E_TOO_LARGE, big[i].what);
    }
    double elapsed = now_s() - t0;
    long grew = max_rss_kib() - rss0;
    assert_below(elapsed, 1.0);
    assert_below((double)grew, 16.0 * 1024); /* KiB: nothing near the refused size */

    /* The cap is exact: 9 rbf features fit max 9, not max 8; a bias on top needs 10. */
    const feat_basis_t rbf = {.kind = FEAT_RBF, .centers = 3, .width = 0.2};
    feat_spec_t s = unit_spec(2, &rbf, 1);
    s.max_features = 9;
    feat_free(build(&s));
    s.max_features = 8;
    expect_fail(&s, WORTH_E_TOO_LARGE, "rbf 9 with max 8");
    const feat_basis_t two[2] = {{.kind = FEAT_BIAS}, rbf};
    s = unit_spec(2, two, 2);
    s.max_features = 9;
    expect_fail(&s, WORTH_E_TOO_LARGE, "bias + rbf 9 with max 9");
    s.max_features = 10;
    feat_free(build(&s));

    /* Many small bases whose sum exceeds the default max. */
    feat_basis_t many[5];
    for (int i = 0; i < 5; i++)
        many[i] = (feat_basis_t){.kind = FEAT_TILES, .tilings = 1, .tiles = 2, .size = 1000};
    s = unit_spec(2, many, 5);
    expect_fail(&s, WORTH_E_TOO_LARGE, "5 x 1000 tiles");
    s.nbases = 4;
    feat_free(build(&s));
}

/* ---- bounds of the output ---- */

static void eval_stays_inside_phi_and_work(void **state)
{
    (void)state;
    const double lo[3] = {-1.0, 0.0, 5.0}, hi[3] = {1.0, 2.0, 6.0};
    const feat_basis_t bases[] = {
        {.kind = FEAT_BIAS},
        {.kind = FEAT_RAW},
        {.kind = FEAT_POLY, .degree = 4},
        {.kind = FEAT_FOURIER, .order = 3, .couple = 2},
        {.kind = FEAT_RBF, .centers = 5, .width = 0.25},
        {.kind = FEAT_TILES, .tilings = 4, .tiles = 3, .size = 33},
        {.kind = FEAT_POLY, .degree = 1},
    };
    feat_spec_t s = {.dims = 3, .lo = lo, .hi = hi, .nbases = 7, .bases = bases};
    struct feat *f = build(&s);
    /* 1 + 3 + (C(7,4)-1) + (3*3 + 3*9) + 125 + 33 + 3 */
    size_t n = 1 + 3 + 34 + 36 + 125 + 33 + 3;
    assert_int_equal(feat_count(f), n);
    double *phi = malloc(n * sizeof *phi);
    assert_non_null(phi);
    const double xs[4][3] = {{0.3, 1.1, 5.5}, {-9, 9, 9}, {1, 2, 6}, {-1, 0, 5}};
    for (int i = 0; i < 4; i++) {
        eval_guarded(f, xs[i], phi); /* checks the guards */
        for (size_t k = 0; k < n; k++)
            assert_true(isfinite(phi[k]));
    }
    /* Tiles sit at [1+3+34+36+125, +33) and sum to 4. */
    double sum = 0;
    for (size_t k = 199; k < 199 + 33; k++)
        sum += phi[k];
    assert_near(sum, 4, 0);
    /* The trailing degree-1 poly equals raw. */
    assert_near(phi[n - 3], phi[1 + 2], 0);
    assert_near(phi[n - 1], phi[1], 0);
    free(phi);
    feat_free(f);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(counts_of_every_basis),
        cmocka_unit_test(concatenation_adds_counts_in_order),
        cmocka_unit_test(normalisation_uses_declared_ranges),
        cmocka_unit_test(poly_monomials_in_generator_order),
        cmocka_unit_test(fourier_cosines_at_a_point),
        cmocka_unit_test(rbf_is_gaussian_around_grid_centres),
        cmocka_unit_test(tiles_activate_one_tile_per_tiling),
        cmocka_unit_test(clipping_is_reported),
        cmocka_unit_test(bad_specs_are_refused),
        cmocka_unit_test(huge_bases_are_too_large_and_cheap),
        cmocka_unit_test(eval_stays_inside_phi_and_work),
    };
    return cmocka_run_group_tests(tests, setup_ranges, NULL);
}
