/*
 * history.h - the learning history of each model, in plant time, in the
 * database (the history table, schema/005_history.sql), so that it survives
 * a restart and a picture can be drawn of the whole run.
 *
 * The learner takes a row when the transitions it has learnt reach a new
 * bucket: of plant time (ten control periods wide, 600 s when the model
 * declares no period) when they carry the plant's t, else of seq (100
 * transitions).  Rows are stored by the writer thread, a few at a time (the
 * learner gathers them), with INSERT OR IGNORE: the first row of a bucket
 * stays, so recovery, which learns the tail of the log again, only adds the
 * rows a crash lost.  Listing runs on the writer thread too and answers the
 * connection that asked (EV_REPLY).
 */
#ifndef WORTH_HISTORY_H
#define WORTH_HISTORY_H

#include <stddef.h>
#include <stdint.h>

#include "learn/est.h"
#include "learn/model.h"

struct writer;
struct queue;

/* Rows in a bucket of seq for transitions without t. */
#define HISTORY_SEQ_BUCKET 100
/* Control periods in a bucket of plant time, and its width when the model has no period. */
#define HISTORY_PERIODS   10
#define HISTORY_DEFAULT_S 600.0

/* Plain data: one row. */
typedef struct history_row_t {
    int timed;      /* 1: bucket is of plant time; 0: of seq */
    int64_t bucket; /* floor(plant_t / width) or floor(seq / HISTORY_SEQ_BUCKET) */
    uint64_t seq;   /* the last transition learnt */
    double at;      /* worthd's clock */
    double plant_t; /* the plant's t of the last transition with one; NAN: none */
    double td_rms[MODEL_MAX_EST];
    double realised_rms[MODEL_MAX_EST]; /* NAN before any return was known */
} history_row_t;

/* Plain data: which rows to list. */
typedef struct history_query_t {
    int by_t;        /* 1: from..to are plant times; 0: seqs */
    double from, to; /* inclusive */
    size_t max;      /* most rows returned: every k-th of the window, and its last */
} history_query_t;

/*
 * The learner's side: rows gathered on its thread until the writer stores
 * them.  Holds at most HISTORY_PEND rows (more in one publish interval are
 * left out: buckets that close so fast are not worth a row each) and hands
 * them over at least every HISTORY_FLUSH_S, and whenever the learner has
 * caught up with its queue.  Allocates in history_buf_new
 * only.
 */
#define HISTORY_PEND    256
#define HISTORY_FLUSH_S 2.0
struct history_buf;
/* plant_t: the t of the last transition learnt (NAN: none). */
struct history_buf *history_buf_new(size_t n_est, double plant_t);
void history_buf_free(struct history_buf *hb);
double history_buf_footprint(void);
/* Returns 1 when the transition seq (its t: t_s, NAN when none) opens a new bucket. */
int history_buf_due(struct history_buf *hb, uint64_t seq, double t_s, double width_s);
/* Takes the row history_buf_due asked for: realised holds each estimator's figure. */
void history_buf_add(struct history_buf *hb, uint64_t seq, double now, const double *realised);
/* Gives the rows without it their estimators' running RMS TD error (est_stats of each). */
void history_buf_fill(struct history_buf *hb, const est_stats_t *st);
/* Returns 1 when the rows should go to the writer now. */
int history_buf_ripe(const struct history_buf *hb, double now);
/* Hands the rows (filled) to the writer for model q. */
void history_buf_flush(struct history_buf *hb, struct writer *w, struct queue *q, double now);

/*
 * At the transition seq (its t: t_s) observed with its diagnostics (stage C):
 * takes a row with the realised-return figures of m when a new bucket opens.
 */
void history_buf_take(struct history_buf *hb, const struct model *m, uint64_t seq, double t_s,
                      double width_s, double now);
/* Fills the rows with m's estimators' RMS TD error (m whole: flushed) and hands them over. */
void history_buf_store(struct history_buf *hb, const struct model *m, struct writer *w,
                       struct queue *q, double now);

/* Stores n rows of model q with n_est estimators each (copied; any thread). */
void writer_history_store(struct writer *w, struct queue *q, const history_row_t *rows, size_t n,
                          size_t n_est);
/*
 * Replies to conn_id with the rows of q in the window, oldest first:
 * ,"estimators":names (JSON, copied), "width_s", "rows" (in the window),
 * "every" (the stride), "history":[...].
 */
void writer_history_list(struct writer *w, struct queue *q, const char *names, size_t n_est,
                         double width_s, const history_query_t *hq, uint64_t conn_id);

#endif /* WORTH_HISTORY_H */
