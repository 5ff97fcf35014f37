/*
 * fuzz_proto.c - libFuzzer target: worthd's framing and request dispatcher.
 *
 * One input is the byte stream a client sends on one connection.  Each input
 * is run twice.
 *
 * 1. Framing, split at every byte (a differential check).  The stream goes
 *    through the framer (daemon/net/frame.c, the code the server uses) whole,
 *    then one byte per read, then in two reads cut at byte k for every k
 *    (inputs up to 64 bytes) or for 64 chosen k (evenly spaced and beside
 *    each newline).  The one-byte run also parks every third event, which
 *    must then come back unchanged.  The sequence of framed events (kind,
 *    length, bytes) must be identical in every run; any difference aborts.
 *    A stand-in decides which lines are bulk headers here: a line holding
 *    "observe.bulk" and "count":N with N in 1..8 announces N records of a
 *    2-dimensional model (48 bytes each).
 *
 * 2. The real dispatcher.  The stream goes through the framer into
 *    daemon/proto/proto.c as the server's pump would feed it, with EOF at the
 *    end.  What is real: framing, cJSON parsing with the request arena, every
 *    op's validation, spec.c and model_new, the learner threads, the writer
 *    thread and its SQLite database (a temporary directory made once in
 *    LLVMFuzzerInitialize, WAL, synchronous=NORMAL), durable acks, parking on
 *    a full queue, training, checkpoints, rollbacks, events.  What is not:
 *    the libuv loop and the socket; this file implements the connection API
 *    of server.h over one in-memory connection, and delivers the threads'
 *    events on its own thread as the server's async handle would.  Backups
 *    are real too (store/backup.c, into a backup directory inside the
 *    temporary one), with one seam on purpose: every backup is named
 *    backup.db (linker --wrap, after the request's name was validated), so
 *    inputs cannot fill the disk with backups of names of their own.
 *    Checked for every input: every reply is one line holding a JSON object
 *    with "ok" (or a training "progress" line), every error carries a code
 *    from include/worth/errors.h, and the connection gets exactly one reply
 *    per request it sent (the last one too, when it closes after an error or
 *    at EOF).  Between inputs every model is dropped and every learner joined,
 *    so each input starts from the same state and a crash reproduces alone.
 *
 * Limits (kept small so the odd paths are reachable): max_line 1024 bytes,
 * max_batch 8, queue 8 records, 4 models, an automatic checkpoint every 50
 * transitions.  Every wait for a thread is bounded (WAIT_S); a request that
 * never gets its reply aborts as a finding.  The connection needs "auth" (the
 * token is "s3cret") when the input's length is 7 modulo 8.
 */
#include <cjson/cJSON.h>
#include <errno.h>
#include <pthread.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "core/arena.h"
#include "store/backup.h"
#include "store/db.h"
#include "net/frame.h"
#include "live/learner.h"
#include "common/mem.h"
#include "proto/proto.h"
#include "common/say.h"
#include "worth/errors.h"
#include "store/writer.h"

#define MAX_LINE   1024
#define MAX_BATCH  8 /* and the queue: two batches in a row park the second */
#define MAX_MODELS 4
/* Seconds a reply or a learner may take before the input counts as hung. */
#define WAIT_S 20
/* Bytes of one bulk record of the stand-in's 2-dimensional model. */
#define TOY_REC (6 * sizeof(double))

int LLVMFuzzerInitialize(int *argc, char ***argv);
int LLVMFuzzerTestOneInput(const uint8_t *data, size_t n);

static void die(const char *what, const char *detail)
{
    fprintf(stderr, "fuzz_proto: %s%s%s\n", what, detail ? ": " : "", detail ? detail : "");
    abort();
}

/* ---- part 1: the framing differential ---------------------------------------------------- */

struct flog {
    unsigned char *b;
    size_t len, cap;
};

static void flog_put(struct flog *l, const void *p, size_t n)
{
    if (l->len + n > l->cap) {
        l->cap = (l->len + n) * 2 + 256;
        l->b = mem_realloc(l->b, l->cap);
    }
    if (n)
        memcpy(l->b + l->len, p, n);
    l->len += n;
}

static void flog_event(struct flog *l, const frame_ev_t *ev)
{
    unsigned char k = (unsigned char)ev->kind;
    uint64_t len = ev->len, got = ev->got;
    flog_put(l, &k, 1);
    flog_put(l, &len, sizeof len);
    flog_put(l, &got, sizeof got);
    if (ev->kind == FRAME_LINE || ev->kind == FRAME_BLANK)
        flog_put(l, ev->line, ev->len);
    else if (ev->kind == FRAME_BULK)
        flog_put(l, ev->data, ev->len);
}

static const char *find(const char *s, size_t n, const char *pat)
{
    size_t m = strlen(pat);
    for (size_t i = 0; i + m <= n; i++)
        if (memcmp(s + i, pat, m) == 0)
            return s + i;
    return NULL;
}

/* The stand-in's rule: payload bytes announced by line, 0 when it is no bulk header. */
static size_t toy_bulk_bytes(const char *line, size_t len)
{
    if (!find(line, len, "\"observe.bulk\""))
        return 0;
    const char *c = find(line, len, "\"count\":");
    if (!c)
        return 0;
    const char *q = c + 8, *end = line + len;
    size_t k = 0;
    while (q < end && *q >= '0' && *q <= '9' && k <= MAX_BATCH)
        k = k * 10 + (size_t)(*q++ - '0');
    return k >= 1 && k <= MAX_BATCH ? k * TOY_REC : 0;
}

/* Handles every event the framer has; returns 1 once the stream has ended (TOO_LONG, TRUNCATED). */
static int toy_drain(frame_t *f, int eof, struct flog *log, unsigned *evno, unsigned park_every)
{
    for (;;) {
        frame_ev_t ev;
        enum frame_kind k = frame_next(f, eof, &ev);
        if (k == FRAME_MORE)
            return 0;
        flog_event(log, &ev);
        if (k == FRAME_TOO_LONG || k == FRAME_TRUNCATED)
            return 1;
        if (k == FRAME_LINE && (ev.len > MAX_LINE || memchr(ev.line, '\n', ev.len)))
            die("framing", "a line is longer than max_line or holds a newline");
        if (park_every && ++*evno % park_every == 0) {
            /* Parked: not consumed, so the next call must return the same event. */
            frame_ev_t again;
            frame_next(f, eof, &again);
            const void *a = k == FRAME_BULK ? (const void *)ev.data : ev.line;
            const void *b = k == FRAME_BULK ? (const void *)again.data : again.line;
            if (again.kind != ev.kind || again.len != ev.len || memcmp(a, b, ev.len) != 0)
                die("framing", "an event handed back after parking came again changed");
        }
        if (k == FRAME_LINE) {
            size_t bytes = toy_bulk_bytes(ev.line, ev.len);
            if (bytes)
                frame_expect_bulk(f, bytes);
        }
        frame_consume(f);
    }
}

/*
 * Frames d[0..n) delivered in reads that end at each of the ncut cut points
 * (ascending, then n), or one byte per read when bytewise; logs the events.
 */
static void toy_run(const uint8_t *d, size_t n, const size_t *cut, size_t ncut, int bytewise,
                    unsigned park_every, struct flog *log)
{
    static frame_t f; /* one framer for every run: its buffers outlive them */
    if (!f.in)
        frame_init(&f, MAX_LINE, NULL);
    frame_reset(&f);
    unsigned evno = 0;
    size_t pos = 0, next_cut = 0;
    int ended = 0;
    while (pos < n && !ended) {
        size_t end = n;
        if (bytewise)
            end = pos + 1;
        else if (next_cut < ncut)
            end = cut[next_cut];
        while (pos < end && !ended) {
            size_t took = frame_feed(&f, d + pos, end - pos);
            pos += took;
            ended = toy_drain(&f, 0, log, &evno, park_every);
            if (!took && !ended)
                die("framing", "the input buffer is full and the framer wants more");
        }
        if (!bytewise && next_cut < ncut)
            next_cut++;
    }
    if (!ended)
        toy_drain(&f, 1, log, &evno, park_every);
}

/* Returns 1 when two event logs differ. */
static int flog_differ(const struct flog *a, const struct flog *b)
{
    return a->len != b->len || (a->len && memcmp(a->b, b->b, a->len) != 0);
}

static void framing_check(const uint8_t *d, size_t n)
{
    struct flog ref = {0}, alt = {0};
    toy_run(d, n, NULL, 0, 0, 0, &ref);

    toy_run(d, n, NULL, 0, 1, 3, &alt);
    if (flog_differ(&alt, &ref))
        die("framing", "one byte per read frames differently from the whole input");

    size_t ks[128], nk = 0;
    if (n <= 64) {
        for (size_t k = 1; k < n; k++)
            ks[nk++] = k;
    } else {
        for (size_t i = 1; i <= 48; i++)
            ks[nk++] = i * n / 49;
        for (size_t i = 0; i < n && nk < 126; i++)
            if (d[i] == '\n') {
                ks[nk++] = i;
                ks[nk++] = i + 1;
            }
    }
    for (size_t i = 0; i < nk; i++) {
        if (ks[i] == 0 || ks[i] >= n)
            continue;
        alt.len = 0;
        toy_run(d, n, &ks[i], 1, 0, 0, &alt);
        if (flog_differ(&alt, &ref)) {
            char k[32];
            snprintf(k, sizeof k, "k = %zu", ks[i]);
            die("framing: two reads cut at byte k frame differently from the whole input", k);
        }
    }
    mem_free(ref.b);
    mem_free(alt.b);
}

/* ---- part 2: the connection API of net/conn.h, over one in-memory connection ------------- */

struct conns {
    int unused;
};

struct conn {
    uint64_t id;
    void *state; /* the protocol's */
    frame_t fr;
    int waiting, parked, close_after, closed;
    char *out; /* every byte sent to the client */
    size_t out_len, out_cap;
};

static struct conns set;
static struct proto *proto;
/*
 * The buffer budget of the one connection: its first input buffer and a
 * little more, so that bulk payloads of a few records fit and larger ones are
 * refused (over_budget, payload skipped) -- both paths get fuzzed.
 */
static budget_t budget = {.cap = FRAME_IN_START + 3000};
static struct conn *live; /* the one open connection, or NULL */
static uint64_t next_conn_id;

uint64_t conn_id(const struct conn *c)
{
    return c->id;
}

void *conn_state(struct conn *c)
{
    return c->state;
}

void conn_set_authed(struct conn *c)
{
    (void)c;
}

void conn_send(struct conn *c, const char *buf, size_t len)
{
    if (c->closed)
        return;
    if (c->out_len + len > c->out_cap) {
        c->out_cap = (c->out_len + len) * 2 + 4096;
        c->out = mem_realloc(c->out, c->out_cap);
    }
    memcpy(c->out + c->out_len, buf, len);
    c->out_len += len;
}

/* As the server: closes once no reply waits (the socket takes every byte at once here). */
static void maybe_close(struct conn *c)
{
    if (c->close_after && !c->closed && proto_conn_quiet(proto, c))
        c->closed = 1;
}

void conn_close_after_reply(struct conn *c)
{
    c->close_after = 1;
    maybe_close(c);
}

int conn_expect_bulk(struct conn *c, size_t nbytes)
{
    return frame_expect_bulk(&c->fr, nbytes);
}

void conn_skip_bulk(struct conn *c, size_t nbytes)
{
    frame_skip_bulk(&c->fr, nbytes);
}

void conn_wait(struct conn *c)
{
    c->waiting = 1;
}

void conn_resume(struct conn *c)
{
    c->waiting = 0;
}

void conns_each(struct conns *s, void (*fn)(struct conn *c, void *ctx), void *ctx)
{
    (void)s;
    if (live && !live->closed)
        fn(live, ctx);
}

struct conn *conns_find(struct conns *s, uint64_t id)
{
    (void)s;
    return live && live->id == id && !live->closed ? live : NULL;
}

void conns_count(const struct conns *s, size_t *n, size_t *tcp, size_t *unauthed)
{
    (void)s;
    *n = live && !live->closed;
    *tcp = *n;
    *unauthed = 0;
}

/* ---- the threads' events ---------------------------------------------------------------- */

static pthread_mutex_t mu = PTHREAD_MUTEX_INITIALIZER;
static pthread_cond_t cv = PTHREAD_COND_INITIALIZER;
static event_t *box, *draining;
static size_t n_box, cap_box, cap_draining;
static int woken;
static unsigned long n_created, n_exited; /* learners started, learner threads ended */

static void post_event(void *ctx, const event_t *ev)
{
    (void)ctx;
    pthread_mutex_lock(&mu);
    if (n_box == cap_box) {
        cap_box = cap_box ? 2 * cap_box : 64;
        box = mem_realloc(box, cap_box * sizeof *box);
    }
    box[n_box++] = *ev;
    if (ev->kind == EV_EXITED)
        n_exited++;
    woken = 1;
    pthread_cond_signal(&cv);
    pthread_mutex_unlock(&mu);
}

static void wake_loop(void *ctx)
{
    (void)ctx;
    pthread_mutex_lock(&mu);
    woken = 1;
    pthread_cond_signal(&cv);
    pthread_mutex_unlock(&mu);
}

static struct writer *writer;
static config_t opts;
static char dir[256], db_path[300], backup_dir[300], backup_path[400];
static struct backup_dir *backups;

/* Delivers every posted event, as the server's async callback does. */
static void drain_events(void)
{
    pthread_mutex_lock(&mu);
    size_t n = n_box;
    if (n > cap_draining) {
        mem_free(draining);
        draining = mem_alloc(cap_box * sizeof *draining);
        cap_draining = cap_box;
    }
    if (n)
        memcpy(draining, box, n * sizeof *box);
    n_box = 0;
    pthread_mutex_unlock(&mu);
    for (size_t i = 0; i < n; i++)
        proto_event(proto, &draining[i]);
    if (live)
        maybe_close(live);
}

/* Waits until a thread posts or wakes us; 0 after WAIT_S seconds without. */
static int wait_wake(void)
{
    struct timespec until;
    clock_gettime(CLOCK_REALTIME, &until);
    until.tv_sec += WAIT_S;
    int rc = 0;
    pthread_mutex_lock(&mu);
    while (!woken && rc != ETIMEDOUT)
        rc = pthread_cond_timedwait(&cv, &mu, &until);
    int got = woken;
    woken = 0;
    pthread_mutex_unlock(&mu);
    return got;
}

/* Learners are counted so that cleanup can wait for every one to end. */
struct learner *__real_learner_new(const char *name, char *spec_json, struct model *m,
                                   const learner_opts_t *o, event_post_fn post, event_wake_fn wake,
                                   void *ctx);
struct learner *__wrap_learner_new(const char *name, char *spec_json, struct model *m,
                                   const learner_opts_t *o, event_post_fn post, event_wake_fn wake,
                                   void *ctx);
struct learner *__wrap_learner_new(const char *name, char *spec_json, struct model *m,
                                   const learner_opts_t *o, event_post_fn post, event_wake_fn wake,
                                   void *ctx)
{
    pthread_mutex_lock(&mu);
    n_created++;
    pthread_mutex_unlock(&mu);
    return __real_learner_new(name, spec_json, m, o, post, wake, ctx);
}

/* Backups go to one file in the backup directory, whatever name the input gives (or none). */
void __real_writer_backup(struct writer *w, const char *name, uint64_t conn_id);
void __wrap_writer_backup(struct writer *w, const char *name, uint64_t conn_id);
void __wrap_writer_backup(struct writer *w, const char *name, uint64_t conn_id)
{
    (void)name;
    __real_writer_backup(w, "backup.db", conn_id); /* replaces the last: a backup worthd wrote */
}

/* ---- part 2: driving the dispatcher ------------------------------------------------------ */

struct tally {
    size_t requests; /* requests that must get exactly one reply */
};

/* The server's pump, for the one connection: returns when it needs input, an event or closed. */
static void pump(struct conn *c, int eof, struct tally *t)
{
    while (!c->close_after && !c->waiting && !c->parked) {
        frame_ev_t ev;
        enum frame_kind k = frame_next(&c->fr, eof, &ev);
        if (k == FRAME_MORE)
            break;
        if (k == FRAME_TRUNCATED) {
            t->requests++;
            proto_bulk_truncated(proto, c, ev.got);
            conn_close_after_reply(c);
            break;
        }
        if (k == FRAME_TOO_LONG) {
            t->requests++;
            proto_line_too_long(proto, c);
            conn_close_after_reply(c);
            break;
        }
        if (k == FRAME_BULK) {
            if (proto_bulk(proto, c, ev.data, ev.len) == PROTO_PARK) {
                c->parked = 1;
                break;
            }
            t->requests++;
            frame_consume(&c->fr);
            continue;
        }
        if (k == FRAME_LINE) {
            if (proto_line(proto, c, ev.line, ev.len) == PROTO_PARK) {
                c->parked = 1;
                break;
            }
            /* A bulk header that was accepted is answered after its payload. */
            if (!frame_in_bulk(&c->fr))
                t->requests++;
        }
        frame_consume(&c->fr);
    }
    if (eof && !c->close_after && !c->waiting && !c->parked && !frame_in_bulk(&c->fr))
        conn_close_after_reply(c); /* the client finished */
}

/* Waits for an event and delivers it; aborts when none comes in WAIT_S seconds. */
static void await(const char *what)
{
    if (!wait_wake())
        die("no event within the time limit while waiting for", what);
    drain_events();
}

static int known_code(const char *name)
{
#define KNOWN(suffix, val, wire, msg)                                                              \
    if (strcmp(name, wire) == 0 && (val) != 0)                                                     \
        return 1;
    WORTH_ERRORS(KNOWN)
#undef KNOWN
    return 0;
}

/* Checks every reply line; returns how many answer a request (progress lines do not). */
static size_t check_replies(const char *b, size_t len)
{
    size_t answers = 0;
    if (len && b[len - 1] != '\n')
        die("reply", "the output does not end with a newline");
    for (size_t at = 0; at < len;) {
        const char *nl = memchr(b + at, '\n', len - at);
        size_t n = (size_t)(nl - (b + at));
        const char *end = NULL;
        cJSON *j = cJSON_ParseWithLengthOpts(b + at, n, &end, 0);
        if (!j || !cJSON_IsObject(j) || end != b + at + n) {
            fprintf(stderr, "reply: %.*s\n", (int)(n > 300 ? 300 : n), b + at);
            die("reply", "a reply line is not one JSON object");
        }
        const cJSON *ok = cJSON_GetObjectItemCaseSensitive(j, "ok");
        if (cJSON_IsBool(ok)) {
            answers++;
            if (cJSON_IsFalse(ok)) {
                const cJSON *e = cJSON_GetObjectItemCaseSensitive(j, "error");
                const cJSON *code = cJSON_GetObjectItemCaseSensitive(e, "code");
                const cJSON *msg = cJSON_GetObjectItemCaseSensitive(e, "message");
                if (!cJSON_IsString(code) || !known_code(code->valuestring) ||
                    !cJSON_IsString(msg)) {
                    fprintf(stderr, "reply: %.*s\n", (int)(n > 300 ? 300 : n), b + at);
                    die("reply", "an error without a known code and a message");
                }
            }
        } else if (!cJSON_IsObject(cJSON_GetObjectItemCaseSensitive(j, "progress"))) {
            fprintf(stderr, "reply: %.*s\n", (int)(n > 300 ? 300 : n), b + at);
            die("reply", "a line with neither \"ok\" nor \"progress\"");
        }
        cJSON_Delete(j);
        at += n + 1;
    }
    arena_reset();
    return answers;
}

static void fuzz_conn_open(struct conn *c, int needs_auth)
{
    memset(c, 0, sizeof *c);
    c->id = ++next_conn_id;
    c->state = proto_conn_open(proto, c, needs_auth);
    if (frame_init(&c->fr, MAX_LINE, &budget) != 0)
        die("budget", "the first buffer of the only connection does not fit");
    live = c;
}

static void conn_end(struct conn *c)
{
    c->closed = 1;
    live = NULL;
    frame_close(&c->fr);
    if (budget.used != 0)
        die("budget", "bytes stay charged to the budget after the connection closed");
    proto_conn_close(proto, c, c->state);
    mem_free(c->out);
}

static void real_run(const uint8_t *d, size_t n)
{
    struct conn c;
    struct tally t = {0};
    fuzz_conn_open(&c, n % 8 == 7);
    size_t pos = 0;
    int eof = 0;
    for (unsigned turns = 0;; turns++) {
        if (turns > 1000000)
            die("dispatcher", "the connection makes no progress");
        pump(&c, eof, &t);
        if (c.waiting || c.parked || (c.close_after && !c.closed)) {
            await(c.waiting ? "a reply" : c.parked ? "queue space" : "durable acks");
            c.parked = 0; /* every wake-up retries a parked request */
            continue;
        }
        if (c.closed)
            break;
        if (pos < n) {
            size_t took = frame_feed(&c.fr, d + pos, n - pos);
            if (!took)
                die("dispatcher", "the input buffer is full and the framer wants more");
            pos += took;
            continue;
        }
        if (!eof) {
            eof = 1;
            continue;
        }
        die("dispatcher", "EOF handled and the connection still open");
    }
    size_t answers = check_replies(c.out, c.out_len);
    if (answers != t.requests) {
        char msg[96];
        snprintf(msg, sizeof msg, "%zu requests, %zu replies", t.requests, answers);
        die("the connection did not get one reply per request", msg);
    }
    conn_end(&c);
}

/* Sends one line on c and waits for its reply; returns the reply (parsed, arena). */
static cJSON *cleanup_request(struct conn *c, const char *line)
{
    c->out_len = 0;
    CHECK(proto_line(proto, c, line, strlen(line)) == PROTO_DONE);
    while (c->waiting || !proto_conn_quiet(proto, c))
        await(line);
    cJSON *j = cJSON_ParseWithLengthOpts(c->out, c->out_len, NULL, 0);
    if (!j)
        die("cleanup: no reply to", line);
    return j;
}

/* Drops every model and waits until every learner has ended and the writer has caught up. */
static void cleanup(void)
{
    struct conn c;
    fuzz_conn_open(&c, 0);
    cJSON *list = cleanup_request(&c, "{\"op\":\"model.list\"}");
    const cJSON *models = cJSON_GetObjectItemCaseSensitive(list, "models"), *m;
    char names[MAX_MODELS + 1][MODEL_NAME_MAX + 1];
    size_t k = 0;
    cJSON_ArrayForEach(m, models)
    {
        const cJSON *name = cJSON_GetObjectItemCaseSensitive(m, "model");
        if (k <= MAX_MODELS && cJSON_IsString(name))
            snprintf(names[k++], sizeof names[0], "%s", name->valuestring);
    }
    cJSON_Delete(list);
    arena_reset();
    for (size_t i = 0; i < k; i++) {
        char line[160];
        snprintf(line, sizeof line, "{\"op\":\"model.drop\",\"model\":\"%s\"}", names[i]);
        cJSON_Delete(cleanup_request(&c, line));
        arena_reset();
    }
    for (;;) {
        pthread_mutex_lock(&mu);
        int done = n_exited == n_created;
        pthread_mutex_unlock(&mu);
        if (done)
            break;
        await("learners to end");
    }
    /* The writer runs jobs in order: once this one answers, every drop has been released. */
    cJSON_Delete(cleanup_request(&c, "{\"op\":\"events\",\"limit\":1}"));
    arena_reset();
    drain_events();
    conn_end(&c);
}

/* ---- libFuzzer entry points --------------------------------------------------------------- */

static void teardown(void)
{
    if (!proto)
        return;
    proto_shutdown(proto);
    writer_free(writer);
    drain_events();
    proto_free(proto);
    proto = NULL;
    arena_uninstall();
    char p[400];
    const char *sfx[] = {"", "-wal", "-shm"};
    for (size_t i = 0; i < 3; i++) {
        snprintf(p, sizeof p, "%s%s", db_path, sfx[i]);
        unlink(p);
    }
    backup_dir_free(backups);
    unlink(backup_path);
    rmdir(backup_dir);
    rmdir(dir);
}

int LLVMFuzzerInitialize(int *argc, char ***argv)
{
    (void)argc;
    (void)argv;
    say_set_level(getenv("FUZZ_LOG") ? SAY_DEBUG : SAY_ERROR); /* FUZZ_LOG=1: the daemon's log */
    const char *tmp = getenv("TMPDIR");
    snprintf(dir, sizeof dir, "%s/worth-fuzz-XXXXXX", tmp && *tmp ? tmp : "/tmp");
    if (!mkdtemp(dir))
        die("cannot make a temporary directory", dir);
    snprintf(db_path, sizeof db_path, "%s/fuzz.db", dir);
    snprintf(backup_dir, sizeof backup_dir, "%s/backups", dir);
    snprintf(backup_path, sizeof backup_path, "%s/backup.db", backup_dir);
    opts = (config_t){
        .socket_path = NULL,
        .token = "s3cret",
        .max_line = MAX_LINE,
        .max_batch = MAX_BATCH,
        .queue = MAX_BATCH,
        .max_models = MAX_MODELS,
        .db_path = db_path,
        .sync_full = 0,
        .checkpoint_every = 50,
        .keep = 3,
        .max_query_work = 100000000,
    };
    char err[512];
    sqlite3 *db = NULL;
    if (backup_dir_open(backup_dir, db_path, NULL, 0600, &backups, err, sizeof err) != 0)
        die("cannot open the backup directory", err);
    if (db_open(db_path, 0, &db, err, sizeof err) != 0)
        die("cannot open the database", err);
    arena_install(1u << 20);
    writer_opts_t wo = {.keep = opts.keep, .group_max = 4096, .backups = backups};
    writer = writer_new(db, &wo, post_event, &set);
    proto = proto_new(&opts, writer, &set, post_event, wake_loop, &set);
    writer_start(writer);
    atexit(teardown);
    return 0;
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t n)
{
    framing_check(data, n);
    real_run(data, n);
    cleanup();
    return 0;
}
