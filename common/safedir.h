/*
 * safedir.h - may someone other than worthd replace what it puts in a directory?
 *
 * A file's own mode protects it only while nobody else can swap it for
 * another: the socket's directory and the backup directory must therefore
 * belong to worthd's user or root, and must not be writable by every user
 * unless the sticky bit keeps others from removing worthd's entries (/tmp).
 * One rule for both, so they cannot drift apart.  Plain POSIX, any thread.
 */
#ifndef WORTH_SAFEDIR_H
#define WORTH_SAFEDIR_H

#include <stddef.h>
#include <sys/stat.h>

/*
 * Checks the directory dir whose stat is st (the caller chooses stat or
 * lstat).  what names it in the message ("socket directory"), thing says what
 * could be replaced ("the socket").  Returns 0, or -1 with the reason in err
 * (errlen bytes; all strings borrowed).
 */
int safedir_check(const char *dir, const struct stat *st, const char *what, const char *thing,
                  char *err, size_t errlen);

#endif /* WORTH_SAFEDIR_H */
