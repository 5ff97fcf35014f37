/*
 * errors.c - names and messages for the codes of include/worth/errors.h.
 *
 * Shared by the daemon, the learning core and the client library.  Pure
 * lookups over the X-macro table; no state, safe from any thread.
 */
#include "worth/errors.h"

const char *worth_err_name(int code)
{
    switch (code) {
#define WORTH_ERR_NAME(name, val, wire, msg)                                                       \
    case (val):                                                                                    \
        return wire;
        WORTH_ERRORS(WORTH_ERR_NAME)
#undef WORTH_ERR_NAME
    }
    return "unknown_error";
}

const char *worth_strerror(int code)
{
    switch (code) {
#define WORTH_ERR_MSG(name, val, wire, msg)                                                        \
    case (val):                                                                                    \
        return msg;
        WORTH_ERRORS(WORTH_ERR_MSG)
#undef WORTH_ERR_MSG
    }
    return "unknown error";
}
