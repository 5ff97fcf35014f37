/*
 * safedir.c - the rule for directories whose entries worthd relies on.
 *
 * Pure: it looks only at the stat it is given and at worthd's effective
 * user, so the caller decides whether a symbolic link is followed.  It never
 * logs; the caller does, with the message it fills.
 */
#include "common/safedir.h"

#include <unistd.h>

#include "common/fail.h"

int safedir_check(const char *dir, const struct stat *st, const char *what, const char *thing,
                  char *err, size_t errlen)
{
    if ((st->st_mode & S_IWOTH) && !(st->st_mode & S_ISVTX))
        return err_fail(err, errlen, -1,
                        "%s %s is writable by every user without the sticky bit (mode %04o): "
                        "anyone could replace %s; use a directory of worthd's own",
                        what, dir, (unsigned)(st->st_mode & 07777), thing);
    if (st->st_uid != geteuid() && st->st_uid != 0)
        return err_fail(err, errlen, -1,
                        "%s %s belongs to user %u, not to worthd's user %u or root", what, dir,
                        (unsigned)st->st_uid, (unsigned)geteuid());
    return 0;
}
