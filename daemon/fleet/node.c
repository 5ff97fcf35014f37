/*
 * node.c - `worthd fleet`: a fleet node's options, its connection, the stream
 * and buckets, the leases, and the fleet thread's loop.
 *
 * Leases.  Shard p's lease is the key s<p> of bucket worth_lease, holding
 * {"node":NAME}.  It is taken with a create (no key) or a compare-and-set on
 * the revision a node saw unchanged for a whole lease time (the owner went
 * quiet), and renewed by a compare-and-set every third of a lease time.  No
 * clock is compared across machines: a taker measures the quiet time on its
 * own monotonic clock, and an owner stops learning and answering once a lease
 * time less 10% has passed since the last renewal it sent that succeeded - so
 * it has stopped before anyone may take over.  A lost compare-and-set means
 * someone took it: the shard is closed at once.
 *
 * Balance.  Every node puts a heartbeat n.<name> each tick and counts the
 * nodes whose heartbeat moved within a lease time; it takes free shards up to
 * ceil(shards / nodes) and hands the ones beyond back (checkpoint, then delete
 * the lease).  A lease left expired for two lease times is taken whatever the
 * count, so no shard is left without an owner.
 */
#include <errno.h>
#include <getopt.h>
#include <inttypes.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "common/natsurls.h"
#include "common/say.h"
#include "fleet/fleet_impl.h"
#include "worth/errors.h"

/* The value of a lease handed back (stopping, or beyond this node's share). */
#define FREE_LEASE "{\"node\":\"\"}"

static volatile sig_atomic_t stopping;

static void on_stop(int sig)
{
    (void)sig;
    stopping = 1;
}

static const char usage[] =
    "usage: worthd fleet --nats URLS [--node NAME] [--shards N] [--replicas R]\n"
    "                    [--lease-ms MS] [--checkpoint-every N] [--checkpoint-ms MS]\n"
    "                    [--metrics HOST:PORT] [--quiet]\n"
    "\n"
    "Runs worthd as one node of a fleet on NATS JetStream (doc/fleet.md).\n"
    "\n"
    "  --nats URLS            NATS servers, comma-separated (default $WORTH_NATS)\n"
    "  --node NAME            this node's name, [A-Za-z0-9_-] (default: the host name)\n"
    "  --shards N             shards of the fleet, 1..1024 (default 16); must equal the\n"
    "                         partition count of the servers' mapping of worth.in.*\n"
    "  --replicas R           replicas of the stream and buckets when this node creates\n"
    "                         them, 1..5 (default 1; 3 in production)\n"
    "  --lease-ms MS          a shard whose owner is quiet this long is taken over\n"
    "                         (default 3000, 300..600000)\n"
    "  --checkpoint-every N   checkpoint a shard after N messages (default 100000)\n"
    "  --checkpoint-ms MS     ... or MS after the last one when it learnt any (default 5000)\n"
    "  --metrics HOST:PORT    serve GET /metrics (Prometheus text) there; numeric IPv4\n"
    "  --quiet                log warnings and errors only\n";

static int name_ok(const char *s)
{
    size_t n = strlen(s);
    if (n == 0 || n > 40)
        return 0;
    for (; *s; s++)
        if (!((*s >= 'a' && *s <= 'z') || (*s >= 'A' && *s <= 'Z') || (*s >= '0' && *s <= '9') ||
              *s == '_' || *s == '-'))
            return 0;
    return 1;
}

static int num_opt(const char *name, const char *v, long long lo, long long hi, long long *out)
{
    char *end;
    errno = 0;
    long long x = strtoll(v, &end, 10);
    if (errno || *end || end == v || x < lo || x > hi) {
        fprintf(stderr, "worthd fleet: bad_param: %s \"%s\": give an integer in %lld..%lld\n", name,
                v, lo, hi);
        return -1;
    }
    *out = x;
    return 0;
}

/* Parses argv into o; returns -1 to run, else the exit code. */
static int parse(int argc, char **argv, fleet_opts_t *o)
{
    static const struct option lo[] = {
        {"nats", required_argument, 0, 'n'},
        {"node", required_argument, 0, 'N'},
        {"shards", required_argument, 0, 's'},
        {"replicas", required_argument, 0, 'r'},
        {"lease-ms", required_argument, 0, 'l'},
        {"checkpoint-every", required_argument, 0, 'c'},
        {"checkpoint-ms", required_argument, 0, 'C'},
        {"metrics", required_argument, 0, 'm'},
        {"quiet", no_argument, 0, 'q'},
        {"help", no_argument, 0, 'h'},
        {0, 0, 0, 0},
    };
    memset(o, 0, sizeof *o);
    o->urls = getenv("WORTH_NATS");
    o->shards = 16;
    o->replicas = 1;
    o->lease_ms = 3000;
    o->ckpt_every = 100000;
    o->ckpt_ms = 5000;
    if (gethostname(o->node, sizeof o->node - 1) != 0 || !name_ok(o->node))
        snprintf(o->node, sizeof o->node, "node-%ld", (long)getpid());
    optind = 1;
    int c;
    long long v;
    while ((c = getopt_long(argc, argv, "", lo, NULL)) != -1) {
        switch (c) {
        case 'n':
            o->urls = optarg;
            break;
        case 'N':
            if (!name_ok(optarg)) {
                fprintf(stderr,
                        "worthd fleet: bad_param: --node \"%s\": 1..40 of "
                        "[A-Za-z0-9_-]\n",
                        optarg);
                return 2;
            }
            snprintf(o->node, sizeof o->node, "%s", optarg);
            break;
        case 's':
            if (num_opt("--shards", optarg, 1, 1024, &v))
                return 2;
            o->shards = (unsigned)v;
            break;
        case 'r':
            if (num_opt("--replicas", optarg, 1, 5, &v))
                return 2;
            o->replicas = (unsigned)v;
            break;
        case 'l':
            if (num_opt("--lease-ms", optarg, 300, 600000, &v))
                return 2;
            o->lease_ms = v;
            break;
        case 'c':
            if (num_opt("--checkpoint-every", optarg, 1, 1000000000, &v))
                return 2;
            o->ckpt_every = (uint64_t)v;
            break;
        case 'C':
            if (num_opt("--checkpoint-ms", optarg, 10, 3600000, &v))
                return 2;
            o->ckpt_ms = v;
            break;
        case 'm': {
            struct sockaddr_in sa;
            if (fleet_http_parse(optarg, &sa) != 0) {
                fprintf(stderr,
                        "worthd fleet: bad_param: --metrics \"%s\": give HOST:PORT, HOST a "
                        "numeric IPv4 address (127.0.0.1:9465)\n",
                        optarg);
                return 2;
            }
            o->metrics = optarg;
            break;
        }
        case 'q':
            o->quiet = 1;
            break;
        case 'h':
            fputs(usage, stdout);
            return 0;
        default:
            fputs(usage, stderr);
            return 2;
        }
    }
    if (optind < argc) {
        fprintf(stderr, "worthd fleet: unexpected argument \"%s\"\n%s", argv[optind], usage);
        return 2;
    }
    if (!o->urls || !*o->urls) {
        fprintf(stderr, "worthd fleet: bad_param: give the NATS servers (--nats or $WORTH_NATS)\n");
        return 2;
    }
    return -1;
}

/* Creates stream name over subject (or accepts it as it is).  KV buckets are made here too,
 * so that allow_direct stays off: a direct get may be answered by a replica that has not yet
 * got the newest revision, and a lease or a checkpoint head must never be read stale. */
static int ensure_stream(struct node *nd, const char *name, const char *subject, int kv)
{
    jsStreamConfig sc;
    jsStreamConfig_Init(&sc);
    sc.Name = name;
    const char *subjects[1] = {subject};
    sc.Subjects = subjects;
    sc.SubjectsLen = 1;
    sc.Storage = js_FileStorage;
    sc.Replicas = nd->o.replicas;
    sc.AllowDirect = false;
    if (kv) {
        sc.MaxMsgsPerSubject = 1;
        sc.AllowRollup = true;
        sc.DenyDelete = true;
        sc.Discard = js_DiscardNew;
    }
    jsStreamInfo *si = NULL;
    jsErrCode jerr = 0;
    natsStatus st = NATS_OK;
    for (int attempt = 0; attempt < 50 && !stopping; attempt++) {
        st = js_GetStreamInfo(&si, nd->js, name, &nd->jo, &jerr);
        if (st == NATS_OK)
            break;
        st = js_AddStream(&si, nd->js, &sc, &nd->jo, &jerr);
        if (st == NATS_OK)
            break;
        usleep(200 * 1000); /* a cluster that is still electing its meta leader */
    }
    if (st != NATS_OK) {
        say_error("fleet: stream %s: %s (%d)", name, natsStatus_GetText(st), (int)jerr);
        return -1;
    }
    if (si->Config->AllowDirect)
        say_warn("fleet: stream %s allows direct gets; reads may be stale (recreate it)", name);
    jsStreamInfo_Destroy(si);
    return 0;
}

static int setup(struct node *nd)
{
    natsOptions *no = NULL;
    natsStatus st = natsOptions_Create(&no);
    if (st == NATS_OK)
        st = natsurls_set(no, nd->o.urls);
    if (st == NATS_OK)
        st = natsOptions_SetMaxReconnect(no, -1);
    if (st == NATS_OK)
        st = natsOptions_SetReconnectWait(no, 100);
    if (st == NATS_OK)
        st = natsOptions_SetSendAsap(no, true);
    if (st == NATS_OK)
        st = natsOptions_SetRetryOnFailedConnect(no, true, NULL, NULL);
    if (st == NATS_OK)
        st = natsOptions_SetName(no, nd->o.node);
    if (st == NATS_OK)
        st = natsConnection_Connect(&nd->nc, no);
    natsOptions_Destroy(no);
    if (st != NATS_OK) {
        say_error("fleet: cannot connect to %s: %s", nd->o.urls, natsStatus_GetText(st));
        return -1;
    }
    jsOptions_Init(&nd->jo);
    nd->jo.Wait = 2000;
    if (natsConnection_JetStream(&nd->js, nd->nc, &nd->jo) != NATS_OK)
        return -1;
    if (ensure_stream(nd, FLEET_STREAM, FLEET_SUBJECTS, 0) ||
        ensure_stream(nd, "KV_" FLEET_KV_LEASE, "$KV." FLEET_KV_LEASE ".>", 1) ||
        ensure_stream(nd, "KV_" FLEET_KV_CKPT, "$KV." FLEET_KV_CKPT ".>", 1))
        return -1;
    if (js_KeyValue(&nd->lease, nd->js, FLEET_KV_LEASE) != NATS_OK ||
        js_KeyValue(&nd->ckpt, nd->js, FLEET_KV_CKPT) != NATS_OK) {
        say_error("fleet: buckets: %s", nats_GetLastError(NULL));
        return -1;
    }
    char via[128];
    snprintf(via, sizeof via, "worth.via.%s.>", nd->o.node);
    if (natsConnection_Subscribe(&nd->via, nd->nc, via, ask_forward, nd) != NATS_OK)
        return -1;
    snprintf(via, sizeof via, "worth.node.%s", nd->o.node);
    if (natsConnection_Subscribe(&nd->self, nd->nc, via, ask_queue, nd) != NATS_OK)
        return -1;
    return 0;
}

/* Heartbeat, and the count of live nodes (this one included). */
static void heartbeat(struct node *nd, int64_t now)
{
    char key[80], val[128];
    snprintf(key, sizeof key, "n.%s", nd->o.node);
    int n = snprintf(val, sizeof val, "{\"node\":\"%s\",\"shards\":%d}", nd->o.node, nd->owned);
    kvStore_Put(&nd->hb_rev, nd->lease, key, val, n);
    kvKeysList keys = {0};
    if (kvStore_Keys(&keys, nd->lease, NULL) != NATS_OK)
        return;
    unsigned alive = 1;
    for (int i = 0; i < keys.Count; i++) {
        const char *k = keys.Keys[i];
        if (strncmp(k, "n.", 2) != 0 || strcmp(k + 2, nd->o.node) == 0)
            continue;
        kvEntry *e = NULL;
        if (kvStore_Get(&e, nd->lease, k) != NATS_OK)
            continue;
        uint64_t rev = kvEntry_Revision(e);
        kvEntry_Destroy(e);
        size_t j = 0;
        while (j < nd->n_peers && strcmp(nd->peers[j].id, k + 2) != 0)
            j++;
        if (j == nd->n_peers) {
            if (nd->n_peers == sizeof nd->peers / sizeof nd->peers[0])
                continue;
            snprintf(nd->peers[j].id, sizeof nd->peers[j].id, "%s", k + 2);
            nd->peers[j].rev = 0;
            nd->n_peers++;
        }
        if (nd->peers[j].rev != rev) {
            nd->peers[j].rev = rev;
            nd->peers[j].seen_ms = now;
        }
        if (now - nd->peers[j].seen_ms < nd->o.lease_ms)
            alive++;
    }
    kvKeysList_Destroy(&keys);
    if (alive != nd->nodes_alive)
        say_info("fleet: %u node%s alive", alive, alive == 1 ? "" : "s");
    nd->nodes_alive = alive;
}

static int lease_val(const struct node *nd, char *buf, size_t cap)
{
    return snprintf(buf, cap, "{\"node\":\"%s\"}", nd->o.node);
}

/* The key of shard p's lease. */
static void lease_key(char *key, size_t cap, unsigned p)
{
    snprintf(key, cap, "s%u", p);
}

/*
 * Renews s's lease by the compare-and-set on the revision this node wrote last.  Returns
 * NATS_OK (s's revision and renewal time moved on) or the failure; a failed compare-and-set
 * (someone wrote the lease since) leaves nats_GetLastError saying "wrong last sequence".
 */
static natsStatus renew_one(struct node *nd, struct shard *s, const char *val, int vl)
{
    char key[32];
    lease_key(key, sizeof key, s->id);
    int64_t sent = fleet_now_ms();
    uint64_t rev = 0;
    natsStatus st = kvStore_Update(&rev, nd->lease, key, val, vl, s->lease_rev);
    if (st == NATS_OK) {
        s->lease_rev = rev;
        s->renewed_ms = sent;
    }
    return st;
}

static void take(struct node *nd, struct shard *s, uint64_t rev, int64_t sent)
{
    s->owned = 1;
    s->lease_rev = rev;
    s->renewed_ms = sent;
    if (shard_open(nd, s) != 0) {
        char key[32];
        lease_key(key, sizeof key, s->id);
        kvStore_UpdateString(NULL, nd->lease, key, FREE_LEASE, rev);
        s->owned = 0;
        return;
    }
    nd->owned++;
    say_info("fleet: shard %u taken (checkpoint seq %" PRIu64 ")", s->id, s->ck_seq);
}

static void drop(struct node *nd, struct shard *s, const char *why)
{
    say_warn("fleet: shard %u given up: %s", s->id, why);
    shard_close(nd, s, 1);
    nd->owned--;
}

/* Hands s back: checkpoint, close, and the lease written free. */
static void release(struct node *nd, struct shard *s)
{
    char key[32];
    lease_key(key, sizeof key, s->id);
    shard_checkpoint(nd, s);
    uint64_t rev = s->lease_rev;
    shard_close(nd, s, 1);
    nd->owned--;
    /* Conditional on the revision this node wrote last: a lease someone has taken over
     * meanwhile stays theirs. */
    kvStore_UpdateString(NULL, nd->lease, key, FREE_LEASE, rev);
    say_info("fleet: shard %u handed back", s->id);
}

/* Renews every lease this node holds (first, and quickly: opening shards takes time). */
static void renew(struct node *nd, const char *val, int vl)
{
    for (unsigned p = 0; p < nd->o.shards && !stopping; p++) {
        struct shard *s = &nd->sh[p];
        if (s->owned && renew_one(nd, s, val, vl) != NATS_OK && nats_GetLastError(NULL) &&
            strstr(nats_GetLastError(NULL), "wrong last"))
            drop(nd, s, "the lease was taken over");
    }
}

static void lease_tick(struct node *nd, int64_t now)
{
    char val[128];
    int vl = lease_val(nd, val, sizeof val);
    renew(nd, val, vl);
    heartbeat(nd, now);
    unsigned target = (nd->o.shards + nd->nodes_alive - 1) / nd->nodes_alive;
    /* Opening a shard takes a JetStream consumer's creation (some 100 ms, seconds while
     * the cluster elects): the leases held are renewed after each, and taking stops half a
     * lease time into the tick (the rest wait for the next) so that questions get answered. */
    int64_t budget_end = fleet_now_ms() + nd->o.lease_ms / 2;
    for (unsigned p = 0; p < nd->o.shards && !stopping && fleet_now_ms() < budget_end; p++) {
        struct shard *s = &nd->sh[p];
        if (s->owned)
            continue;
        char key[32];
        lease_key(key, sizeof key, p);
        int64_t sent = fleet_now_ms();
        kvEntry *e = NULL;
        natsStatus st = kvStore_Get(&e, nd->lease, key);
        if (st == NATS_NOT_FOUND) {
            uint64_t rev = 0;
            if ((unsigned)nd->owned < target &&
                kvStore_Create(&rev, nd->lease, key, val, vl) == NATS_OK) {
                take(nd, s, rev, sent);
                renew(nd, val, vl);
            }
            continue;
        }
        if (st != NATS_OK)
            continue;
        uint64_t rev = kvEntry_Revision(e);
        int is_free = kvEntry_ValueLen(e) == (int)strlen(FREE_LEASE) &&
                      memcmp(kvEntry_Value(e), FREE_LEASE, strlen(FREE_LEASE)) == 0;
        kvEntry_Destroy(e);
        uint64_t nrev = 0;
        if (is_free) { /* handed back: taken like a free shard */
            if ((unsigned)nd->owned < target &&
                kvStore_Update(&nrev, nd->lease, key, val, vl, rev) == NATS_OK) {
                take(nd, s, nrev, sent);
                renew(nd, val, vl);
            }
            continue;
        }
        if (rev != s->seen_rev) {
            s->seen_rev = rev;
            s->seen_ms = now;
            continue;
        }
        int64_t quiet = now - s->seen_ms;
        if (quiet < nd->o.lease_ms || ((unsigned)nd->owned >= target && quiet < 2 * nd->o.lease_ms))
            continue;
        if (kvStore_Update(&nrev, nd->lease, key, val, vl, rev) == NATS_OK) {
            say_info("fleet: shard %u: owner quiet for %" PRId64 " ms, taking over", p, quiet);
            take(nd, s, nrev, sent);
            renew(nd, val, vl);
        }
    }
    for (unsigned p = nd->o.shards; p-- > 0 && (unsigned)nd->owned > target && !stopping;)
        if (nd->sh[p].owned)
            release(nd, &nd->sh[p]);
}

/*
 * Before anything is learnt or answered: a shard whose last successful renewal was sent more
 * than 90% of a lease time ago may have been taken over.  It is renewed once more, by the
 * compare-and-set on the revision this node wrote last: success proves nobody wrote the
 * lease since (so nobody took it), and the shard goes on; failure closes it.  So a loop held
 * up (a slow consumer creation) costs no shard, and an owner cut off from the servers stops.
 */
static void lease_guard(struct node *nd)
{
    char val[128];
    int vl = lease_val(nd, val, sizeof val);
    for (unsigned p = 0; p < nd->o.shards; p++) {
        struct shard *s = &nd->sh[p];
        if (s->owned && fleet_now_ms() - s->renewed_ms > nd->o.lease_ms * 9 / 10 &&
            renew_one(nd, s, val, vl) != NATS_OK)
            drop(nd, s, "no renewal within the lease time");
    }
}

/* Runs one shard's fetch; reopens it from its checkpoint after 2 s of failed fetches. */
static int pump(struct node *nd, struct shard *s, int64_t now)
{
    int n = shard_pump(nd, s);
    if (n >= 0) {
        s->fetch_fail_ms = 0;
        s->since_ck += (uint64_t)n;
        if (s->since_ck >= nd->o.ckpt_every || (s->since_ck && now - s->ck_ms >= nd->o.ckpt_ms)) {
            if (shard_checkpoint(nd, s) == 0)
                s->since_ck = 0;
            else
                s->ck_ms = now; /* try again a checkpoint period later */
        }
        return n;
    }
    if (!s->fetch_fail_ms)
        s->fetch_fail_ms = now;
    else if (now - s->fetch_fail_ms > 2000) {
        say_warn("fleet: shard %u: fetches failing (%s); reopening", s->id,
                 nats_GetLastError(NULL));
        uint64_t rev = s->lease_rev;
        int64_t renewed = s->renewed_ms;
        shard_close(nd, s, 1);
        nd->owned--;
        take(nd, s, rev, renewed);
    }
    return 0;
}

static void serve_asks(struct node *nd, int wait_ms)
{
    natsMsg *batch[FLEET_ASKS];
    size_t n = 0;
    pthread_mutex_lock(&nd->q.mu);
    if (nd->q.n == 0 && wait_ms > 0) {
        struct timespec ts;
        clock_gettime(CLOCK_REALTIME, &ts);
        ts.tv_nsec += (long)wait_ms * 1000000L;
        ts.tv_sec += ts.tv_nsec / 1000000000L;
        ts.tv_nsec %= 1000000000L;
        pthread_cond_timedwait(&nd->q.cv, &nd->q.mu, &ts);
    }
    while (nd->q.n) {
        batch[n++] = nd->q.msg[nd->q.head];
        nd->q.head = (nd->q.head + 1) % FLEET_ASKS;
        nd->q.n--;
    }
    pthread_mutex_unlock(&nd->q.mu);
    for (size_t i = 0; i < n; i++)
        ask_answer(nd, batch[i]);
}

static void run(struct node *nd)
{
    int64_t next_tick = 0;
    while (!stopping) {
        int64_t now = fleet_now_ms();
        if (now >= next_tick) {
            lease_tick(nd, now);
            next_tick = fleet_now_ms() + nd->o.lease_ms / 3;
        }
        lease_guard(nd);
        now = fleet_now_ms();
        int got = 0;
        for (unsigned p = 0; p < nd->o.shards && !stopping; p++)
            if (nd->sh[p].owned) {
                got += pump(nd, &nd->sh[p], now);
                serve_asks(nd, 0);
            }
        serve_asks(nd, got ? 0 : 5);
    }
    say_info("fleet: stopping: checkpointing and handing back %d shard%s", nd->owned,
             nd->owned == 1 ? "" : "s");
    for (unsigned p = 0; p < nd->o.shards; p++)
        if (nd->sh[p].owned)
            release(nd, &nd->sh[p]);
    char key[80];
    snprintf(key, sizeof key, "n.%s", nd->o.node);
    kvStore_Delete(nd->lease, key);
}

int fleet_main(int argc, char **argv)
{
    struct node *nd = calloc(1, sizeof *nd);
    if (!nd)
        return 1;
    int rc = parse(argc, argv, &nd->o);
    if (rc >= 0) {
        free(nd);
        return rc;
    }
    if (nd->o.quiet)
        say_set_level(SAY_WARN);
    nd->sh = calloc(nd->o.shards, sizeof *nd->sh);
    if (!nd->sh) {
        free(nd);
        return 1;
    }
    for (unsigned p = 0; p < nd->o.shards; p++)
        nd->sh[p].id = p;
    nd->nodes_alive = 1;
    pthread_mutex_init(&nd->q.mu, NULL);
    pthread_cond_init(&nd->q.cv, NULL);
    struct sigaction sa = {.sa_handler = on_stop};
    sigemptyset(&sa.sa_mask);
    sigaction(SIGINT, &sa, NULL);
    sigaction(SIGTERM, &sa, NULL);
    signal(SIGPIPE, SIG_IGN);
    rc = 1;
    nd->http_fd = -1;
    if (setup(nd) == 0 && (!nd->o.metrics || fleet_http_start(nd, nd->o.metrics) == 0)) {
        say_info("fleet: node %s on %s, %u shards, lease %" PRId64 " ms", nd->o.node, nd->o.urls,
                 nd->o.shards, nd->o.lease_ms);
        run(nd);
        rc = 0;
    }
    fleet_http_stop(nd);
    natsSubscription *subs[] = {nd->via, nd->self};
    for (size_t i = 0; i < 2; i++)
        if (subs[i]) {
            natsSubscription_Unsubscribe(subs[i]);
            natsSubscription_Destroy(subs[i]);
        }
    kvStore_Destroy(nd->lease);
    kvStore_Destroy(nd->ckpt);
    jsCtx_Destroy(nd->js);
    natsConnection_Destroy(nd->nc);
    /* requests queued after the last pass go unanswered (their askers time out) */
    while (nd->q.n) {
        natsMsg_Destroy(nd->q.msg[nd->q.head]);
        nd->q.head = (nd->q.head + 1) % FLEET_ASKS;
        nd->q.n--;
    }
    nats_CloseAndWait(5000); /* the library's threads end before exit: no use after free */
    pthread_mutex_destroy(&nd->q.mu);
    pthread_cond_destroy(&nd->q.cv);
    free(nd->sh);
    free(nd);
    return rc;
}
