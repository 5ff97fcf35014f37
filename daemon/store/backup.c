/*
 * backup.c - the backup directory: opening it safely and writing copies into it.
 *
 * A backup holds bytes a client chose (model names, specs, transitions), so a
 * backup written over any path a client names would let every client of
 * worthd replace any file worthd may write.  Copies therefore go only into
 * one directory, fixed at start, held open by descriptor, under plain file
 * names, and never over a file worthd did not write itself.
 *
 * backup_dir_open runs on the main thread before the writer starts (it owns
 * the directory's descriptor from then on); backup_write runs on the writer
 * thread only, with the writer's connection.  It must never follow a symbolic
 * link inside the directory, never replace one of worthd's own files, and
 * never leave a temporary file behind except after a crash (the next start
 * removes it).
 *
 * Invariants.
 * 1. A backup appears under its name only complete and on disk: temporary
 *    name (created O_EXCL|O_NOFOLLOW), VACUUM INTO, fsync, rename, fsync of
 *    the directory.
 * 2. An existing file is replaced only when it is a regular file of worthd's
 *    effective user with one link whose SQLite header carries worthd's
 *    application_id: a backup worthd wrote.  Anything else is left untouched.
 * 3. Never onto the database, its -wal, -shm, -journal or .lock, nor the
 *    socket: by name (resolved directories) and, where the file exists, by
 *    device and inode.
 *
 * XXX: VACUUM INTO opens its output by path (SQLite takes no descriptor).
 * worthd creates that file itself first and checks afterwards that the path
 * still names it, and the directory may be written only by worthd's user or
 * root (safedir.h), so nobody else can swap the name in between.
 */
#include "store/backup.h"

#include <dirent.h>
#include <errno.h>
#include <fcntl.h>
#include <limits.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <sys/syscall.h>
#include <time.h>
#include <unistd.h>

#include "store/db.h"
#include "common/fail.h"
#include "common/mem.h"
#include "common/safedir.h"
#include "common/say.h"
#include "worth/errors.h"

#ifndef RENAME_NOREPLACE
#define RENAME_NOREPLACE (1 << 0) /* linux/fs.h */
#endif

/* Different names worthd tries for its own backups within one second. */
#define AUTO_TRIES 1000

struct backup_dir {
    int fd;              /* the directory, opened at start */
    char path[PATH_MAX]; /* its resolved path, for VACUUM INTO and replies */
    unsigned mode;       /* of every backup */
    unsigned next_tmp;   /* numbers temporary names (writer thread) */
    char *db_path;       /* --db as given, or NULL */
    char *socket_path;   /* the Unix socket, or NULL */
};

/* Suffixes of the files SQLite and worthd keep beside a database. */
static const char *const own_suffix[] = {"", "-wal", "-shm", "-journal", ".lock"};

static int io_code(int e)
{
    return e == ENOSPC || e == EDQUOT ? WORTH_E_STORAGE_FULL : WORTH_E_STORAGE_ERROR;
}

int backup_default_dir(const char *db_path, char *out, size_t len)
{
    const char *sd = getenv("STATE_DIRECTORY");
    size_t n;
    if (sd && *sd && *sd != ':') { /* systemd lists several StateDirectory= with ':' */
        n = strcspn(sd, ":");
        return (size_t)snprintf(out, len, "%.*s/backups", (int)n, sd) < len ? 0 : -1;
    }
    const char *slash = strrchr(db_path, '/');
    if (!slash)
        n = (size_t)snprintf(out, len, "backups");
    else if (slash == db_path)
        n = (size_t)snprintf(out, len, "/backups");
    else
        n = (size_t)snprintf(out, len, "%.*s/backups", (int)(slash - db_path), db_path);
    return n < len ? 0 : -1;
}

int backup_name_check(const char *name, char *why, size_t len)
{
    size_t n = strlen(name);
    if (n == 0 || n > BACKUP_NAME_MAX)
        return err_fail(why, len, -1, "a backup name is 1..%d bytes", BACKUP_NAME_MAX);
    if (name[0] == '.')
        return err_fail(why, len, -1, "a backup name must not start with '.'");
    for (const char *p = name; *p; p++) {
        char c = *p;
        if (!((c >= 'A' && c <= 'Z') || (c >= 'a' && c <= 'z') || (c >= '0' && c <= '9') ||
              c == '.' || c == '_' || c == '-'))
            return err_fail(why, len, -1,
                            "a backup name is a plain file name of [A-Za-z0-9._-] (no '/'): the "
                            "file goes into worthd's --backup-dir");
    }
    return 0;
}

/* Parses a temporary name of worthd's: 1 with the pid that made it, else 0. */
static int tmp_name(const char *name, long *pid)
{
    size_t lp = strlen(BACKUP_TMP_PREFIX);
    if (strncmp(name, BACKUP_TMP_PREFIX, lp) != 0)
        return 0;
    const char *p = name + lp, *q = p;
    long v = 0;
    while (*q >= '0' && *q <= '9' && q - p < 12)
        v = v * 10 + (*q++ - '0');
    if (q == p || *q++ != '-')
        return 0;
    const char *r = q;
    while (*q >= '0' && *q <= '9')
        q++;
    if (q == r)
        return 0;
    /* VACUUM INTO keeps a rollback journal beside its output while it writes. */
    if (strcmp(q, BACKUP_TMP_SUFFIX) != 0 && strcmp(q, BACKUP_TMP_SUFFIX "-journal") != 0)
        return 0;
    *pid = v;
    return 1;
}

/*
 * Removes the temporary files interrupted backups left: regular files of
 * worthd's user with a temporary name, unless the process named in it still
 * runs (another worthd on the same directory may be writing it).  Never
 * touches anything else (a *.rescue-* copy beside a database holds data).
 */
static void sweep(struct backup_dir *bd)
{
    int fd = dup(bd->fd);
    DIR *d = fd >= 0 ? fdopendir(fd) : NULL;
    if (!d) {
        say_warn("cannot list the backup directory %s: %s", bd->path, strerror(errno));
        if (fd >= 0)
            close(fd);
        return;
    }
    for (struct dirent *e; (e = readdir(d)) != NULL;) {
        long pid;
        struct stat st;
        if (!tmp_name(e->d_name, &pid) ||
            fstatat(bd->fd, e->d_name, &st, AT_SYMLINK_NOFOLLOW) != 0 || !S_ISREG(st.st_mode) ||
            st.st_uid != geteuid())
            continue;
        if (pid > 0 && pid != (long)getpid() && (kill((pid_t)pid, 0) == 0 || errno == EPERM)) {
            say_info("left %s/%s alone: process %ld, which may be writing it, runs", bd->path,
                     e->d_name, pid);
            continue;
        }
        if (unlinkat(bd->fd, e->d_name, 0) == 0)
            say_warn("removed %s/%s (%lld bytes), left by an interrupted backup", bd->path,
                     e->d_name, (long long)st.st_size);
        else
            say_warn("cannot remove %s/%s, left by an interrupted backup: %s", bd->path, e->d_name,
                     strerror(errno));
    }
    closedir(d);
}

int backup_dir_open(const char *dir, const char *db_path, const char *socket_path,
                    unsigned file_mode, struct backup_dir **out, char *err, size_t errlen)
{
    char def[PATH_MAX];
    if (!dir) {
        if (backup_default_dir(db_path ? db_path : "./worthd.db", def, sizeof def) != 0)
            return err_fail(err, errlen, -1, "the default backup directory's path is too long");
        dir = def;
    }
    if (!*dir)
        return err_fail(err, errlen, -1, "--backup-dir must name a directory");
    unsigned mode = file_mode ? file_mode : 0600;
    mode_t dmode = (mode & 0040) ? 0750 : 0700;
    struct stat st;
    if (lstat(dir, &st) != 0) {
        if (errno != ENOENT)
            return err_fail(err, errlen, -1, "backup directory %s: %s", dir, strerror(errno));
        if (mkdir(dir, dmode) != 0 && errno != EEXIST)
            return err_fail(err, errlen, -1, "cannot create the backup directory %s: %s%s", dir,
                            strerror(errno), errno == ENOENT ? " (its parent must exist)" : "");
        if (lstat(dir, &st) != 0)
            return err_fail(err, errlen, -1, "backup directory %s: %s", dir, strerror(errno));
        say_info("created the backup directory %s (mode %04o)", dir, (unsigned)dmode);
    }
    if (S_ISLNK(st.st_mode))
        return err_fail(err, errlen, -1,
                        "backup directory %s is a symbolic link; name the directory itself", dir);
    if (!S_ISDIR(st.st_mode))
        return err_fail(err, errlen, -1, "backup directory %s is not a directory", dir);
    if (safedir_check(dir, &st, "backup directory", "a backup", err, errlen) != 0)
        return -1;
    int fd = open(dir, O_RDONLY | O_DIRECTORY | O_NOFOLLOW | O_CLOEXEC);
    struct stat fst;
    if (fd < 0 || fstat(fd, &fst) != 0) {
        err_fail(err, errlen, -1, "cannot open the backup directory %s: %s", dir, strerror(errno));
        goto out_close;
    }
    if (fst.st_dev != st.st_dev || fst.st_ino != st.st_ino) {
        err_fail(err, errlen, -1, "backup directory %s was replaced while worthd opened it", dir);
        goto out_close;
    }
    struct backup_dir *bd = mem_calloc(1, sizeof *bd);
    if (!realpath(dir, bd->path)) {
        err_fail(err, errlen, -1, "cannot resolve the backup directory %s: %s", dir,
                 strerror(errno));
        mem_free(bd);
        goto out_close;
    }
    bd->fd = fd;
    bd->mode = mode;
    bd->db_path = db_path ? mem_strdup(db_path) : NULL;
    bd->socket_path = socket_path ? mem_strdup(socket_path) : NULL;
    sweep(bd);
    say_info("backups go to %s (files mode %04o)", bd->path, mode);
    *out = bd;
    return 0;
out_close:
    if (fd >= 0)
        close(fd);
    return -1;
}

void backup_dir_free(struct backup_dir *bd)
{
    if (!bd)
        return;
    close(bd->fd);
    mem_free(bd->db_path);
    mem_free(bd->socket_path);
    mem_free(bd);
}

const char *backup_dir_path(const struct backup_dir *bd)
{
    return bd->path;
}

/* Writes realpath(dirname(path)) + "/" + basename(path) into out: path's own name, resolved. */
static int name_resolved(const char *path, char *out, size_t len)
{
    char dir[PATH_MAX], real[PATH_MAX];
    const char *slash = strrchr(path, '/'), *base = slash ? slash + 1 : path;
    if (!slash)
        snprintf(dir, sizeof dir, ".");
    else if (slash == path)
        snprintf(dir, sizeof dir, "/");
    else if ((size_t)snprintf(dir, sizeof dir, "%.*s", (int)(slash - path), path) >= sizeof dir)
        return -1;
    if (!realpath(dir, real))
        return -1;
    return (size_t)snprintf(out, len, "%s/%s", strcmp(real, "/") ? real : "", base) < len ? 0 : -1;
}

/*
 * Returns 1 when name in the directory is one of worthd's own files (what
 * says which): by its resolved name, or, when target (the entry's lstat) is
 * given, by device and inode.  Else 0.
 */
static int is_own(const struct backup_dir *bd, sqlite3 *db, const char *name,
                  const struct stat *target, const char **what)
{
    char full[PATH_MAX + BACKUP_NAME_MAX + 2];
    snprintf(full, sizeof full, "%s/%s", bd->path, name);
    const char *files[3] = {bd->db_path, db ? sqlite3_db_filename(db, "main") : NULL,
                            bd->socket_path};
    for (int i = 0; i < 3; i++) {
        if (!files[i] || !*files[i])
            continue;
        char forms[2][PATH_MAX];
        int nf = 0;
        if (name_resolved(files[i], forms[nf], sizeof forms[nf]) == 0)
            nf++;
        if (db_resolve(files[i], forms[nf], sizeof forms[nf]) == 0)
            nf++;
        size_t ns = i == 2 ? 1 : sizeof own_suffix / sizeof own_suffix[0];
        for (int f = 0; f < nf; f++)
            for (size_t k = 0; k < ns; k++) {
                char own[PATH_MAX + 16];
                struct stat st;
                if ((size_t)snprintf(own, sizeof own, "%s%s", forms[f], own_suffix[k]) >=
                    sizeof own)
                    continue;
                if (strcmp(own, full) == 0 ||
                    (target && stat(own, &st) == 0 && st.st_dev == target->st_dev &&
                     st.st_ino == target->st_ino)) {
                    *what = i == 2 ? "socket" : k == 0 ? "database" : own_suffix[k];
                    return 1;
                }
            }
    }
    return 0;
}

/*
 * Looks at the entry name: 0 when there is none; 1 when it is a backup worthd
 * wrote (invariant 2), which may be replaced; -1 otherwise, with why.
 * *found says whether st holds the entry's lstat.
 */
static int existing(const struct backup_dir *bd, const char *name, struct stat *st, int *found,
                    char *why, size_t len)
{
    *found = 0;
    if (fstatat(bd->fd, name, st, AT_SYMLINK_NOFOLLOW) != 0) {
        if (errno == ENOENT)
            return 0;
        return err_fail(why, len, -1, "cannot examine it: %s", strerror(errno));
    }
    *found = 1;
    if (S_ISLNK(st->st_mode))
        return err_fail(why, len, -1, "it is a symbolic link");
    if (!S_ISREG(st->st_mode))
        return err_fail(why, len, -1, "it is not a regular file");
    if (st->st_uid != geteuid())
        return err_fail(why, len, -1, "it belongs to user %u", (unsigned)st->st_uid);
    if (st->st_nlink != 1)
        return err_fail(why, len, -1, "it has %lu links", (unsigned long)st->st_nlink);
    unsigned char h[100];
    ssize_t n = -1;
    struct stat fst;
    int fd = openat(bd->fd, name, O_RDONLY | O_NOFOLLOW | O_NONBLOCK | O_CLOEXEC);
    if (fd >= 0) {
        if (fstat(fd, &fst) == 0 && fst.st_dev == st->st_dev && fst.st_ino == st->st_ino)
            n = pread(fd, h, sizeof h, 0);
        close(fd);
    }
    if (n < 0)
        return err_fail(why, len, -1, "it cannot be read");
    /* The header: "SQLite format 3\0", then application_id at bytes 68..71, big-endian. */
    uint32_t app = n >= 72 ? (uint32_t)h[68] << 24 | (uint32_t)h[69] << 16 | (uint32_t)h[70] << 8 |
                                 (uint32_t)h[71]
                           : 0;
    if (n < 72 || memcmp(h, "SQLite format 3", 16) != 0 || app != BACKUP_APPLICATION_ID)
        return err_fail(why, len, -1, "it is not a worthd database");
    return 1;
}

/* Moves from to to in the directory unless to exists (then -1 with EEXIST). */
static int rename_noreplace(int dfd, const char *from, const char *to)
{
    if (syscall(SYS_renameat2, dfd, from, dfd, to, RENAME_NOREPLACE) == 0)
        return 0;
    if (errno != ENOSYS && errno != EINVAL)
        return -1;
    /* A kernel or file system without RENAME_NOREPLACE: a hard link never replaces either. */
    if (linkat(dfd, from, dfd, to, 0) != 0)
        return -1;
    unlinkat(dfd, from, 0);
    return 0;
}

/* The refusals of a name that exists, or is worthd's own; 0 when it may be (re)placed. */
static int refuse(const struct backup_dir *bd, sqlite3 *db, const char *name, char *why, size_t len)
{
    struct stat st;
    int found;
    char detail[128];
    const char *what;
    int e = existing(bd, name, &st, &found, detail, sizeof detail);
    if (is_own(bd, db, name, found ? &st : NULL, &what))
        return err_fail(why, len, WORTH_E_BAD_PARAM,
                        "backup name %s is worthd's own %s%s; choose another name", name,
                        what[0] == '-' || what[0] == '.' ? "database's " : "", what);
    if (e < 0)
        return err_fail(
            why, len, WORTH_E_BAD_PARAM,
            "%s/%s exists and is not a backup worthd wrote (%s); refusing to replace it", bd->path,
            name, detail);
    return 0;
}

int backup_write(struct backup_dir *bd, sqlite3 *db, const char *name, char *name_out,
                 size_t name_len, uint64_t *bytes, char *why, size_t why_len)
{
    char tmp[96], tmp_path[PATH_MAX + 128], auto_name[64];
    int code;
    if (name) {
        char detail[160];
        if (backup_name_check(name, detail, sizeof detail) != 0)
            return err_fail(why, why_len, WORTH_E_BAD_PARAM, "%s", detail);
        if ((code = refuse(bd, db, name, why, why_len)) != 0)
            return code; /* before the copy: an early answer costs nothing */
    }
    snprintf(tmp, sizeof tmp, BACKUP_TMP_PREFIX "%ld-%u" BACKUP_TMP_SUFFIX, (long)getpid(),
             ++bd->next_tmp);
    snprintf(tmp_path, sizeof tmp_path, "%s/%s", bd->path, tmp);
    int fd =
        openat(bd->fd, tmp, O_RDWR | O_CREAT | O_EXCL | O_NOFOLLOW | O_CLOEXEC, (mode_t)bd->mode);
    if (fd < 0)
        return err_fail(why, why_len, io_code(errno), "cannot create %s: %s", tmp_path,
                        strerror(errno));
    struct stat made, st;
    if (fchmod(fd, (mode_t)bd->mode) != 0 || fstat(fd, &made) != 0) {
        code = err_fail(why, why_len, io_code(errno), "%s: %s", tmp_path, strerror(errno));
        goto out_unlink;
    }
    /* SQLite's VACUUM INTO writes into an existing file as long as it is empty. */
    sqlite3_stmt *vac = NULL;
    int ok = sqlite3_prepare_v2(db, "VACUUM INTO ?", -1, &vac, NULL) == SQLITE_OK;
    if (ok) {
        sqlite3_bind_text(vac, 1, tmp_path, -1, SQLITE_STATIC);
        ok = sqlite3_step(vac) == SQLITE_DONE;
    }
    if (!ok)
        code = err_fail(why, why_len, db_error_code(db), "cannot copy the database: %s",
                        sqlite3_errmsg(db));
    sqlite3_finalize(vac);
    if (!ok)
        goto out_unlink;
    if (fstatat(bd->fd, tmp, &st, AT_SYMLINK_NOFOLLOW) != 0 || st.st_dev != made.st_dev ||
        st.st_ino != made.st_ino) {
        code = err_fail(why, why_len, WORTH_E_STORAGE_ERROR,
                        "%s was replaced while the copy was written", tmp_path);
        goto out_unlink;
    }
    if (fsync(fd) != 0 || fstat(fd, &made) != 0) {
        code = err_fail(why, why_len, io_code(errno), "cannot fsync %s: %s", tmp_path,
                        strerror(errno));
        goto out_unlink;
    }
    if (!name) { /* a new name of worthd's own: never replaces anything */
        time_t now = time(NULL);
        struct tm tm;
        char stamp[32];
        gmtime_r(&now, &tm);
        strftime(stamp, sizeof stamp, "%Y%m%dT%H%M%SZ", &tm);
        const char *what;
        int placed = 0;
        for (unsigned k = 1; k <= AUTO_TRIES && !placed; k++) {
            if (k == 1)
                snprintf(auto_name, sizeof auto_name, "worthd-%s.db", stamp);
            else
                snprintf(auto_name, sizeof auto_name, "worthd-%s-%u.db", stamp, k);
            if (is_own(bd, db, auto_name, NULL, &what))
                continue;
            if (rename_noreplace(bd->fd, tmp, auto_name) == 0)
                placed = 1;
            else if (errno != EEXIST)
                break;
        }
        if (!placed) {
            code = err_fail(why, why_len, io_code(errno), "cannot name the backup in %s: %s",
                            bd->path, errno == EEXIST ? "every name is taken" : strerror(errno));
            goto out_unlink;
        }
        name = auto_name;
    } else if (rename_noreplace(bd->fd, tmp, name) != 0) {
        if (errno != EEXIST) {
            code = err_fail(why, why_len, io_code(errno), "cannot move %s to %s/%s: %s", tmp_path,
                            bd->path, name, strerror(errno));
            goto out_unlink;
        }
        /* It exists: replace it only if it is an earlier backup of worthd's. */
        if ((code = refuse(bd, db, name, why, why_len)) != 0)
            goto out_unlink;
        if (renameat(bd->fd, tmp, bd->fd, name) != 0) {
            code = err_fail(why, why_len, io_code(errno), "cannot move %s to %s/%s: %s", tmp_path,
                            bd->path, name, strerror(errno));
            goto out_unlink;
        }
    }
    close(fd);
    if (fsync(bd->fd) != 0)
        return err_fail(why, why_len, io_code(errno),
                        "%s/%s is written, but the directory cannot be fsynced: %s", bd->path, name,
                        strerror(errno));
    snprintf(name_out, name_len, "%s", name);
    *bytes = (uint64_t)made.st_size;
    return 0;
out_unlink:
    unlinkat(bd->fd, tmp, 0);
    snprintf(tmp_path, sizeof tmp_path, "%s-journal", tmp);
    unlinkat(bd->fd, tmp_path, 0);
    close(fd);
    return code;
}
