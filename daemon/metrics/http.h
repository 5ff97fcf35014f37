/*
 * http.h - worthd's optional HTTP listener for GET /metrics.
 *
 * Serves the Prometheus text exposition format (version 0.0.4) on the loop
 * thread: one short request per connection, answered and closed.  Parses
 * HTTP itself (a request line and at most 64 header lines in 8 KiB): anything
 * malformed gets 400 and the connection is closed; a silent client is cut off
 * after 10 s.  It never blocks and never touches ingest.
 */
#ifndef WORTH_METRICS_H
#define WORTH_METRICS_H

#include <uv.h>

struct metrics;
struct proto;
struct writer;

/* Builds the exposition text (owned by the caller, free); *len gets its length. */
typedef char *(*metrics_render_fn)(void *ctx, size_t *len);
/* 1 when the bearer token (len bytes, borrowed) may scrape; compared in constant time. */
typedef int (*metrics_auth_fn)(void *ctx, const char *bearer, size_t len);

/*
 * Listens on host_port (borrowed for the listener's life).  With token set,
 * every request must carry "Authorization: Bearer TOKEN" that auth (with ctx)
 * accepts.  A non-loopback address without a token is refused.  Returns 0
 * with *out (owned; metrics_close), or -1 (logged).
 */
int metrics_start(uv_loop_t *loop, const char *host_port, int token, metrics_auth_fn auth,
                  metrics_render_fn render, void *ctx, struct metrics **out);
/* Closes the listener and every open metrics connection; frees m when they are closed. */
void metrics_close(struct metrics *m);

#endif /* WORTH_METRICS_H */
