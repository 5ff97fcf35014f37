/*
 * conn.h - client connections: reading, framing, writing, their limits.
 *
 * The loop thread owns every connection.  Each one's framer (frame.h) splits
 * its input into request lines and bulk payloads, handed one at a time to the
 * handler the protocol registered (conn_handler_t), at most a fixed number of
 * lines per turn so one client cannot starve the others.  Replies are written
 * at once when the socket takes them and queued otherwise.  A connection
 * stops reading while its unsent replies pile up, while its request is parked
 * (the model's queue is full), while it waits for an answer from another
 * thread, or while it has unhandled lines.  Every byte it holds counts
 * against the daemon's buffer budget (budget.h).
 *
 * net/ knows nothing of the protocol: the handler's callbacks are how it
 * calls up, and the protocol keeps its own state per connection
 * (conn_state).  The listeners (server.h) accept into this set.
 */
#ifndef WORTH_CONN_H
#define WORTH_CONN_H

#include <stddef.h>
#include <stdint.h>
#include <uv.h>

#include "config.h"
#include "net/budget.h"

struct conn;
struct conns;

/* What a line or bulk handler returns. */
enum { CONN_DONE = 0, CONN_PARK = 1 };

/* Plain data: a Unix socket peer's credentials (SO_PEERCRED, SO_PEERGROUPS). */
typedef struct conn_peer_t {
    int pid;
    uint32_t uid, gid;
    size_t n_groups;     /* groups below, the primary gid first */
    uint32_t groups[65]; /* the rest past 65 are not seen (XXX: a rule naming one misses) */
} conn_peer_t;

/* Callbacks of the protocol, called on the loop thread; ctx is the handler's. */
typedef struct conn_handler_t {
    void *ctx;
    /* A connection opened; returns its protocol state (the handler's until close). */
    void *(*open)(void *ctx, struct conn *c, int needs_auth);
    /* The connection is being freed: release state. */
    void (*close)(void *ctx, struct conn *c, void *state);
    /* One request line (len bytes, borrowed); CONN_PARK: not handled yet, offer it again. */
    int (*line)(void *ctx, struct conn *c, const char *line, size_t len);
    /* The whole payload announced by conn_expect_bulk (borrowed); CONN_DONE or CONN_PARK. */
    int (*bulk)(void *ctx, struct conn *c, const unsigned char *data, size_t len);
    /* The connection ended got bytes into a bulk payload: nothing of it is to be applied. */
    void (*truncated)(void *ctx, struct conn *c, size_t got);
    /* A line longer than --max-line arrived: answer it (the connection then closes). */
    void (*too_long)(void *ctx, struct conn *c);
    /* 1 when no reply is owed on the connection (so it may close, or count as idle). */
    int (*quiet)(void *ctx, struct conn *c);
    /* May be NULL.  A Unix connection was accepted from a peer with these credentials
     * (borrowed), before any of its lines is handled. */
    void (*peer)(void *ctx, struct conn *c, const conn_peer_t *peer);
} conn_handler_t;

/* Lifecycle */

/* Returns an empty set of connections on loop (borrowed), configured by cfg (borrowed). */
struct conns *conns_new(uv_loop_t *loop, const config_t *cfg);
/* Sets the handler (copied); before the first connection opens. */
void conns_set_handler(struct conns *set, const conn_handler_t *h);
/* Frees the set once its handles are closed (after uv_run returned). */
void conns_free(struct conns *set);

/* Accepting [server.c] */

/*
 * Returns a new connection of the set, TCP or Unix, whose stream the caller
 * accepts into (conn_stream).  needs_auth: it must authenticate (a TCP
 * listener with a token).  Then conn_start, or conn_refuse.
 */
struct conn *conn_open(struct conns *set, int tcp, int needs_auth);
uv_stream_t *conn_stream(struct conn *c);
/* Starts reading the accepted connection. */
void conn_start(struct conn *c);
/* Sends one error line (code, msg) that no request asked for, then closes. */
void conn_refuse(struct conn *c, int code, const char *msg);
/* Closes the connection at once (accept failed). */
void conn_abort(struct conn *c);
/* 1 when the buffer budget could not give the connection its first buffer. */
int conn_starved(const struct conn *c);
/* Counts: open connections, of them TCP, of them not yet authenticated. */
void conns_count(const struct conns *set, size_t *n, size_t *tcp, size_t *unauthed);
/* The budget of every connection's buffers (for status lines). */
const budget_t *conns_budget(const struct conns *set);

/* For the protocol layer */

/* Queues len bytes (one or more whole lines, borrowed) for the client. */
void conn_send(struct conn *c, const char *buf, size_t len);
/* Returns the connection's unique id (never reused while the daemon runs). */
uint64_t conn_id(const struct conn *c);
/* Returns the protocol's state of the connection (what the handler's open returned). */
void *conn_state(struct conn *c);
/* The connection has authenticated: its deadline and its place among the unauthenticated end. */
void conn_set_authed(struct conn *c);
/* Closes the connection once everything queued so far is written. */
void conn_close_after_reply(struct conn *c);
/*
 * The next nbytes of input are a bulk payload, handed whole to the bulk
 * callback.  Returns 0, or -1 when the buffer budget cannot hold it (nothing
 * changed: answer over_budget and call conn_skip_bulk).
 */
int conn_expect_bulk(struct conn *c, size_t nbytes);
/* The next nbytes of input are a refused bulk payload: dropped as they arrive. */
void conn_skip_bulk(struct conn *c, size_t nbytes);
/* Stops handling this connection's input until conn_resume (awaiting an answer). */
void conn_wait(struct conn *c);
void conn_resume(struct conn *c);
/* Calls fn for every open connection (fn may close it). */
void conns_each(struct conns *set, void (*fn)(struct conn *c, void *ctx), void *ctx);
/* Returns the live connection with that id, or NULL. */
struct conn *conns_find(struct conns *set, uint64_t id);

/* For the daemon's start and stop [worthd.c] */

/* After the protocol heard from another thread: closes connections whose last reply is out,
 * and handles again every parked request. */
void conns_kick(struct conns *set);
/* Stopping: nothing new is read from any connection. */
void conns_stop_reading(struct conns *set);
/*
 * Closes every connection once its replies are written (closing at once would
 * cancel what libuv still holds), a client that does not read after
 * linger_ms regardless; then the set's own handles.
 */
void conns_close_all(struct conns *set, unsigned linger_ms);

#endif /* WORTH_CONN_H */
