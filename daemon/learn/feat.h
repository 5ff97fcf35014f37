/*
 * feat.h - feature maps phi(x) for linear value estimators.
 *
 * A map is built once from a spec and is then read-only: feat_eval() takes a
 * caller-owned workspace, so one map can serve a learner thread and a query
 * thread at once.  Evaluation never allocates.
 *
 * Every input dimension is first normalised to u in [0, 1] from the declared
 * range [lo, hi]; values outside are clipped and reported to the caller, who
 * counts them.  Then the bases are evaluated in the order given and their
 * outputs concatenated.
 */
#ifndef WORTH_FEAT_H
#define WORTH_FEAT_H

#include <stddef.h>

struct feat;

/* Hard ceiling on input dimensions; a spec above it is too_large. */
#define FEAT_MAX_DIMS 64
/* Default ceiling on the number of features of one map. */
#define FEAT_DEFAULT_MAX 4096
/* Most tilings of one tiles basis. */
#define FEAT_MAX_TILINGS 1024
/* Most tiles per dimension of one tiling. */
#define FEAT_MAX_TILES (1 << 20)
/* Largest max_features a spec may ask for (2^20 features of 8 bytes: 8 MiB a vector). */
#define FEAT_HARD_MAX (1 << 20)

enum feat_kind {
    FEAT_BIAS,    /* one constant feature 1 */
    FEAT_RAW,     /* u_d for each dimension */
    FEAT_POLY,    /* every monomial of u with total degree 1..degree */
    FEAT_FOURIER, /* cos(pi c.u), c in {0..order}^D, 1 <= nonzeros(c) <= couple */
    FEAT_RBF,     /* Gaussian bumps on a centres^D grid, width in normalised units */
    FEAT_TILES    /* tilings x tiles^D grid, asymmetric offsets, hashed into size */
};

/* Plain data: one basis and its parameters (unused fields are ignored). */
typedef struct feat_basis_t {
    enum feat_kind kind;
    unsigned degree;  /* poly: total degree >= 1 */
    unsigned order;   /* fourier: order k >= 1 */
    unsigned couple;  /* fourier: most dimensions one term may couple; 0 = all */
    unsigned centers; /* rbf: centres per dimension >= 1 */
    double width;     /* rbf: standard deviation in normalised units, > 0 */
    unsigned tilings; /* tiles: number of tilings >= 1 */
    unsigned tiles;   /* tiles: tiles per dimension per tiling >= 1 */
    unsigned size;    /* tiles: hashed table size >= 1 */
} feat_basis_t;

/* Plain data: the whole map.  Pointers are borrowed during feat_new only. */
typedef struct feat_spec_t {
    size_t dims;               /* input dimension D, 1..FEAT_MAX_DIMS */
    const double *lo;          /* D lower bounds */
    const double *hi;          /* D upper bounds, hi > lo */
    size_t nbases;             /* >= 1 */
    const feat_basis_t *bases; /* nbases entries */
    size_t max_features;       /* 0 = FEAT_DEFAULT_MAX */
} feat_spec_t;

/* Lifecycle */

/*
 * Builds a map from spec into *out (owned by the caller, free with feat_free).
 * Returns 0, or WORTH_E_BAD_PARAM / WORTH_E_TOO_LARGE with a message in err
 * (caller's buffer of errlen bytes); *out is untouched on error.
 */
int feat_new(const feat_spec_t *spec, struct feat **out, char *err, size_t errlen);
void feat_free(struct feat *f);

/* Query */

/* Returns the number of features n of the map. */
size_t feat_count(const struct feat *f);
/* Returns the input dimension D. */
size_t feat_dims(const struct feat *f);
/* Returns how many doubles of workspace feat_eval needs. */
size_t feat_work_size(const struct feat *f);

/* Operate */

/*
 * Writes the n features of x (D finite values, borrowed) into phi (n doubles,
 * borrowed), using work (feat_work_size doubles, borrowed).  Returns the
 * number of components of x that were outside their range and clipped.
 * The caller validates that x is finite; feat_eval does not allocate.
 */
size_t feat_eval(const struct feat *f, const double *x, double *phi, double *work);

#endif /* WORTH_FEAT_H */
