/*
 * mlpnet.h - the maths of a small feed-forward value network, and the sizing
 * of the estimator kinds built on it (mlp, ensemble).
 *
 * A network maps n inputs through L hidden layers (tanh or ReLU) to one
 * linear output.  Its parameters are one flat array of doubles, layer by
 * layer from the input side: W_l (dim[l] x dim[l-1], row-major), then b_l
 * (dim[l]); the output layer last (W is 1 x dim[L], b one double).  An
 * ensemble keeps its K networks one after the other.
 *
 * Pure functions over caller-owned arrays: nothing here allocates, keeps
 * state or takes a lock, so any thread may call them on arrays it owns (or
 * only reads).  Matrix work goes through OpenBLAS (dgemm, dgemv).
 */
#ifndef WORTH_MLPNET_H
#define WORTH_MLPNET_H

#include <stddef.h>
#include <stdint.h>

#include "learn/est.h"

/* Adam's decay rates and the constant added to the root of the second moment. */
#define MLPNET_BETA1 0.9
#define MLPNET_BETA2 0.999
#define MLPNET_EPS   1e-8

/* Plain data: the shape of one network. */
typedef struct mlpnet_t {
    size_t layers;                        /* hidden layers L */
    size_t dim[EST_MLP_MAX_LAYERS + 2];   /* dim[0] inputs, dim[1..L] hidden, dim[L+1] = 1 */
    size_t off_w[EST_MLP_MAX_LAYERS + 2]; /* offset of W_l in the parameters, l = 1..L+1 */
    size_t off_b[EST_MLP_MAX_LAYERS + 2]; /* offset of b_l */
    size_t params;                        /* parameters of one network */
    size_t hidden;                        /* sum of the hidden widths */
    size_t widest;                        /* the widest hidden layer */
    int relu;                             /* 1: ReLU, 0: tanh */
} mlpnet_t;

/* Lifecycle */

/* Fills s for the hidden layers and activation of p over n inputs (p already checked). */
void mlpnet_shape(mlpnet_t *s, const est_params_t *p, size_t n);
/*
 * Writes a network's starting parameters into w (s->params doubles, borrowed):
 * every W entry uniform in +-sqrt(6 / (fan_in + fan_out)) (Glorot & Bengio
 * 2010), drawn row by row from layer 1 on by a generator seeded with seed
 * (learn/rng.h, rng_unit), the hidden biases 0 and the output bias out_bias.
 */
void mlpnet_init(const mlpnet_t *s, double *w, uint64_t seed, double out_bias);

/* Operate */

/*
 * Returns the output at one input x (dim[0] doubles) under the parameters w;
 * work holds 2 * s->widest doubles.  All pointers borrowed.
 */
double mlpnet_value(const mlpnet_t *s, const double *w, const double *x, double *work);
/*
 * The outputs of B inputs X (B x dim[0], row-major) into out (B), the hidden
 * activations into H (B x dim[l] per layer, layer after layer: B * s->hidden
 * doubles), for mlpnet_backward.
 */
void mlpnet_forward(const mlpnet_t *s, const double *w, const double *X, size_t B, double *H,
                    double *out);
/*
 * The gradient of sum_i err[i] * out_i with respect to the parameters into
 * grad (s->params doubles, overwritten), from X and the activations H that
 * mlpnet_forward computed with w; work holds 2 * B * s->widest doubles.
 * With err[i] = (out_i - y_i) / B this is the gradient of the mean of
 * (out - y)^2 / 2 with the targets y held fixed (a semi-gradient).
 */
void mlpnet_backward(const mlpnet_t *s, const double *w, const double *X, size_t B, const double *H,
                     const double *err, double *grad, double *work);
/*
 * One Adam step (Kingma & Ba 2015) over P parameters w with moments m and v
 * and gradient g: m = b1 m + (1-b1) g, v = b2 v + (1-b2) g^2, then
 * w -= alpha (m / (1-b1^t)) / (sqrt(v / (1-b2^t)) + eps); t >= 1 counts steps.
 */
void mlpnet_adam(size_t P, double *w, double *m, double *v, const double *g, uint64_t t,
                 double alpha);
/* Scales g (P doubles) to norm clip when its Euclidean norm exceeds clip > 0; returns the norm. */
double mlpnet_clip(size_t P, double *g, double clip);

/* The kinds mlp and ensemble (mlp.c) */

/* Returns 0, or WORTH_E_BAD_PARAM / WORTH_E_TOO_LARGE with a message in err, for p over n. */
int mlp_check(const est_params_t *p, size_t n, char *err, size_t errlen);
/* Returns the parameters of all members' networks (p checked). */
size_t mlp_weight_count(const est_params_t *p, size_t n);
/* Returns the bytes an mlp or ensemble holds at most, snapshots aside (pure arithmetic). */
double mlp_footprint(const est_params_t *p, size_t n, size_t sources);

#endif /* WORTH_MLPNET_H */
