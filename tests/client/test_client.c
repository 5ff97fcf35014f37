/*
 * test_client.c - the C client library against a real worthd.
 *
 * Starts worthd (path in $WORTH_DAEMON) on a Unix socket and database in a
 * fresh temporary folder, and calls every function of include/worth/client.h,
 * checking replies exactly; then the error paths: worthd's own codes, a
 * server that is down, the hello of worth_connect against worthd and against
 * fake peers (a thread on a Unix socket in the same folder) that speak
 * another protocol version, are not worthd or never answer, and peers that
 * go silent or hang up after hello.  Every wait is bounded.
 */
#include <limits.h>
#include <math.h>
#include <pthread.h>
#include <setjmp.h>
#include <signal.h>
#include <spawn.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <sys/time.h>
#include <sys/un.h>
#include <sys/wait.h>
#include <time.h>
#include <unistd.h>

#include <cmocka.h>

#include "worth/client.h"

extern char **environ;

static char dir[256], sock[300], db[300];
static pid_t daemon_pid;

static void sleep_ms(int ms)
{
    struct timespec ts = {ms / 1000, (long)(ms % 1000) * 1000000};
    nanosleep(&ts, NULL);
}

static int start_daemon(void **state)
{
    (void)state;
    const char *exe = getenv("WORTH_DAEMON");
    if (!exe) {
        fprintf(stderr, "set WORTH_DAEMON to the worthd executable\n");
        return -1;
    }
    snprintf(dir, sizeof dir, "/tmp/worth-client-XXXXXX");
    if (!mkdtemp(dir))
        return -1;
    snprintf(sock, sizeof sock, "%s/w.sock", dir);
    snprintf(db, sizeof db, "%s/w.db", dir);
    char *argv[] = {(char *)exe, "--socket", sock, "--db", db, "--log-level", "warn", NULL};
    if (posix_spawn(&daemon_pid, exe, NULL, NULL, argv, environ) != 0)
        return -1;
    for (int i = 0; i < 1000; i++) { /* up to 10 s */
        worth_opts o = {.socket_path = sock};
        worth_client *c = NULL;
        if (worth_connect(&o, &c, NULL, 0) == 0) {
            worth_close(c);
            return 0;
        }
        sleep_ms(10);
    }
    return -1;
}

static int stop_daemon(void **state)
{
    (void)state;
    int status = -1;
    kill(daemon_pid, SIGTERM);
    for (int i = 0; i < 1000 && waitpid(daemon_pid, &status, WNOHANG) == 0; i++)
        sleep_ms(10);
    char cmd[400];
    snprintf(cmd, sizeof cmd, "rm -rf '%s'", dir);
    if (system(cmd) != 0)
        fprintf(stderr, "could not remove %s\n", dir);
    return WIFEXITED(status) && WEXITSTATUS(status) == 0 ? 0 : -1;
}

static worth_client *open_client(void)
{
    worth_opts o = {.socket_path = sock, .timeout_ms = 10000};
    worth_client *c = NULL;
    char err[256];
    int rc = worth_connect(&o, &c, err, sizeof err);
    if (rc)
        print_error("connect: %s\n", err);
    assert_int_equal(rc, 0);
    return c;
}

#define OK(call)                                                                                   \
    do {                                                                                           \
        int rc_ = (call);                                                                          \
        if (rc_)                                                                                   \
            print_error("%s: %s: %s\n", #call, worth_error_name(c), worth_error_message(c));       \
        assert_int_equal(rc_, 0);                                                                  \
    } while (0)

static const char *SPEC =
    "{\"model\":\"%s\",\"dims\":1,\"gamma\":0.5,\"ranges\":[[0,1]],"
    "\"features\":[{\"basis\":\"bias\"},{\"basis\":\"raw\"}],"
    "\"estimators\":[{\"name\":\"td\",\"kind\":\"td\",\"alpha\":0.5},"
    "{\"name\":\"rls\",\"kind\":\"rls_td\"},{\"name\":\"rp\",\"kind\":\"replay\"}]}";

static void create(worth_client *c, const char *name)
{
    char spec[600];
    snprintf(spec, sizeof spec, SPEC, name);
    size_t features = 0;
    OK(worth_model_create(c, spec, &features));
    assert_int_equal(features, 2);
}

static void models_and_ingest(void **state)
{
    (void)state;
    worth_client *c = open_client();
    create(c, "a");
    const char *json = NULL;
    OK(worth_model_info(c, NULL, &json));
    assert_non_null(strstr(json, "\"model\":\"a\""));
    OK(worth_model_info(c, "a", &json));
    assert_non_null(strstr(json, "\"estimators\":[\"td\",\"rls\",\"rp\"]"));

    /* One transition, then automatic batching, then a bulk frame. */
    double x = 0.25, xn = 0.5;
    worth_transition t = {.x = &x, .r = 1.0, .x_next = &xn, .t = NAN, .dt = NAN};
    uint64_t seq = 0;
    OK(worth_observe(c, "a", 1, &t, &seq));
    assert_int_equal(seq, 1);
    worth_set_batch_max(c, 10);
    for (int i = 0; i < 25; i++) {
        worth_transition b = {
            .x = &x, .r = 1.0, .terminal = 1, .source = "unit-2", .t = 100.0 + i, .dt = 60.0};
        OK(worth_observe_queue(c, "a", 1, &b, &seq));
    }
    assert_int_equal(seq, 21); /* two batches of 10 went out */
    OK(worth_flush(c, &seq));
    assert_int_equal(seq, 26);
    OK(worth_flush(c, &seq)); /* nothing left: no request */
    double rec[3][4] = {{0.1, 1.0, 0.2, 0}, {0.2, 1.0, 0.3, 0}, {0.3, 1.0, 0.0, 1}};
    OK(worth_observe_bulk(c, "a", 1, &rec[0][0], 3, 0, &seq));
    assert_int_equal(seq, 29);
    OK(worth_observe_bulk(c, "a", 1, &rec[0][0], 3, 1, &seq));
    assert_int_equal(seq, 32);

    /* Wait until learnt, then query. */
    for (int i = 0; i < 1000; i++) {
        OK(worth_stats(c, "a", &json));
        if (strstr(json, "\"applied\":32"))
            break;
        sleep_ms(5);
    }
    assert_non_null(strstr(json, "\"received\":32,\"applied\":32"));
    worth_value_t v;
    OK(worth_value(c, "a", &x, 1, NULL, &v));
    assert_int_equal(v.n, 3);
    assert_string_equal(v.names[0], "td");
    assert_string_equal(v.names[2], "rp");
    /* The headline: the first while none is ok yet (32 transitions, few returns); its sd is
     * its own, and td has none (rls_td's is not borrowed). */
    assert_true(v.value == v.values[0]);
    assert_true(isnan(v.sd));
    assert_int_equal(v.seq, 32);
    worth_value_t one;
    OK(worth_value(c, "a", &x, 1, "rls", &one));
    assert_true(one.value == v.values[1]);
    assert_true(isfinite(one.sd) && one.sd >= 0);
    assert_int_equal(one.n, 0);
    double xs[2] = {0.25, 0.75}, out[2];
    OK(worth_values(c, "a", xs, 2, 1, "rls", out, &seq));
    assert_true(out[0] == v.values[1]);
    assert_true(isfinite(out[1]));
    worth_close(c);
}

/* Samples (one request, and a bulk of "form":"samples"), pseq, the counts and the error index. */
static void samples_and_producer_sequences(void **state)
{
    (void)state;
    worth_client *c = open_client();
    OK(worth_model_create(c,
                          "{\"model\":\"s\",\"gamma\":0.5,"
                          "\"dims\":[{\"name\":\"level\",\"unit\":\"m\",\"range\":[0,1]}],"
                          "\"reward_unit\":\"EUR\",\"period_s\":60,"
                          "\"samples\":{\"reward\":\"next\",\"max_gap_periods\":3},"
                          "\"features\":[{\"basis\":\"bias\"},{\"basis\":\"raw\"}],"
                          "\"estimators\":[{\"name\":\"td\",\"kind\":\"td\"}]}",
                          NULL));
    double x[6] = {0.1, 0.2, 0.3, 0.4, 0.5, 0.6};
    worth_sample s[3] = {
        {"u1", 1000, &x[0], -1, 0}, {"u1", 1060, &x[1], -2, 0}, {"u2", 1000, &x[2], -3, 0}};
    worth_ingest_t in;
    memset(&in, 0xff, sizeof in);
    OK(worth_observe_samples(c, "s", 1, s, 3, &in));
    assert_int_equal(in.seq, 1);
    assert_int_equal(in.paired, 1);
    assert_int_equal(in.skipped, 0);
    assert_int_equal(in.gaps, 0);
    /* One sample alone goes as "sample"; a resend is skipped and counted. */
    OK(worth_observe_samples(c, "s", 1, &s[1], 1, &in));
    assert_int_equal(in.paired, 0);
    assert_int_equal(in.skipped, 1);
    worth_ingest_t last;
    worth_last_ingest(c, &last);
    assert_int_equal(last.skipped, 1);
    /* A bulk of u1: t, x, r, terminal; 1120 pairs, 1500 comes after a gap (> 180 s). */
    double rec[3][4] = {{1120, 0.4, -4, 0}, {1500, 0.5, -5, 0}, {1560, 0.6, -6, 1}};
    OK(worth_observe_samples_bulk(c, "s", 1, "u1", &rec[0][0], 3, 0, &in));
    assert_int_equal(in.paired, 2);
    assert_int_equal(in.gaps, 1);
    assert_int_equal(in.seq, 3);
    /* Out of order within a request: refused whole, the index names the sample. */
    worth_sample back[2] = {{"u2", 2000, &x[0], 0, 0}, {"u2", 1990, &x[1], 0, 0}};
    assert_int_equal(worth_observe_samples(c, "s", 1, back, 2, &in), WORTH_E_OUT_OF_ORDER);
    assert_int_equal(worth_error_index(c), 1);
    assert_string_equal(worth_error_name(c), "out_of_order");
    /* Transitions with pseq: a resend at or below the last pseq of the source is skipped. */
    double tr[2][4] = {{0.1, 1, 0.2, 0}, {0.2, 1, 0.3, 0}};
    OK(worth_observe_bulk_pseq(c, "s", 1, &tr[0][0], 2, "g", 10, 0, &in));
    assert_int_equal(in.skipped, 0);
    OK(worth_observe_bulk_pseq(c, "s", 1, &tr[0][0], 2, "g", 11, 0, &in));
    assert_int_equal(in.skipped, 1); /* pseq 11 was logged, 12 is new */
    worth_transition t = {
        .x = &x[0], .r = 1, .x_next = &x[1], .source = "g", .t = NAN, .dt = NAN, .pseq = 12};
    uint64_t seq = 0;
    OK(worth_observe(c, "s", 1, &t, &seq));
    worth_last_ingest(c, &last);
    assert_int_equal(last.skipped, 1);
    t.pseq = 13;
    OK(worth_observe_queue(c, "s", 1, &t, NULL));
    t.pseq = 13;
    OK(worth_observe_queue(c, "s", 1, &t, NULL));
    OK(worth_flush(c, &seq));
    worth_last_ingest(c, &last);
    assert_int_equal(last.skipped, 1);
    assert_int_equal(last.seq, seq);
    /* A bad record names its index; the error index is -1 when none is named. */
    double bad[2][4] = {{0.1, 1, 0.2, 0}, {0.1, 1, 0.2, 7}};
    assert_int_equal(worth_observe_bulk_pseq(c, "s", 1, &bad[0][0], 2, NULL, 0, 0, &in),
                     WORTH_E_BAD_PARAM);
    assert_int_equal(worth_error_index(c), 1);
    assert_int_equal(worth_model_drop(c, "nosuch"), WORTH_E_NO_SUCH_MODEL);
    assert_int_equal(worth_error_index(c), -1);
    worth_close(c);
}

struct progress {
    unsigned calls, last;
};

static void on_pass(void *ctx, unsigned pass, unsigned of, double change)
{
    struct progress *p = ctx;
    assert_int_equal(pass, p->last + 1);
    assert_int_equal(of, 4);
    assert_true(change >= 0);
    p->last = pass;
    p->calls++;
}

static void checkpoints_rollback_backup_train(void **state)
{
    (void)state;
    worth_client *c = open_client();
    create(c, "b");
    double x = 0.5;
    worth_transition t = {.x = &x, .r = 2.0, .terminal = 1, .t = NAN, .dt = NAN};
    for (int i = 0; i < 5; i++)
        OK(worth_observe(c, "b", 1, &t, NULL));
    int64_t id = 0;
    uint64_t seq = 0;
    OK(worth_checkpoint(c, "b", "first", &id, &seq));
    assert_true(id > 0);
    assert_int_equal(seq, 5);
    worth_value_t before;
    OK(worth_value(c, "b", &x, 1, NULL, &before));
    t.r = 9.0;
    for (int i = 0; i < 7; i++)
        OK(worth_observe(c, "b", 1, &t, NULL));
    const char *json = NULL;
    OK(worth_checkpoints(c, "b", &json));
    assert_non_null(strstr(json, "\"label\":\"first\""));
    uint64_t undone = 0, replayed = 9;
    OK(worth_rollback(c, "b", id, 0, 0, 0, 0, &undone, &replayed));
    assert_int_equal(undone, 7);
    assert_int_equal(replayed, 0);
    worth_value_t after;
    OK(worth_value(c, "b", &x, 1, NULL, &after));
    for (size_t i = 0; i < before.n; i++)
        assert_true(after.values[i] == before.values[i]);
    /* A window: replay with seq 6..8 excluded (they were rolled back already: 0 undone). */
    OK(worth_rollback(c, "b", id, 1, 's', 6, 8, &undone, &replayed));
    assert_int_equal(undone, 0);

    struct progress pr = {0, 0};
    worth_train_t rep;
    OK(worth_train(c, "b", "rp", 4, on_pass, &pr, &rep));
    assert_int_equal(rep.passes, pr.calls);
    assert_true(rep.passes >= 1 && rep.passes <= 4);

    /* Backups go into worthd's --backup-dir: by default "backups" beside its database. */
    char path[PATH_MAX + 64], want[PATH_MAX + 64], real[PATH_MAX];
    assert_non_null(realpath(dir, real));
    snprintf(want, sizeof want, "%s/backups/backup.db", real);
    uint64_t bytes = 0;
    OK(worth_backup(c, "backup.db", path, sizeof path, &bytes));
    assert_true(bytes > 0);
    assert_string_equal(path, want);
    assert_int_equal(access(path, R_OK), 0);
    OK(worth_backup(c, NULL, path, sizeof path, NULL)); /* a name of worthd's own */
    assert_int_equal(strncmp(path, want, strlen(want) - strlen("backup.db")), 0);
    assert_non_null(strstr(path, "/worthd-"));
    assert_int_equal(worth_backup(c, "../backup.db", path, sizeof path, NULL), WORTH_E_BAD_PARAM);
    assert_string_equal(worth_error_name(c), "bad_param");
    OK(worth_model_drop(c, "b"));
    worth_close(c);
}

static void server_errors_keep_their_codes(void **state)
{
    (void)state;
    worth_client *c = open_client();
    double x[2] = {0.1, 0.2};
    worth_value_t v;
    assert_int_equal(worth_value(c, "nope", x, 1, NULL, &v), WORTH_E_NO_SUCH_MODEL);
    assert_string_equal(worth_error_name(c), "no_such_model");
    assert_non_null(strstr(worth_error_message(c), "nope"));
    create(c, "e");
    assert_int_equal(worth_value(c, "e", x, 2, NULL, &v), WORTH_E_BAD_DIMENSION);
    assert_string_equal(worth_error_name(c), "bad_dimension");
    double nan = NAN;
    worth_transition t = {.x = &nan, .r = 1, .terminal = 1, .t = NAN, .dt = NAN};
    assert_int_equal(worth_observe(c, "e", 1, &t, NULL), WORTH_E_BAD_NUMBER);
    char spec[600];
    snprintf(spec, sizeof spec, SPEC, "e");
    assert_int_equal(worth_model_create(c, spec, NULL), WORTH_E_MODEL_EXISTS);
    assert_int_equal(worth_train(c, "e", "td", 1, NULL, NULL, NULL), WORTH_E_UNSUPPORTED);
    /* A batch with a bad element: the error names its index. */
    worth_set_batch_max(c, 100);
    double good = 0.5;
    worth_transition ok = {.x = &good, .r = 1, .terminal = 1, .t = NAN, .dt = NAN};
    assert_int_equal(worth_observe_queue(c, "e", 1, &ok, NULL), 0);
    assert_int_equal(worth_observe_queue(c, "e", 1, &t, NULL), 0);
    assert_int_equal(worth_flush(c, NULL), WORTH_E_BAD_NUMBER);
    assert_non_null(strstr(worth_error_message(c), "batch index 1"));
    /* The connection still works after errors; a raw request too. */
    const char *reply = NULL;
    assert_int_equal(worth_request(c, "{\"op\":\"hello\"}", &reply), 0);
    assert_non_null(strstr(reply, "\"protocol\":1"));
    assert_int_equal(worth_request(c, "{\"op\":\"nope\"}", &reply), WORTH_E_UNKNOWN_OP);
    worth_close(c);
}

static void server_down(void **state)
{
    (void)state;
    char path[400], err[256] = "";
    snprintf(path, sizeof path, "%s/nobody.sock", dir);
    worth_opts o = {.socket_path = path};
    worth_client *c = (worth_client *)&o;
    assert_int_equal(worth_connect(&o, &c, err, sizeof err), WORTH_E_IO);
    assert_true(c == (worth_client *)&o); /* untouched */
    assert_non_null(strstr(err, "cannot connect"));
    worth_opts tcp = {.host_port = "127.0.0.1:1"};
    assert_int_equal(worth_connect(&tcp, &c, err, sizeof err), WORTH_E_IO);
    worth_opts both = {.socket_path = path, .host_port = "127.0.0.1:1"};
    assert_int_equal(worth_connect(&both, &c, err, sizeof err), WORTH_E_BAD_PARAM);
}

/*
 * A fake peer on a Unix socket: a thread accepts one connection, keeps what
 * the client sends until the first newline, answers it with reply (nothing
 * when reply is NULL), then hangs up at once (hang_up) or waits until the
 * client does.  Every wait is bounded: the listener and the connection time
 * out after 10 s.
 */
struct peer {
    char path[400];
    const char *reply;
    int hang_up;
    int lfd;
    char got[256]; /* the first line received, with its newline */
    pthread_t th;
};

static void *peer_run(void *arg)
{
    struct peer *p = arg;
    struct timeval tv = {10, 0};
    int fd = accept(p->lfd, NULL, NULL);
    if (fd < 0)
        return NULL;
    setsockopt(fd, SOL_SOCKET, SO_RCVTIMEO, &tv, sizeof tv);
    size_t n = 0;
    while (n + 1 < sizeof p->got && !memchr(p->got, '\n', n)) {
        ssize_t k = recv(fd, p->got + n, sizeof p->got - 1 - n, 0);
        if (k <= 0)
            break;
        n += (size_t)k;
    }
    p->got[n] = 0;
    if (p->reply)
        (void)!send(fd, p->reply, strlen(p->reply), MSG_NOSIGNAL);
    char buf[256];
    while (!p->hang_up && recv(fd, buf, sizeof buf, 0) > 0)
        ;
    close(fd);
    return NULL;
}

static void peer_start(struct peer *p, const char *name, const char *reply, int hang_up)
{
    memset(p, 0, sizeof *p);
    snprintf(p->path, sizeof p->path, "%s/%s", dir, name);
    p->reply = reply;
    p->hang_up = hang_up;
    p->lfd = socket(AF_UNIX, SOCK_STREAM, 0);
    struct sockaddr_un a;
    memset(&a, 0, sizeof a);
    a.sun_family = AF_UNIX;
    assert_true(strlen(p->path) < sizeof a.sun_path);
    memcpy(a.sun_path, p->path, strlen(p->path) + 1);
    unlink(p->path);
    assert_int_equal(bind(p->lfd, (struct sockaddr *)&a, sizeof a), 0);
    assert_int_equal(listen(p->lfd, 4), 0);
    struct timeval tv = {10, 0};
    setsockopt(p->lfd, SOL_SOCKET, SO_RCVTIMEO, &tv, sizeof tv); /* bounds accept */
    assert_int_equal(pthread_create(&p->th, NULL, peer_run, p), 0);
}

static void peer_stop(struct peer *p)
{
    pthread_join(p->th, NULL);
    close(p->lfd);
    unlink(p->path);
}

/* The answer of a worthd of protocol v1 (schema/protocol.md, hello). */
static const char HELLO_V1[] =
    "{\"ok\":true,\"server\":\"worthd\",\"version\":\"0.1.0\",\"protocol\":1}\n";

static void hello_against_worthd(void **state)
{
    (void)state;
    worth_client *c = open_client(); /* worth_connect said hello and accepted the answer */
    const char *reply = NULL;
    assert_int_equal(worth_request(c, "{\"op\":\"hello\"}", &reply), 0);
    char want[64];
    snprintf(want, sizeof want, "\"protocol\":%d", WORTH_PROTOCOL_VERSION);
    assert_non_null(strstr(reply, want));
    snprintf(want, sizeof want, "\"version\":\"%s\"", worth_version());
    assert_non_null(strstr(reply, want)); /* worthd and the library are of one build */
    assert_non_null(strstr(reply, "\"server\":\"worthd\""));
    worth_close(c);
}

static void hello_refuses_other_protocols_and_peers(void **state)
{
    (void)state;
    char err[512] = "";
    worth_client *c = NULL;
    struct peer p;

    /* A worthd of protocol 2: unsupported, naming both versions. */
    peer_start(&p, "v2.sock",
               "{\"ok\":true,\"server\":\"worthd\",\"version\":\"9.1.0\",\"protocol\":2}\n", 0);
    worth_opts o = {.socket_path = p.path, .timeout_ms = 5000};
    assert_int_equal(worth_connect(&o, &c, err, sizeof err), WORTH_E_UNSUPPORTED);
    assert_null(c);
    peer_stop(&p);
    assert_string_equal(p.got, "{\"op\":\"hello\"}\n"); /* the one request it sent */
    char want[128];
    snprintf(want, sizeof want, "speaks protocol %d", WORTH_PROTOCOL_VERSION);
    assert_non_null(strstr(err, "worthd 9.1.0"));
    assert_non_null(strstr(err, "speaks protocol 2;"));
    assert_non_null(strstr(err, want));
    assert_non_null(strstr(err, worth_version()));

    /* A peer that is not worthd: a line that is not JSON, or another server's JSON. */
    peer_start(&p, "ssh.sock", "SSH-2.0-OpenSSH_9.2p1 Debian-2\r\n", 0);
    o.socket_path = p.path;
    assert_int_equal(worth_connect(&o, &c, err, sizeof err), WORTH_E_IO);
    peer_stop(&p);
    assert_non_null(strstr(err, "is not worthd"));
    assert_non_null(strstr(err, "SSH-2.0"));
    peer_start(&p, "other.sock", "{\"ok\":true,\"server\":\"other\",\"protocol\":1}\n", 0);
    o.socket_path = p.path;
    assert_int_equal(worth_connect(&o, &c, err, sizeof err), WORTH_E_IO);
    peer_stop(&p);
    assert_non_null(strstr(err, "is not worthd"));

    /* A peer that never answers: connect itself times out. */
    peer_start(&p, "mute.sock", NULL, 0);
    o.socket_path = p.path;
    o.timeout_ms = 200;
    assert_int_equal(worth_connect(&o, &c, err, sizeof err), WORTH_E_IO);
    peer_stop(&p);
    assert_non_null(strstr(err, "timed out"));
    assert_null(c);
}

static void timeout_and_hang_up(void **state)
{
    (void)state;
    /* A peer that answers hello and then never again. */
    struct peer p;
    peer_start(&p, "silent.sock", HELLO_V1, 0);
    worth_opts o = {.socket_path = p.path, .timeout_ms = 200};
    worth_client *c = NULL;
    assert_int_equal(worth_connect(&o, &c, NULL, 0), 0);
    struct timespec t0, t1;
    clock_gettime(CLOCK_MONOTONIC, &t0);
    const char *reply;
    assert_int_equal(worth_request(c, "{\"op\":\"hello\"}", &reply), WORTH_E_IO);
    clock_gettime(CLOCK_MONOTONIC, &t1);
    double s = (double)(t1.tv_sec - t0.tv_sec) + (t1.tv_nsec - t0.tv_nsec) * 1e-9;
    assert_true(s >= 0.19 && s < 5.0);
    assert_non_null(strstr(worth_error_message(c), "timed out"));
    /* After a timeout the connection is closed: later calls fail at once. */
    assert_int_equal(worth_request(c, "{\"op\":\"hello\"}", &reply), WORTH_E_IO);
    worth_close(c);
    peer_stop(&p);

    /* A peer that answers hello and hangs up. */
    peer_start(&p, "gone.sock", HELLO_V1, 1);
    o.socket_path = p.path;
    assert_int_equal(worth_connect(&o, &c, NULL, 0), 0);
    peer_stop(&p); /* joined: the peer has closed its end */
    assert_int_equal(worth_request(c, "{\"op\":\"hello\"}", &reply), WORTH_E_IO);
    const char *m = worth_error_message(c);
    assert_true(strstr(m, "closed") || strstr(m, "lost")); /* EOF, or a reset on send */
    worth_close(c);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(models_and_ingest),
        cmocka_unit_test(checkpoints_rollback_backup_train),
        cmocka_unit_test(samples_and_producer_sequences),
        cmocka_unit_test(server_errors_keep_their_codes),
        cmocka_unit_test(server_down),
        cmocka_unit_test(hello_against_worthd),
        cmocka_unit_test(hello_refuses_other_protocols_and_peers),
        cmocka_unit_test(timeout_and_hang_up),
    };
    return cmocka_run_group_tests(tests, start_daemon, stop_daemon);
}
