/*
 * server.h - worthd's event loop: listeners, connections, framing.
 *
 * The loop thread owns every socket.  It splits input into lines (at most
 * max_line bytes each), hands each to the protocol (proto.h), collects the
 * binary payload of a bulk request, and writes replies: at once when the
 * socket takes them, queued otherwise.  It stops reading from a client whose
 * unsent replies pile up, whose request waits for queue space (parked), or
 * whose request waits for a learner's answer; it handles at most a fixed
 * number of lines per read callback so one client cannot starve the others.
 */
#ifndef WORTH_SERVER_H
#define WORTH_SERVER_H

#include <stddef.h>
#include <stdint.h>

struct server;
struct conn;
struct proto_conn;

/* Plain data: the daemon's configuration (strings borrowed for the server's life). */
typedef struct server_opts_t {
    const char *socket_path;   /* Unix socket path */
    const char *listen;        /* "HOST:PORT" for TCP, or NULL */
    const char *token;         /* required by TCP clients when set; never logged */
    size_t max_line;           /* bytes of one request line */
    size_t max_batch;          /* transitions in one batch or bulk */
    size_t queue;              /* records in each model's queue (>= max_batch) */
    size_t max_models;         /* models one daemon holds */
    const char *db_path;       /* SQLite database */
    int sync_full;             /* synchronous=FULL (else NORMAL) */
    uint64_t checkpoint_every; /* automatic checkpoint period in transitions; 0 = off */
    unsigned keep;             /* unlabelled checkpoints kept per model */
    uint64_t db_max_mb;        /* database size cap in MiB; 0 = none */
    const char *metrics;       /* "HOST:PORT" of the HTTP metrics listener, or NULL */
    size_t max_conns;          /* client connections open at once (Unix and TCP together) */
    unsigned idle_timeout_s;   /* close a connection silent this long; 0 = never */
    unsigned send_timeout_s;   /* cut off a client whose unread replies stay over the cap */
    size_t max_features;       /* features one model may have */
    uint64_t max_model_mb;     /* memory one model may come to hold, in MiB */
    uint64_t max_buffer_mb;    /* every connection's buffers together, in MiB; 0 = no cap */
    unsigned auth_timeout_s;   /* a TCP client must authenticate this soon after connecting */
    size_t max_unauthed;       /* TCP connections not yet authenticated, at once */
    size_t unix_slots;         /* of max_conns, kept for the Unix socket (TCP gets the rest) */
    int tcp_without_token;     /* the operator's explicit opt-out: TCP needs no token */
    size_t max_query_work;     /* one value request's work: states x (features + sd terms) */
    const char *backup_dir;    /* where backups go; NULL: the default (store/backup.h) */
    unsigned file_mode;        /* of the database, its companions and backups: 0600 or 0640 */
} server_opts_t;

/*
 * Runs the daemon until SIGINT or SIGTERM.  Returns the process exit status:
 * 0 after a clean stop (everything accepted has been applied), 1 when it
 * could not start (the reason is logged).
 */
int server_run(const server_opts_t *opts);

struct sockaddr_storage;
/* Parses "HOST:PORT" or "[V6]:PORT" (numeric, or localhost); 0 or -1.  *loopback set. */
int server_parse_hostport(const char *spec, struct sockaddr_storage *addr, int *loopback);

/* For the protocol layer, on the loop thread: */

/* Queues len bytes (one or more whole lines, borrowed) for the client. */
void conn_send(struct conn *c, const char *buf, size_t len);
/* Returns the connection's unique id (never reused while the daemon runs). */
uint64_t conn_id(const struct conn *c);
/* Returns the protocol's per-connection state. */
struct proto_conn *conn_proto(struct conn *c);
/* Closes the connection once everything queued so far is written. */
void conn_close_after_reply(struct conn *c);
/*
 * The next nbytes of input are a bulk payload, handed whole to proto_bulk.
 * Returns 0, or -1 when the buffer budget cannot hold it (nothing changed:
 * answer over_budget and call conn_skip_bulk).
 */
int conn_expect_bulk(struct conn *c, size_t nbytes);
/* The next nbytes of input are a refused bulk payload: dropped as they arrive. */
void conn_skip_bulk(struct conn *c, size_t nbytes);
/* Stops handling this connection's input until conn_resume (awaiting an answer). */
void conn_wait(struct conn *c);
void conn_resume(struct conn *c);
/* Calls fn for every open connection (fn may close it). */
void server_each_conn(struct server *s, void (*fn)(struct conn *c, void *ctx), void *ctx);
/* Returns the live connection with that id, or NULL. */
struct conn *server_conn(struct server *s, uint64_t id);

#endif /* WORTH_SERVER_H */
