/*
 * db.c - opening worthd's database, migrating it, and reading it back.
 *
 * Runs on the main thread at start-up (open, migrate, recover) and on a
 * learner thread during a rollback (replay, on its own read-only connection).
 * It never writes outside a migration: every other write belongs to the
 * writer thread (writer.c).
 *
 * Invariants.
 * 1. A migration is applied with its user_version bump in one transaction:
 *    a crash leaves the schema at the old version or the new, never between.
 * 2. Replay learns rows in exactly the order the live daemon learnt them:
 *    transitions by seq, each training right after the transition it followed,
 *    so a replay rebuilds the same weights bit for bit.
 * 3. No column of a stored row is used before its type is checked: a damaged
 *    row is reported (WORTH_E_DAMAGED, naming its seq), never learnt, and no
 *    NULL blob or text pointer is dereferenced.
 */
#include "store/db.h"

#include <errno.h>
#include <fcntl.h>
#include <limits.h>
#include <stdlib.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <string.h>
#include <sys/file.h>
#include <sys/stat.h>
#include <time.h>
#include <unistd.h>

#include "common/fail.h"
#include "common/mem.h"
#include "common/say.h"
#include "store/logsql.h"
#include "worth/errors.h"

double db_now(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

int db_resolve(const char *path, char *out, size_t len)
{
    char buf[PATH_MAX];
    if (realpath(path, buf)) {
        if ((size_t)snprintf(out, len, "%s", buf) >= len)
            return -1;
        return 0;
    }
    /* Not there yet: resolve its directory. */
    char dir[PATH_MAX];
    if ((size_t)snprintf(dir, sizeof dir, "%s", path) >= sizeof dir)
        return -1;
    char *slash = strrchr(dir, '/');
    const char *base = slash ? slash + 1 : path;
    if (slash == dir)
        dir[1] = 0;
    else if (slash)
        *slash = 0;
    else
        snprintf(dir, sizeof dir, ".");
    if (!realpath(dir, buf))
        return -1;
    if ((size_t)snprintf(out, len, "%s/%s", strcmp(buf, "/") ? buf : "", base) >= len)
        return -1;
    return 0;
}

int db_lock(const char *path, char *err, size_t errlen)
{
    char lock[PATH_MAX + 8], real[PATH_MAX];
    /* Lock the resolved name, so a symlink to the same file finds the same lock. */
    if (db_resolve(path, real, sizeof real) != 0 ||
        (size_t)snprintf(lock, sizeof lock, "%s.lock", real) >= sizeof lock)
        return err_fail(err, errlen, -1, "cannot resolve the database path %s: %s", path,
                        strerror(errno));
    int fd = open(lock, O_RDWR | O_CREAT | O_CLOEXEC, 0600);
    if (fd < 0)
        return err_fail(err, errlen, -1, "cannot open %s: %s", lock, strerror(errno));
    if (flock(fd, LOCK_EX | LOCK_NB) != 0) {
        int e = errno;
        close(fd);
        if (e == EWOULDBLOCK)
            return err_fail(err, errlen, -1, "another worthd is using %s (%s is locked)", path,
                            lock);
        return err_fail(err, errlen, -1, "cannot lock %s: %s", lock, strerror(e));
    }
    return fd;
}

static int exec(sqlite3 *db, const char *sql, char *err, size_t errlen)
{
    char *msg = NULL;
    if (sqlite3_exec(db, sql, NULL, NULL, &msg) != SQLITE_OK) {
        err_fail(err, errlen, -1, "%s", msg ? msg : sqlite3_errmsg(db));
        sqlite3_free(msg);
        return -1;
    }
    return 0;
}

static int user_version(sqlite3 *db)
{
    sqlite3_stmt *st = NULL;
    int v = -1;
    if (sqlite3_prepare_v2(db, "PRAGMA user_version", -1, &st, NULL) == SQLITE_OK &&
        sqlite3_step(st) == SQLITE_ROW)
        v = sqlite3_column_int(st, 0);
    sqlite3_finalize(st);
    return v;
}

static int migrate(sqlite3 *db, const char *path, char *err, size_t errlen)
{
    int have = user_version(db);
    if (have < 0)
        return err_fail(err, errlen, -1, "cannot read the schema version of %s", path);
    int newest = db_migrations[db_n_migrations - 1].version;
    if (have > newest)
        return err_fail(
            err, errlen, -1,
            "%s has schema version %d; this worthd knows up to %d (a newer worthd wrote it)", path,
            have, newest);
    for (int i = 0; i < db_n_migrations; i++) {
        const struct db_migration *mg = &db_migrations[i];
        if (mg->version <= have)
            continue;
        char bump[64];
        snprintf(bump, sizeof bump, "PRAGMA user_version = %d;", mg->version);
        if (exec(db, "BEGIN IMMEDIATE", err, errlen) || exec(db, mg->sql, err, errlen) ||
            exec(db, bump, err, errlen) || exec(db, "COMMIT", err, errlen)) {
            sqlite3_exec(db, "ROLLBACK", NULL, NULL, NULL);
            return err_fail(err, errlen, -1, "migration %d failed: %s", mg->version, err);
        }
        say_info("database %s: applied schema migration %d", path, mg->version);
    }
    return 0;
}

int db_error_code(sqlite3 *db)
{
    switch (sqlite3_extended_errcode(db) & 0xff) {
    case SQLITE_FULL:
        return WORTH_E_STORAGE_FULL;
    case SQLITE_CORRUPT:
    case SQLITE_NOTADB:
        return WORTH_E_BAD_DATABASE;
    default:
        return WORTH_E_STORAGE_ERROR;
    }
}

void db_tighten(sqlite3 *db, unsigned mode)
{
    static const char *const suffix[] = {"", "-wal", "-shm"};
    const char *main_file = sqlite3_db_filename(db, "main");
    if (!main_file || !*main_file)
        return;
    for (size_t i = 0; i < sizeof suffix / sizeof suffix[0]; i++) {
        char path[PATH_MAX + 8];
        struct stat st;
        snprintf(path, sizeof path, "%s%s", main_file, suffix[i]);
        /* SQLite names the resolved file: a symbolic link here is not one of its files. */
        if (lstat(path, &st) != 0 || !S_ISREG(st.st_mode))
            continue;
        unsigned had = (unsigned)st.st_mode & 07777;
        if (!(had & ~mode))
            continue;
        if (chmod(path, had & mode) == 0)
            say_warn("%s had mode %04o, readable or writable beyond --file-mode %04o; now %04o",
                     path, had, mode, had & mode);
        else
            say_warn("%s has mode %04o, looser than --file-mode %04o, and cannot be changed: %s",
                     path, had, mode, strerror(errno));
    }
}

int db_set_max_mb(sqlite3 *db, uint64_t max_mb)
{
    if (max_mb == 0)
        return 0;
    sqlite3_stmt *st = NULL;
    int64_t page = 4096;
    if (sqlite3_prepare_v2(db, "PRAGMA page_size", -1, &st, NULL) == SQLITE_OK &&
        sqlite3_step(st) == SQLITE_ROW)
        page = sqlite3_column_int64(st, 0);
    sqlite3_finalize(st);
    char sql[96];
    snprintf(sql, sizeof sql, "PRAGMA max_page_count = %llu",
             (unsigned long long)(max_mb * 1048576u / (uint64_t)page));
    return sqlite3_exec(db, sql, NULL, NULL, NULL) == SQLITE_OK ? 0 : -1;
}

/* A file that has tables but not worthd's is someone else's database: refuse it. */
static int foreign(sqlite3 *db)
{
    sqlite3_stmt *st = NULL;
    int tables = 0, ours = 0;
    if (sqlite3_prepare_v2(db, "SELECT name FROM sqlite_master WHERE type = 'table'", -1, &st,
                           NULL) != SQLITE_OK)
        return 1;
    while (sqlite3_step(st) == SQLITE_ROW) {
        tables++;
        ours += strcmp((const char *)sqlite3_column_text(st, 0), "transitions") == 0;
    }
    sqlite3_finalize(st);
    return tables > 0 && (!ours || user_version(db) < 1);
}

int db_open(const char *path, int sync_full, sqlite3 **out, char *err, size_t errlen)
{
    sqlite3 *db = NULL;
    int rc = sqlite3_open_v2(
        path, &db, SQLITE_OPEN_READWRITE | SQLITE_OPEN_CREATE | SQLITE_OPEN_NOMUTEX, NULL);
    if (rc != SQLITE_OK) {
        err_fail(err, errlen, -1, "cannot open %s: %s", path,
                 db ? sqlite3_errmsg(db) : "no memory");
        sqlite3_close(db);
        return -1;
    }
    sqlite3_busy_timeout(db, 5000);
    /* Read the schema first: a corrupt or foreign file fails here, before we touch it. */
    if (sqlite3_exec(db, "SELECT count(*) FROM sqlite_master", NULL, NULL, NULL) != SQLITE_OK ||
        foreign(db)) {
        err_fail(err, errlen, -1, "bad_database: %s is %s", path,
                 sqlite3_errcode(db) == SQLITE_OK ? "another program's database, not worthd's"
                                                  : "not a readable SQLite database");
        sqlite3_close(db);
        return -1;
    }
    /* A newer worthd's file is refused before anything is written to it (even the WAL switch). */
    int have = user_version(db), newest = db_migrations[db_n_migrations - 1].version;
    if (have > newest) {
        err_fail(err, errlen, -1,
                 "bad_database: %s has schema version %d; this worthd knows up to %d (a newer "
                 "worthd wrote it)",
                 path, have, newest);
        sqlite3_close(db);
        return -1;
    }
    if (exec(db, "PRAGMA journal_mode = WAL", err, errlen) ||
        exec(db, sync_full ? "PRAGMA synchronous = FULL" : "PRAGMA synchronous = NORMAL", err,
             errlen) ||
        migrate(db, path, err, errlen)) {
        sqlite3_close(db);
        return -1;
    }
    *out = db;
    return 0;
}

int db_open_ro(const char *path, sqlite3 **out, char *err, size_t errlen)
{
    sqlite3 *db = NULL;
    if (sqlite3_open_v2(path, &db, SQLITE_OPEN_READONLY | SQLITE_OPEN_NOMUTEX, NULL) != SQLITE_OK) {
        err_fail(err, errlen, -1, "cannot open %s: %s", path,
                 db ? sqlite3_errmsg(db) : "no memory");
        sqlite3_close(db);
        return -1;
    }
    sqlite3_busy_timeout(db, 5000);
    *out = db;
    return 0;
}

int db_restore_newest(sqlite3 *db, int64_t model_id, const char *name, struct model *m,
                      db_start_t *start, char *err, size_t errlen)
{
    memset(start, 0, sizeof *start);
    start->plant_t = NAN;
    sqlite3_stmt *st = NULL;
    if (sqlite3_prepare_v2(db,
                           "SELECT id, seq, training, state, plant_t FROM checkpoints"
                           " WHERE model = ?1 AND invalid = 0 ORDER BY seq DESC, id DESC",
                           -1, &st, NULL) != SQLITE_OK)
        return err_fail(err, errlen, -1, "%s", sqlite3_errmsg(db));
    sqlite3_bind_int64(st, 1, model_id);
    int rc;
    while ((rc = sqlite3_step(st)) == SQLITE_ROW) {
        int64_t id = sqlite3_column_int64(st, 0);
        /* Types first: a damaged row (seq NULL, state TEXT) is skipped like a bad checksum. */
        int typed = sqlite3_column_type(st, 1) == SQLITE_INTEGER &&
                    sqlite3_column_type(st, 2) == SQLITE_INTEGER &&
                    sqlite3_column_type(st, 3) == SQLITE_BLOB;
        const void *blob = typed ? sqlite3_column_blob(st, 3) : NULL;
        int len = typed ? sqlite3_column_bytes(st, 3) : 0;
        char why[256] = "a column of the wrong type";
        if (blob && model_load(m, blob, (size_t)len, why, sizeof why) == 0) {
            start->checkpoint = id;
            start->seq = (uint64_t)sqlite3_column_int64(st, 1);
            start->training = (uint64_t)sqlite3_column_int64(st, 2);
            if (sqlite3_column_type(st, 4) != SQLITE_NULL)
                start->plant_t = sqlite3_column_double(st, 4);
            break;
        }
        say_warn("model %s: checkpoint %lld cannot be restored (%s); trying an older one", name,
                 (long long)id, blob || !typed ? why : "empty state");
    }
    sqlite3_finalize(st);
    if (rc != SQLITE_ROW && rc != SQLITE_DONE)
        return err_fail(err, errlen, -1, "%s", sqlite3_errmsg(db));
    if (start->checkpoint == 0)
        model_reset(m);
    return 0;
}

/* The most passes one logged training may ask for: the protocol's limit on train. */
#define DB_MAX_PASSES 100000

/* What column col of st holds, for a message: "NULL", "TEXT", "a BLOB of 12 bytes", ... */
static const char *col_kind(sqlite3_stmt *st, int col, char *buf, size_t len)
{
    switch (sqlite3_column_type(st, col)) {
    case SQLITE_NULL:
        return "NULL";
    case SQLITE_INTEGER:
        snprintf(buf, len, "the integer %lld", (long long)sqlite3_column_int64(st, col));
        return buf;
    case SQLITE_FLOAT:
        return "a real";
    case SQLITE_TEXT:
        return "TEXT";
    default:
        snprintf(buf, len, "a BLOB of %d bytes", sqlite3_column_bytes(st, col));
        return buf;
    }
}

/*
 * Runs the logged training at tr (ordinal, after_seq, estimator, passes) on m, after checking
 * its columns.  Returns 0, or -1 with why when the row is damaged (nothing is run).
 */
static int run_training(struct model *m, sqlite3_stmt *tr, char *why, size_t len)
{
    char k[48];
    long long ord = sqlite3_column_int64(tr, 0);
    if (sqlite3_column_type(tr, 0) != SQLITE_INTEGER ||
        sqlite3_column_type(tr, 1) != SQLITE_INTEGER)
        return err_fail(why, len, -1, "a training's ordinal or after_seq is not an integer");
    if (sqlite3_column_type(tr, 2) != SQLITE_TEXT || !sqlite3_column_text(tr, 2))
        return err_fail(why, len, -1, "training %lld: estimator is %s, not text", ord,
                        col_kind(tr, 2, k, sizeof k));
    const char *est = (const char *)sqlite3_column_text(tr, 2);
    int i = model_est_find(m, est);
    if (i < 0)
        return err_fail(why, len, -1, "training %lld names no estimator of the model (\"%.64s\")",
                        ord, est);
    if (sqlite3_column_type(tr, 3) != SQLITE_INTEGER || sqlite3_column_int64(tr, 3) < 1 ||
        sqlite3_column_int64(tr, 3) > DB_MAX_PASSES)
        return err_fail(why, len, -1, "training %lld: passes is %s, not 1..%d", ord,
                        col_kind(tr, 3, k, sizeof k), DB_MAX_PASSES);
    est_train_t rep;
    /* A training cut short (worthd stopping, a rollback, 002_health.sql) runs exactly the
     * mini-batch steps it took then: the same bits as then. */
    est_train_opts_t o = {.passes = (unsigned)sqlite3_column_int(tr, 3)};
    if (sqlite3_column_type(tr, 4) != SQLITE_NULL) {
        if (sqlite3_column_type(tr, 4) != SQLITE_INTEGER || sqlite3_column_int64(tr, 4) < 0)
            return err_fail(why, len, -1, "training %lld: steps is %s, not a count", ord,
                            col_kind(tr, 4, k, sizeof k));
        o.max_steps = (uint64_t)sqlite3_column_int64(tr, 4);
        if (o.max_steps == 0)
            return 0; /* cut before its first step: it changed nothing */
    }
    model_train(m, (size_t)i, &o, &rep);
    return 0;
}

/*
 * A failed step over the model's rows: SQLITE_CORRUPT there is bad_database (its pages are
 * damaged; whether only its own, the caller judges), anything else the database's code.
 */
static int step_failed(sqlite3 *db, uint64_t after, char *err, size_t errlen)
{
    if ((sqlite3_extended_errcode(db) & 0xff) == SQLITE_CORRUPT)
        return err_fail(err, errlen, WORTH_E_BAD_DATABASE,
                        "the database is corrupt where it holds the model's log after seq %llu: %s",
                        (unsigned long long)after, sqlite3_errmsg(db));
    return err_fail(err, errlen, db_error_code(db), "%s", sqlite3_errmsg(db));
}

int db_replay(sqlite3 *db, int64_t model_id, struct model *m, db_start_t *from, uint64_t upto,
              uint64_t *replayed, uint64_t *last_training, uint64_t *bad_seq, db_abandon_fn abandon,
              void *actx, char *err, size_t errlen)
{
    sqlite3_stmt *tr = NULL;
    struct logit *it = NULL;
    struct model_replay *rp = NULL;
    int code = 0;
    uint64_t seq = from->seq, unused;
    char why[256];
    if (!bad_seq)
        bad_seq = &unused;
    *bad_seq = 0;
    *replayed = 0;
    *last_training = from->training;
    /* upto beyond INT64_MAX reads as "everything" */
    sqlite3_int64 hi = upto > (uint64_t)INT64_MAX ? INT64_MAX : (sqlite3_int64)upto;

    if (sqlite3_prepare_v2(db,
                           "SELECT ordinal, after_seq, estimator, passes, steps FROM trainings"
                           " WHERE model = ?1 AND ordinal > ?2 AND after_seq <= ?3"
                           " AND rolled_back = 0 ORDER BY ordinal",
                           -1, &tr, NULL) != SQLITE_OK ||
        logit_open(db, model_id, model_dims(m), from->seq, (uint64_t)hi, &it) != 0) {
        code = err_fail(err, errlen, db_error_code(db), "%s", sqlite3_errmsg(db));
        goto out;
    }
    sqlite3_bind_int64(tr, 1, model_id);
    sqlite3_bind_int64(tr, 2, (sqlite3_int64)from->training);
    sqlite3_bind_int64(tr, 3, hi);

    /*
     * The estimators learn on worker threads while this thread reads the log
     * and evaluates features (model_replay: same bits as model_observe).  A
     * training must see every transition before it, so the replay is ended
     * before one and begun again after.
     */
    rp = model_replay_new(m, 0, 0);
    int trc = sqlite3_step(tr), xrc;
    logit_row_t row;
    while ((xrc = logit_next(it, &row, bad_seq, why, sizeof why)) == 1) {
        if (row.rolled_back)
            continue;
        seq = row.seq;
        if (abandon && *replayed % DB_ABANDON_EVERY == DB_ABANDON_EVERY - 1 && abandon(actx)) {
            code = err_fail(err, errlen, WORTH_E_CANCELLED,
                            "replay given up at seq %llu: worthd is stopping",
                            (unsigned long long)seq);
            goto out;
        }
        /* Trainings that ran before this transition was learnt. */
        while (trc == SQLITE_ROW && (uint64_t)sqlite3_column_int64(tr, 1) < seq) {
            if (rp) {
                model_replay_end(rp);
                rp = NULL;
            }
            if (run_training(m, tr, why, sizeof why) != 0) {
                code = err_fail(err, errlen, WORTH_E_DAMAGED, "%s", why);
                goto out;
            }
            *last_training = (uint64_t)sqlite3_column_int64(tr, 0);
            trc = sqlite3_step(tr);
        }
        if (!rp)
            rp = model_replay_new(m, 0, 0);
        if (model_replay_push(rp, &row.o, why, sizeof why) != 0) {
            *bad_seq = seq;
            code = err_fail(err, errlen, WORTH_E_DAMAGED, "transition %llu is damaged: %s",
                            (unsigned long long)seq, why);
            goto out;
        }
        (*replayed)++;
        if (!isnan(row.t))
            from->plant_t = row.t;
    }
    if (xrc == -1) {
        code = err_fail(err, errlen, WORTH_E_DAMAGED, "transition %llu is damaged: %s",
                        (unsigned long long)*bad_seq, why);
        goto out;
    }
    if (xrc != 0) {
        code = step_failed(db, seq, err, errlen);
        goto out;
    }
    model_replay_end(rp);
    rp = NULL;
    while (trc == SQLITE_ROW) {
        if (run_training(m, tr, why, sizeof why) != 0) {
            code = err_fail(err, errlen, WORTH_E_DAMAGED, "%s", why);
            goto out;
        }
        *last_training = (uint64_t)sqlite3_column_int64(tr, 0);
        trc = sqlite3_step(tr);
    }
    if (trc != SQLITE_DONE)
        code = step_failed(db, seq, err, errlen);
out:
    model_replay_end(rp); /* learns what was pushed before a failure */
    sqlite3_finalize(tr);
    logit_close(it);
    return code;
}
