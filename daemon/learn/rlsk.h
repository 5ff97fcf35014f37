/*
 * rlsk.h - the two O(n^2) kernels of RLS-TD's update (rls.c), in one variant
 * per instruction set, chosen once per process from what the CPU offers.
 *
 *   products: pz = P z and u = P' d in one pass over P (row-major, n x n);
 *   downdate: P = (P - k u') * inv_mu in one pass.
 *
 * Every variant computes the same maths; they differ in the order of the
 * additions (vector width) and in fused multiply-adds, so the last bits of
 * their results differ.  Within one process every RLS-TD update goes through
 * the same variant, so the live path, a replay and an in-process run give the
 * same bits; a database moved to a host that picks another variant recovers
 * to within rounding of the first host's weights, not bit for bit.
 * WORTH_RLS_KERNEL=portable (or compat, avx512) in the environment pins
 * the variant, for example to compare two hosts bit for bit; compat is the
 * arithmetic of the builds before these kernels (schema 5), which recovers a
 * database they wrote to their very bits.
 */
#ifndef WORTH_LEARN_RLSK_H
#define WORTH_LEARN_RLSK_H

#include <stddef.h>

/*
 * P is n x n, row i at P + i * ld (ld >= n); the intrinsic variants store
 * whole vectors, so P and u should be 64-byte aligned and ld a multiple of 8
 * (RLSK_LD) or every vector store splits a cache line.
 */
typedef void (*rlsk_products_fn)(size_t n, size_t ld, const double *P, const double *z,
                                 const double *d, double *pz, double *u);
typedef void (*rlsk_downdate_fn)(size_t n, size_t ld, double *P, const double *k, const double *u,
                                 double inv_mu);

/* The row stride for n: n rounded up to a multiple of 8 doubles (64 bytes). */
#define RLSK_LD(n) (((n) + 7) & ~(size_t)7)

/*
 * downdate(k, u, inv_mu), then products(z, d) into pz and u2, with the bits of
 * the two calls but, where the variant fuses them, one pass over P.  u and u2
 * must not overlap.
 */
typedef void (*rlsk_fused_fn)(size_t n, size_t ld, double *P, const double *k, const double *u,
                              double inv_mu, const double *z, const double *d, double *pz,
                              double *u2);
/* The diagonal downdate(k, u, inv_mu) would leave in P, into out (n), P untouched. */
typedef void (*rlsk_diag_fn)(size_t n, size_t ld, const double *P, const double *k, const double *u,
                             double inv_mu, double *out);

typedef struct {
    const char *name; /* "portable", "compat" or "avx512" (AVX-512F with FMA) */
    rlsk_products_fn products;
    rlsk_downdate_fn downdate;
    rlsk_fused_fn fused;
    rlsk_diag_fn diag;
} rlsk_t;

/* The variant this process uses (chosen on the first call; thread-safe). */
const rlsk_t *rlsk(void);

/* The variant called name if this build has it and the CPU runs it, else NULL. */
const rlsk_t *rlsk_named(const char *name);

#endif
