/*
 * est.h - linear value estimators behind one interface.
 *
 * An estimator holds weights w of a linear value function V(x) = w . phi(x)
 * and updates them from transitions given in feature space: phi = phi(x),
 * phi_next = phi(x_next), reward r and the discount g of that transition
 * (gamma, or gamma_per_s^dt).  A terminal transition means V(x_next) = 0: its
 * phi_next is ignored, and traces and buffers of its source are reset.
 *
 * Transitions come from up to `sources` independent streams (units of a fleet).
 * Traces, n-step and Monte Carlo buffers are kept per source, so interleaved
 * streams do not corrupt each other.  A source's buffers are allocated the
 * first time it is seen; after that, est_observe allocates nothing.
 *
 * Not thread-safe: one thread updates an estimator.  est_value and est_sd are
 * const and may run concurrently with each other but not with an update.
 * Every estimator is deterministic: the same parameters, seed and transitions
 * give bit-identical weights, and save -> load -> continue gives the same bits
 * as never stopping.
 *
 * Divergence.  A step size that is too large for the features (td, replay),
 * or a numerically broken kind, makes the weights grow geometrically until
 * they overflow.  After every update (est_observe, and after est_train) the
 * estimator has diverged when
 *   1. any weight is not finite (EST_WHY_NONFINITE), or
 *   2. |v| or |vn|, the values of x and x_next under the weights before the
 *      update, exceed B = EST_DIVERGE_FACTOR * max(1, R_max), with R_max the
 *      largest |r| the estimator has seen, this transition's included
 *      (EST_WHY_BOUND).
 * Why this bound: a discounted return is at most R_max / (1 - gamma) in size,
 * so a value beyond 1e10 R_max needs gamma within 1e-10 of 1 (or an episode
 * of 1e10 steps) to be genuine; any realistic plant stays far inside it.  And
 * it sits some 290 decades below overflow, so a geometric blow-up is caught
 * while every number is still finite, rather than after NaN has spread into
 * the traces and statistics.  XXX: an init of 1e10 R_max or more (an absurd
 * prior) trips rule 2 on the first transition.
 * A diverged estimator is reset to its initial weights and kind state (so no
 * non-finite number is ever saved, snapshotted or published), keeps its
 * counters, remembers when (diverged_at, its update count then) and why, and
 * from then on validates and counts transitions but learns nothing; its value
 * and sd are NAN and est_train returns WORTH_E_DIVERGED.  The flag is part of
 * the saved state and of the value snapshot; only est_reset (or loading a
 * state that is not diverged) clears it.
 */
#ifndef WORTH_EST_H
#define WORTH_EST_H

#include <stdatomic.h>
#include <stddef.h>
#include <stdint.h>

struct est;

/* Version of the byte format written by est_save (2: R_max and the divergence record; rls_td
 * its covariance resets; 3: the network parameters of mlp and ensemble in the header).
 * Versions 1 and 2 still load, the new fields at their defaults. */
#define EST_FORMAT_VERSION 3
/* Oldest format est_load still reads. */
#define EST_FORMAT_OLDEST 1
/* Divergence rule 2: a value beyond this many times max(1, R_max) means divergence. */
#define EST_DIVERGE_FACTOR 1e10
/* rls_td: health is unhealthy for this many times n updates from a covariance reset on. */
#define EST_RLS_RESET_WINDOW 10
/* The reasons est_stats gives in why (static strings). */
#define EST_WHY_NONFINITE "non-finite weights"
#define EST_WHY_BOUND     "value beyond 1e10 x the largest reward"
#define EST_WHY_P_RESET   "covariance reset"
/* Most sources one estimator keeps separate state for. */
#define EST_MAX_SOURCES 1024
/* mlp, ensemble: most hidden layers, widest hidden layer, most members, most weights. */
#define EST_MLP_MAX_LAYERS  4
#define EST_MLP_MAX_WIDTH   1024
#define EST_MLP_MAX_MEMBERS 32
#define EST_MLP_MAX_WEIGHTS 10000000

enum est_kind {
    EST_TD,        /* semi-gradient TD(0) */
    EST_TD_N,      /* n-step semi-gradient TD */
    EST_TD_LAMBDA, /* true online TD(lambda), dutch traces (van Seijen & Sutton 2014) */
    EST_MC,        /* gradient Monte Carlo, episodic or truncated at a horizon */
    EST_RLS_TD,    /* RLS-TD(lambda), instrumental-variable form, forgetting factor */
    EST_LSTD,      /* batch LSTD(lambda) with ridge, LU solve */
    EST_REPLAY,    /* semi-gradient TD over mini-batches from a bounded replay buffer */
    EST_MLP,       /* a feed-forward network trained by replay with Adam (nonlinear) */
    EST_ENSEMBLE,  /* K such networks on bootstrap masks: value = mean, sd = spread */
    EST_KIND_COUNT
};

enum est_guard {
    EST_GUARD_REGULARISE, /* rls_td: regularised forgetting (Gunnarsson 1996); the default */
    EST_GUARD_TRACE,      /* rls_td: forget only while trace(P) stays under trace_cap */
    EST_GUARD_NONE        /* rls_td: plain exponential forgetting (winds up) */
};

enum est_act {
    EST_ACT_TANH, /* mlp, ensemble: hidden units tanh(z); the default */
    EST_ACT_RELU  /* mlp, ensemble: hidden units max(0, z) */
};

/* Plain data: the hidden layers of a network, input side first. */
typedef struct est_hidden_t {
    unsigned count;                     /* hidden layers, 1..EST_MLP_MAX_LAYERS; 2 */
    unsigned width[EST_MLP_MAX_LAYERS]; /* units of each, 1..EST_MLP_MAX_WIDTH; 32 */
} est_hidden_t;

/*
 * Plain data: parameters of every kind; each kind reads its own fields.
 * est_params_default() fills the documented defaults.
 */
typedef struct est_params_t {
    enum est_kind kind;
    double alpha;           /* step size, > 0 (td, td_n, td_lambda, mc, replay; 0.01), Adam's
                               (mlp, ensemble; 0.001) */
    double init;            /* initial value of every weight; 0 */
    double lambda;          /* trace decay in [0,1] (td_lambda 0.9, rls_td 0, lstd 0) */
    unsigned nstep;         /* td_n: steps n >= 1; 4; mlp, ensemble: n-step targets, 1 */
    unsigned horizon;       /* mc: 0 = episodic, else truncated return over H steps; 0 */
    unsigned max_episode;   /* mc episodic: buffered steps per source before truncating; 100000 */
    double forget;          /* rls_td: mu in (0,1]; lstd: decay of A and b in (0,1]; 1 */
    double delta;           /* rls_td: P0 = delta * I, > 0; 100 */
    enum est_guard guard;   /* rls_td wind-up guard when forget < 1; EST_GUARD_REGULARISE */
    double trace_cap;       /* rls_td, guard trace: bound on trace(P), 0 = n * delta; 0 */
    double ridge;           /* lstd: eps >= 0 added to A's diagonal at solve time; 1e-6 */
    unsigned refit_every;   /* lstd: solve after this many transitions, >= 1; 100 */
    unsigned capacity;      /* replay: buffer size in transitions, >= 1; 10000 */
    unsigned batch;         /* replay: mini-batch size >= 1; 32 */
    unsigned steps_per_obs; /* replay: background mini-batch steps per transition; 1 */
    double decay;           /* replay: alpha_k = alpha / (1 + k / decay); 0 = constant; 0 */
    double tol;             /* replay: converged when a pass changes |w| by < tol; 1e-4 */
    uint64_t seed;          /* replay, mlp, ensemble: RNG seed; 1 */
    /* mlp and ensemble also read capacity, batch, steps_per_obs, decay, tol and seed. */
    est_hidden_t hidden;   /* mlp, ensemble: hidden layers; {2, {32, 32}} */
    enum est_act act;      /* mlp, ensemble: activation; EST_ACT_TANH */
    unsigned target_every; /* mlp, ensemble: target network refreshed every K steps, 0 none; 0 */
    double clip;           /* mlp, ensemble: gradient-norm clip, 0 = none; 0 */
    unsigned members;      /* ensemble: networks K, 2..EST_MLP_MAX_MEMBERS; 5 (mlp: 1) */
} est_params_t;

/* An estimator's health, from its own numerical evidence. */
enum est_health {
    EST_HEALTH_OK,        /* nothing known against it */
    EST_HEALTH_UNHEALTHY, /* answers, but a guard acted recently (rls_td: covariance reset) */
    EST_HEALTH_DIVERGED   /* diverged (see above): answers NAN, learns nothing */
};

/* Plain data: counters and figures of one estimator. */
typedef struct est_stats_t {
    uint64_t updates;     /* transitions observed (while diverged too) */
    uint64_t guarded;     /* updates skipped or damped by a numerical guard */
    uint64_t refits;      /* lstd: solves; replay, mlp, ensemble: mini-batch steps */
    double td_last;       /* last TD error r + g V(x') - V(x), weights before the update */
    double td_rms;        /* RMS TD error, exponentially weighted over ~1000 transitions */
    double trace_p;       /* rls_td: trace(P); otherwise 0 */
    int health;           /* enum est_health */
    const char *why;      /* static reason (EST_WHY_*) when not ok, else NULL */
    uint64_t diverged_at; /* update count when divergence was detected; 0 when not diverged */
    uint64_t p_resets;    /* rls_td: covariance resets (see rls.c); otherwise 0 */
} est_stats_t;

/* Called after each complete training pass; ctx is borrowed. */
typedef void (*est_progress_fn)(void *ctx, unsigned pass, unsigned of, double change);

/* Plain data: how to run est_train.  Pointers are borrowed for the call. */
typedef struct est_train_opts_t {
    unsigned passes;          /* replay: most passes (fewer once converged); lstd: ignored */
    uint64_t max_steps;       /* replay: stop after exactly this many mini-batch steps; 0: none */
    est_progress_fn progress; /* after each complete pass; may be NULL */
    void *ctx;                /* for progress */
    const atomic_int *cancel; /* nonzero: stop before the next step; NULL = never */
} est_train_opts_t;

/* Plain data: result of est_train. */
typedef struct est_train_t {
    unsigned passes; /* passes run, a last partial one included (replay), or 1 (lstd refit) */
    double change;   /* |w_after - w_before| / |w_before| of the last pass */
    int converged;   /* 1 when a complete pass changed w by less than tol */
    uint64_t steps;  /* mini-batch steps taken (replay); lstd: 1 when it solved, else 0 */
    int cancelled;   /* 1 when *cancel stopped the training */
} est_train_t;

/* Lifecycle */

/* Fills p with the defaults of kind. */
void est_params_default(enum est_kind kind, est_params_t *p);
/* Returns the wire name of kind ("td", "td_n", ...), or NULL. */
const char *est_kind_name(enum est_kind kind);
/* Returns the kind named name, or -1. */
int est_kind_parse(const char *name);

/*
 * Builds an estimator for n features and `sources` source slots into *out
 * (owned by the caller, free with est_free).  Returns 0, or WORTH_E_BAD_PARAM /
 * WORTH_E_TOO_LARGE with a message in err; *out is untouched on error.
 */
int est_new(const est_params_t *p, size_t n, size_t sources, struct est **out, char *err,
            size_t errlen);
/*
 * Returns the most bytes an estimator of p over n features and `sources`
 * source slots can come to hold: weights, matrices, every source's traces and
 * buffers at their full size, and two published value snapshots.  Pure
 * arithmetic in double (no overflow), for a limit checked before est_new.
 */
double est_footprint(const est_params_t *p, size_t n, size_t sources);
void est_free(struct est *e);
/* Returns the estimator to its freshly built state. */
void est_reset(struct est *e);

/* Operate */

/*
 * Learns from one transition of source src (< sources).  phi and phi_next are
 * n doubles (borrowed); phi_next may be NULL when terminal.  Returns 0, or
 * WORTH_E_BAD_NUMBER / WORTH_E_BAD_PARAM (src or g out of range, g not in
 * [0,1]) with the estimator unchanged.  Inputs are checked for finiteness.
 * Then applies the divergence rule (above); a diverged estimator validates
 * and counts the transition but learns nothing, and still returns 0.
 */
int est_observe(struct est *e, size_t src, const double *phi, double r, const double *phi_next,
                double g, int terminal);

/*
 * Trains as o says (borrowed): replay runs up to o->passes passes of
 * ceil(size/batch) mini-batch steps over its buffer, stops early once
 * converged, and stops after o->max_steps steps when that is set; lstd
 * refits once (passes and max_steps ignored: its solve is one step).
 * o->cancel is read before every step (before lstd's solve, which cannot be
 * cut); a cancelled training leaves the estimator exactly as a training
 * with max_steps = rep->steps would (with no step taken: unchanged).
 * Fills *rep.  Returns 0; WORTH_E_CANCELLED; WORTH_E_DIVERGED when the
 * estimator had diverged (nothing done) or diverged during the training
 * (then reset, see above); WORTH_E_UNSUPPORTED for the other kinds.
 */
int est_train(struct est *e, const est_train_opts_t *o, est_train_t *rep);

/* Query */

/* Returns V(phi) (phi: n doubles, borrowed): w . phi, or the network's output (ensemble:
 * the members' mean); NAN when e has diverged. */
double est_value(const struct est *e, const double *phi);
/*
 * Writes the standard deviation of the value at phi to *sd: rls_td gives
 * sqrt(s2 * phi'P phi) with s2 the running residual variance (NAN when
 * phi'P phi is not finite or negative: P is broken or indefinite); ensemble the sample
 * standard deviation of its members' values; NAN when e has diverged.  Returns 0 or
 * WORTH_E_UNSUPPORTED.
 */
int est_sd(const struct est *e, const double *phi, double *sd);
/*
 * Returns V(x) and the TD error of the last transition observed, both under the
 * weights before its update (what est_observe computed; not part of the saved state).
 * Both are NAN once e has diverged, from the transition that showed it on.
 */
double est_last_value(const struct est *e);
double est_last_td(const struct est *e);
/* The sd of V(x) before the last update, where the estimator gave one while it learnt (rls_td);
 * NAN otherwise. */
double est_last_sd(const struct est *e);
/* Returns the est_weight_count(e) weights (borrowed, valid until the next update): for the
 * linear kinds the n weights of w . phi, for mlp and ensemble every network parameter
 * (learn/mlpnet.h gives the layout). */
const double *est_weights(const struct est *e);
size_t est_weight_count(const struct est *e);
size_t est_features(const struct est *e);
const est_params_t *est_params(const struct est *e);
void est_stats(const struct est *e, est_stats_t *out);
/* Returns 1 when e has diverged (see above), else 0. */
int est_diverged(const struct est *e);

/* Published snapshots: what a query thread needs, copied out by the owner */

/* Returns the doubles a value snapshot of e takes: the weights, the diverged flag, and for
 * rls_td s2 and P. */
size_t est_snap_size(const struct est *e);
/* Writes e's value snapshot (est_snap_size doubles) into out (borrowed). */
void est_snap(const struct est *e, double *out);
/*
 * Returns the value of phi under snap, a snapshot taken from e, and writes its
 * sd (NAN when the kind has none) to *sd; both NAN when e had diverged.  Reads only e's immutable
 * fields (kind, sizes), so it may run while e's owner updates e.
 */
double est_snap_value(const struct est *e, const double *snap, const double *phi, double *sd);

/* Persistence */

/*
 * Serialises the whole state (weights, matrices, traces, buffers, RNG,
 * counters) into buf (cap bytes, borrowed).  Writes the needed size to *len;
 * returns 0, or WORTH_E_TOO_LARGE when cap is short (call with buf NULL to size).
 * The bytes carry a header (format version, kind, sizes, parameters) and a
 * CRC-32.
 */
int est_save(const struct est *e, uint8_t *buf, size_t cap, size_t *len);
/*
 * Restores the state written by est_save into e, built with the same
 * parameters and sizes (format EST_FORMAT_OLDEST..EST_FORMAT_VERSION).
 * Returns 0; WORTH_E_CORRUPT (bad magic, version,
 * length or checksum) or WORTH_E_MISMATCH (other kind, sizes or parameters),
 * with a message in err and e unchanged.
 */
int est_load(struct est *e, const uint8_t *buf, size_t len, char *err, size_t errlen);

#endif /* WORTH_EST_H */
