/*
 * spec.h - a model.create request turned into a model_spec_t.
 *
 * Parsed on the loop thread from the request's cJSON tree.  The result owns
 * every array the model_spec_t points into, and a canonical JSON text of the
 * spec with every default filled in (for model.get and, later, for the
 * models table).  Nothing here allocates from the request's cJSON arena: the
 * result outlives the request.
 */
#ifndef WORTH_SPEC_H
#define WORTH_SPEC_H

#include <cjson/cJSON.h>
#include <stddef.h>

#include "learn/inputs.h"
#include "learn/model.h"

/* Longest dimension unit or reward unit, in bytes, without the NUL. */
#define SPEC_UNIT_MAX 31

/*
 * Plain data: what a person reads about a model, and how its samples pair
 * into transitions (schema/protocol.md, "Samples").  Copied into the model's
 * learner; read on the loop thread.
 */
typedef struct spec_meta_t {
    size_t dims;
    int named;                                     /* the dimensions have names */
    char names[FEAT_MAX_DIMS][MODEL_NAME_MAX + 1]; /* "" when not named */
    char units[FEAT_MAX_DIMS][SPEC_UNIT_MAX + 1];  /* "" when none */
    char reward_unit[SPEC_UNIT_MAX + 1];           /* "" when none */
    double period_s;                               /* the control period; 0 when not given */
    int reward_same; /* samples: r is what the step starting at it earns (else: ending at it) */
    double max_gap_s; /* samples further apart break the chain; INFINITY: none */
    double lo[FEAT_MAX_DIMS], hi[FEAT_MAX_DIMS]; /* the declared ranges */
    inputs_params_t inputs;                      /* the direct input checks ("diagnostics") */
} spec_meta_t;

/* Plain data, owned by the caller of spec_parse; free with spec_free. */
typedef struct spec_t {
    char name[MODEL_NAME_MAX + 1]; /* the model's name */
    model_spec_t m;                /* points into the arrays below */
    double *lo, *hi;               /* dims each */
    feat_basis_t *bases;           /* m.feat.nbases */
    est_params_t *est;             /* m.n_est */
    char (*est_names)[MODEL_NAME_MAX + 1];
    const char **est_name_ptrs; /* m.est_names points here */
    char *canonical;            /* owned JSON text of the spec, defaults filled in */
    diag_params_t diag;         /* m.diag points here */
    spec_meta_t meta;           /* names, units, control period, sample pairing */
} spec_t;

/*
 * Parses the fields of a model.create request (req, borrowed: the whole
 * request object; "op" and "id" are ignored) into *out (owned by the caller,
 * free with spec_free).  Checks types and ranges that model_new would not
 * report clearly, unknown fields in bases and estimators, and names.  Returns
 * 0 or a negative worth error (bad_request, bad_number, bad_param,
 * bad_dimension, too_large) with a message in err; *out is untouched on error.
 * model_new may still refuse the spec (too_large feature counts): its error
 * is the caller's to report.
 */
int spec_parse(const cJSON *req, spec_t **out, char *err, size_t errlen);
/*
 * spec_parse under a daemon's ceiling on features per model: max_features
 * defaults to the smaller of FEAT_DEFAULT_MAX and feat_limit, and a spec
 * asking for more than feat_limit is too_large.
 */
int spec_parse_within(const cJSON *req, size_t feat_limit, spec_t **out, char *err, size_t errlen);
void spec_free(spec_t *s);

/* Returns 1 when name is a valid model name: 1..63 bytes of [A-Za-z0-9._-]. */
int spec_name_ok(const char *name);
/* Returns the index of the dimension named name in meta, or -1. */
int spec_dim_find(const spec_meta_t *meta, const char *name);

#endif /* WORTH_SPEC_H */
