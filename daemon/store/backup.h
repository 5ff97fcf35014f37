/*
 * backup.h - the backup directory and the copies worthd writes into it.
 *
 * A backup request names a file, never a path: every copy goes into one
 * directory chosen by the operator at start (--backup-dir), which worthd
 * checks, creates when missing, clears of temporary files an interrupted
 * backup left, and holds open.  Opened on the main thread before the writer
 * starts; backups are written on the writer thread only.
 */
#ifndef WORTH_BACKUP_H
#define WORTH_BACKUP_H

#include <sqlite3.h>
#include <stddef.h>
#include <stdint.h>

struct backup_dir;

/* Longest backup name, in bytes. */
#define BACKUP_NAME_MAX 128
/* PRAGMA application_id of every worthd database ("WRTH"; schema/002_health.sql). */
#define BACKUP_APPLICATION_ID 1465013320u
/* Temporary files are named BACKUP_TMP_PREFIX "<pid>-<n>" BACKUP_TMP_SUFFIX. */
#define BACKUP_TMP_PREFIX ".worthd-backup-"
#define BACKUP_TMP_SUFFIX ".tmp"

/*
 * Writes the default backup directory into out (len bytes): the first entry
 * of $STATE_DIRECTORY (systemd) followed by "/backups" when that is set and
 * not empty, else "backups" in the directory of db_path.  Returns 0, or -1
 * when it does not fit.
 */
int backup_default_dir(const char *db_path, char *out, size_t len);

/*
 * Opens the backup directory dir (NULL: backup_default_dir), creating it
 * (one level; mode 0700, or 0750 when file_mode gives the group read) when it
 * is missing.  Refuses a symbolic link, a non-directory and a directory that
 * fails safedir_check.  Removes the temporary files an interrupted backup of
 * worthd's user left there (each logged), except those of a process that
 * still runs.  db_path and socket_path (either may be NULL; borrowed, copied)
 * name the files a backup must never replace.  file_mode (0600 or 0640; 0
 * means 0600) is the mode of every backup.  Returns 0 with *out (owned:
 * backup_dir_free), or -1 with the reason in err.
 */
int backup_dir_open(const char *dir, const char *db_path, const char *socket_path,
                    unsigned file_mode, struct backup_dir **out, char *err, size_t errlen);
/* Closes the directory and frees bd (NULL is fine). */
void backup_dir_free(struct backup_dir *bd);
/* The directory's resolved path (owned by bd). */
const char *backup_dir_path(const struct backup_dir *bd);

/*
 * Checks a client's backup name: 1..BACKUP_NAME_MAX bytes of [A-Za-z0-9._-],
 * not starting with '.'.  Returns 0, or -1 with the reason in why.
 */
int backup_name_check(const char *name, char *why, size_t len);

/*
 * On the writer thread: writes a consistent copy of db (VACUUM INTO) into the
 * directory as name, or under a new name of worthd's own when name is NULL
 * (worthd-YYYYMMDDTHHMMSSZ.db, then -2, -3, ... within one second), through
 * a temporary file that is fsynced, moved into place without replacing
 * anything but an earlier backup of worthd's, and followed by an fsync of the
 * directory.  Returns 0 with the name used in name_out (name_len bytes) and
 * the size in *bytes; or WORTH_E_BAD_PARAM (a bad name, one of worthd's own
 * files, an existing file worthd did not write), WORTH_E_STORAGE_FULL or
 * WORTH_E_STORAGE_ERROR, with why.  No temporary file stays behind.
 */
int backup_write(struct backup_dir *bd, sqlite3 *db, const char *name, char *name_out,
                 size_t name_len, uint64_t *bytes, char *why, size_t why_len);

#endif /* WORTH_BACKUP_H */
