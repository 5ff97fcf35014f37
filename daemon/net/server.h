/*
 * server.h - worthd's listeners: the Unix socket (mode 0660) and, with
 * --listen, TCP.
 *
 * The loop thread owns them.  What they accept joins the set of connections
 * (conn.h), or is refused with one line naming the limit it hit (connections,
 * TCP's share, TCP peers not yet authenticated, the buffer budget).  Knows
 * nothing of the protocol.
 */
#ifndef WORTH_SERVER_H
#define WORTH_SERVER_H

#include <uv.h>

#include "config.h"

struct server;
struct conns;
struct sockaddr_storage;

/* Lifecycle */

/* Returns listeners for cfg (borrowed) on loop, accepting into conns (borrowed). */
struct server *server_new(uv_loop_t *loop, const config_t *cfg, struct conns *conns);
/*
 * Listens on the Unix socket (checking its directory, removing a stale
 * socket, refusing to replace anything else) and on TCP when configured.
 * Returns 0, or -1 (logged).
 */
int server_listen(struct server *s);
/* Closes the listeners and removes the socket file, if it is still the one bound. */
void server_stop_listening(struct server *s);
/* Frees s once its handles are closed. */
void server_free(struct server *s);

/* Query */

/* Connections refused over a limit, and shed at the open-file limit, so far. */
void server_counts(const struct server *s, unsigned long long *refused, unsigned long long *shed);
/* Parses "HOST:PORT" or "[V6]:PORT" (numeric, or localhost); 0 or -1.  *loopback set. */
int server_parse_hostport(const char *spec, struct sockaddr_storage *addr, int *loopback);

#endif /* WORTH_SERVER_H */
