/*
 * kernels.c - in-process cost of each estimator's update and value, and the
 * OpenBLAS reference for RLS-TD's update (a benchmark, not a test).
 *
 * For every estimator kind and n in {16, 64, 256, 1024} (or the sizes given
 * with -n), times est_observe and est_value on a pool of random transitions
 * (features in [0, 1], a terminal every 100th so that episodic buffers
 * close), and beside RLS-TD the same maths written with OpenBLAS the way a
 * textbook would: ddot twice for V(x) and V(x'), dgemv for P z, dgemv
 * (transposed) for P'd, daxpy for w, dger for P - k u'.  Both run in this
 * process, one after the other, so their ratio holds under any load.
 *
 * Prints one JSON object a line:
 *   {"kind":"rls_td","n":64,"update_ns":...,"value_ns":...,"iters":...}
 *   {"kind":"openblas_rls","n":64,"update_ns":...,"iters":...}
 * Usage: kernels [-t SECONDS per measurement] [-n N]... [-k KIND]...
 * OpenBLAS runs on one thread, as in worthd.
 */
#include <cblas.h>
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "learn/est.h"

void openblas_set_num_threads(int n);

#define POOL 256 /* transitions cycled through */

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

static uint64_t rng_state = 0x9e3779b97f4a7c15u;

static double unif(void)
{
    rng_state ^= rng_state << 13;
    rng_state ^= rng_state >> 7;
    rng_state ^= rng_state << 17;
    return (double)(rng_state >> 11) * 0x1.0p-53;
}

struct pool {
    size_t n;
    double *phi, *phin, *r;
    int *term;
};

static void pool_init(struct pool *p, size_t n)
{
    p->n = n;
    p->phi = malloc(POOL * n * sizeof *p->phi);
    p->phin = malloc(POOL * n * sizeof *p->phin);
    p->r = malloc(POOL * sizeof *p->r);
    p->term = malloc(POOL * sizeof *p->term);
    if (!p->phi || !p->phin || !p->r || !p->term) {
        fprintf(stderr, "kernels: out of memory\n");
        exit(1);
    }
    for (size_t i = 0; i < POOL * n; i++) {
        p->phi[i] = unif();
        p->phin[i] = unif();
    }
    for (size_t k = 0; k < POOL; k++) {
        p->r[k] = unif() - 0.5;
        p->term[k] = k % 100 == 99;
    }
}

static void pool_free(struct pool *p)
{
    free(p->phi);
    free(p->phin);
    free(p->r);
    free(p->term);
}

static volatile double sink; /* keeps value loops from being optimised away */

/*
 * Timing.  A measurement is ROUNDS rounds of at least min_s / ROUNDS seconds
 * each, and its figure is the fastest round: another process taking the core
 * only ever adds time, so the fastest round is the least disturbed.  RLS-TD
 * and its reference alternate round by round, so both see the same load.
 */
#define ROUNDS 8

struct runner {
    void (*step)(struct runner *r, size_t k); /* one update on pool transition k */
    const struct pool *p;
    struct est *e;                            /* est runner */
    double *P, *w, *d, *pz, *u;               /* reference runner */
};

/* Runs r for at least secs; returns ns per update. */
static double round_ns(struct runner *r, double secs, uint64_t *iters)
{
    size_t k = 0;
    uint64_t it = 0;
    double t0 = now_s(), t;
    do {
        for (int rep = 0; rep < 16; rep++, it++, k = (k + 1) % POOL)
            r->step(r, k);
        t = now_s() - t0;
    } while (t < secs);
    *iters += it;
    return t * 1e9 / (double)it;
}

static void est_step(struct runner *r, size_t k)
{
    const struct pool *p = r->p;
    int rc = est_observe(r->e, 0, p->phi + k * p->n, p->r[k],
                         p->term[k] ? NULL : p->phin + k * p->n, 0.99, p->term[k]);
    if (rc) {
        fprintf(stderr, "kernels: est_observe returned %d\n", rc);
        exit(1);
    }
}

/*
 * The reference: RLS-TD(0) with mu = 1 and P0 = 100 I (est_params_default),
 * each step a library call.  Same maths as rls.c's update, so the same number
 * of flops; what differs is that P is read by three separate routines.
 */
static void ref_step(struct runner *r, size_t k)
{
    const struct pool *p = r->p;
    int n = (int)p->n;
    const double g = 0.99;
    const double *phi = p->phi + k * p->n, *phin = p->phin + k * p->n;
    int term = p->term[k];
    double v = cblas_ddot(n, r->w, 1, phi, 1);
    double vn = term ? 0.0 : cblas_ddot(n, r->w, 1, phin, 1);
    cblas_dcopy(n, phi, 1, r->d, 1);
    if (!term)
        cblas_daxpy(n, -g, phin, 1, r->d, 1);
    /* z = phi (lambda = 0) */
    cblas_dgemv(CblasRowMajor, CblasNoTrans, n, n, 1.0, r->P, n, phi, 1, 0.0, r->pz, 1);
    cblas_dgemv(CblasRowMajor, CblasTrans, n, n, 1.0, r->P, n, r->d, 1, 0.0, r->u, 1);
    double den = 1.0 + cblas_ddot(n, r->d, 1, r->pz, 1);
    double err = p->r[k] - (v - (term ? 0.0 : g) * vn);
    cblas_dscal(n, 1.0 / den, r->pz, 1);
    cblas_daxpy(n, err, r->pz, 1, r->w, 1);
    cblas_dger(CblasRowMajor, n, n, -1.0, r->pz, 1, r->u, 1, r->P, n);
}

static void *xcalloc(size_t count, size_t size)
{
    void *q = calloc(count, size);
    if (!q) {
        fprintf(stderr, "kernels: out of memory\n");
        exit(1);
    }
    return q;
}

static void ref_init(struct runner *r, const struct pool *p)
{
    size_t n = p->n;
    memset(r, 0, sizeof *r);
    r->step = ref_step;
    r->p = p;
    r->P = xcalloc(n * n, sizeof *r->P);
    r->w = xcalloc(n, sizeof *r->w);
    r->d = xcalloc(n, sizeof *r->d);
    r->pz = xcalloc(n, sizeof *r->pz);
    r->u = xcalloc(n, sizeof *r->u);
    for (size_t i = 0; i < n; i++)
        r->P[i * n + i] = 100.0;
}

static void ref_free(struct runner *r)
{
    sink = r->w[0];
    free(r->P);
    free(r->w);
    free(r->d);
    free(r->pz);
    free(r->u);
}

static double time_value(const struct est *e, const struct pool *p, double min_s)
{
    size_t n = p->n;
    double best = INFINITY, acc = 0;
    for (int round = 0; round < ROUNDS; round++) {
        size_t k = 0;
        uint64_t it = 0;
        double t0 = now_s(), t;
        do {
            for (int rep = 0; rep < 64; rep++, it++, k = (k + 1) % POOL)
                acc += est_value(e, p->phi + k * n);
            t = now_s() - t0;
        } while (t < min_s / ROUNDS);
        double ns = t * 1e9 / (double)it;
        best = ns < best ? ns : best;
    }
    sink = acc;
    return best;
}

static int wanted(const char *kind, char **kinds, int nk)
{
    if (nk == 0)
        return 1;
    for (int i = 0; i < nk; i++)
        if (strcmp(kinds[i], kind) == 0)
            return 1;
    return 0;
}

int main(int argc, char **argv)
{
    double min_s = 0.2;
    size_t sizes[16] = {16, 64, 256, 1024};
    int ns = 4, user_n = 0, nk = 0;
    char *kinds[EST_KIND_COUNT + 1];
    for (int i = 1; i < argc; i++) {
        if (strcmp(argv[i], "-t") == 0 && i + 1 < argc) {
            min_s = atof(argv[++i]);
        } else if (strcmp(argv[i], "-n") == 0 && i + 1 < argc && user_n < 16) {
            sizes[user_n++] = (size_t)atol(argv[++i]);
            ns = user_n;
        } else if (strcmp(argv[i], "-k") == 0 && i + 1 < argc && nk <= EST_KIND_COUNT) {
            kinds[nk++] = argv[++i];
        } else {
            fprintf(stderr, "usage: kernels [-t SECONDS] [-n N]... [-k KIND]...\n");
            return 2;
        }
    }
    openblas_set_num_threads(1);

    for (int s = 0; s < ns; s++) {
        size_t n = sizes[s];
        struct pool p;
        pool_init(&p, n);
        for (int kind = 0; kind < EST_KIND_COUNT; kind++) {
            const char *name = est_kind_name((enum est_kind)kind);
            if (!wanted(name, kinds, nk))
                continue;
            est_params_t par;
            est_params_default((enum est_kind)kind, &par);
            struct est *e = NULL;
            char err[200];
            if (est_new(&par, n, 1, &e, err, sizeof err) != 0) {
                fprintf(stderr, "kernels: %s at n = %zu: %s\n", name, n, err);
                return 1;
            }
            struct runner run = {.step = est_step, .p = &p, .e = e}, ref;
            int with_ref = kind == EST_RLS_TD;
            if (with_ref)
                ref_init(&ref, &p);
            uint64_t it = 0, it_ref = 0, warm = 0;
            round_ns(&run, min_s / 10, &warm); /* warm caches and buffers */
            if (with_ref)
                round_ns(&ref, min_s / 10, &warm);
            double up = INFINITY, up_ref = INFINITY;
            for (int round = 0; round < ROUNDS; round++) {
                double a = round_ns(&run, min_s / ROUNDS, &it);
                up = a < up ? a : up;
                if (with_ref) {
                    double b = round_ns(&ref, min_s / ROUNDS, &it_ref);
                    up_ref = b < up_ref ? b : up_ref;
                }
            }
            double val = time_value(e, &p, min_s / 4);
            printf("{\"kind\":\"%s\",\"n\":%zu,\"update_ns\":%.1f,\"value_ns\":%.1f,"
                   "\"iters\":%llu}\n",
                   name, n, up, val, (unsigned long long)it);
            if (with_ref) {
                printf("{\"kind\":\"openblas_rls\",\"n\":%zu,\"update_ns\":%.1f,\"iters\":%llu}\n",
                       n, up_ref, (unsigned long long)it_ref);
                ref_free(&ref);
            }
            fflush(stdout);
            est_free(e);
        }
        pool_free(&p);
    }
    return 0;
}
