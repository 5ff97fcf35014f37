/*
 * rlsk_plain.h - RLS-TD's kernels in plain C, included by rlsk.c once per
 * variant built from it: NAME(x) names the functions, ATTR is put before
 * the two O(n^2) ones (empty, or GCC's target_clones).  No include guard on
 * purpose.
 */
/*
 * One pass over P (row-major) gives both pz = P z and u = P' d, where dgemv
 * twice would read P twice.  The simd pragma lets the compiler vectorise the
 * row dot product (a reduction), which plain -O2 may not reorder; the order is
 * fixed per build, so results stay deterministic.
 */
ATTR static void NAME(products)(size_t n, size_t ld, const double *P, const double *z,
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
ATTR static void NAME(downdate)(size_t n, size_t ld, double *P, const double *k, const double *u,
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

static void NAME(fused)(size_t n, size_t ld, double *P, const double *k, const double *u,
                        double inv_mu, const double *z, const double *d, double *pz, double *u2)
{
    NAME(downdate)(n, ld, P, k, u, inv_mu);
    NAME(products)(n, ld, P, z, d, pz, u2);
}

/* Each entry as the downdate above rounds it: two products and a difference. */
static void NAME(diag)(size_t n, size_t ld, const double *P, const double *k, const double *u,
                       double inv_mu, double *out)
{
    for (size_t i = 0; i < n; i++) {
        double p = P[i * ld + i];
        out[i] = inv_mu == 1.0 ? p - k[i] * u[i] : p * inv_mu - (k[i] * inv_mu) * u[i];
    }
}
