/*
 * td.c - semi-gradient TD(0): w += alpha * delta * phi.
 *
 * No state beyond the weights.  O(n) per transition, no allocation.  Runs on
 * the estimator's owning thread.
 */
#include "learn/est_impl.h"

static void td_init(struct est *e)
{
    e->k = NULL;
}

static void td_free(struct est *e)
{
    (void)e;
}

static void td_reset(struct est *e)
{
    (void)e;
}

static int td_observe(struct est *e, size_t src, const double *phi, double r, const double *phin,
                      double g, int terminal, double v, double vn)
{
    (void)src;
    (void)phin;
    (void)terminal;
    double delta = r + g * vn - v;
    est_axpy(e->n, e->p.alpha * delta, phi, e->w);
    return 0;
}

static void td_save(const struct est *e, ser_w *w)
{
    (void)e;
    (void)w;
}

static void td_load(struct est *e, ser_r *r, unsigned version)
{
    (void)version; /* no change between formats 1 and 2 */
    (void)e;
    (void)r;
}

const struct est_ops est_td_ops = {
    .init = td_init,
    .free = td_free,
    .reset = td_reset,
    .observe = td_observe,
    .save = td_save,
    .load = td_load,
};
