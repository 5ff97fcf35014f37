/*
 * rlsk.c - RLS-TD's two O(n^2) kernels, portable C and, on x86-64, AVX2+FMA
 * and AVX-512 intrinsics; the variant is chosen once per process (rlsk.h).
 *
 * The portable variant is plain C that the compiler vectorises for the
 * baseline of its target (SSE2 on x86-64: the same bits on every x86-64
 * host).  The intrinsic variants fix their order of additions in the code
 * (four rows of P at a time, one accumulator per row, a fixed horizontal sum)
 * and fuse each multiply-add, which halves the instructions of the portable
 * form; AVX-512 halves them again.  All of P stays in the level-1 cache up to
 * n = 70 or so (n^2 doubles), so the loops are bound by arithmetic, not
 * memory, and the instruction count is what matters.
 */
#include "learn/rlsk.h"

#include <pthread.h>
#include <stdlib.h>
#include <string.h>

/* ---- portable ---------------------------------------------------------------- */

/*
 * One pass over P (row-major) gives both pz = P z and u = P' d, where dgemv
 * twice would read P twice.  The simd pragma lets the compiler vectorise the
 * row dot product (a reduction), which plain -O2 may not reorder; the order is
 * fixed per build, so results stay deterministic.
 */
static void products_portable(size_t n, size_t ld, const double *P, const double *z,
                              const double *d, double *pz, double *u)
{
    memset(u, 0, n * sizeof *u);
    size_t i = 0;
    /*
     * Four rows at a time: each element of u and z is loaded once per four
     * rows instead of once per row, so the loop does eight multiply-adds per
     * load and store of u rather than two.
     */
    for (; i + 4 <= n; i += 4) {
        const double *r0 = P + i * ld, *r1 = r0 + ld, *r2 = r1 + ld, *r3 = r2 + ld;
        double a0 = 0.0, a1 = 0.0, a2 = 0.0, a3 = 0.0;
        double d0 = d[i], d1 = d[i + 1], d2 = d[i + 2], d3 = d[i + 3];
#pragma omp simd reduction(+ : a0, a1, a2, a3)
        for (size_t j = 0; j < n; j++) {
            double zj = z[j];
            a0 += r0[j] * zj;
            a1 += r1[j] * zj;
            a2 += r2[j] * zj;
            a3 += r3[j] * zj;
            u[j] += (d0 * r0[j] + d1 * r1[j]) + (d2 * r2[j] + d3 * r3[j]);
        }
        pz[i] = a0;
        pz[i + 1] = a1;
        pz[i + 2] = a2;
        pz[i + 3] = a3;
    }
    for (; i < n; i++) {
        const double *row = P + i * ld;
        double acc = 0.0, di = d[i];
#pragma omp simd reduction(+ : acc)
        for (size_t j = 0; j < n; j++) {
            acc += row[j] * z[j];
            u[j] += di * row[j];
        }
        pz[i] = acc;
    }
}

/* P = (P - k u') * inv_mu in one pass (dscal and dger would take two). */
static void downdate_portable(size_t n, size_t ld, double *P, const double *k, const double *u,
                              double inv_mu)
{
    /*
     * mu = 1 (no forgetting, the default) skips the scaling.  Same bits: x * 1.0
     * is x, and this file is built without floating-point contraction (ISO C
     * mode), so both forms round the same two operations.
     */
    if (inv_mu == 1.0) {
        for (size_t i = 0; i < n; i++) {
            double *row = P + i * ld, ki = k[i];
#pragma omp simd
            for (size_t j = 0; j < n; j++)
                row[j] -= ki * u[j];
        }
        return;
    }
    for (size_t i = 0; i < n; i++) {
        double *row = P + i * ld, ki = k[i] * inv_mu;
#pragma omp simd
        for (size_t j = 0; j < n; j++)
            row[j] = row[j] * inv_mu - ki * u[j];
    }
}

static const rlsk_t PORTABLE = {"portable", products_portable, downdate_portable};

/* ---- x86-64 intrinsics -------------------------------------------------------- */

#if defined(__x86_64__) && defined(__GNUC__)
#include <immintrin.h>
#define HAVE_X86 1

#define AVX2   __attribute__((target("avx2,fma")))
#define AVX512 __attribute__((target("avx512f,fma")))

/* Lanes 0..rem-1 of a 4-lane mask (rem in 1..3). */
AVX2 static __m256i mask4(size_t rem)
{
    static const long long lanes[8] = {-1, -1, -1, -1, 0, 0, 0, 0};
    return _mm256_loadu_si256((const __m256i *)(lanes + 4 - rem));
}

/* a0 + a1 + a2 + a3 as ((a0 + a2) + (a1 + a3)): a fixed order. */
AVX2 static double hsum4(__m256d a)
{
    __m128d s = _mm_add_pd(_mm256_castpd256_pd128(a), _mm256_extractf128_pd(a, 1));
    return _mm_cvtsd_f64(_mm_add_sd(s, _mm_unpackhi_pd(s, s)));
}

AVX2 static void products_avx2(size_t n, size_t ld, const double *P, const double *z,
                               const double *d, double *pz, double *u)
{
    memset(u, 0, n * sizeof *u);
    size_t full = n & ~(size_t)3, rem = n & 3, i = 0;
    __m256i m = rem ? mask4(rem) : _mm256_setzero_si256();
    for (; i + 4 <= n; i += 4) {
        const double *r0 = P + i * ld, *r1 = r0 + ld, *r2 = r1 + ld, *r3 = r2 + ld;
        __m256d a0 = _mm256_setzero_pd(), a1 = a0, a2 = a0, a3 = a0;
        __m256d d0 = _mm256_set1_pd(d[i]), d1 = _mm256_set1_pd(d[i + 1]);
        __m256d d2 = _mm256_set1_pd(d[i + 2]), d3 = _mm256_set1_pd(d[i + 3]);
        size_t j = 0;
        for (; j < full; j += 4) {
            __m256d zj = _mm256_loadu_pd(z + j), uj = _mm256_loadu_pd(u + j);
            __m256d x0 = _mm256_loadu_pd(r0 + j), x1 = _mm256_loadu_pd(r1 + j);
            __m256d x2 = _mm256_loadu_pd(r2 + j), x3 = _mm256_loadu_pd(r3 + j);
            a0 = _mm256_fmadd_pd(x0, zj, a0);
            a1 = _mm256_fmadd_pd(x1, zj, a1);
            a2 = _mm256_fmadd_pd(x2, zj, a2);
            a3 = _mm256_fmadd_pd(x3, zj, a3);
            uj = _mm256_fmadd_pd(d0, x0, uj);
            uj = _mm256_fmadd_pd(d1, x1, uj);
            uj = _mm256_fmadd_pd(d2, x2, uj);
            uj = _mm256_fmadd_pd(d3, x3, uj);
            _mm256_storeu_pd(u + j, uj);
        }
        if (rem) {
            __m256d zj = _mm256_maskload_pd(z + j, m), uj = _mm256_maskload_pd(u + j, m);
            __m256d x0 = _mm256_maskload_pd(r0 + j, m), x1 = _mm256_maskload_pd(r1 + j, m);
            __m256d x2 = _mm256_maskload_pd(r2 + j, m), x3 = _mm256_maskload_pd(r3 + j, m);
            a0 = _mm256_fmadd_pd(x0, zj, a0);
            a1 = _mm256_fmadd_pd(x1, zj, a1);
            a2 = _mm256_fmadd_pd(x2, zj, a2);
            a3 = _mm256_fmadd_pd(x3, zj, a3);
            uj = _mm256_fmadd_pd(d0, x0, uj);
            uj = _mm256_fmadd_pd(d1, x1, uj);
            uj = _mm256_fmadd_pd(d2, x2, uj);
            uj = _mm256_fmadd_pd(d3, x3, uj);
            _mm256_maskstore_pd(u + j, m, uj);
        }
        pz[i] = hsum4(a0);
        pz[i + 1] = hsum4(a1);
        pz[i + 2] = hsum4(a2);
        pz[i + 3] = hsum4(a3);
    }
    for (; i < n; i++) {
        const double *row = P + i * ld;
        __m256d a = _mm256_setzero_pd(), di = _mm256_set1_pd(d[i]);
        size_t j = 0;
        for (; j < full; j += 4) {
            __m256d x = _mm256_loadu_pd(row + j);
            a = _mm256_fmadd_pd(x, _mm256_loadu_pd(z + j), a);
            _mm256_storeu_pd(u + j, _mm256_fmadd_pd(di, x, _mm256_loadu_pd(u + j)));
        }
        if (rem) {
            __m256d x = _mm256_maskload_pd(row + j, m);
            a = _mm256_fmadd_pd(x, _mm256_maskload_pd(z + j, m), a);
            _mm256_maskstore_pd(u + j, m, _mm256_fmadd_pd(di, x, _mm256_maskload_pd(u + j, m)));
        }
        pz[i] = hsum4(a);
    }
}

AVX2 static void downdate_avx2(size_t n, size_t ld, double *P, const double *k, const double *u,
                               double inv_mu)
{
    size_t full = n & ~(size_t)3, rem = n & 3;
    __m256i m = rem ? mask4(rem) : _mm256_setzero_si256();
    __m256d s = _mm256_set1_pd(inv_mu);
    int scale = inv_mu != 1.0;
    for (size_t i = 0; i < n; i++) {
        double *row = P + i * ld;
        __m256d ki = _mm256_set1_pd(scale ? k[i] * inv_mu : k[i]);
        size_t j = 0;
        for (; j < full; j += 4) {
            __m256d x = _mm256_loadu_pd(row + j);
            if (scale)
                x = _mm256_mul_pd(x, s);
            _mm256_storeu_pd(row + j, _mm256_fnmadd_pd(ki, _mm256_loadu_pd(u + j), x));
        }
        if (rem) {
            __m256d x = _mm256_maskload_pd(row + j, m);
            if (scale)
                x = _mm256_mul_pd(x, s);
            _mm256_maskstore_pd(row + j, m, _mm256_fnmadd_pd(ki, _mm256_maskload_pd(u + j, m), x));
        }
    }
}

/* a0 + ... + a7 in a fixed order: halves added twice, then the last pair. */
AVX512 static double hsum8(__m512d a)
{
    __m256d h = _mm256_add_pd(_mm512_castpd512_pd256(a), _mm512_extractf64x4_pd(a, 1));
    __m128d s = _mm_add_pd(_mm256_castpd256_pd128(h), _mm256_extractf128_pd(h, 1));
    return _mm_cvtsd_f64(_mm_add_sd(s, _mm_unpackhi_pd(s, s)));
}

AVX512 static void products_avx512(size_t n, size_t ld, const double *P, const double *z,
                                   const double *d, double *pz, double *u)
{
    memset(u, 0, n * sizeof *u);
    size_t full = n & ~(size_t)7, i = 0;
    __mmask8 m = (__mmask8)((1u << (n & 7)) - 1);
    for (; i + 4 <= n; i += 4) {
        const double *r0 = P + i * ld, *r1 = r0 + ld, *r2 = r1 + ld, *r3 = r2 + ld;
        __m512d a0 = _mm512_setzero_pd(), a1 = a0, a2 = a0, a3 = a0;
        __m512d d0 = _mm512_set1_pd(d[i]), d1 = _mm512_set1_pd(d[i + 1]);
        __m512d d2 = _mm512_set1_pd(d[i + 2]), d3 = _mm512_set1_pd(d[i + 3]);
        size_t j = 0;
        for (; j < full; j += 8) {
            __m512d zj = _mm512_loadu_pd(z + j), uj = _mm512_loadu_pd(u + j);
            __m512d x0 = _mm512_loadu_pd(r0 + j), x1 = _mm512_loadu_pd(r1 + j);
            __m512d x2 = _mm512_loadu_pd(r2 + j), x3 = _mm512_loadu_pd(r3 + j);
            a0 = _mm512_fmadd_pd(x0, zj, a0);
            a1 = _mm512_fmadd_pd(x1, zj, a1);
            a2 = _mm512_fmadd_pd(x2, zj, a2);
            a3 = _mm512_fmadd_pd(x3, zj, a3);
            uj = _mm512_fmadd_pd(d0, x0, uj);
            uj = _mm512_fmadd_pd(d1, x1, uj);
            uj = _mm512_fmadd_pd(d2, x2, uj);
            uj = _mm512_fmadd_pd(d3, x3, uj);
            _mm512_storeu_pd(u + j, uj);
        }
        if (m) {
            __m512d zj = _mm512_maskz_loadu_pd(m, z + j), uj = _mm512_maskz_loadu_pd(m, u + j);
            __m512d x0 = _mm512_maskz_loadu_pd(m, r0 + j), x1 = _mm512_maskz_loadu_pd(m, r1 + j);
            __m512d x2 = _mm512_maskz_loadu_pd(m, r2 + j), x3 = _mm512_maskz_loadu_pd(m, r3 + j);
            a0 = _mm512_fmadd_pd(x0, zj, a0);
            a1 = _mm512_fmadd_pd(x1, zj, a1);
            a2 = _mm512_fmadd_pd(x2, zj, a2);
            a3 = _mm512_fmadd_pd(x3, zj, a3);
            uj = _mm512_fmadd_pd(d0, x0, uj);
            uj = _mm512_fmadd_pd(d1, x1, uj);
            uj = _mm512_fmadd_pd(d2, x2, uj);
            uj = _mm512_fmadd_pd(d3, x3, uj);
            _mm512_mask_storeu_pd(u + j, m, uj);
        }
        pz[i] = hsum8(a0);
        pz[i + 1] = hsum8(a1);
        pz[i + 2] = hsum8(a2);
        pz[i + 3] = hsum8(a3);
    }
    for (; i < n; i++) {
        const double *row = P + i * ld;
        __m512d a = _mm512_setzero_pd(), di = _mm512_set1_pd(d[i]);
        size_t j = 0;
        for (; j < full; j += 8) {
            __m512d x = _mm512_loadu_pd(row + j);
            a = _mm512_fmadd_pd(x, _mm512_loadu_pd(z + j), a);
            _mm512_storeu_pd(u + j, _mm512_fmadd_pd(di, x, _mm512_loadu_pd(u + j)));
        }
        if (m) {
            __m512d x = _mm512_maskz_loadu_pd(m, row + j);
            a = _mm512_fmadd_pd(x, _mm512_maskz_loadu_pd(m, z + j), a);
            _mm512_mask_storeu_pd(u + j, m,
                                  _mm512_fmadd_pd(di, x, _mm512_maskz_loadu_pd(m, u + j)));
        }
        pz[i] = hsum8(a);
    }
}

AVX512 static void downdate_avx512(size_t n, size_t ld, double *P, const double *k, const double *u,
                                   double inv_mu)
{
    size_t full = n & ~(size_t)7;
    __mmask8 m = (__mmask8)((1u << (n & 7)) - 1);
    __m512d s = _mm512_set1_pd(inv_mu);
    int scale = inv_mu != 1.0;
    for (size_t i = 0; i < n; i++) {
        double *row = P + i * ld;
        __m512d ki = _mm512_set1_pd(scale ? k[i] * inv_mu : k[i]);
        size_t j = 0;
        for (; j < full; j += 8) {
            __m512d x = _mm512_loadu_pd(row + j);
            if (scale)
                x = _mm512_mul_pd(x, s);
            _mm512_storeu_pd(row + j, _mm512_fnmadd_pd(ki, _mm512_loadu_pd(u + j), x));
        }
        if (m) {
            __m512d x = _mm512_maskz_loadu_pd(m, row + j);
            if (scale)
                x = _mm512_mul_pd(x, s);
            _mm512_mask_storeu_pd(row + j, m,
                                  _mm512_fnmadd_pd(ki, _mm512_maskz_loadu_pd(m, u + j), x));
        }
    }
}

static const rlsk_t AVX2_FMA = {"avx2", products_avx2, downdate_avx2};
static const rlsk_t AVX512F = {"avx512", products_avx512, downdate_avx512};
#endif

/* ---- choice ------------------------------------------------------------------- */

const rlsk_t *rlsk_named(const char *name)
{
    if (!name)
        return NULL;
    if (strcmp(name, PORTABLE.name) == 0)
        return &PORTABLE;
#ifdef HAVE_X86
    __builtin_cpu_init();
    if (strcmp(name, AVX2_FMA.name) == 0)
        return __builtin_cpu_supports("avx2") && __builtin_cpu_supports("fma") ? &AVX2_FMA : NULL;
    if (strcmp(name, AVX512F.name) == 0)
        return __builtin_cpu_supports("avx512f") ? &AVX512F : NULL;
#endif
    return NULL;
}

static const rlsk_t *chosen;
static pthread_once_t once = PTHREAD_ONCE_INIT;

static void choose(void)
{
    const char *pin = getenv("WORTH_RLS_KERNEL");
    chosen = rlsk_named(pin && *pin ? pin : NULL);
    if (chosen)
        return;
    /* Unpinned (or pinned to what this CPU cannot run, which worthd refuses at start): the best. */
    if (!(chosen = rlsk_named("avx512")) && !(chosen = rlsk_named("avx2")))
        chosen = &PORTABLE;
}

const rlsk_t *rlsk(void)
{
    pthread_once(&once, choose);
    return chosen;
}
