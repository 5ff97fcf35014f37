/*
 * logsql.h - the transition log as SQLite holds it: a model's rows of the
 * transitions table (written before schema 006) followed by its blocks
 * (log_blocks, logblk.h), with the marks of rollbacks (the rolled_back column,
 * log_undone).  The only module that knows that layout: the rest of store/
 * and live/ read and change the log through it, one transition at a time.
 *
 * Functions take the connection they run on; they never begin or commit a
 * transaction (the writer's do, the readers' run in SQLite's implicit one).
 */
#ifndef WORTH_LOGSQL_H
#define WORTH_LOGSQL_H

#include <sqlite3.h>
#include <stddef.h>
#include <stdint.h>

#include "learn/model.h"
#include "store/logblk.h"

/* An iterator over a model's log (opaque). */
struct logit;

/* One logged transition, as logit_next yields it. */
typedef struct logit_row_t {
    uint64_t seq;
    model_obs_t o;       /* x, x_next and source point into the iterator: valid until next */
    double t;            /* NAN when it has none */
    int64_t rolled_back; /* 0, or the rollback event that undid it */
    int legacy;          /* a row of the transitions table */
} logit_row_t;

/* How logsql_undo chooses. */
enum { LOGSQL_UNDO_ALL, LOGSQL_UNDO_SEQS, LOGSQL_UNDO_TIMES };

/* Read */

/*
 * Opens an iterator over model's transitions with seq in (after, upto], in seq
 * order, rolled-back ones included (rolled_back says).  dims: the model's.
 * Returns 0 with *out owned (logit_close), or -1 (the database's error).
 */
int logit_open(sqlite3 *db, int64_t model, size_t dims, uint64_t after, uint64_t upto,
               struct logit **out);
/*
 * The next transition into *row.  Returns 1, 0 at the end, -1 when a stored
 * transition is damaged (*bad_seq its seq, why says how), or -2 when SQLite
 * failed (sqlite3_errcode of db says why: SQLITE_CORRUPT for damaged pages).
 */
int logit_next(struct logit *it, logit_row_t *row, uint64_t *bad_seq, char *why, size_t len);
void logit_close(struct logit *it);

/* The smallest and largest seq logged for model (0, 0 when none).  0 or -1. */
int logsql_bounds(sqlite3 *db, int64_t model, uint64_t *lo, uint64_t *hi);
/* Transitions of model after seq `after` not rolled back (a replay's length); 0 on error. */
uint64_t logsql_count_live(sqlite3 *db, int64_t model, uint64_t after);
/* dims below: the model's, to read its blocks. */
/* The t of transition seq, NAN when it has none or is not logged. */
double logsql_t_at(sqlite3 *db, int64_t model, size_t dims, uint64_t seq);
/* The t of the newest transition with seq < below that has one; NAN when none. */
double logsql_last_t(sqlite3 *db, int64_t model, size_t dims, uint64_t below);

/* Write (inside the caller's transaction) */

/* The statement logsql_put_block binds (prepare once, SQLITE_PREPARE_PERSISTENT). */
#define LOGSQL_INSERT_BLOCK                                                                        \
    "INSERT INTO log_blocks(model, first_seq, last_seq, t_lo, t_hi, untimed, data)"                \
    " VALUES(?,?,?,?,?,?,?)"
/* Stores the finished block e (borrowed) of model with st (LOGSQL_INSERT_BLOCK).  0 or -1. */
int logsql_put_block(sqlite3_stmt *st, int64_t model, const logblk_enc_t *e);
/*
 * Marks as undone by rollback event ev the transitions of model with seq in
 * (after, upto] not undone yet: all of them (LOGSQL_UNDO_ALL), those with seq
 * in [lo, hi] (_SEQS) or with t in [lo, hi] (_TIMES; *untimed counts those
 * without t).  *undone gets the count marked.  Returns 0, or -1 (the
 * database's error) or -2 (a damaged block: nothing of it may be trusted).
 */
int logsql_undo(sqlite3 *db, int64_t model, size_t dims, uint64_t after, uint64_t upto, int mode,
                double lo, double hi, int64_t ev, uint64_t *undone, uint64_t *untimed);
/*
 * Deletes model's transitions with seq in (lo, hi] (retention, a purge): rows,
 * whole blocks, and the part of a block that straddles hi or lo is rewritten
 * with the records kept (enc: a scratch encoder, borrowed; dims may be 0 when
 * (lo, hi] takes whole blocks only).  Returns the transitions deleted, or -1.
 */
int64_t logsql_delete(sqlite3 *db, int64_t model, size_t dims, uint64_t lo, uint64_t hi,
                      logblk_enc_t *enc);

#endif /* WORTH_LOGSQL_H */
