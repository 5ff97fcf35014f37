/*
 * rescue.c - the database file's health: is the file at --db still the one
 * the connection writes, and may worthd write it (writer thread).
 *
 * Nothing is written, and no commit acknowledged, while the file at the
 * database's path is not the one the connection writes (removed or replaced:
 * the commit would vanish with worthd) or worthd may not write it (made
 * read-only).  A removed file is first written back to its path from the
 * open connection, which is then reopened there; a replaced one is never
 * overwritten.  Each change of state is logged once, loudly.
 */

#include <errno.h>
#include <fcntl.h>
#include <math.h>
#include <pthread.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "common/jw.h"
#include "common/mem.h"
#include "core/event.h"
#include "core/queue.h"
#include "common/say.h"
#include "store/backup.h"
#include "store/db.h"
#include "store/fileguard.h"
#include "store/wr.h"
#include "worth/errors.h"

/* ---- the database file's health ---------------------------------------------------------- */

/* snprintf for messages that may be cut short (paths are long; messages end up in replies). */
static void rescue_msgf(char *buf, size_t len, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));
static void rescue_msgf(char *buf, size_t len, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(buf, len, fmt, ap);
    va_end(ap);
}

static int64_t rescue_pragma_int(sqlite3 *db, const char *sql)
{
    sqlite3_stmt *st = NULL;
    int64_t v = -1;
    if (sqlite3_prepare_v2(db, sql, -1, &st, NULL) == SQLITE_OK && sqlite3_step(st) == SQLITE_ROW)
        v = sqlite3_column_int64(st, 0);
    sqlite3_finalize(st);
    return v;
}

static int rescue_sync_path(const char *path, int dir);

/* fsyncs path (a file or a directory); returns 0 or -1 with errno. */
static int rescue_sync_path(const char *path, int dir)
{
    int fd = open(path, (dir ? O_RDONLY | O_DIRECTORY : O_RDWR) | O_CLOEXEC);
    if (fd < 0)
        return -1;
    int rc = fsync(fd);
    close(fd);
    return rc;
}

/* Writes the directory that holds path into dir (len bytes): "." for a bare name. */
static void rescue_dir_of(const char *path, char *dir, size_t len)
{
    snprintf(dir, len, "%s", path);
    char *slash = strrchr(dir, '/');
    if (slash == dir)
        dir[1] = 0;
    else if (slash)
        *slash = 0;
    else
        snprintf(dir, len, ".");
}

/*
 * The database file or its -wal was removed while worthd ran: everything
 * committed lives only in files that have no name any more.  Writes it back:
 * checkpoint the WAL into the main file (truncating the WAL), copy the main
 * file to a temporary name beside the path if the path is empty, close the
 * connection (SQLite then removes the -wal and -shm it named), rename the copy
 * into place, fsync the directory, and open the path again.  Returns 0 with
 * w->db open on the path, or -1 with why: w->db is then the old connection
 * (nothing was closed) or NULL (the data is in the file why names).
 */
static int rescue_write_back(struct writer *w, char *why, size_t len)
{
    char path[PATH_MAX]; /* a copy: fileguard_init below rewrites w->guard */
    snprintf(path, sizeof path, "%s", w->guard.path);
    char tmp[PATH_MAX + 32], dir[PATH_MAX];
    snprintf(tmp, sizeof tmp, "%s.rescue-%ld", path, (long)getpid());
    rescue_dir_of(path, dir, sizeof dir);
    int sync_full = rescue_pragma_int(w->db, "PRAGMA synchronous") >= 2;
    int64_t max_pages = rescue_pragma_int(w->db, "PRAGMA max_page_count");
    int copy = access(path, F_OK) != 0;
    sqlite3_stmt *st = NULL;
    int ok =
        sqlite3_prepare_v2(w->db, "PRAGMA wal_checkpoint(TRUNCATE)", -1, &st, NULL) == SQLITE_OK &&
        sqlite3_step(st) == SQLITE_ROW && sqlite3_column_int(st, 0) == 0;
    sqlite3_finalize(st);
    if (!ok) {
        rescue_msgf(why, len, "cannot checkpoint the log into the open file: %s",
                    sqlite3_errmsg(w->db));
        return -1;
    }
    if (copy) {
        unlink(tmp);
        ok = sqlite3_prepare_v2(w->db, "VACUUM INTO ?", -1, &st, NULL) == SQLITE_OK;
        if (ok) {
            sqlite3_bind_text(st, 1, tmp, -1, SQLITE_STATIC);
            ok = sqlite3_step(st) == SQLITE_DONE;
        }
        if (!ok)
            rescue_msgf(why, len, "cannot copy the open file to %s: %s", tmp,
                        sqlite3_errmsg(w->db));
        sqlite3_finalize(st);
        if (ok && rescue_sync_path(tmp, 0) != 0) {
            rescue_msgf(why, len, "cannot fsync %s: %s", tmp, strerror(errno));
            ok = 0;
        }
        if (!ok) {
            unlink(tmp);
            return -1;
        }
    }
    wr_finalize(w);
    if (sqlite3_close(w->db) != SQLITE_OK) {
        rescue_msgf(why, len, "cannot close the old connection: %s", sqlite3_errmsg(w->db));
        if (wr_prepare(w) != 0)
            CHECK(!"statements that compiled before compile again");
        if (copy)
            unlink(tmp);
        return -1;
    }
    w->db = NULL;
    w->guarded = 0;
    if (copy && (rename(tmp, path) != 0 || rescue_sync_path(dir, 1) != 0)) {
        rescue_msgf(why, len, "cannot move %s to %s (%s); everything acknowledged is in %s", tmp,
                    path, strerror(errno), tmp);
        return -1;
    }
    char err[512];
    if (db_open(path, sync_full, &w->db, err, sizeof err) != 0) {
        w->db = NULL;
        rescue_msgf(why, len, "cannot open %s again: %s", path, err);
        return -1;
    }
    if (max_pages > 0) {
        char sql[80];
        snprintf(sql, sizeof sql, "PRAGMA max_page_count = %lld", (long long)max_pages);
        sqlite3_exec(w->db, sql, NULL, NULL, NULL);
    }
    if (wr_prepare(w) != 0 || fileguard_init(&w->guard, path) != 0) {
        rescue_msgf(why, len, "cannot use %s again: %s", path, sqlite3_errmsg(w->db));
        wr_finalize(w);
        sqlite3_close(w->db);
        w->db = NULL;
        return -1;
    }
    w->guarded = 1;
    return 0;
}

/*
 * Checks the database file (what: fileguard_what bits; always all of them
 * while something is wrong).  Returns a fileguard_state: FILEGUARD_OK (also
 * after a successful rescue: the connection then writes the restored file) or
 * the reason to refuse, with why filled; logs each change of state once,
 * loudly.  A group of log records costs five syscalls: all three checks
 * before it (so a replaced or read-only file is refused before anything is
 * written to it) and the names after its COMMIT (about 15 us in all on the
 * sandboxed test machine, where a syscall costs 1.5-3 us).
 */
int rescue_health(struct writer *w, int what, char *why, size_t len)
{
    if (!w->db) {
        rescue_msgf(why, len, "%s", w->lost_why);
        return FILEGUARD_REPLACED;
    }
    if (!w->guarded)
        return FILEGUARD_OK; /* the file could not be stat'ed at start (never seen) */
    if (w->lost == FILEGUARD_REPLACED) {
        rescue_msgf(why, len, "%s", w->lost_why);
        return FILEGUARD_REPLACED;
    }
    if (w->lost || w->readonly)
        what = FILEGUARD_ALL;
    char found[sizeof w->lost_why];
    int s = fileguard_check(&w->guard, what, found, sizeof found);
    if (s == FILEGUARD_OK || s == FILEGUARD_READONLY) {
        if (s == FILEGUARD_READONLY && !w->readonly)
            say_error("%s: worthd refuses every write (storage_error) until it is writable "
                      "again; queries go on",
                      found);
        else if (s == FILEGUARD_OK && w->readonly)
            say_info("database %s is writable again; writes resume", w->guard.path);
        w->readonly = s == FILEGUARD_READONLY;
        if (s == FILEGUARD_READONLY)
            rescue_msgf(why, len, "%s", found);
        return s;
    }
    if (s == FILEGUARD_REPLACED) {
        say_error("%s while worthd ran: worthd refuses every write (storage_error) until it is "
                  "restarted; what it committed since it started is only in its open file: save "
                  "it with the backup request before stopping worthd",
                  found);
        w->lost = FILEGUARD_REPLACED;
        /* Everything committed into the open main file: if it was moved rather than deleted,
         * the file under its new name is then complete without the -wal left at the path. */
        if (sqlite3_exec(w->db, "PRAGMA wal_checkpoint(TRUNCATE)", NULL, NULL, NULL) != SQLITE_OK)
            say_warn("cannot checkpoint the log into the open file: %s", sqlite3_errmsg(w->db));
        rescue_msgf(w->lost_why, sizeof w->lost_why, "%s; restart worthd", found);
        rescue_msgf(why, len, "%s", w->lost_why);
        return s;
    }
    /* Removed: write it back from the open connection, at most once a second. */
    double now = db_now();
    if (w->lost == FILEGUARD_REMOVED && now < w->next_rescue) {
        rescue_msgf(why, len, "%s", w->lost_why);
        return s;
    }
    if (w->lost != FILEGUARD_REMOVED)
        say_error("%s while worthd ran; writing the database back to %s from the open file", found,
                  w->guard.path);
    char fail[sizeof w->lost_why];
    if (rescue_write_back(w, fail, sizeof fail) == 0) {
        say_warn("database %s written back with everything committed; writes go on", w->guard.path);
        w->lost = 0;
        return FILEGUARD_OK;
    }
    if (w->lost != FILEGUARD_REMOVED || !w->db)
        say_error("database %s could not be written back: %s; worthd refuses every write "
                  "(storage_error)%s",
                  w->guard.path, fail,
                  w->db ? " and tries again each second; save the data with the backup request"
                        : "");
    w->lost = FILEGUARD_REMOVED;
    w->next_rescue = now + 1.0;
    rescue_msgf(w->lost_why, sizeof w->lost_why, "%s; %s", found, fail);
    rescue_msgf(why, len, "%s", w->lost_why);
    return s;
}

/* rescue_health() before a write: returns 0, or storage_error with why. */
int rescue_may_write(struct writer *w, int what, char *why, size_t len)
{
    return rescue_health(w, what, why, len) == FILEGUARD_OK ? 0 : WORTH_E_STORAGE_ERROR;
}
