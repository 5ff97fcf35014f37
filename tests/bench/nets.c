/*
 * nets.c - in-process cost of the value networks (a benchmark, not a test).
 *
 * For mlp and ensemble (5 members) at two sizes (8 inputs, hidden 32-32;
 * 64 inputs, hidden 128-128), both with batch 32 and one mini-batch step per
 * transition: transitions/s through est_observe (a forward for V(x) and
 * V(x'), the ring, and the step), the ns of one training step (est_train
 * with max_steps), and beside it a lower bound: the same step's matrix
 * products alone, timed as bare cblas_dgemm / cblas_dgemv calls on the same
 * shapes (target forward, forward, backward: per hidden layer one dgemm
 * each way, and one more per layer above the first for the backward's
 * delta), so the ratio says what the element-wise work, gathering and Adam
 * add to the BLAS floor.
 *
 * Prints one JSON object a line:
 *   {"kind":"mlp","n":8,"hidden":"32-32","obs_per_s":...,"step_ns":...,"blas_ns":...,"ratio":...}
 * Usage: nets [-t SECONDS per measurement].  OpenBLAS runs on one thread, as in worthd.
 */
#include <cblas.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "learn/est.h"

void openblas_set_num_threads(int n);

#define POOL  512
#define BATCH 32

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

static uint64_t state = 0x9e3779b97f4a7c15u;

static double unif(void)
{
    state ^= state << 13;
    state ^= state >> 7;
    state ^= state << 17;
    return (double)(state >> 11) * 0x1.0p-53;
}

static void *xcalloc(size_t count, size_t size)
{
    void *p = calloc(count, size);
    if (!p) {
        fprintf(stderr, "nets: out of memory\n");
        exit(1);
    }
    return p;
}

/* ns of one est_observe, fastest of 5 rounds of at least secs/5 each. */
static double time_observe(struct est *e, const double *pool, size_t n, double secs)
{
    double best = 1e30;
    size_t k = 0;
    for (int round = 0; round < 5; round++) {
        uint64_t it = 0;
        double t0 = now_s(), t;
        do {
            for (int j = 0; j < 16; j++, k = (k + 1) % (POOL - 1), it++)
                est_observe(e, 0, pool + k * n, pool[k * n], pool + (k + 1) * n, 0.95, 0);
            t = now_s() - t0;
        } while (t < secs / 5);
        if (t / (double)it < best)
            best = t / (double)it;
    }
    return best * 1e9;
}

/* ns of one training step (all members), fastest of 5 rounds. */
static double time_step(struct est *e, double secs)
{
    double best = 1e30;
    for (int round = 0; round < 5; round++) {
        uint64_t it = 0;
        double t0 = now_s(), t;
        do {
            est_train_t rep;
            est_train(e, &(est_train_opts_t){.passes = 1, .max_steps = 8}, &rep);
            it += rep.steps;
            t = now_s() - t0;
        } while (t < secs / 5);
        if (t / (double)it < best)
            best = t / (double)it;
    }
    return best * 1e9;
}

/* ns of the matrix products of one member's step on these shapes, fastest of 5 rounds. */
static double time_blas(size_t n, const unsigned *hid, size_t L, double secs)
{
    size_t dim[8] = {n};
    size_t widest = n;
    for (size_t l = 0; l < L; l++) {
        dim[l + 1] = hid[l];
        if (hid[l] > widest)
            widest = hid[l];
    }
    double *A = xcalloc(BATCH * widest, sizeof *A), *C = xcalloc(BATCH * widest, sizeof *C);
    double *W = xcalloc(widest * widest, sizeof *W), *G = xcalloc(widest * widest, sizeof *G);
    double *v = xcalloc(BATCH, sizeof *v), *u = xcalloc(widest, sizeof *u);
    for (size_t i = 0; i < BATCH * widest; i++)
        A[i] = unif();
    for (size_t i = 0; i < widest * widest; i++)
        W[i] = unif() - 0.5;
    double best = 1e30;
    for (int round = 0; round < 5; round++) {
        uint64_t it = 0;
        double t0 = now_s(), t;
        do {
            for (int pass = 0; pass < 2; pass++) { /* target forward, forward */
                for (size_t l = 1; l <= L; l++)
                    cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasTrans, BATCH, (int)dim[l],
                                (int)dim[l - 1], 1.0, A, (int)dim[l - 1], W, (int)dim[l - 1], 1.0,
                                C, (int)dim[l]);
                cblas_dgemv(CblasRowMajor, CblasNoTrans, BATCH, (int)dim[L], 1.0, C, (int)dim[L], u,
                            1, 1.0, v, 1);
            }
            cblas_dgemv(CblasRowMajor, CblasTrans, BATCH, (int)dim[L], 1.0, C, (int)dim[L], v, 1,
                        0.0, u, 1);
            for (size_t l = L; l >= 1; l--) {
                cblas_dgemm(CblasRowMajor, CblasTrans, CblasNoTrans, (int)dim[l], (int)dim[l - 1],
                            BATCH, 1.0, C, (int)dim[l], A, (int)dim[l - 1], 0.0, G,
                            (int)dim[l - 1]);
                if (l > 1)
                    cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, BATCH, (int)dim[l - 1],
                                (int)dim[l], 1.0, C, (int)dim[l], W, (int)dim[l - 1], 0.0, A,
                                (int)dim[l - 1]);
            }
            it++;
            t = now_s() - t0;
        } while (t < secs / 5);
        if (t / (double)it < best)
            best = t / (double)it;
    }
    free(A);
    free(C);
    free(W);
    free(G);
    free(v);
    free(u);
    return best * 1e9;
}

int main(int argc, char **argv)
{
    double secs = 0.5;
    if (argc == 3 && strcmp(argv[1], "-t") == 0)
        secs = atof(argv[2]);
    else if (argc != 1) {
        fprintf(stderr, "usage: nets [-t SECONDS]\n");
        return 2;
    }
    openblas_set_num_threads(1);
    static const struct {
        size_t n;
        unsigned hidden[2];
    } sizes[] = {{8, {32, 32}}, {64, {128, 128}}};
    for (size_t z = 0; z < 2; z++) {
        size_t n = sizes[z].n;
        double *pool = xcalloc(POOL * n, sizeof *pool);
        for (size_t i = 0; i < POOL * n; i++)
            pool[i] = unif();
        double blas = time_blas(n, sizes[z].hidden, 2, secs);
        for (int kind = EST_MLP; kind <= EST_ENSEMBLE; kind++) {
            est_params_t p;
            est_params_default((enum est_kind)kind, &p);
            p.hidden = (est_hidden_t){2, {sizes[z].hidden[0], sizes[z].hidden[1], 0, 0}};
            p.batch = BATCH;
            p.capacity = 10000;
            struct est *e;
            char err[200];
            if (est_new(&p, n, 1, &e, err, sizeof err)) {
                fprintf(stderr, "nets: %s\n", err);
                return 1;
            }
            double obs = time_observe(e, pool, n, secs);
            double step = time_step(e, secs);
            size_t K = kind == EST_ENSEMBLE ? p.members : 1;
            printf("{\"kind\":\"%s\",\"n\":%zu,\"hidden\":\"%u-%u\",\"members\":%zu,"
                   "\"weights\":%zu,\"obs_per_s\":%.0f,\"step_ns\":%.0f,\"blas_ns\":%.0f,"
                   "\"ratio\":%.2f}\n",
                   est_kind_name((enum est_kind)kind), n, sizes[z].hidden[0], sizes[z].hidden[1], K,
                   est_weight_count(e), 1e9 / obs, step, blas * (double)K,
                   step / (blas * (double)K));
            fflush(stdout);
            est_free(e);
        }
        free(pool);
    }
    return 0;
}
