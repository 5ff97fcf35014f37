/*
 * alarms.h - a learner's alarms into events: the drift alarm, its clearing,
 * and the direct input checks (learn/drift.h, learn/inputs.h).
 *
 * Learner thread.  Each function logs one line and hands one event to the
 * writer; it allocates only per event (the writer's job), never per
 * transition.
 */
#ifndef WORTH_ALARMS_H
#define WORTH_ALARMS_H

#include <stdint.h>

#include "core/spec.h"
#include "learn/drift.h"
#include "learn/inputs.h"

struct queue;
struct writer;

/*
 * A drift alarm raised at transition seq (dr: the detector now).  The
 * detector counts steps from the model's start; the onset's seq is that of
 * the transition at its step when no rollback intervened.  With pre_drift,
 * the writer keeps a "pre-drift" checkpoint no later than the onset.
 */
void alarms_drift(struct writer *w, struct queue *q, const char *name, const diag_drift_t *dr,
                  uint64_t seq, int pre_drift, double plant_t);
/* The active drift alarm cleared at transition seq. */
void alarms_drift_cleared(struct writer *w, struct queue *q, const char *name,
                          const diag_drift_t *dr, uint64_t seq, double plant_t);
/* An input check raised or cleared (meta, borrowed: the dimensions' names). */
void alarms_input(struct writer *w, struct queue *q, const char *name, const spec_meta_t *meta,
                  const inputs_event_t *ev);

#endif /* WORTH_ALARMS_H */
