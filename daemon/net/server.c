/*
 * server.c - worthd's listeners: the Unix socket and TCP, and what is
 * accepted on them (server.h).
 *
 * The loop thread owns the listeners.  Each accepted connection joins the set
 * of connections (conn.h), or is refused with one line naming the limit it
 * hit, in this order: the daemon's --max-conns; the share of TCP (--max-conns
 * less --unix-slots), so that slots stay for the local Unix clients; TCP
 * peers still to authenticate (--max-unauthenticated), so that silent ones
 * cannot hold that share; the buffer budget.
 *
 * When accept fails for lack of descriptors (EMFILE), libuv frees its reserve
 * descriptor to accept and close the waiting connections, silently.  If that
 * reserve is gone (another thread took the descriptor it freed), libuv
 * reports EMFILE to on_connection and retries at once: on_connection then
 * sheds one waiting connection with a reserve of its own, so the retry loop
 * ends when none is left, and logs at most every LOG_GAP_MS.  XXX: with both
 * reserves gone the accept loop would spin until a descriptor frees up.
 *
 * The socket's file mode guards it only while nobody else can replace it: its
 * directory is checked (safedir.h), and at stop the path is unlinked only if
 * it still names the socket bound here.
 */
#include "net/server.h"

#include <arpa/inet.h>
#include <errno.h>
#include <fcntl.h>
#include <netinet/in.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <sys/stat.h>
#include <sys/un.h>
#include <unistd.h>

#include "common/mem.h"
#include "net/conn.h"
#include "common/safedir.h"
#include "common/say.h"
#include "worth/errors.h"

/* Least gap between two log lines about shed or refused connections. */
#define LOG_GAP_MS 10000

struct server {
    uv_loop_t *loop;
    const config_t *cfg;
    struct conns *conns;
    uv_pipe_t unix_listener;
    uv_tcp_t tcp_listener;
    int have_unix, have_tcp;
    int have_sock_id; /* sock_dev, sock_ino: the socket file bound (only it is unlinked) */
    dev_t sock_dev;
    ino_t sock_ino;
    int reserve_fd;                   /* a spare descriptor, freed to shed a connection */
    unsigned long long shed, refused; /* connections lost to EMFILE, refused over a limit */
    uint64_t shed_log_ms, refused_log_ms;
};

/* Returns 1 when at most one log line per LOG_GAP_MS may be written now (then resets *last). */
static int log_due(struct server *s, uint64_t *last)
{
    uint64_t now = uv_now(s->loop);
    if (*last && now - *last < LOG_GAP_MS)
        return 0;
    *last = now;
    return 1;
}

static void on_connection(uv_stream_t *listener, int status)
{
    struct server *s = listener->data;
    if (status < 0) {
        /* libuv retries accept as soon as this returns: shed one waiting connection. */
        if ((status == UV_EMFILE || status == UV_ENFILE) && s->reserve_fd >= 0) {
            uv_os_fd_t lfd;
            close(s->reserve_fd);
            if (uv_fileno((uv_handle_t *)listener, &lfd) == 0) {
                int fd = accept(lfd, NULL, NULL);
                if (fd >= 0)
                    close(fd);
            }
            s->reserve_fd = open("/dev/null", O_RDONLY | O_CLOEXEC);
        }
        s->shed++;
        if (log_due(s, &s->shed_log_ms))
            say_warn("accept: %s; %llu connection%s shed so far", uv_strerror(status), s->shed,
                     s->shed == 1 ? "" : "s");
        return;
    }
    int tcp = listener == (uv_stream_t *)&s->tcp_listener;
    struct conn *c = conn_open(s->conns, tcp, tcp && s->cfg->token != NULL);
    int rc = uv_accept(listener, conn_stream(c));
    if (rc < 0) {
        say_warn("accept: %s", uv_strerror(rc));
        conn_abort(c);
        return;
    }
    size_t n, n_tcp, n_unauthed;
    conns_count(s->conns, &n, &n_tcp, &n_unauthed);
    const config_t *o = s->cfg;
    size_t tcp_cap = o->max_conns > o->unix_slots ? o->max_conns - o->unix_slots : 1;
    const char *why = NULL, *limit = NULL;
    int code = WORTH_E_TOO_MANY_CONNECTIONS;
    if (n > o->max_conns) {
        why = "worthd holds its limit of connections (--max-conns); try again later";
        limit = "--max-conns";
    } else if (tcp && n_tcp > tcp_cap) {
        why = "worthd holds its limit of TCP connections (--max-conns less --unix-slots); "
              "try again later";
        limit = "--max-conns less --unix-slots";
    } else if (tcp && o->token && n_unauthed > o->max_unauthed) {
        why = "too many TCP connections are waiting to authenticate (--max-unauthenticated); "
              "try again later";
        limit = "--max-unauthenticated";
    } else if (conn_starved(c)) {
        why = "the daemon's buffer budget (--max-buffer-mb) is spent; try again later";
        limit = "--max-buffer-mb";
        code = WORTH_E_OVER_BUDGET;
    }
    if (why) {
        s->refused++;
        if (log_due(s, &s->refused_log_ms))
            say_warn("connection %llu (%s) refused (%s, the limit of %s): %zu open, %zu tcp, %zu "
                     "not authenticated; %llu refused so far",
                     (unsigned long long)conn_id(c), tcp ? "tcp" : "unix", worth_err_name(code),
                     limit, n - 1, n_tcp, n_unauthed, s->refused);
        conn_refuse(c, code, why);
        return;
    }
    say_debug("connection %llu opened (%s)", (unsigned long long)conn_id(c), tcp ? "tcp" : "unix");
    conn_start(c);
}

/* Returns 1 when something accepts connections at path (a live daemon), 0 when nothing does. */
static int unix_socket_live(const char *path)
{
    int fd = socket(AF_UNIX, SOCK_STREAM, 0);
    if (fd < 0)
        return 0;
    struct sockaddr_un a;
    memset(&a, 0, sizeof a);
    a.sun_family = AF_UNIX;
    snprintf(a.sun_path, sizeof a.sun_path, "%s", path);
    int live = connect(fd, (struct sockaddr *)&a, sizeof a) == 0;
    close(fd);
    return live;
}

/*
 * The socket's file mode guards it only as long as nobody else can replace it:
 * refuses a directory that every user may write to without the sticky bit,
 * or one owned by another user than worthd's or root.  Returns 0 or -1 (logged).
 */
static int check_socket_dir(const char *path)
{
    char dir[sizeof((struct sockaddr_un *)0)->sun_path];
    const char *slash = strrchr(path, '/');
    if (!slash)
        snprintf(dir, sizeof dir, ".");
    else if (slash == path)
        snprintf(dir, sizeof dir, "/");
    else
        snprintf(dir, sizeof dir, "%.*s", (int)(slash - path), path);
    struct stat st;
    if (stat(dir, &st) != 0) {
        say_error("socket directory %s: %s", dir, strerror(errno));
        return -1;
    }
    char why[sizeof dir + 200];
    if (safedir_check(dir, &st, "socket directory", "the socket", why, sizeof why) != 0) {
        say_error("%s", why);
        return -1;
    }
    return 0;
}

/*
 * Creates a Unix stream socket bound to path, mode 0660.  Bound here rather
 * than by uv_pipe_bind, because libuv's uv_close then unlinks whatever sits at
 * the path; stop() removes only this socket (unlink_socket).  Returns 0 with
 * *fd, or a negative errno (a libuv error code).
 */
static int bind_unix(const char *path, int *fd)
{
    struct sockaddr_un a;
    memset(&a, 0, sizeof a);
    a.sun_family = AF_UNIX;
    snprintf(a.sun_path, sizeof a.sun_path, "%s", path);
    int sfd = socket(AF_UNIX, SOCK_STREAM | SOCK_CLOEXEC, 0);
    if (sfd < 0)
        return -errno;
    /* Mode 0660: uv_pipe_chmod cannot express it, so set the umask around bind. */
    mode_t old = umask(0117);
    int rc = bind(sfd, (struct sockaddr *)&a, sizeof a), e = errno;
    umask(old);
    if (rc != 0) {
        close(sfd);
        return -e;
    }
    *fd = sfd;
    return 0;
}

static int listen_unix(struct server *s)
{
    const char *path = s->cfg->socket_path;
    struct sockaddr_un probe;
    if (strlen(path) >= sizeof probe.sun_path) {
        say_error("socket path %s is longer than %zu bytes", path, sizeof probe.sun_path - 1);
        return -1;
    }
    struct stat st;
    if (check_socket_dir(path) != 0)
        return -1;
    if (lstat(path, &st) == 0) {
        if (!S_ISSOCK(st.st_mode)) {
            say_error("%s exists and is not a socket; refusing to replace it", path);
            return -1;
        }
        if (unix_socket_live(path)) {
            say_error("another daemon is listening on %s", path);
            return -1;
        }
        say_warn("removing stale socket %s left by an earlier run", path);
        unlink(path);
    }
    uv_pipe_init(s->loop, &s->unix_listener, 0);
    s->unix_listener.data = s;
    s->have_unix = 1;
    int fd = -1;
    int rc = bind_unix(path, &fd);
    if (rc == 0 && lstat(path, &st) == 0) { /* what stop() may remove: this socket, no other file */
        s->sock_dev = st.st_dev;
        s->sock_ino = st.st_ino;
        s->have_sock_id = 1;
    }
    if (rc == 0 && (rc = uv_pipe_open(&s->unix_listener, fd)) != 0)
        close(fd);
    if (rc == 0)
        rc = uv_listen((uv_stream_t *)&s->unix_listener, 511, on_connection);
    if (rc < 0) {
        say_error("cannot listen on %s: %s", path, uv_strerror(rc));
        return -1;
    }
    say_info("listening on %s (unix, mode 0660)", path);
    return 0;
}

/* Parses HOST:PORT or [V6]:PORT into addr; returns 0, or -1. */
int server_parse_hostport(const char *spec, struct sockaddr_storage *addr, int *loopback)
{
    char host[256];
    const char *colon = strrchr(spec, ':');
    if (!colon || colon == spec || !colon[1])
        return -1;
    size_t hl = (size_t)(colon - spec);
    if (hl >= sizeof host)
        return -1;
    memcpy(host, spec, hl);
    host[hl] = 0;
    char *end;
    long port = strtol(colon + 1, &end, 10);
    if (*end || port < 1 || port > 65535)
        return -1;
    if (host[0] == '[' && hl >= 2 && host[hl - 1] == ']') {
        host[hl - 1] = 0;
        struct sockaddr_in6 *a6 = (struct sockaddr_in6 *)addr;
        if (uv_ip6_addr(host + 1, (int)port, a6) != 0)
            return -1;
        *loopback = memcmp(&a6->sin6_addr, &in6addr_loopback, sizeof in6addr_loopback) == 0;
        return 0;
    }
    if (strcmp(host, "localhost") == 0)
        snprintf(host, sizeof host, "127.0.0.1");
    struct sockaddr_in *a4 = (struct sockaddr_in *)addr;
    if (uv_ip4_addr(host, (int)port, a4) != 0)
        return -1;
    *loopback = (ntohl(a4->sin_addr.s_addr) >> 24) == 127;
    return 0;
}

static int listen_tcp(struct server *s)
{
    struct sockaddr_storage addr;
    int loopback = 0;
    memset(&addr, 0, sizeof addr);
    if (server_parse_hostport(s->cfg->listen, &addr, &loopback) != 0) {
        say_error("--listen %s: expected HOST:PORT with a numeric address", s->cfg->listen);
        return -1;
    }
    if (!loopback && !s->cfg->token) {
        say_error("refusing to listen on %s, a non-loopback address, without --token-file",
                  s->cfg->listen);
        return -1;
    }
    if (!s->cfg->token && !s->cfg->tcp_without_token) {
        say_error("refusing to listen on %s without --token-file: every local user could "
                  "use the whole protocol (--allow-tcp-without-token to accept that)",
                  s->cfg->listen);
        return -1;
    }
    uv_tcp_init(s->loop, &s->tcp_listener);
    s->tcp_listener.data = s;
    s->have_tcp = 1;
    int rc = uv_tcp_bind(&s->tcp_listener, (struct sockaddr *)&addr, 0);
    if (rc == 0)
        rc = uv_listen((uv_stream_t *)&s->tcp_listener, 511, on_connection);
    if (rc < 0) {
        say_error("cannot listen on %s: %s", s->cfg->listen, uv_strerror(rc));
        return -1;
    }
    if (s->cfg->token)
        say_info("listening on %s (tcp, token required within %u s)", s->cfg->listen,
                 s->cfg->auth_timeout_s);
    else
        say_warn("listening on %s (tcp) WITHOUT A TOKEN (--allow-tcp-without-token): every "
                 "user of this machine can create, feed, roll back and drop models",
                 s->cfg->listen);
    return 0;
}

/* ---- start and stop ---------------------------------------------------------------------- */

/*
 * Removes the socket file, but only while the path still names the socket
 * worthd bound: whoever replaced it meanwhile keeps their file.  XXX: a
 * replacement between the lstat and the unlink is still removed.
 */
static void unlink_socket(struct server *s)
{
    const char *path = s->cfg->socket_path;
    struct stat st;
    if (!s->have_sock_id || lstat(path, &st) != 0)
        return;
    if (!S_ISSOCK(st.st_mode) || st.st_dev != s->sock_dev || st.st_ino != s->sock_ino) {
        say_warn("%s is no longer worthd's socket; left in place", path);
        return;
    }
    unlink(path);
}

struct server *server_new(uv_loop_t *loop, const config_t *cfg, struct conns *conns)
{
    struct server *s = mem_calloc(1, sizeof *s);
    s->loop = loop;
    s->cfg = cfg;
    s->conns = conns;
    s->reserve_fd = open("/dev/null", O_RDONLY | O_CLOEXEC);
    return s;
}

int server_listen(struct server *s)
{
    return listen_unix(s) == 0 && (!s->cfg->listen || listen_tcp(s) == 0) ? 0 : -1;
}

void server_stop_listening(struct server *s)
{
    if (s->have_unix) {
        unlink_socket(s); /* before the close, as libuv would: the name goes first */
        uv_close((uv_handle_t *)&s->unix_listener, NULL);
        s->have_unix = 0;
    }
    if (s->have_tcp) {
        uv_close((uv_handle_t *)&s->tcp_listener, NULL);
        s->have_tcp = 0;
    }
}

void server_counts(const struct server *s, unsigned long long *refused, unsigned long long *shed)
{
    *refused = s->refused;
    *shed = s->shed;
}

void server_free(struct server *s)
{
    if (!s)
        return;
    if (s->reserve_fd >= 0)
        close(s->reserve_fd);
    mem_free(s);
}
