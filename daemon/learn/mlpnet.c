/*
 * mlpnet.c - forward and backward passes of a small value network, Adam, and
 * gradient-norm clipping.
 *
 * Owns nothing: every array is the caller's, and every function is a pure
 * function of its arguments, so the estimator's learner thread and any query
 * thread may call it at once on arrays they own or only read.  It must never
 * allocate (it runs inside every training step) and never depend on anything
 * but its arguments: the summation order of every product is that of
 * single-threaded OpenBLAS on the build's CPU, so the same inputs give the
 * same bits.
 *
 * Batch passes are row-major matrices, one row per input: layer l computes
 * Z_l = H_{l-1} W_l' + 1 b_l' (dgemm), H_l = act(Z_l).  Backward keeps
 * D_l = dLoss/dZ_l: D_L = (err w_out') .* act'(H_L), gW_l = D_l' H_{l-1},
 * gb_l = 1' D_l, D_{l-1} = (D_l W_l) .* act'(H_{l-1}), with act' written in
 * terms of the activation (1 - h^2 for tanh, h > 0 for ReLU).
 */
#include "learn/mlpnet.h"

#include <cblas.h>
#include <math.h>
#include <string.h>

#include "learn/rng.h"

void mlpnet_shape(mlpnet_t *s, const est_params_t *p, size_t n)
{
    memset(s, 0, sizeof *s);
    s->layers = p->hidden.count;
    s->relu = p->act == EST_ACT_RELU;
    s->dim[0] = n;
    for (size_t l = 1; l <= s->layers; l++) {
        s->dim[l] = p->hidden.width[l - 1];
        s->hidden += s->dim[l];
        if (s->dim[l] > s->widest)
            s->widest = s->dim[l];
    }
    s->dim[s->layers + 1] = 1;
    size_t off = 0;
    for (size_t l = 1; l <= s->layers + 1; l++) {
        s->off_w[l] = off;
        off += s->dim[l] * s->dim[l - 1];
        s->off_b[l] = off;
        off += s->dim[l];
    }
    s->params = off;
}

void mlpnet_init(const mlpnet_t *s, double *w, uint64_t seed, double out_bias)
{
    rng_t rng;
    rng_init(&rng, seed);
    for (size_t l = 1; l <= s->layers + 1; l++) {
        double a = sqrt(6.0 / (double)(s->dim[l] + s->dim[l - 1]));
        double *W = w + s->off_w[l];
        for (size_t i = 0; i < s->dim[l] * s->dim[l - 1]; i++)
            W[i] = a * (2.0 * rng_unit(&rng) - 1.0);
        memset(w + s->off_b[l], 0, s->dim[l] * sizeof *w);
    }
    w[s->off_b[s->layers + 1]] = out_bias;
}

static void activate(const mlpnet_t *s, double *h, size_t count)
{
    if (s->relu) {
        for (size_t i = 0; i < count; i++)
            h[i] = h[i] > 0.0 ? h[i] : 0.0;
    } else {
        for (size_t i = 0; i < count; i++)
            h[i] = tanh(h[i]);
    }
}

/* d *= act'(h) over count entries, act' from the activation h itself. */
static void times_slope(const mlpnet_t *s, const double *h, double *d, size_t count)
{
    if (s->relu) {
        for (size_t i = 0; i < count; i++)
            d[i] = h[i] > 0.0 ? d[i] : 0.0;
    } else {
        for (size_t i = 0; i < count; i++)
            d[i] *= 1.0 - h[i] * h[i];
    }
}

double mlpnet_value(const mlpnet_t *s, const double *w, const double *x, double *work)
{
    const double *in = x;
    double *buf[2] = {work, work + s->widest};
    size_t L = s->layers;
    for (size_t l = 1; l <= L; l++) {
        double *z = buf[l & 1];
        memcpy(z, w + s->off_b[l], s->dim[l] * sizeof *z);
        cblas_dgemv(CblasRowMajor, CblasNoTrans, (int)s->dim[l], (int)s->dim[l - 1], 1.0,
                    w + s->off_w[l], (int)s->dim[l - 1], in, 1, 1.0, z, 1);
        activate(s, z, s->dim[l]);
        in = z;
    }
    return cblas_ddot((int)s->dim[L], w + s->off_w[L + 1], 1, in, 1) + w[s->off_b[L + 1]];
}

void mlpnet_forward(const mlpnet_t *s, const double *w, const double *X, size_t B, double *H,
                    double *out)
{
    const double *in = X;
    size_t L = s->layers;
    for (size_t l = 1; l <= L; l++) {
        size_t d = s->dim[l], dp = s->dim[l - 1];
        for (size_t i = 0; i < B; i++)
            memcpy(H + i * d, w + s->off_b[l], d * sizeof *H);
        cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasTrans, (int)B, (int)d, (int)dp, 1.0, in,
                    (int)dp, w + s->off_w[l], (int)dp, 1.0, H, (int)d);
        activate(s, H, B * d);
        in = H;
        H += B * d;
    }
    double b = w[s->off_b[L + 1]];
    for (size_t i = 0; i < B; i++)
        out[i] = b;
    cblas_dgemv(CblasRowMajor, CblasNoTrans, (int)B, (int)s->dim[L], 1.0, in, (int)s->dim[L],
                w + s->off_w[L + 1], 1, 1.0, out, 1);
}

void mlpnet_backward(const mlpnet_t *s, const double *w, const double *X, size_t B, const double *H,
                     const double *err, double *grad, double *work)
{
    size_t L = s->layers;
    /* Where each hidden layer's activations start in H. */
    const double *Hl[EST_MLP_MAX_LAYERS + 1];
    Hl[0] = X;
    const double *at = H;
    for (size_t l = 1; l <= L; l++) {
        Hl[l] = at;
        at += B * s->dim[l];
    }
    /* The output layer: gW = err' H_L, gb = sum err, D_L = err w_out' .* act'(H_L). */
    size_t dL = s->dim[L];
    cblas_dgemv(CblasRowMajor, CblasTrans, (int)B, (int)dL, 1.0, Hl[L], (int)dL, err, 1, 0.0,
                grad + s->off_w[L + 1], 1);
    double gb = 0.0;
    for (size_t i = 0; i < B; i++)
        gb += err[i];
    grad[s->off_b[L + 1]] = gb;
    double *D = work, *Dn = work + B * s->widest;
    const double *wo = w + s->off_w[L + 1];
    for (size_t i = 0; i < B; i++)
        for (size_t j = 0; j < dL; j++)
            D[i * dL + j] = err[i] * wo[j];
    times_slope(s, Hl[L], D, B * dL);
    for (size_t l = L; l >= 1; l--) {
        size_t d = s->dim[l], dp = s->dim[l - 1];
        cblas_dgemm(CblasRowMajor, CblasTrans, CblasNoTrans, (int)d, (int)dp, (int)B, 1.0, D,
                    (int)d, Hl[l - 1], (int)dp, 0.0, grad + s->off_w[l], (int)dp);
        double *gbl = grad + s->off_b[l];
        memset(gbl, 0, d * sizeof *gbl);
        for (size_t i = 0; i < B; i++)
            for (size_t j = 0; j < d; j++)
                gbl[j] += D[i * d + j];
        if (l == 1)
            break;
        cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, (int)B, (int)dp, (int)d, 1.0, D,
                    (int)d, w + s->off_w[l], (int)dp, 0.0, Dn, (int)dp);
        times_slope(s, Hl[l - 1], Dn, B * dp);
        double *t = D;
        D = Dn;
        Dn = t;
    }
}

void mlpnet_adam(size_t P, double *w, double *m, double *v, const double *g, uint64_t t,
                 double alpha)
{
    double c1 = 1.0 - pow(MLPNET_BETA1, (double)t), c2 = 1.0 - pow(MLPNET_BETA2, (double)t);
    for (size_t i = 0; i < P; i++) {
        m[i] = MLPNET_BETA1 * m[i] + (1.0 - MLPNET_BETA1) * g[i];
        v[i] = MLPNET_BETA2 * v[i] + (1.0 - MLPNET_BETA2) * (g[i] * g[i]);
        w[i] -= alpha * (m[i] / c1) / (sqrt(v[i] / c2) + MLPNET_EPS);
    }
}

double mlpnet_clip(size_t P, double *g, double clip)
{
    double norm = sqrt(cblas_ddot((int)P, g, 1, g, 1));
    if (clip > 0 && norm > clip)
        cblas_dscal((int)P, clip / norm, g, 1);
    return norm;
}
