/*
 * fail.c - error messages into caller buffers (see fail.h).  Any thread.
 */
#include "common/fail.h"

#include <stdarg.h>
#include <stdio.h>

int err_fail(char *err, size_t errlen, int code, const char *fmt, ...)
{
    if (err && errlen) {
        va_list ap;
        va_start(ap, fmt);
        vsnprintf(err, errlen, fmt, ap);
        va_end(ap);
    }
    return code;
}
