/*
 * ensemble.c - K value networks, each with its own seed and bootstrap mask:
 * the value is their mean, the sd their spread.
 *
 * The training is mlp.c's (one replay buffer, each entry carrying a mask bit
 * per member, each member drawing its own mini-batches and starting from its
 * own seeded weights); this file gives the answers.  Where the data are
 * dense every member is pulled to the same targets and they agree; where
 * they are sparse each member extrapolates from its own start and its own
 * half of the few entries, so the spread grows: an uncertainty that says
 * "little evidence here", not a confidence interval of the value.
 *
 * Value and sd are pure functions of the weights passed in (e->w or a
 * published snapshot's copy) and e's immutable shape, so a query thread may
 * run them while the owner trains; they never allocate (a bounded stack
 * workspace).
 */
#include <math.h>

#include "learn/mlp_impl.h"

/* The members' mean at phi under the weights w; their sample standard deviation into *sd. */
static double ens_value(const struct est *e, const double *w, const double *phi, double *sd)
{
    double work[2 * EST_MLP_MAX_WIDTH], v[EST_MLP_MAX_MEMBERS];
    const mlpnet_t *s = mlp_net(e);
    size_t K = mlp_members(e);
    double mean = 0.0;
    for (size_t k = 0; k < K; k++) {
        v[k] = mlpnet_value(s, w + k * s->params, phi, work);
        mean += v[k];
    }
    mean /= (double)K;
    if (sd) {
        double ss = 0.0;
        for (size_t k = 0; k < K; k++)
            ss += (v[k] - mean) * (v[k] - mean);
        *sd = sqrt(ss / (double)(K - 1));
    }
    return mean;
}

static int ens_sd(const struct est *e, const double *phi, double *sd)
{
    ens_value(e, e->w, phi, sd);
    return 0;
}

const struct est_ops est_ensemble_ops = {
    .init_w = mlp_init_w,
    .value = ens_value,
    .init = mlp_init,
    .free = mlp_free,
    .reset = mlp_reset,
    .observe = mlp_observe,
    .sd = ens_sd,
    .train = mlp_train,
    .save = mlp_save,
    .load = mlp_load,
    .stats = mlp_stats,
};
