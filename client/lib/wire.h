/*
 * wire.h - a connection of libworth-client and its transport: what wire.c
 * (connect, deadlines, send, read lines, reply status) gives requests.c (the
 * typed calls).  Internal to the library: nothing here is exported.
 */
#ifndef WORTH_CLIENT_WIRE_H
#define WORTH_CLIENT_WIRE_H

#include <stddef.h>
#include <time.h>

#include <cjson/cJSON.h>

#include "common/jw.h"
#include "worth/client.h"

/* Plain data behind the opaque worth_client; owned by worth_connect/worth_close. */
struct worth_client {
    int fd;         /* -1 once the connection is lost or timed out */
    int timeout_ms; /* per call */
    char *in;       /* received bytes not yet cut into lines */
    size_t in_len, in_cap;
    char *line; /* the last reply line, NUL-terminated */
    size_t line_cap;
    jw_t req; /* the request being built */
    char err_name[64];
    char err_msg[512];
    long err_index;        /* the error's "index", -1 when it names none */
    worth_ingest_t ingest; /* the counts of the last successful ingest reply */
    /* automatic batching (worth_observe_queue) */
    char batch_model[64];
    size_t batch_dims, batch_n, batch_max;
    jw_t batch; /* the batch's elements, comma-separated */
};

/* Sets the last error of c (name from code, message from fmt) and returns code. */
int wire_fail(worth_client *c, int code, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));

/* *d gets the monotonic time ms milliseconds from now. */
void wire_deadline(struct timespec *d, int ms);

/*
 * Sends len bytes of buf (borrowed) before the deadline dl.  Returns 0, or
 * WORTH_E_IO with the error set; a timeout or a lost connection closes it.
 */
int wire_send(worth_client *c, const void *buf, size_t len, const struct timespec *dl);

/* Reads one reply line into c->line before dl; 0 or WORTH_E_IO (connection closed). */
int wire_recv_line(worth_client *c, const struct timespec *dl);

/*
 * Parses c->line: returns 0 when it says ok, else its error code with the
 * error set (WORTH_E_IO when it is not a JSON object).  *root (may be NULL)
 * gets the parsed reply, owned by the caller (cJSON_Delete), or NULL.
 */
int wire_status(worth_client *c, cJSON **root);

/* Sends c->req as one line and reads the reply: wire_status of it. */
int wire_call(worth_client *c, cJSON **root);

#endif /* WORTH_CLIENT_WIRE_H */
