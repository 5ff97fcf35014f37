/*
 * fileguard.h - is the database file worthd opened still the one at its path,
 * and may worthd still write it?
 *
 * SQLite writes through the file descriptors it opened.  If the database file
 * (or its -wal) is removed or replaced while worthd runs, every later commit
 * "succeeds" into a file that no longer has a name and vanishes when worthd
 * exits; if the file is made read-only, the open descriptor still writes.
 * The writer asks this module before it writes (and after each commit) and
 * refuses, or rescues, accordingly.  Plain POSIX: stat and faccessat only.
 */
#ifndef WORTH_FILEGUARD_H
#define WORTH_FILEGUARD_H

#include <limits.h>
#include <stddef.h>
#include <sys/types.h>

/* Verdicts of fileguard_check. */
enum fileguard_state {
    FILEGUARD_OK = 0,       /* same file, writable */
    FILEGUARD_REMOVED = 1,  /* the path names no file, or the -wal is gone while the file is ours */
    FILEGUARD_REPLACED = 2, /* another file is at the path */
    FILEGUARD_READONLY = 3, /* the file at the path is ours, but worthd may not write it */
};

/* What fileguard_check looks at (bits). */
enum fileguard_what {
    FILEGUARD_NAME = 1,  /* the path (and -wal) still name the files opened: two stats */
    FILEGUARD_WRITE = 2, /* worthd may write the file at the path: one faccessat */
    FILEGUARD_ALL = 3,
};

/* Plain data: the identities recorded when the database was opened. */
typedef struct fileguard_t {
    char path[PATH_MAX];
    char wal[PATH_MAX + 8];
    dev_t dev, wal_dev;
    ino_t ino, wal_ino;
    int have_wal; /* the -wal existed at the last check (SQLite creates it lazily) */
} fileguard_t;

/*
 * Records the identity of path (the database file SQLite has open, as
 * sqlite3_db_filename gives it) and of path-wal when it exists.  Returns 0,
 * or -1 with errno when path cannot be stat'ed.
 */
int fileguard_init(fileguard_t *g, const char *path);

/*
 * With FILEGUARD_NAME, compares the path's file (and -wal) with the recorded
 * identities; with FILEGUARD_WRITE, checks that worthd's effective user may
 * write the file at the path (faccessat W_OK, which also sees a read-only
 * mount).  Returns a fileguard_state; for anything but FILEGUARD_OK, why (len
 * bytes, borrowed) says what was found.
 */
int fileguard_check(fileguard_t *g, int what, char *why, size_t len);

#endif /* WORTH_FILEGUARD_H */
