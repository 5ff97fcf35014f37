/*
 * worth/client.h - the C client library of worthd.
 *
 * For plant gateways and tools written in C: connect to worthd over its Unix
 * socket or TCP, and call every request of protocol v1 (schema/protocol.md)
 * without writing protocol code.  Calls are synchronous, each bounded by the
 * connection's timeout.  worth_connect says hello first and refuses a peer
 * that is not worthd or speaks another protocol version
 * (WORTH_PROTOCOL_VERSION in worth/protocol.h).
 *
 * Errors: every call returns 0 or a negative code of worth/errors.h.  A code
 * sent by worthd keeps its wire name and message (worth_error_name and
 * worth_error_message); failures on this side are WORTH_E_IO (cannot connect,
 * connection lost, timeout, a peer that is not worthd) with a message saying
 * which, and WORTH_E_UNSUPPORTED for a worthd of another protocol version.
 *
 * Memory: the library allocates through one wrapper that prints a message and
 * aborts the program when memory runs out (as worthd does); no call returns
 * an out-of-memory error.
 *
 * Threads: a connection is not thread-safe.  Use one connection per thread
 * (worthd serves many connections at once); different connections need no
 * locking.
 *
 * Ownership: strings returned by the library (replies, names) are owned by
 * the connection and valid until its next call; copy what you keep.
 *
 * Symbols: the shared library exports the worth_* functions below (WORTH_API)
 * and nothing else.
 */
#ifndef WORTH_CLIENT_H
#define WORTH_CLIENT_H

#include <stddef.h>
#include <stdint.h>

#include "worth/errors.h"
#include "worth/export.h"
#include "worth/protocol.h"

#ifdef __cplusplus
extern "C" {
#endif

/* An open connection to worthd. */
typedef struct worth_client worth_client;

/* Most estimators a value reply carries (a model's limit). */
#define WORTH_MAX_ESTIMATORS 16

/* Plain data: where and how to connect.  Strings are borrowed during worth_connect. */
typedef struct worth_opts {
    const char *socket_path; /* Unix socket, or NULL to use host_port */
    const char *host_port;   /* "HOST:PORT" (numeric host, or localhost) */
    const char *token;       /* sent with auth first when not NULL */
    int timeout_ms;          /* per call; 0 means 30000 */
} worth_opts;

/* Plain data: the answer of worth_value. */
typedef struct worth_value_t {
    double value; /* the headline estimator's, or the one asked for; NAN while it has no
                     estimate yet (the reply's "primary" and "health" say which and why) */
    double sd;    /* that estimator's own sd; NAN when it has none */
    uint64_t seq; /* last transition applied to the weights that answered */
    size_t n;     /* estimators below (0 when one was asked for) */
    char names[WORTH_MAX_ESTIMATORS][64];
    double values[WORTH_MAX_ESTIMATORS];
} worth_value_t;

/* Plain data: one transition. */
typedef struct worth_transition {
    const double *x; /* dims values (borrowed) */
    double r;
    const double *x_next; /* dims values, or NULL when terminal */
    int terminal;
    const char *source; /* NULL for the default source */
    double t;           /* NAN when absent */
    double dt;          /* NAN when absent */
    uint64_t pseq;      /* producer sequence (>= 1, per source), 0 when absent */
} worth_transition;

/* Plain data: one sample of a plant (schema/protocol.md, "Samples"). */
typedef struct worth_sample {
    const char *source; /* NULL for the default source */
    double t;           /* seconds since 1970, UTC */
    const double *x;    /* dims values, in the model's order (borrowed) */
    double r;
    int terminal; /* the sample's state is terminal: its source's chain ends there */
} worth_sample;

/* Plain data: what one ingest request did (fields the reply lacks read 0). */
typedef struct worth_ingest_t {
    uint64_t seq;     /* the model's last transition seq after the request */
    uint64_t paired;  /* transitions worthd made from the request's samples */
    uint64_t skipped; /* samples or transitions skipped as already logged (resends) */
    uint64_t gaps;    /* chains broken by a gap longer than the model's limit */
} worth_ingest_t;

/* Plain data: the answer of worth_train. */
typedef struct worth_train_t {
    unsigned passes;
    double change;
    int converged;
} worth_train_t;

/* Called after each training pass with pass, of and the relative weight change. */
typedef void (*worth_progress_fn)(void *ctx, unsigned pass, unsigned of, double change);

/* Lifecycle */

/* The library's version, e.g. "0.1.0" (static storage). */
WORTH_API const char *worth_version(void);

/*
 * Connects, authenticates when a token is given, and says hello: the peer
 * must answer as worthd of protocol WORTH_PROTOCOL_VERSION.  Returns 0 with
 * *out owned by the caller (free with worth_close), or a negative code with
 * a message in err (errlen bytes; err may be NULL): WORTH_E_IO when it cannot
 * connect, the peer does not answer in time or is not worthd;
 * WORTH_E_UNSUPPORTED when worthd speaks another protocol version (the
 * message names both); worthd's own code (e.g. WORTH_E_UNAUTHORIZED) when it
 * refuses, with err reading "CODE: message".
 */
WORTH_API int worth_connect(const worth_opts *o, worth_client **out, char *err, size_t errlen);
/* Closes the connection and frees it; NULL is fine. */
WORTH_API void worth_close(worth_client *c);

/* Errors of the last failed call (owned by c). */
WORTH_API const char *worth_error_name(const worth_client *c);
WORTH_API const char *worth_error_message(const worth_client *c);
/*
 * The element of a batch, samples or bulk that the last error names (its
 * "index": 0 for the first), or -1 when it names none.
 */
WORTH_API long worth_error_index(const worth_client *c);

/* Any request */

/*
 * Sends one request (a JSON object, without newline) and returns worthd's
 * final reply line in *reply (owned by c; progress lines are skipped).
 * Returns 0 when the reply says ok, the reply's error code otherwise; when no
 * reply came (WORTH_E_IO), *reply is "".
 */
WORTH_API int worth_request(worth_client *c, const char *json, const char **reply);

/* Models */

/* Creates a model from a model.create spec (JSON object; "op" is added).  *features may be NULL. */
WORTH_API int worth_model_create(worth_client *c, const char *spec_json, size_t *features);
WORTH_API int worth_model_drop(worth_client *c, const char *model);
/* The model.list reply, or model.get's when model is not NULL (owned by c). */
WORTH_API int worth_model_info(worth_client *c, const char *model, const char **json);

/* Transitions */

/* One transition; *seq (may be NULL) gets its number.  Waits until it is durable. */
WORTH_API int worth_observe(worth_client *c, const char *model, size_t dims,
                            const worth_transition *t, uint64_t *seq);
/*
 * Automatic batching: worth_observe_queue adds a transition to the
 * connection's batch for model (sending it when it reaches batch_max, 256 by
 * default) and worth_flush sends what is left.  *seq gets the last seq sent.
 * A batch is all-or-nothing: an error names the index within the batch.
 */
WORTH_API int worth_observe_queue(worth_client *c, const char *model, size_t dims,
                                  const worth_transition *t, uint64_t *seq);
WORTH_API int worth_flush(worth_client *c, uint64_t *seq);
WORTH_API void worth_set_batch_max(worth_client *c, size_t n);
/*
 * Bulk frames: count records of 2*dims+2 doubles each (x, r, x_next,
 * terminal as 0 or 1), sent as one observe.bulk.  *seq gets the last seq.
 * With applied set, the reply does not wait for durability (weaker).
 */
WORTH_API int worth_observe_bulk(worth_client *c, const char *model, size_t dims,
                                 const double *records, size_t count, int applied, uint64_t *seq);
/*
 * The same with the header's source (NULL: the default source) and producer
 * sequence: the records are numbered pseq, pseq + 1, ... (pseq 0: none), and
 * worthd skips those at or below the last it logged for the source.  *out
 * (may be NULL) gets seq and skipped.
 */
WORTH_API int worth_observe_bulk_pseq(worth_client *c, const char *model, size_t dims,
                                      const double *records, size_t count, const char *source,
                                      uint64_t pseq, int applied, worth_ingest_t *out);
/*
 * The counts of the last successful ingest call of c (observe, a batch sent
 * by worth_observe_queue or worth_flush, a bulk, samples); zeros before any.
 */
WORTH_API void worth_last_ingest(const worth_client *c, worth_ingest_t *out);

/* Samples: worthd pairs consecutive samples of a source into transitions */

/*
 * n samples (n >= 1, at most worthd's --max-batch) in one observe request:
 * all-or-nothing; within it each source's samples must go forward in time
 * (else out_of_order, worth_error_index naming the first that does not).  A
 * sample at or before the last one worthd logged for its source is skipped
 * and counted, so resending is safe.  *out (may be NULL) gets the counts.
 */
WORTH_API int worth_observe_samples(worth_client *c, const char *model, size_t dims,
                                    const worth_sample *s, size_t n, worth_ingest_t *out);
/*
 * count samples of one source (NULL: the default source) as one observe.bulk
 * of "form":"samples": records of dims + 3 doubles each, t, x[0..dims-1], r,
 * terminal (0 or 1).  With applied set, the reply does not wait for
 * durability (weaker).  *out (may be NULL) gets the counts.
 */
WORTH_API int worth_observe_samples_bulk(worth_client *c, const char *model, size_t dims,
                                         const char *source, const double *records, size_t count,
                                         int applied, worth_ingest_t *out);

/* Queries */

/* Value of one state under every estimator (estimator NULL) or one. */
WORTH_API int worth_value(worth_client *c, const char *model, const double *x, size_t dims,
                          const char *estimator, worth_value_t *out);
/* Values of count states (row-major count x dims) into out (count doubles). */
WORTH_API int worth_values(worth_client *c, const char *model, const double *xs, size_t count,
                           size_t dims, const char *estimator, double *out, uint64_t *seq);
/* The stats reply (owned by c). */
WORTH_API int worth_stats(worth_client *c, const char *model, const char **json);

/* Checkpoints and history */

/* label may be NULL.  *id and *seq may be NULL. */
WORTH_API int worth_checkpoint(worth_client *c, const char *model, const char *label, int64_t *id,
                               uint64_t *seq);
/* The checkpoints reply (owned by c). */
WORTH_API int worth_checkpoints(worth_client *c, const char *model, const char **json);
/*
 * Rolls back to checkpoint id.  With replay, re-learns the log after it,
 * skipping [lo, hi] of seq (exclude 's') or of t (exclude 't'); exclude 0 for
 * no window.  undone and replayed may be NULL.
 */
WORTH_API int worth_rollback(worth_client *c, const char *model, int64_t id, int replay,
                             char exclude, double lo, double hi, uint64_t *undone,
                             uint64_t *replayed);
/*
 * Writes a consistent copy of worthd's database into worthd's --backup-dir
 * as name (a plain file name, 1..128 bytes of [A-Za-z0-9._-], not starting
 * with '.'; an earlier backup of that name is replaced), or under a new name
 * of worthd's when name is NULL.  The file's full path on worthd's machine
 * goes to path (path_len bytes; path may be NULL).  bytes may be NULL.
 */
WORTH_API int worth_backup(worth_client *c, const char *name, char *path, size_t path_len,
                           uint64_t *bytes);
/* Trains a replay or lstd estimator; progress may be NULL. */
WORTH_API int worth_train(worth_client *c, const char *model, const char *estimator,
                          unsigned passes, worth_progress_fn progress, void *ctx,
                          worth_train_t *out);

/* Operations */

/* The status reply (owned by c): version, uptime, the database against its limit, models. */
WORTH_API int worth_status(worth_client *c, const char **json);
/*
 * Drops model (when it is served) and deletes every row of every dropped model
 * of that name but its events; *json (may be NULL; owned by c) gets the reply
 * with the rows deleted and the bytes freed.  Needs the admin role.
 */
WORTH_API int worth_model_purge(worth_client *c, const char *model, const char **json);

#ifdef __cplusplus
}
#endif

#endif /* WORTH_CLIENT_H */
