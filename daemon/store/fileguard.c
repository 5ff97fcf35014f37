/*
 * fileguard.c - watches the database file's name and mode for the writer.
 *
 * Runs on the writer thread only (and on the main thread before the writer
 * starts).  It owns nothing but the identities in its fileguard_t and never
 * opens the files it watches: at most two stats and a faccessat per check,
 * so the writer can afford one before and one after every commit group.  It
 * must never decide what to do about a change; the writer does (writer.c,
 * "the database file's health").
 *
 * XXX: a change between the check that follows a COMMIT and the next check is
 * seen at that next check; no commit is acknowledged in between.
 */
#include "store/fileguard.h"

#include <errno.h>
#include <fcntl.h>
#include <stdio.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

int fileguard_init(fileguard_t *g, const char *path)
{
    memset(g, 0, sizeof *g);
    if ((size_t)snprintf(g->path, sizeof g->path, "%s", path) >= sizeof g->path ||
        (size_t)snprintf(g->wal, sizeof g->wal, "%s-wal", path) >= sizeof g->wal) {
        errno = ENAMETOOLONG;
        return -1;
    }
    struct stat st;
    if (stat(g->path, &st) != 0)
        return -1;
    g->dev = st.st_dev;
    g->ino = st.st_ino;
    if (stat(g->wal, &st) == 0) {
        g->wal_dev = st.st_dev;
        g->wal_ino = st.st_ino;
        g->have_wal = 1;
    }
    return 0;
}

int fileguard_check(fileguard_t *g, int what, char *why, size_t len)
{
    struct stat st;
    if (!(what & FILEGUARD_NAME))
        goto access;
    if (stat(g->path, &st) != 0) {
        int e = errno;
        snprintf(why, len, "the database file %s is gone (%s)", g->path, strerror(e));
        /* ENOENT: removed.  Anything else (EACCES on a directory made unreadable, EIO) means
         * we cannot tell which file is there: refuse to write, but do not write a copy. */
        return e == ENOENT ? FILEGUARD_REMOVED : FILEGUARD_REPLACED;
    }
    if (st.st_dev != g->dev || st.st_ino != g->ino) {
        snprintf(why, len, "the database file %s was replaced by another file", g->path);
        return FILEGUARD_REPLACED;
    }
    if (stat(g->wal, &st) == 0) {
        if (!g->have_wal) {
            g->wal_dev = st.st_dev;
            g->wal_ino = st.st_ino;
            g->have_wal = 1;
        } else if (st.st_dev != g->wal_dev || st.st_ino != g->wal_ino) {
            snprintf(why, len, "the write-ahead log %s was replaced by another file", g->wal);
            return FILEGUARD_REMOVED;
        }
    } else if (g->have_wal) {
        snprintf(why, len, "the write-ahead log %s was removed", g->wal);
        return FILEGUARD_REMOVED;
    }
access:
    if ((what & FILEGUARD_WRITE) && faccessat(AT_FDCWD, g->path, W_OK, AT_EACCESS) != 0) {
        int e = errno;
        if (e == ENOENT) { /* seen without FILEGUARD_NAME: a removal all the same */
            snprintf(why, len, "the database file %s is gone (%s)", g->path, strerror(e));
            return FILEGUARD_REMOVED;
        }
        snprintf(why, len, "the database file %s is not writable (%s)", g->path, strerror(e));
        return FILEGUARD_READONLY;
    }
    return FILEGUARD_OK;
}
