/*
 * inputs.h - direct checks of a model's inputs, in plant time: a dimension
 * frozen (a stuck sensor), a dimension out of its declared range for long, a
 * source gone silent.
 *
 * These catch the commonest plant faults long before the value drifts.  Each
 * check is per source (and dimension), raises once and clears once: the
 * caller turns the two into events.  Plant time is the transitions' t; a
 * source whose transitions carry no t counts one control period per
 * transition.
 *
 * - frozen: the dimension has not moved by more than frozen_tol of its
 *   range for frozen_periods control periods, where it usually moves: its
 *   running rate of change (an exponential average over about 100 samples
 *   of "moved since the last sample") is at least one half.  So a slow
 *   dimension (a tariff that changes hourly) is never called frozen, and a
 *   sensor that updates every period is called frozen within frozen_periods
 *   (plus the one sample that shows it) of getting stuck.
 * - out_of_range: outside [lo, hi] for longer than range_periods periods.
 * - silent: no transition from the source for silent_periods periods of the
 *   plant time the other sources show (inputs_tick).
 *
 * Owned by a model's learner; learner thread only.  A source's state is
 * allocated when the source is first seen, never per transition.  Not part
 * of the model's saved state: after a restart the checks start again.
 */
#ifndef WORTH_INPUTS_H
#define WORTH_INPUTS_H

#include <stddef.h>
#include <stdint.h>

struct inputs;

/* Plain data: parameters (defaults in inputs_params_default). */
typedef struct inputs_params_t {
    double period_s;       /* the control period; 0: none (a transition counts as a period) */
    double frozen_periods; /* 5 */
    double frozen_tol;     /* fraction of the dimension's range that counts as a move; 1e-9 */
    double range_periods;  /* 3 */
    double silent_periods; /* 10 */
} inputs_params_t;

/* The checks' kinds, as events name them. */
enum inputs_kind { INPUTS_FROZEN = 0, INPUTS_OUT_OF_RANGE = 1, INPUTS_SILENT = 2 };

/* Plain data: a check raised or cleared (src borrowed: valid during the callback). */
typedef struct inputs_event_t {
    enum inputs_kind kind;
    int raised;      /* 1 raised, 0 cleared */
    const char *src; /* the source's name ("" the default source) */
    int dim;         /* the dimension; -1 for silent */
    double t;        /* plant time now */
    double since;    /* plant time the condition began (for a clearing: of the raised one) */
    double value;    /* the dimension's value (frozen, out of range); NAN for silent */
} inputs_event_t;

/* Plain data: one check raised now. */
typedef struct inputs_active_t {
    enum inputs_kind kind;
    size_t src; /* index for inputs_source_name */
    int dim;
    double since;
} inputs_active_t;

typedef void (*inputs_event_fn)(void *ctx, const inputs_event_t *ev);

/* Lifecycle */
void inputs_params_default(inputs_params_t *p);
/* Returns the checks (owned; inputs_free) of dims dimensions with ranges lo, hi (copied). */
struct inputs *inputs_new(const inputs_params_t *p, size_t dims, const double *lo, const double *hi,
                          size_t max_sources);
void inputs_free(struct inputs *in);

/* Operate: a transition of source src (borrowed) at plant time t (NAN: none) from state x. */
void inputs_observe(struct inputs *in, const char *src, double t, const double *x,
                    inputs_event_fn fn, void *ctx);
/* The silent check of every source against plant time now (NAN: nothing to do). */
void inputs_tick(struct inputs *in, double now, inputs_event_fn fn, void *ctx);

/* Query: fills up to max checks raised now; returns how many are raised in all. */
size_t inputs_list(const struct inputs *in, inputs_active_t *out, size_t max);
const char *inputs_source_name(const struct inputs *in, size_t src);
/* The event kind of a check ("input_frozen", "input_out_of_range", "source_silent"). */
const char *inputs_kind_name(enum inputs_kind k);

#endif /* WORTH_INPUTS_H */
