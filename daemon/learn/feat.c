/*
 * feat.c - building and evaluating feature maps.
 *
 * Owns the precomputed tables of each basis (monomial exponents, Fourier
 * coefficient vectors, tile offsets).  Built on whichever thread creates a
 * model; evaluated on learner and query threads concurrently, which is safe
 * because evaluation reads the map and writes only caller buffers.
 *
 * Counts are computed with saturating arithmetic before any table is
 * allocated, so a spec like fourier order 9 on 40 dimensions is refused with
 * too_large instead of exhausting memory.  Evaluation must never allocate.
 */
#include "learn/feat.h"

#include <math.h>
#include <stdarg.h>
#include <stdint.h>
#include <stdio.h>
#include <string.h>

#include "common/fail.h"
#include "common/mem.h"
#include "worth/errors.h"

static const double PI = 3.14159265358979323846;

struct basis {
    feat_basis_t p;
    size_t count;      /* features this basis contributes */
    unsigned char *ex; /* poly: count x D exponents; fourier: count x D coefficients */
    double *offset;    /* tiles: tilings x D offsets in normalised units */
    uint32_t *nz_at;   /* fourier: term k's non-zero coefficients are nz[nz_at[k]..nz_at[k+1]) */
    uint32_t *nz;      /* fourier: index j*(order+1) + c into the cos/sin table */
};

struct feat {
    size_t dims;
    size_t count;
    size_t work;
    double *lo;
    double *span; /* hi - lo */
    size_t nbases;
    struct basis *b;
};

/* Saturating helpers: every count is capped at cap + 1, which means "too many". */
static size_t sat_add(size_t a, size_t b, size_t cap)
{
    return (a > cap || b > cap || a + b > cap) ? cap + 1 : a + b;
}

static size_t sat_mul(size_t a, size_t b, size_t cap)
{
    if (a == 0 || b == 0)
        return 0;
    if (a > cap || b > cap || a > (cap + 1) / b)
        return cap + 1;
    size_t m = a * b;
    return m > cap ? cap + 1 : m;
}

/* Binomial coefficient C(n, k), saturating at cap + 1. */
static size_t binom(size_t n, size_t k, size_t cap)
{
    if (k > n)
        return 0;
    if (k > n - k)
        k = n - k;
    /* Exact in 128 bits for every value that fits under cap. */
    unsigned __int128 r = 1;
    for (size_t i = 1; i <= k; i++) {
        r = r * (n - k + i) / i;
        if (r > cap)
            return cap + 1;
    }
    return (size_t)r;
}

static size_t basis_count(const feat_basis_t *p, size_t d, size_t cap)
{
    switch (p->kind) {
    case FEAT_BIAS:
        return 1;
    case FEAT_RAW:
        return d;
    case FEAT_POLY: /* monomials of total degree 1..p in d variables: C(d+p, p) - 1 */
        /* binom saturates at cap + 2, so a saturated count stays above cap. */
        return binom(d + p->degree, p->degree, cap + 1) - 1;
    case FEAT_FOURIER: {
        size_t jmax = p->couple ? p->couple : d, total = 0;
        for (size_t j = 1; j <= jmax && j <= d; j++) {
            size_t kj = 1;
            for (size_t i = 0; i < j; i++)
                kj = sat_mul(kj, p->order, cap);
            total = sat_add(total, sat_mul(binom(d, j, cap), kj, cap), cap);
        }
        return total;
    }
    case FEAT_RBF: {
        size_t total = 1;
        for (size_t i = 0; i < d; i++)
            total = sat_mul(total, p->centers, cap);
        return total;
    }
    case FEAT_TILES:
        return p->size;
    }
    return cap + 1;
}

static const char *kind_name(enum feat_kind k)
{
    static const char *names[] = {"bias", "raw", "poly", "fourier", "rbf", "tiles"};
    return (unsigned)k < sizeof names / sizeof names[0] ? names[k] : "?";
}

static int check_basis(const feat_basis_t *p, size_t i, size_t d, char *err, size_t errlen)
{
    switch (p->kind) {
    case FEAT_BIAS:
    case FEAT_RAW:
        return 0;
    case FEAT_POLY:
        if (p->degree < 1 || p->degree > 255)
            return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                            "basis %zu (poly): degree must be 1..255", i);
        return 0;
    case FEAT_FOURIER:
        if (p->order < 1 || p->order > 255)
            return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                            "basis %zu (fourier): order must be 1..255", i);
        if (p->couple > d)
            return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                            "basis %zu (fourier): couple must be 0..%zu (the dimension)", i, d);
        return 0;
    case FEAT_RBF:
        if (p->centers < 1)
            return err_fail(err, errlen, WORTH_E_BAD_PARAM, "basis %zu (rbf): centers must be >= 1",
                            i);
        if (!(p->width > 0) || !isfinite(p->width))
            return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                            "basis %zu (rbf): width must be a finite number > 0", i);
        return 0;
    case FEAT_TILES:
        /* tilings bounds the offset table (tilings x D) and the cost of an evaluation. */
        if (p->tilings < 1 || p->tilings > FEAT_MAX_TILINGS || p->tiles < 1 ||
            p->tiles > FEAT_MAX_TILES || p->size < 1)
            return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                            "basis %zu (tiles): tilings must be 1..%d, tiles 1..%d, size >= 1", i,
                            FEAT_MAX_TILINGS, FEAT_MAX_TILES);
        return 0;
    }
    return err_fail(err, errlen, WORTH_E_BAD_PARAM, "basis %zu: unknown kind", i);
}

/* Enumerates exponent vectors with 1 <= sum <= deg, last dimension fastest. */
static void gen_poly(unsigned char *cur, size_t d, size_t dim, unsigned left, unsigned sum,
                     unsigned char *out, size_t *k)
{
    if (dim == d) {
        if (sum >= 1) {
            memcpy(out + *k * d, cur, d);
            (*k)++;
        }
        return;
    }
    for (unsigned e = 0; e <= left; e++) {
        cur[dim] = (unsigned char)e;
        gen_poly(cur, d, dim + 1, left - e, sum + e, out, k);
    }
    cur[dim] = 0;
}

/* Enumerates c in {0..order}^d with 1 <= nonzeros <= couple, last dimension fastest. */
static void gen_fourier(unsigned char *cur, size_t d, size_t dim, unsigned order, unsigned nz,
                        unsigned couple, unsigned char *out, size_t *k)
{
    if (dim == d) {
        if (nz >= 1) {
            memcpy(out + *k * d, cur, d);
            (*k)++;
        }
        return;
    }
    for (unsigned c = 0; c <= order; c++) {
        if (c > 0 && nz == couple)
            break;
        cur[dim] = (unsigned char)c;
        gen_fourier(cur, d, dim + 1, order, nz + (c > 0), couple, out, k);
    }
    cur[dim] = 0;
}

/* Lists each Fourier term's non-zero coefficients, so evaluation skips the zeros. */
static void sparse_fourier(struct basis *b, size_t d)
{
    size_t total = 0, k1 = b->p.order + 1;
    for (size_t k = 0; k < b->count * d; k++)
        total += b->ex[k] != 0;
    b->nz_at = mem_alloc((b->count + 1) * sizeof *b->nz_at);
    b->nz = mem_alloc((total ? total : 1) * sizeof *b->nz);
    size_t at = 0;
    for (size_t k = 0; k < b->count; k++) {
        b->nz_at[k] = (uint32_t)at;
        for (size_t j = 0; j < d; j++)
            if (b->ex[k * d + j])
                b->nz[at++] = (uint32_t)(j * k1 + b->ex[k * d + j]);
    }
    b->nz_at[b->count] = (uint32_t)at;
}

int feat_new(const feat_spec_t *spec, struct feat **out, char *err, size_t errlen)
{
    size_t d = spec->dims;
    size_t cap = spec->max_features ? spec->max_features : FEAT_DEFAULT_MAX;

    if (cap > FEAT_HARD_MAX)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "max_features must be <= %d",
                        FEAT_HARD_MAX);

    if (d < 1)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "dims must be >= 1");
    if (d > FEAT_MAX_DIMS)
        return err_fail(err, errlen, WORTH_E_TOO_LARGE, "dims %zu exceeds the limit %d", d,
                        FEAT_MAX_DIMS);
    if (spec->nbases < 1)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "at least one basis is required");
    for (size_t i = 0; i < d; i++) {
        double lo = spec->lo[i], hi = spec->hi[i];
        if (!isfinite(lo) || !isfinite(hi) || !(hi > lo) || !isfinite(hi - lo))
            return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                            "range of dimension %zu must be finite with lo < hi", i);
    }
    size_t total = 0;
    for (size_t i = 0; i < spec->nbases; i++) {
        int rc = check_basis(&spec->bases[i], i, d, err, errlen);
        if (rc)
            return rc;
        total = sat_add(total, basis_count(&spec->bases[i], d, cap), cap);
        if (total > cap)
            return err_fail(err, errlen, WORTH_E_TOO_LARGE,
                            "basis %zu (%s) takes the feature count over the limit %zu", i,
                            kind_name(spec->bases[i].kind), cap);
    }

    struct feat *f = mem_calloc(1, sizeof *f);
    f->dims = d;
    f->count = total;
    f->lo = mem_alloc(d * sizeof *f->lo);
    f->span = mem_alloc(d * sizeof *f->span);
    for (size_t i = 0; i < d; i++) {
        f->lo[i] = spec->lo[i];
        f->span[i] = spec->hi[i] - spec->lo[i];
    }
    f->nbases = spec->nbases;
    f->b = mem_calloc(f->nbases, sizeof *f->b);

    /* Workspace: u (d), then the largest per-basis table (poly powers, rbf factors). */
    size_t extra = 0;
    unsigned char cur[FEAT_MAX_DIMS];
    memset(cur, 0, sizeof cur);
    for (size_t i = 0; i < f->nbases; i++) {
        struct basis *b = &f->b[i];
        b->p = spec->bases[i];
        b->count = basis_count(&b->p, d, cap);
        size_t k = 0;
        switch (b->p.kind) {
        case FEAT_POLY:
            b->ex = mem_calloc(b->count, d);
            gen_poly(cur, d, 0, b->p.degree, 0, b->ex, &k);
            CHECK(k == b->count);
            if (d * (b->p.degree + 1) > extra)
                extra = d * (b->p.degree + 1);
            break;
        case FEAT_FOURIER:
            b->ex = mem_calloc(b->count, d);
            gen_fourier(cur, d, 0, b->p.order, 0, b->p.couple ? b->p.couple : (unsigned)d, b->ex,
                        &k);
            CHECK(k == b->count);
            sparse_fourier(b, d);
            if (2 * d * (b->p.order + 1) > extra)
                extra = 2 * d * (b->p.order + 1);
            break;
        case FEAT_RBF:
            if (d * b->p.centers > extra)
                extra = d * b->p.centers;
            break;
        case FEAT_TILES: {
            /*
             * Asymmetric offsets (Miller & Glanz): tiling t is displaced in
             * dimension j by t*(2j+1)/T of a tile width, modulo one tile, so
             * tilings do not all shift along the diagonal.
             */
            double w = 1.0 / b->p.tiles;
            b->offset = mem_alloc((size_t)b->p.tilings * d * sizeof *b->offset);
            for (unsigned t = 0; t < b->p.tilings; t++)
                for (size_t j = 0; j < d; j++)
                    b->offset[t * d + j] =
                        w * (double)((t * (2 * j + 1)) % b->p.tilings) / b->p.tilings;
            break;
        }
        case FEAT_BIAS:
        case FEAT_RAW:
            break;
        }
    }
    f->work = d + extra;
    *out = f;
    return 0;
}

void feat_free(struct feat *f)
{
    if (!f)
        return;
    for (size_t i = 0; i < f->nbases; i++) {
        mem_free(f->b[i].ex);
        mem_free(f->b[i].offset);
        mem_free(f->b[i].nz_at);
        mem_free(f->b[i].nz);
    }
    mem_free(f->b);
    mem_free(f->lo);
    mem_free(f->span);
    mem_free(f);
}

size_t feat_count(const struct feat *f)
{
    return f->count;
}

size_t feat_dims(const struct feat *f)
{
    return f->dims;
}

size_t feat_work_size(const struct feat *f)
{
    return f->work;
}

/* 64-bit mix of a tile's integer coordinates (splitmix64 finaliser per word). */
static uint64_t mix(uint64_t h, uint64_t v)
{
    h ^= v + 0x9e3779b97f4a7c15ULL + (h << 6) + (h >> 2);
    h ^= h >> 30;
    h *= 0xbf58476d1ce4e5b9ULL;
    h ^= h >> 27;
    h *= 0x94d049bb133111ebULL;
    h ^= h >> 31;
    return h;
}

static void eval_basis(const struct basis *b, size_t d, const double *u, double *phi, double *tab)
{
    switch (b->p.kind) {
    case FEAT_BIAS:
        phi[0] = 1.0;
        return;
    case FEAT_RAW:
        memcpy(phi, u, d * sizeof *phi);
        return;
    case FEAT_POLY: {
        unsigned p1 = b->p.degree + 1;
        for (size_t j = 0; j < d; j++) {
            tab[j * p1] = 1.0;
            for (unsigned e = 1; e < p1; e++)
                tab[j * p1 + e] = tab[j * p1 + e - 1] * u[j];
        }
        for (size_t k = 0; k < b->count; k++) {
            const unsigned char *ex = b->ex + k * d;
            double v = 1.0;
            for (size_t j = 0; j < d; j++)
                v *= tab[j * p1 + ex[j]];
            phi[k] = v;
        }
        return;
    }
    case FEAT_FOURIER: {
        /*
         * cos(pi c.u) is the real part of the product over dimensions of
         * e^{i pi c_j u_j}.  Per dimension one cos and one sin give
         * e^{i pi u_j}; its powers 0..order follow by complex multiplication.
         * Each term then costs a few multiplications instead of a cos.
         */
        size_t k1 = b->p.order + 1;
        for (size_t j = 0; j < d; j++) {
            double *t = tab + 2 * j * k1, c1 = cos(PI * u[j]), s1 = sin(PI * u[j]);
            t[0] = 1.0;
            t[1] = 0.0;
            for (size_t k = 1; k < k1; k++) {
                t[2 * k] = t[2 * k - 2] * c1 - t[2 * k - 1] * s1;
                t[2 * k + 1] = t[2 * k - 2] * s1 + t[2 * k - 1] * c1;
            }
        }
        for (size_t k = 0; k < b->count; k++) {
            double re = 1.0, im = 0.0;
            for (uint32_t e = b->nz_at[k]; e < b->nz_at[k + 1]; e++) {
                const double *z = tab + 2 * (size_t)b->nz[e];
                double r2 = re * z[0] - im * z[1];
                im = re * z[1] + im * z[0];
                re = r2;
            }
            phi[k] = re;
        }
        return;
    }
    case FEAT_RBF: {
        /* Separable: exp(-|u-m|^2 / 2w^2) is the product of per-dimension factors. */
        unsigned c = b->p.centers;
        double inv = 1.0 / (2.0 * b->p.width * b->p.width);
        for (size_t j = 0; j < d; j++)
            for (unsigned i = 0; i < c; i++) {
                double m = c == 1 ? 0.5 : (double)i / (c - 1);
                double z = u[j] - m;
                tab[j * c + i] = exp(-z * z * inv);
            }
        for (size_t k = 0; k < b->count; k++) {
            size_t rest = k;
            double v = 1.0;
            for (size_t j = d; j-- > 0;) { /* last dimension fastest */
                v *= tab[j * c + rest % c];
                rest /= c;
            }
            phi[k] = v;
        }
        return;
    }
    case FEAT_TILES: {
        unsigned n = b->p.tiles;
        memset(phi, 0, b->count * sizeof *phi);
        for (unsigned t = 0; t < b->p.tilings; t++) {
            uint64_t h = mix(0x5eed, t);
            for (size_t j = 0; j < d; j++) {
                /* u + offset lies in [0, 1 + w); tile index 0..n. */
                long q = (long)floor((u[j] + b->offset[t * d + j]) * n);
                if (q > (long)n)
                    q = (long)n;
                h = mix(h, (uint64_t)q);
            }
            phi[h % b->count] += 1.0;
        }
        return;
    }
    }
}

size_t feat_eval(const struct feat *f, const double *x, double *phi, double *work)
{
    size_t d = f->dims, clipped = 0;
    double *u = work, *tab = work + d;
    for (size_t j = 0; j < d; j++) {
        double v = (x[j] - f->lo[j]) / f->span[j];
        if (v < 0.0) {
            v = 0.0;
            clipped++;
        } else if (v > 1.0) {
            v = 1.0;
            clipped++;
        }
        u[j] = v;
    }
    size_t off = 0;
    for (size_t i = 0; i < f->nbases; i++) {
        eval_basis(&f->b[i], d, u, phi + off, tab);
        off += f->b[i].count;
    }
    return clipped;
}
