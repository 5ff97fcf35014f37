/*
 * logsql_impl.h - what logsql.c (reading the log) and logedit.c (changing it) share: the
 * iterator's insides.  Not for use outside daemon/store/.
 */
#ifndef WORTH_LOGSQL_IMPL_H
#define WORTH_LOGSQL_IMPL_H

#include "learn/feat.h"
#include "store/logsql.h"

/* seqs lo..hi undone by rollback event ev (a log_undone row) */
struct undone {
    uint64_t lo, hi;
    int64_t ev;
};

struct logit {
    sqlite3 *db;
    size_t dims;
    uint64_t after, upto, prev; /* prev: the seq yielded last */
    sqlite3_stmt *leg, *blk;    /* leg NULL: blocks only */
    logblk_dec_t *dec;
    size_t i;       /* the next record of dec */
    uint64_t first; /* seq of dec's first record */
    struct undone *u;
    size_t nu, ui;
    double x[FEAT_MAX_DIMS], xn[FEAT_MAX_DIMS];
    char src[MODEL_NAME_MAX + 1];
};

/* logit_open, with legacy 0 for the blocks alone (the rows of transitions are skipped). */
int logit_open_part(sqlite3 *db, int64_t model, size_t dims, uint64_t after, uint64_t upto,
                    int legacy, struct logit **out);

#endif /* WORTH_LOGSQL_IMPL_H */
