/*
 * db.h - worthd's SQLite database: opening, migrations, recovery reads.
 *
 * The writer thread (writer.h) owns the read-write connection after start-up;
 * before it starts, the main thread uses it to migrate and to recover every
 * model.  Learner threads open their own read-only connections to replay the
 * log after a rollback (WAL lets them read while the writer writes).
 */
#ifndef WORTH_DB_H
#define WORTH_DB_H

#include <sqlite3.h>
#include <stddef.h>
#include <stdint.h>

#include "learn/model.h"

/* One embedded migration (generated from schema/NNN_*.sql by schema/embed.py). */
struct db_migration {
    int version;
    const char *sql;
};
extern const struct db_migration db_migrations[];
extern const int db_n_migrations;

/*
 * Writes the absolute, symlink-free form of path into out (len bytes), also
 * for a file that does not exist yet (its directory must).  Returns 0 or -1.
 */
int db_resolve(const char *path, char *out, size_t len);

/*
 * Takes the daemon's lock on the database (an flock on PATH.lock), so a
 * second worthd on the same file refuses to start.  Returns the lock's fd
 * (keep it open for the process's life) or -1 with a message in err.
 */
int db_lock(const char *path, char *err, size_t errlen);

/*
 * Opens path read-write (creating it), sets WAL, synchronous FULL or NORMAL
 * and a busy timeout, checks that an existing file is a worthd database, and
 * applies pending migrations in one transaction each.  Returns 0 with *out
 * owned by the caller (sqlite3_close), or -1 with err (which names the
 * problem: bad_database for a corrupt or foreign file).
 */
int db_open(const char *path, int sync_full, sqlite3 **out, char *err, size_t errlen);
/*
 * Removes from the database file of db, its -wal and -shm every permission
 * bit that mode (0600 or 0640) does not grant, with a warning for each file
 * changed; never adds one.  At start-up, before the writer starts.
 */
void db_tighten(sqlite3 *db, unsigned mode);
/* Caps the database at max_mb megabytes (PRAGMA max_page_count); 0 leaves it unbounded. */
int db_set_max_mb(sqlite3 *db, uint64_t max_mb);
/*
 * Maps the connection's last error to a worth code: storage_full (disk or
 * quota full), bad_database (corrupt, or not a database), else storage_error.
 */
int db_error_code(sqlite3 *db);
/* Opens path read-only (for replays on a learner thread). */
int db_open_ro(const char *path, sqlite3 **out, char *err, size_t errlen);

/* Seconds since 1970, UTC, as stored in created_at and at. */
double db_now(void);

/* Asked during a long replay whether to give it up (worthd is stopping); nonzero: yes. */
typedef int (*db_abandon_fn)(void *ctx);
/* Transitions a replay learns between two calls of its abandon function. */
#define DB_ABANDON_EVERY 64

/* Plain data: where a model's replay starts. */
typedef struct db_start_t {
    int64_t checkpoint; /* id of the checkpoint restored, 0 for none */
    uint64_t seq;       /* the last transition that state has learnt */
    uint64_t training;  /* the last training (ordinal) it includes */
    double plant_t;     /* the plant's t of the last transition it learnt, NAN when unknown;
                           db_replay advances it */
} db_start_t;

/*
 * Restores m from the newest valid checkpoint of model_id whose state loads
 * (a checkpoint that fails its checksum or does not fit is skipped with a
 * warning), filling *start; with none, m is reset and *start zeroed.
 * Returns 0, or -1 with err on a database error.
 */
int db_restore_newest(sqlite3 *db, int64_t model_id, const char *name, struct model *m,
                      db_start_t *start, char *err, size_t errlen);

/*
 * Replays into m the log of model_id after *from (transitions with seq in
 * (from->seq, upto], trainings with ordinal > from->training and after_seq <=
 * upto), skipping rolled-back rows, in the order they were first learnt.
 * Fills *replayed (transitions learnt) and *last_training, and sets
 * from->plant_t to the t of the last transition replayed that has one (left
 * as it was when none has).  Returns 0, or with err:
 * - WORTH_E_DAMAGED: a row of the model's own is damaged (a column of the
 *   wrong type, a vector of the wrong length, terminal not 0 or 1, a value
 *   model_check refuses, a training naming no estimator or with passes out of
 *   range); *bad_seq (may be NULL) gets the seq of the offending transition,
 *   0 when it is a training.  m then holds what was learnt before it.
 * - WORTH_E_BAD_DATABASE: SQLite found the pages holding the model's rows
 *   corrupt (SQLITE_CORRUPT while stepping over them): the model's own damage
 *   if other models can be read, the file's if none can (the caller judges).
 * - another code of db_error_code (storage_error, storage_full): the database
 *   could not be read, a failure of the whole database.
 * - WORTH_E_CANCELLED: abandon (may be NULL; called with actx every
 *   DB_ABANDON_EVERY transitions) returned nonzero: worthd is stopping.  m
 *   then holds part of the replay and must not be served or checkpointed.
 */
int db_replay(sqlite3 *db, int64_t model_id, struct model *m, db_start_t *from, uint64_t upto,
              uint64_t *replayed, uint64_t *last_training, uint64_t *bad_seq, db_abandon_fn abandon,
              void *actx, char *err, size_t errlen);

#endif /* WORTH_DB_H */
