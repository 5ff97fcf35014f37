/*
 * spec_impl.h - what spec.c and spec_meta.c share: the field tables and the
 * readers that answer with a path and a stable code.  Not for use outside
 * daemon/core/spec*.c.
 */
#ifndef WORTH_SPEC_IMPL_H
#define WORTH_SPEC_IMPL_H

#include <cjson/cJSON.h>
#include <stddef.h>
#include <stdint.h>

#include "core/spec.h"

/* Longest field path in a message, e.g. "estimators[15].steps_per_obs". */
#define PATH_MAX_LEN 96
/* Longest path of an array element, e.g. "estimators[15]" (any size_t index fits). */
#define ELEM_MAX_LEN 40
/* Bytes of a client's key or value echoed in a message. */
#define SHOW_MAX 32

enum ftype {
    F_OTHER,  /* parsed by hand */
    F_DOUBLE, /* a finite double */
    F_UINT,   /* an integer that fits an unsigned */
    F_U64,    /* an integer 0..SEED_MAX into a uint64_t */
    F_GUARD,  /* "regularise", "trace" or "none" */
    F_ACT,    /* "tanh" or "relu" */
    F_HIDDEN  /* an array of 1..EST_MLP_MAX_LAYERS layer widths into an est_hidden_t */
};

/* One field of an object: its JSON name and, for parameters, where it goes. */
struct field {
    const char *name;
    enum ftype type;
    size_t off;     /* offset in feat_basis_t or est_params_t */
    unsigned kinds; /* bit k: the field applies to basis or estimator kind k */
    int required;   /* bases only: 1 when the basis has no default for it */
    double lo, hi;  /* F_UINT: allowed integers; hi < 0 means "up to dims" */
};

/* At most SHOW_MAX bytes of a client's string, made printable, in buf (SHOW_MAX + 4 bytes). */
const char *spec_show(const char *s, char *buf);
/* bad_request naming the first member of obj not in the n fields of t. */
int spec_check_keys(const cJSON *obj, const struct field *t, size_t n, const char *path, char *err,
                    size_t errlen);
/* A finite number at path into *out, or bad_number / bad_request. */
int spec_get_double(const cJSON *it, const char *path, double *out, char *err, size_t errlen);
/* An integral number in [lo, hi] (hi <= 2^53) at path, else as spec_get_double or bad_param. */
int spec_get_int(const cJSON *it, const char *path, double lo, double hi, uint64_t *out, char *err,
                 size_t errlen);
/* A string at path into *out (borrowed from the tree), or bad_request. */
int spec_get_string(const cJSON *it, const char *path, const char **out, char *err, size_t errlen);
/* An array of hidden layer widths at path into *out (spec_meta.c), or bad_request / bad_param. */
int spec_get_hidden(const cJSON *it, const char *path, est_hidden_t *out, char *err, size_t errlen);
/* Adds v under key (key NULL: to an array) with the fewest digits that read back; 0 or -1. */
int spec_add_double(cJSON *obj, const char *key, double v);
/* Adds an integer under key; 0 or -1. */
int spec_add_u64(cJSON *obj, const char *key, uint64_t v);

/* spec_meta.c */
int spec_parse_named_dims(const cJSON *req, const cJSON *arr, spec_t *s, char *err, size_t errlen);
int spec_parse_plant(const cJSON *req, spec_t *s, char *err, size_t errlen);
int spec_print_dims(cJSON *root, const spec_t *s);
int spec_print_plant(cJSON *root, const spec_t *s);

/* spec_diag.c: "diagnostics" (after the plant fields: it needs period_s); 0 or an error. */
int spec_parse_diag(const cJSON *o, spec_t *s, char *err, size_t errlen);
int spec_print_diag(cJSON *root, const spec_t *s);

#endif /* WORTH_SPEC_IMPL_H */
