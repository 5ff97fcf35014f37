/*
 * est_impl.h - what the estimator kinds share with est.c; not a public header.
 *
 * est.c validates every input, computes V(x) and V(x') with the weights before
 * the update, keeps the common counters and the byte format's header and
 * checksum; each kind (td.c, tdn.c, tdlambda.c, mc.c, rls.c, lstd.c,
 * replay.c) supplies only its update rule and its own state.
 */
#ifndef WORTH_EST_IMPL_H
#define WORTH_EST_IMPL_H

#include "learn/est.h"
#include "learn/ser.h"

struct est_ops {
    /* Optional: sets the initial weights (NULL: every weight is p.init).  Runs before init,
     * and again on every reset and divergence. */
    void (*init_w)(struct est *e);
    /*
     * Optional: the value at phi under the weights w (e->w, or a snapshot's copy), and the
     * kind's sd there into *sd when sd is not NULL (NAN when it has none).  NULL: w . phi.
     * Const and reentrant: it may run on a query thread while the owner updates e.
     */
    double (*value)(const struct est *e, const double *w, const double *phi, double *sd);
    /* Allocates and initialises the kind's state in e->k; e->w is already set. */
    void (*init)(struct est *e);
    void (*free)(struct est *e);
    /* Back to the state right after init (weights are reset by est.c). */
    void (*reset)(struct est *e);
    /*
     * One transition; inputs are valid.  v = w.phi and vn = w.phi_next (0 when
     * terminal) use the weights before this update.  Returns 1 when a
     * numerical guard skipped or damped the update, else 0.
     */
    int (*observe)(struct est *e, size_t src, const double *phi, double r, const double *phin,
                   double g, int terminal, double v, double vn);
    /* Optional: NULL means unsupported. */
    int (*sd)(const struct est *e, const double *phi, double *sd);
    /*
     * Optional.  o is valid and o->cancel was clear on entry; the kind checks it
     * again before every further step (est_train_cancelled).  Fills rep (zeroed
     * by est.c) and returns 0 or WORTH_E_CANCELLED; est.c applies the
     * divergence rule afterwards.
     */
    int (*train)(struct est *e, const est_train_opts_t *o, est_train_t *rep);
    /* Kind state after the common part; load may set r->err on bad data.  version is the
     * state's format version (EST_FORMAT_OLDEST..EST_FORMAT_VERSION). */
    void (*save)(const struct est *e, ser_w *w);
    void (*load)(struct est *e, ser_r *r, unsigned version);
    /* Optional: extra snapshot doubles after w, their writer and the sd they give. */
    size_t (*snap_size)(const struct est *e);
    void (*snap)(const struct est *e, double *out);
    double (*snap_sd)(const struct est *e, const double *extra, const double *phi);
    /* Optional: fills kind-specific stats (trace_p, refits, p_resets; health and why when the
     * kind is unhealthy); est.c then sets health and why of a diverged estimator. */
    void (*stats)(const struct est *e, est_stats_t *s);
};

struct est {
    est_params_t p;
    const struct est_ops *ops;
    size_t n;    /* features */
    size_t nsrc; /* source slots */
    size_t nw;   /* weights: n, or the networks' parameters (mlp, ensemble) */
    double *w;   /* nw weights */
    uint64_t updates;
    uint64_t guarded;
    double td_last;
    double v_last;        /* V(x) of the last transition, weights before its update */
    double sd_last;       /* its sd then, from estimators that give one while they learn; NAN */
    double td_ms;         /* exponentially weighted mean square of the TD error */
    double td_wsum;       /* its weight sum, for the start-up bias correction */
    double r_max;         /* largest |r| seen (the divergence bound's scale) */
    int diverged;         /* 0, or the reason: 1 non-finite weights, 2 value beyond the bound */
    uint64_t diverged_at; /* updates when divergence was detected */
    void *k;              /* kind state, owned */
};

extern const struct est_ops est_td_ops, est_tdn_ops, est_tdlambda_ops, est_mc_ops, est_rls_ops,
    est_lstd_ops, est_replay_ops, est_mlp_ops, est_ensemble_ops;

/* Returns 1 when o asks the training to stop now (its cancel flag is set). */
int est_train_cancelled(const est_train_opts_t *o);

/* Dot product of n doubles (BLAS ddot). */
double est_dot(size_t n, const double *a, const double *b);
/* y += a * x over n doubles (BLAS daxpy). */
void est_axpy(size_t n, double a, const double *x, double *y);

struct ring;
/* The step of tdn and mc towards a target: w += alpha * (target - w.phi) * phi (phi borrowed). */
void est_step(struct est *e, const double *phi, double target);
/* An episode's end for tdn and mc: steps every waiting state of q (learn/ring.h), oldest first,
 * towards its return to the end (V(terminal) = 0), and empties q. */
void est_ring_flush(struct est *e, struct ring *q);

/*
 * The accumulating trace of one source, shared by rls_td and lstd (the
 * instrument of LSTD(lambda)): z = g_prev*lambda*z + phi, reset at a terminal
 * transition; g_prev is the previous transition's discount.
 */
struct est_trace {
    double *z; /* n, allocated when the source is first seen */
    double g_prev;
};

/* Advances t (allocating z on first use) and writes the regressor d = phi - g phi'. */
void est_trace_step(struct est_trace *t, size_t n, double lambda, const double *phi,
                    const double *phin, double g, int terminal, double *d);
/* Ends the step: resets t at a terminal transition, else remembers g. */
void est_trace_end(struct est_trace *t, size_t n, double g, int terminal);
/* Frees and zeroes nsrc traces. */
void est_traces_reset(struct est_trace *t, size_t nsrc);
void est_traces_save(const struct est_trace *t, size_t nsrc, size_t n, ser_w *w);
void est_traces_load(struct est_trace *t, size_t nsrc, size_t n, ser_r *r);

/* Writes a flag and, when present, n doubles of a lazily allocated per-source vector. */
void est_put_opt(ser_w *w, const double *v, size_t n);
/* Reads what est_put_opt wrote into *v, allocating it (n doubles) when present. */
void est_get_opt(ser_r *r, double **v, size_t n);

#endif /* WORTH_EST_IMPL_H */
