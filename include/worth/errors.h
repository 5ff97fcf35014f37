/*
 * errors.h - the one table of worth error codes.
 *
 * Every failure inside worthd, the client library and the learning core is one
 * of these codes.  0 is success; errors are negative and never renumbered.  The
 * second column is the stable snake_case name sent on the wire in
 * {"ok":false,"error":{"code":NAME,...}}: clients match on it, so a name, once
 * released, is never changed or reused.  The third column is a default
 * human-readable message; call sites add detail in a caller-provided buffer.
 */
#ifndef WORTH_ERRORS_H
#define WORTH_ERRORS_H

#include "worth/export.h"

#ifdef __cplusplus
extern "C" {
#endif

/* X(ENUM_SUFFIX, value, wire_name, message) */
#define WORTH_ERRORS(X)                                                                            \
    X(OK, 0, "ok", "success")                                                                      \
    X(BAD_JSON, -1, "bad_json", "request is not valid JSON")                                       \
    X(UNKNOWN_OP, -2, "unknown_op", "unknown operation")                                           \
    X(BAD_REQUEST, -3, "bad_request", "a required field is missing or has the wrong type")         \
    X(NO_SUCH_MODEL, -4, "no_such_model", "no model of that name")                                 \
    X(MODEL_EXISTS, -5, "model_exists", "a model of that name already exists")                     \
    X(BAD_DIMENSION, -6, "bad_dimension", "vector has the wrong length")                           \
    X(BAD_NUMBER, -7, "bad_number", "value is NaN, infinite or not a number")                      \
    X(BAD_PARAM, -8, "bad_param", "parameter out of its allowed range")                            \
    X(TOO_LARGE, -9, "too_large", "request exceeds a configured limit")                            \
    X(TRUNCATED, -10, "truncated", "payload ended before its declared length")                     \
    X(UNAUTHORIZED, -11, "unauthorized", "authenticate first")                                     \
    X(LINE_TOO_LONG, -12, "line_too_long", "request line exceeds the maximum length")              \
    X(TOO_MANY_SOURCES, -13, "too_many_sources", "model has no free slot for another source")      \
    X(CORRUPT, -14, "corrupt", "stored state failed its format or checksum check")                 \
    X(MISMATCH, -15, "mismatch", "stored state belongs to a different configuration")              \
    X(NUMERIC, -16, "numeric", "numerical failure (singular or non-finite result)")                \
    X(NO_MEMORY, -17, "no_memory", "out of memory")                                                \
    X(IO, -18, "io", "input/output error")                                                         \
    X(INTERNAL, -19, "internal", "internal error")                                                 \
    X(UNSUPPORTED, -20, "unsupported", "operation not supported by this estimator")                \
    X(NO_SUCH_CHECKPOINT, -21, "no_such_checkpoint", "no valid checkpoint with that id")           \
    X(STORAGE_FULL, -22, "storage_full", "the database is full; nothing of the request applied")   \
    X(STORAGE_ERROR, -23, "storage_error", "the database could not be written")                    \
    X(BAD_DATABASE, -24, "bad_database", "the database file is corrupt or not worthd's")           \
    X(TOO_MANY_CONNECTIONS, -25, "too_many_connections",                                           \
      "the daemon holds its limit of connections; try again later")                                \
    X(IDLE_TIMEOUT, -26, "idle_timeout", "the connection was idle too long and is closed")         \
    X(SLOW_READER, -27, "slow_reader", "the client did not read its replies; connection cut off")  \
    X(CANCELLED, -28, "cancelled",                                                                 \
      "cut short: worthd is stopping, or the model was dropped or rolled back")                    \
    X(DIVERGED, -29, "diverged",                                                                   \
      "the estimator diverged (non-finite or exploding weights) and no longer answers")            \
    X(DAMAGED, -30, "damaged", "the model's stored log is damaged; the model is quarantined")      \
    X(OVER_BUDGET, -31, "over_budget", "the daemon's buffer budget is spent; retry later")         \
    X(AUTH_TIMEOUT, -32, "auth_timeout",                                                           \
      "no authentication within the deadline; connection closed")                                  \
    X(OUT_OF_ORDER, -33, "out_of_order", "samples of a source go back in time within one request") \
    X(FORBIDDEN, -34, "forbidden", "the connection's role does not allow this request")          \
    X(NO_OWNER, -35, "no_owner",                                                                   \
      "no fleet node owns the model's shard now (a takeover is under way); retry later")

enum worth_err {
#define WORTH_ERR_ENUM(name, val, wire, msg) WORTH_E_##name = (val),
    WORTH_ERRORS(WORTH_ERR_ENUM)
#undef WORTH_ERR_ENUM
};

/* Stable wire name of code, e.g. "bad_dimension"; "unknown_error" for a code not in the table. */
WORTH_API const char *worth_err_name(int code);

/* Default message of code; never NULL, static storage. */
WORTH_API const char *worth_strerror(int code);

#ifdef __cplusplus
}
#endif

#endif /* WORTH_ERRORS_H */
