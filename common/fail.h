/*
 * fail.h - the one way a function reports an error with detail.
 *
 * Formats a message into the caller's buffer (never a global) and returns
 * the code, so an error path is one line: `return err_fail(err, len, code, ...)`.
 */
#ifndef WORTH_FAIL_H
#define WORTH_FAIL_H

#include <stddef.h>

/* Writes the message into err (errlen bytes; err may be NULL) and returns code. */
int err_fail(char *err, size_t errlen, int code, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));

#endif /* WORTH_FAIL_H */
