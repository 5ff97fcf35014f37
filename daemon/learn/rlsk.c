/*
 * rlsk.c - RLS-TD's two O(n^2) kernels: plain C, and on x86-64 AVX-512
 * intrinsics; the variant is chosen once per process (rlsk.h).
 *
 * The plain C is built twice: "portable", vectorised by the compiler for the
 * baseline of its target (SSE2 on x86-64: the same bits on every x86-64
 * host), and "compat", built as the builds of schema 5 built it (GCC's
 * target_clones: AVX2 where the CPU has it), which is what an AVX2 host
 * without AVX-512 runs.  The AVX-512 variant fixes its order of additions in
 * the code (four rows of P at a time, one accumulator per row, a fixed
 * horizontal sum), fuses each multiply-add, and fuses a step's downdate with
 * the next step's products in one pass over P (rls.c defers the downdate for
 * it).  An AVX2 version of these intrinsics, measured in worthd's ingest at
 * 65 features on this project's machine, ran no faster than compat (551-575k
 * against 536-568k transitions/s) and was dropped; avx512 ran 710-750k.
 */
#include "learn/rlsk.h"

#include <pthread.h>
#include <stdlib.h>
#include <string.h>

/* ---- portable, and the kernels of the builds before rlsk.c ---------------- */

/*
 * "portable": plain C for the baseline of the target, the same bits on every
 * x86-64 host.  "compat": the same C built as the builds of schema 5 built
 * it, twice (AVX2 and the baseline, the loader picking one: GCC's
 * target_clones), so a host recovers a database those builds wrote to the
 * very bits they had.
 */
#define NAME(x) x##_portable
#define ATTR
#include "learn/rlsk_plain.h"
#undef NAME
#undef ATTR

#if defined(__x86_64__) && defined(__GNUC__) && !defined(__clang__)
#define NAME(x) x##_compat
#define ATTR    __attribute__((target_clones("arch=x86-64-v3", "default")))
#include "learn/rlsk_plain.h"
#undef NAME
#undef ATTR
#define HAVE_COMPAT 1
#endif

static const rlsk_t PORTABLE = {"portable", products_portable, downdate_portable, fused_portable,
                                diag_portable};
#ifdef HAVE_COMPAT
static const rlsk_t COMPAT = {"compat", products_compat, downdate_compat, fused_compat,
                              diag_compat};
#endif

/* ---- x86-64 intrinsics -------------------------------------------------------- */

#if defined(__x86_64__) && defined(__GNUC__)
#include <immintrin.h>
#define HAVE_X86 1

#define AVX512 __attribute__((target("avx512f,fma")))

/* a0 + ... + a7 in a fixed order: halves added twice, then the last pair. */
AVX512 static double hsum8(__m512d a)
{
    __m256d h = _mm256_add_pd(_mm512_castpd512_pd256(a), _mm512_extractf64x4_pd(a, 1));
    __m128d s = _mm_add_pd(_mm256_castpd256_pd128(h), _mm256_extractf128_pd(h, 1));
    return _mm_cvtsd_f64(_mm_add_sd(s, _mm_unpackhi_pd(s, s)));
}

/*
 * Columns j..j+7 (lanes m) of a row downdated: x = row (* inv_mu when scale),
 * then x - ki u with one rounding; ki is k_i (* inv_mu when scale).  The one
 * form of the downdate's arithmetic, for downdate_avx512 and the fused pass.
 */
AVX512 static inline __attribute__((always_inline)) __m512d
down8(const double *row, const double *u, size_t j, __mmask8 m, __m512d ki, __m512d s, int scale)
{
    __m512d x = _mm512_maskz_loadu_pd(m, row + j);
    if (scale)
        x = _mm512_mul_pd(x, s);
    return _mm512_fnmadd_pd(ki, _mm512_maskz_loadu_pd(m, u + j), x);
}

/* Lanes of columns j..j+7 inside a row of n: all, or the tail's. */
AVX512 static inline __attribute__((always_inline)) __mmask8 lanes(size_t j, size_t n)
{
    return n - j >= 8 ? (__mmask8)0xff : (__mmask8)((1u << (n - j)) - 1);
}

/* The gain's entry i as the downdate applies it: k_i (* inv_mu when scale). */
#define KI(i) _mm512_set1_pd(scale ? k[i] * inv_mu : k[i])

AVX512 static void downdate_avx512(size_t n, size_t ld, double *P, const double *k, const double *u,
                                   double inv_mu)
{
    __m512d s = _mm512_set1_pd(inv_mu);
    int scale = inv_mu != 1.0;
    for (size_t i = 0; i < n; i++) {
        double *row = P + i * ld;
        __m512d ki = KI(i);
        for (size_t j = 0; j < n; j += 8) {
            __mmask8 m = lanes(j, n);
            _mm512_mask_storeu_pd(row + j, m, down8(row, u, j, m, ki, s, scale));
        }
    }
}

/* Each entry as downdate_avx512 rounds it: x = p (* inv_mu), then x - k u fused. */
AVX512 static void diag_avx512(size_t n, size_t ld, const double *P, const double *k,
                               const double *u, double inv_mu, double *out)
{
    int scale = inv_mu != 1.0;
    for (size_t i = 0; i < n; i++) {
        double x = scale ? P[i * ld + i] * inv_mu : P[i * ld + i];
        double ki = scale ? k[i] * inv_mu : k[i];
        out[i] = __builtin_fma(-ki, u[i], x);
    }
}

/*
 * One pass over P: with down, each row is first downdated, P = (P - k u')
 * * inv_mu as downdate_avx512 rounds it, and stored; then, while in
 * registers, multiplied into pz = P z and u2 = P'd, four rows at a time,
 * columns in order, one accumulator per row and a fixed horizontal sum.  So
 * fused (down) has the bits of downdate_avx512 then products (not down).
 */
AVX512 static inline __attribute__((always_inline)) void
pass_avx512(size_t n, size_t ld, double *P, const double *k, const double *u, double inv_mu,
            const double *z, const double *d, double *pz, double *u2, int down)
{
    memset(u2, 0, n * sizeof *u2);
    size_t i = 0;
    __m512d s = _mm512_set1_pd(inv_mu);
    int scale = inv_mu != 1.0;
    /* A row's columns j..j+7: downdated (down) or as they stand. */
#define ROW(r, kk, j, m) (down ? down8(r, u, j, m, kk, s, scale) : _mm512_maskz_loadu_pd(m, r + j))
#define KD(i)            (down ? KI(i) : s) /* k (and u) are NULL when not down: never read then */
    for (; i + 4 <= n; i += 4) {
        double *r0 = P + i * ld, *r1 = r0 + ld, *r2 = r1 + ld, *r3 = r2 + ld;
        __m512d a0 = _mm512_setzero_pd(), a1 = a0, a2 = a0, a3 = a0;
        __m512d k0 = KD(i), k1 = KD(i + 1), k2 = KD(i + 2), k3 = KD(i + 3);
        __m512d d0 = _mm512_set1_pd(d[i]), d1 = _mm512_set1_pd(d[i + 1]);
        __m512d d2 = _mm512_set1_pd(d[i + 2]), d3 = _mm512_set1_pd(d[i + 3]);
        for (size_t j = 0; j < n; j += 8) {
            __mmask8 m = lanes(j, n);
            __m512d zj = _mm512_maskz_loadu_pd(m, z + j);
            __m512d x0 = ROW(r0, k0, j, m), x1 = ROW(r1, k1, j, m);
            __m512d x2 = ROW(r2, k2, j, m), x3 = ROW(r3, k3, j, m);
            if (down) {
                _mm512_mask_storeu_pd(r0 + j, m, x0);
                _mm512_mask_storeu_pd(r1 + j, m, x1);
                _mm512_mask_storeu_pd(r2 + j, m, x2);
                _mm512_mask_storeu_pd(r3 + j, m, x3);
            }
            a0 = _mm512_fmadd_pd(x0, zj, a0);
            a1 = _mm512_fmadd_pd(x1, zj, a1);
            a2 = _mm512_fmadd_pd(x2, zj, a2);
            a3 = _mm512_fmadd_pd(x3, zj, a3);
            __m512d vj = _mm512_maskz_loadu_pd(m, u2 + j);
            vj = _mm512_fmadd_pd(d0, x0, vj);
            vj = _mm512_fmadd_pd(d1, x1, vj);
            vj = _mm512_fmadd_pd(d2, x2, vj);
            vj = _mm512_fmadd_pd(d3, x3, vj);
            _mm512_mask_storeu_pd(u2 + j, m, vj);
        }
        pz[i] = hsum8(a0);
        pz[i + 1] = hsum8(a1);
        pz[i + 2] = hsum8(a2);
        pz[i + 3] = hsum8(a3);
    }
    for (; i < n; i++) {
        double *row = P + i * ld;
        __m512d a = _mm512_setzero_pd(), di = _mm512_set1_pd(d[i]), ki = KD(i);
        for (size_t j = 0; j < n; j += 8) {
            __mmask8 m = lanes(j, n);
            __m512d x = ROW(row, ki, j, m);
            if (down)
                _mm512_mask_storeu_pd(row + j, m, x);
            a = _mm512_fmadd_pd(x, _mm512_maskz_loadu_pd(m, z + j), a);
            _mm512_mask_storeu_pd(u2 + j, m,
                                  _mm512_fmadd_pd(di, x, _mm512_maskz_loadu_pd(m, u2 + j)));
        }
        pz[i] = hsum8(a);
    }
#undef KD
#undef ROW
}
#undef KI

AVX512 static void products_avx512(size_t n, size_t ld, const double *P, const double *z,
                                   const double *d, double *pz, double *u)
{
    /* Not down: P is only read (the cast is for pass_avx512's signature). */
    pass_avx512(n, ld, (double *)P, NULL, NULL, 1.0, z, d, pz, u, 0);
}

AVX512 static void fused_avx512(size_t n, size_t ld, double *P, const double *k, const double *u,
                                double inv_mu, const double *z, const double *d, double *pz,
                                double *u2)
{
    pass_avx512(n, ld, P, k, u, inv_mu, z, d, pz, u2, 1);
}

static const rlsk_t AVX512F = {"avx512", products_avx512, downdate_avx512, fused_avx512,
                               diag_avx512};
#endif

/* ---- choice ------------------------------------------------------------------- */

const rlsk_t *rlsk_named(const char *name)
{
    if (!name)
        return NULL;
    if (strcmp(name, PORTABLE.name) == 0)
        return &PORTABLE;
#ifdef HAVE_COMPAT
    if (strcmp(name, COMPAT.name) == 0)
        return &COMPAT;
#endif
#ifdef HAVE_X86
    __builtin_cpu_init();
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
    if (!(chosen = rlsk_named("avx512")) && !(chosen = rlsk_named("compat")))
        chosen = &PORTABLE;
}

const rlsk_t *rlsk(void)
{
    pthread_once(&once, choose);
    return chosen;
}
