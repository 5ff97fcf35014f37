/*
 * http.c - `worthd fleet --metrics HOST:PORT`: the node's metrics over HTTP, for Prometheus
 * to scrape (GET /metrics).
 *
 * One thread of its own, blocking on accept (polled every 200 ms for the stop flag), one
 * request at a time: it asks the node for its figures the way any client does, with a
 * NATS request to worth.node.<node> (answered on the fleet thread, ask.c), and sends the
 * text back.  So it touches no shard, and the figures are the same as `worth fleet
 * metrics`.  Requests are read for at most 2 s and 4 KiB; anything but GET /metrics is
 * 404, a node that does not answer within 2 s is 503.
 */
#include <arpa/inet.h>
#include <errno.h>
#include <netinet/in.h>
#include <poll.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <unistd.h>

#include "common/say.h"
#include "fleet/fleet_impl.h"

#define REQ_MAX 4096

static void send_all(int fd, const char *p, size_t n)
{
    while (n) {
        ssize_t k = send(fd, p, n, MSG_NOSIGNAL);
        if (k <= 0)
            return;
        p += k;
        n -= (size_t)k;
    }
}

static void respond(int fd, const char *status, const char *type, const char *body, size_t len)
{
    char head[256];
    int n = snprintf(head, sizeof head,
                     "HTTP/1.0 %s\r\nContent-Type: %s\r\nContent-Length: %zu\r\n"
                     "Connection: close\r\n\r\n",
                     status, type, len);
    send_all(fd, head, (size_t)n);
    send_all(fd, body, len);
}

static void serve(struct node *nd, int fd)
{
    struct timeval tv = {.tv_sec = 2};
    setsockopt(fd, SOL_SOCKET, SO_RCVTIMEO, &tv, sizeof tv);
    char req[REQ_MAX + 1];
    size_t got = 0;
    while (got < REQ_MAX) {
        ssize_t k = recv(fd, req + got, REQ_MAX - got, 0);
        if (k <= 0)
            break;
        got += (size_t)k;
        req[got] = 0;
        if (strstr(req, "\r\n\r\n") || strstr(req, "\n\n"))
            break;
    }
    req[got] = 0;
    if (strncmp(req, "GET /metrics ", 13) != 0 && strncmp(req, "GET /metrics\r", 13) != 0) {
        static const char nf[] = "only GET /metrics is served here\n";
        respond(fd, "404 Not Found", "text/plain", nf, sizeof nf - 1);
        return;
    }
    char subj[96];
    snprintf(subj, sizeof subj, "worth.node.%s", nd->o.node);
    natsMsg *m = NULL;
    if (natsConnection_RequestString(&m, nd->nc, subj, "{\"op\":\"metrics\"}", 2000) != NATS_OK) {
        static const char na[] = "the node did not answer within 2 s\n";
        respond(fd, "503 Service Unavailable", "text/plain", na, sizeof na - 1);
        return;
    }
    respond(fd, "200 OK", "text/plain; version=0.0.4", natsMsg_GetData(m),
            (size_t)natsMsg_GetDataLength(m));
    natsMsg_Destroy(m);
}

static void *run(void *arg)
{
    struct node *nd = arg;
    while (!nd->http_stop) {
        struct pollfd p = {.fd = nd->http_fd, .events = POLLIN};
        if (poll(&p, 1, 200) <= 0)
            continue;
        int fd = accept(nd->http_fd, NULL, NULL);
        if (fd < 0)
            continue;
        serve(nd, fd);
        close(fd);
    }
    return NULL;
}

int fleet_http_parse(const char *hostport, struct sockaddr_in *sa)
{
    char host[64];
    const char *colon = strrchr(hostport, ':');
    char *end = NULL;
    long port = colon ? strtol(colon + 1, &end, 10) : 0;
    memset(sa, 0, sizeof *sa);
    sa->sin_family = AF_INET;
    if (!colon || (size_t)(colon - hostport) >= sizeof host || !end || *end || port < 1 ||
        port > 65535)
        return -1;
    memcpy(host, hostport, (size_t)(colon - hostport));
    host[colon - hostport] = 0;
    if (inet_pton(AF_INET, host, &sa->sin_addr) != 1)
        return -1;
    sa->sin_port = htons((uint16_t)port);
    return 0;
}

int fleet_http_start(struct node *nd, const char *hostport)
{
    struct sockaddr_in sa;
    if (fleet_http_parse(hostport, &sa) != 0) {
        say_error("fleet: --metrics \"%s\": give HOST:PORT, HOST a numeric IPv4 address", hostport);
        return -1;
    }
    int fd = socket(AF_INET, SOCK_STREAM | SOCK_CLOEXEC, 0);
    int one = 1;
    if (fd < 0 || setsockopt(fd, SOL_SOCKET, SO_REUSEADDR, &one, sizeof one) != 0 ||
        bind(fd, (struct sockaddr *)&sa, sizeof sa) != 0 || listen(fd, 16) != 0) {
        say_error("fleet: --metrics %s: %s", hostport, strerror(errno));
        if (fd >= 0)
            close(fd);
        return -1;
    }
    nd->http_fd = fd;
    nd->http_stop = 0;
    if (pthread_create(&nd->http_thread, NULL, run, nd) != 0) {
        close(fd);
        nd->http_fd = -1;
        return -1;
    }
    say_info("fleet: metrics on http://%s/metrics", hostport);
    return 0;
}

void fleet_http_stop(struct node *nd)
{
    if (nd->http_fd < 0)
        return;
    nd->http_stop = 1;
    pthread_join(nd->http_thread, NULL);
    close(nd->http_fd);
    nd->http_fd = -1;
}
