/*
 * pairing.h - a model's samples made into transitions, per source, and the
 * producer sequences of its transitions (schema/protocol.md, "Samples").
 *
 * It is also the loop's table of the model's sources (all of them, whether
 * they send samples or transitions), which must fit in max_sources.
 *
 * Loop thread only, in front of the model's queue: a sample of a source and
 * that source's last sample make a transition (its t the earlier sample's,
 * its dt the difference, its reward by the model's rule), unless the gap
 * between them is over the model's limit or the earlier one was terminal; a
 * sample at or before the source's last t is skipped (a resend).  Pairing is
 * deterministic: the log holds the transitions it made, and each source's
 * state after a request is logged too (a QREC_SOURCE record, the sources
 * table), so it goes on across restarts.
 */
#ifndef WORTH_PAIRING_H
#define WORTH_PAIRING_H

#include <sqlite3.h>
#include <stddef.h>
#include <stdint.h>

#include "core/queue.h"
#include "core/spec.h"

struct pairing;

/* What one sample made. */
enum pair_outcome {
    PAIR_SKIPPED, /* at or before the source's last t: already logged */
    PAIR_START,   /* the source's first sample, or the first after a terminal one */
    PAIR_GAP,     /* too long after the last: the chain breaks here */
    PAIR_PAIRED   /* a transition from the last sample to this one */
};

/* Plain data: one sample as received (x and source borrowed; x: dims doubles). */
typedef struct pair_sample_t {
    const char *source; /* "" for the default source */
    double t;
    const double *x;
    double r;
    int terminal;
} pair_sample_t;

/* Lifecycle */

/* Returns the pairing of a model with meta's rules (copied) and up to max_sources sources. */
struct pairing *pairing_new(const spec_meta_t *meta, size_t max_sources);
void pairing_free(struct pairing *p);
/* Replaces the rules (the same dims). */
void pairing_set_meta(struct pairing *p, const spec_meta_t *meta);
/*
 * Sets every source's state to what the sources table of model_id holds
 * (sources it does not name forget their last sample and pseq).  Returns 0,
 * or a worth code (db_error_code; damaged for a row of the wrong shape) with
 * err.
 */
int pairing_load(struct pairing *p, sqlite3 *db, int64_t model_id, char *err, size_t errlen);

/* Operate */

/*
 * Checks that the k source names (borrowed; NULL means the default source)
 * would fit in the model's source slots.  Returns 0 or WORTH_E_TOO_MANY_SOURCES
 * with a message in err and the index of the first name that does not fit in
 * *bad (may be NULL).
 */
int pairing_fit(const struct pairing *p, const char *const *names, size_t k, size_t *bad, char *err,
                size_t errlen);
/* The model has a source of that name (it must fit: pairing_fit). */
void pairing_note(struct pairing *p, const char *source);

/*
 * Pairs s with its source's last sample: fills *obs (a slot of the model's
 * queue) with the transition when the outcome is PAIR_PAIRED; unless
 * skipped, s is then the source's last sample.  s may point into *obs (a
 * sample parsed into the slot it becomes).  The caller has checked that the
 * source fits, and logs the source's state after the request
 * (pairing_record).
 */
enum pair_outcome pairing_add(struct pairing *p, const pair_sample_t *s, queue_rec_t *obs);
/* Fills rec (a queue slot) as the QREC_SOURCE record of source's state now. */
void pairing_record(const struct pairing *p, const char *source, queue_rec_t *rec);
/* The last t of the source, or -INFINITY when it has none (for within-request order checks). */
double pairing_last_t(const struct pairing *p, const char *source);
/* The last producer sequence of source's transitions (0: none). */
uint64_t pairing_pseq(const struct pairing *p, const char *source);
/* A transition of source with producer sequence pseq is accepted. */
void pairing_pseq_set(struct pairing *p, const char *source, uint64_t pseq);

/* Query */

/* Sources known (in the order first seen), and the i-th one's name, last t (NAN: none) and
 * last pseq. */
size_t pairing_count(const struct pairing *p);
void pairing_get(const struct pairing *p, size_t i, const char **source, double *t, uint64_t *pseq);

#endif /* WORTH_PAIRING_H */
