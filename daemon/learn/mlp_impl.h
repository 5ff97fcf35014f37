/*
 * mlp_impl.h - what the network kinds share: mlp.c trains K networks from one
 * replay buffer (K = 1 for mlp), ensemble.c adds the members' mean and spread.
 * Not a public header.
 */
#ifndef WORTH_MLP_IMPL_H
#define WORTH_MLP_IMPL_H

#include "learn/est_impl.h"
#include "learn/mlpnet.h"
#include "learn/rng.h"

/* Returns the shape of one member's network (K networks of it sit one after another in e->w). */
const mlpnet_t *mlp_net(const struct est *e);
/* Returns the members K. */
size_t mlp_members(const struct est *e);
/* The seed of member k's starting weights, and of its mini-batch draws. */
uint64_t mlp_seed_init(uint64_t seed, size_t k);
uint64_t mlp_seed_draw(uint64_t seed, size_t k);

/* The est_ops both kinds share. */
void mlp_init_w(struct est *e);
void mlp_init(struct est *e);
void mlp_free(struct est *e);
void mlp_reset(struct est *e);
int mlp_observe(struct est *e, size_t src, const double *phi, double r, const double *phin,
                double g, int terminal, double v, double vn);
int mlp_train(struct est *e, const est_train_opts_t *o, est_train_t *rep);
void mlp_save(const struct est *e, ser_w *w);
void mlp_load(struct est *e, ser_r *r, unsigned version);
void mlp_stats(const struct est *e, est_stats_t *s);

#endif /* WORTH_MLP_IMPL_H */
