/*
 * worthd.c - the daemon's composition root: what is built, in which order,
 * and how it is taken down again.
 *
 * Main thread, which becomes the loop thread.  Start-up, top to bottom:
 *   1. the loop and the request arena;
 *   2. the database: its lock (one worthd per file), the backup directory
 *      (swept of a crashed backup's leftovers only under the lock), the file
 *      opened and migrated, its size cap, its mode;
 *   3. the writer, which owns the database connection from then on;
 *   4. the connections, the protocol (the model registry) and the listeners,
 *      wired by callbacks: net/ never calls the protocol by name;
 *   5. the outbox through which learner and writer threads reach the loop,
 *      and the signals;
 *   6. recovery of every model (a stop signal meanwhile ends it early);
 *   7. the writer thread, then the listeners and the metrics endpoint;
 *   8. READY=1 to systemd (notify.h: STATUS= lines came during 6), the
 *      watchdog's timer when systemd asked for one, the retention timer.
 * The stop (stop()) says STOPPING=1, then undoes 8 to 4 in reverse: listeners closed, reading
 * stopped, every learner applies what it accepted and checkpoints, the
 * writer commits the last of it and closes the database, the last replies go
 * out, connections close; the loop then ends and 3 to 1 are freed.
 *
 * It must never serve a half-recovered daemon, and never exit 0 before
 * everything accepted has been applied.
 */
#include "worthd.h"

#include <pthread.h>
#include <signal.h>
#include <stdio.h>
#include <string.h>
#include <unistd.h>
#include <uv.h>

#include "common/mem.h"
#include "core/event.h"
#include "notify.h"
#include "roles.h"
#include "live/learner.h"
#include "metrics/http.h"
#include "metrics/text.h"
#include "net/conn.h"
#include "net/server.h"
#include "core/arena.h"
#include "proto/proto.h"
#include "live/recover.h"
#include "common/say.h"
#include "store/backup.h"
#include "store/db.h"
#include "store/retain.h"
#include "store/writer.h"

/* Bytes of the per-request parse arena. */
#define ARENA_BYTES (4u << 20)
/* At stop, how long connections may take to read their last replies. */
#define LINGER_MS 2000

/* The signals worthd takes in its loop (see on_signal). */
static const int signums[] = {SIGINT, SIGTERM, SIGQUIT, SIGHUP, SIGUSR1, SIGUSR2};
#define N_SIGNALS (sizeof signums / sizeof signums[0])

struct worthd {
    const config_t *cfg;
    uv_loop_t loop;
    struct backup_dir *backups;
    struct writer *writer;
    struct conns *conns;
    struct proto *proto;
    struct server *server;
    struct metrics *metrics;
    uv_signal_t sigs[N_SIGNALS];
    uv_async_t wake;
    uv_timer_t watchdog; /* WATCHDOG=1 every half of $WATCHDOG_USEC */
    int have_watchdog;
    uv_timer_t retain; /* the retention run every --retain-every seconds */
    int have_retain;
    int stopping;
    worthd_reload_fn reload;
    void *reload_ctx;

    /* Outbox: events posted by learner and writer threads under mu. */
    pthread_mutex_t mu;
    event_t *events;
    size_t n_events, cap_events;
    event_t *draining; /* loop-side copy */
    size_t cap_draining;
};

/* ---- the outbox -------------------------------------------------------------------------- */

/* event_post_fn: any thread. */
static void post_event(void *ctx, const event_t *ev)
{
    struct worthd *d = ctx;
    pthread_mutex_lock(&d->mu);
    if (d->n_events == d->cap_events) {
        d->cap_events = d->cap_events ? 2 * d->cap_events : 64;
        d->events = mem_realloc(d->events, d->cap_events * sizeof *d->events);
    }
    d->events[d->n_events++] = *ev;
    pthread_mutex_unlock(&d->mu);
    uv_async_send(&d->wake);
}

/* event_wake_fn: a learner freed queue space. */
static void wake_loop(void *ctx)
{
    struct worthd *d = ctx;
    uv_async_send(&d->wake);
}

/* Delivers every event posted so far to the protocol.  Loop thread. */
static void drain_events(struct worthd *d)
{
    /* Take the whole outbox at once: uv_async_send coalesces. */
    pthread_mutex_lock(&d->mu);
    size_t n = d->n_events;
    if (n > d->cap_draining) {
        mem_free(d->draining);
        d->draining = mem_alloc(d->cap_events * sizeof *d->draining);
        d->cap_draining = d->cap_events;
    }
    if (n)
        memcpy(d->draining, d->events, n * sizeof *d->events);
    d->n_events = 0;
    pthread_mutex_unlock(&d->mu);
    for (size_t i = 0; i < n; i++)
        proto_event(d->proto, &d->draining[i]);
}

static void on_wake(uv_async_t *h)
{
    struct worthd *d = h->data;
    if (d->stopping)
        return;
    drain_events(d);
    conns_kick(d->conns); /* parked requests, replies that became durable */
}

/* ---- stopping ---------------------------------------------------------------------------- */

static void stop(struct worthd *d, const char *why)
{
    if (d->stopping)
        return;
    d->stopping = 1;
    notify_stopping(why);
    say_info("%s: stopping; applying everything accepted", why);
    if (d->have_watchdog) {
        uv_close((uv_handle_t *)&d->watchdog, NULL);
        d->have_watchdog = 0;
    }
    if (d->have_retain) {
        uv_close((uv_handle_t *)&d->retain, NULL);
        d->have_retain = 0;
    }
    server_stop_listening(d->server);
    metrics_close(d->metrics);
    d->metrics = NULL;
    conns_stop_reading(d->conns);
    /* Learners apply everything accepted (the writer still commits it), checkpoint, end. */
    proto_shutdown(d->proto);
    writer_event(d->writer, NULL, "stop", "{}");
    writer_free(d->writer); /* finishes every queued job and record, closes the database */
    d->writer = NULL;
    /* Deliver what the learners and the writer posted last (final replies, acks). */
    drain_events(d);
    conns_close_all(d->conns, LINGER_MS);
    for (size_t i = 0; i < N_SIGNALS; i++)
        uv_close((uv_handle_t *)&d->sigs[i], NULL);
    uv_close((uv_handle_t *)&d->wake, NULL);
}

/* What systemd's status line says while worthd serves. */
static void tell_ready(struct worthd *d)
{
    size_t n = proto_n_models(d->proto);
    notify_ready("serving %zu model%s on %s%s%s", n, n == 1 ? "" : "s", d->cfg->socket_path,
                 d->cfg->listen ? " and " : "", d->cfg->listen ? d->cfg->listen : "");
}

/*
 * SIGINT, SIGTERM and SIGQUIT stop cleanly.  SIGHUP, SIGUSR1 and SIGUSR2 must
 * not kill a daemon that operators and scripts signal by habit: HUP reloads
 * the configuration (what can change live changes, what needs a restart is
 * logged: options.c), USR1 logs a one-line status, USR2 is ignored (logged).
 * SIGALRM and SIGPIPE are ignored in main.c.
 */
static void on_signal(uv_signal_t *h, int signum)
{
    struct worthd *d = h->data;
    switch (signum) {
    case SIGHUP:
        if (!d->reload) {
            say_info("SIGHUP: nothing to reload");
            return;
        }
        notify_reloading();
        d->reload(d->reload_ctx);
        tell_ready(d);
        return;
    case SIGUSR1: {
        size_t models = proto_n_models(d->proto), n, tcp, unauthed;
        unsigned long long refused, shed;
        conns_count(d->conns, &n, &tcp, &unauthed);
        server_counts(d->server, &refused, &shed);
        const budget_t *b = conns_budget(d->conns);
        say_info("status: %zu model%s, %zu connection%s (%zu tcp, %zu not authenticated), "
                 "buffers %zu of %llu MiB (peak %zu), %llu refused, %llu shed",
                 models, models == 1 ? "" : "s", n, n == 1 ? "" : "s", tcp, unauthed, b->used,
                 (unsigned long long)d->cfg->max_buffer_mb, b->peak, refused, shed);
        return;
    }
    case SIGUSR2:
        say_info("SIGUSR2: ignored");
        return;
    default:
        stop(d, signum == SIGINT ? "SIGINT" : signum == SIGQUIT ? "SIGQUIT" : "SIGTERM");
    }
}

/*
 * The stop signal that came during recovery, before the loop could take it.
 * Written only by note_stop (async-signal-safe: one store), read on the main
 * thread.
 */
static volatile sig_atomic_t stop_signal;

static void note_stop(int signum)
{
    stop_signal = signum;
}

/* db_abandon_fn for recovery: gives a long replay up once a stop signal came. */
static int stop_noted(void *ctx)
{
    (void)ctx;
    return stop_signal != 0;
}

/* ---- wiring ------------------------------------------------------------------------------ */

/* recover_sink_t callbacks: recovered and quarantined models go to the registry. */
static void add_recovered(void *ctx, struct learner *l)
{
    struct worthd *d = ctx;
    proto_add_recovered(d->proto, l);
}

static void add_damaged(void *ctx, int64_t id, const char *name, uint64_t seq, const char *reason)
{
    struct worthd *d = ctx;
    proto_add_damaged(d->proto, id, name, seq, reason);
}

/* The metrics listener's render callback. */
static char *render_metrics(void *ctx, size_t *len)
{
    struct worthd *d = ctx;
    return metrics_text(d->proto, d->writer, d->conns, d->cfg->db_path, len);
}

/* recover_sink_t's progress: systemd's status line while recovery runs. */
static void recovery_progress(void *ctx, const char *name, size_t index, size_t n, uint64_t done,
                              uint64_t total)
{
    (void)ctx;
    /* Recovery runs before the loop: its progress keeps systemd's watchdog and start timeout
     * (EXTEND_TIMEOUT_USEC) from ending a long replay. */
    notify_recovering("recovering %s (model %zu of %zu), %d%%", name, index + 1, n,
                      total ? (int)(100.0 * (double)done / (double)total) : 100);
}

/* Every --retain-every seconds: every model's retention policy, on the writer thread. */
static void on_retain(uv_timer_t *t)
{
    struct worthd *d = t->data;
    retain_req_t r = {.run = 1,
                      .default_days = d->cfg->retain_days,
                      .default_transitions = d->cfg->retain_transitions};
    writer_retain(d->writer, &r, 0);
}

/* The watchdog's tick: the loop is alive. */
static void on_watchdog(uv_timer_t *t)
{
    (void)t;
    notify_watchdog();
}

/* metrics_auth_fn: a scrape's bearer token must be one of the token file's (any role). */
static int metrics_auth(void *ctx, const char *bearer, size_t len)
{
    struct worthd *d = ctx;
    if (!d->cfg->token)
        return 1;
    return bearer && roles_of_token(d->cfg->roles, bearer, len, NULL) != ROLE_NONE;
}

/* Runs recovery with stop signals noted rather than taken; returns recover_models' result. */
static int recover(struct worthd *d, sqlite3 *db, char *err, size_t errlen)
{
    learner_opts_t lo;
    proto_learner_opts(d->proto, &lo);
    recover_sink_t sink = {d, &lo, add_recovered, add_damaged, recovery_progress};
    notify_status("recovering the models of %s", d->cfg->db_path);
    const int stops[] = {SIGINT, SIGTERM, SIGQUIT};
    struct sigaction note = {.sa_handler = note_stop}, was[3];
    sigemptyset(&note.sa_mask);
    for (int i = 0; i < 3; i++)
        sigaction(stops[i], &note, &was[i]);
    int rc = recover_models(db, &sink, d->writer, post_event, wake_loop, d, stop_noted, NULL, err,
                            errlen);
    for (int i = 0; i < 3; i++)
        sigaction(stops[i], &was[i], NULL);
    return rc;
}

int worthd_run(const config_t *cfg, worthd_reload_fn reload, void *reload_ctx)
{
    struct worthd *d = mem_calloc(1, sizeof *d);
    d->cfg = cfg;
    d->reload = reload;
    d->reload_ctx = reload_ctx;
    int status = 1;
    char err[1024];
    sqlite3 *db = NULL;

    /* 1. The loop and the request arena. */
    CHECK(uv_loop_init(&d->loop) == 0);
    pthread_mutex_init(&d->mu, NULL);
    arena_install(ARENA_BYTES);

    /* 2. The database. */
    int lock = db_lock(cfg->db_path, err, sizeof err);
    if (lock < 0)
        goto out_fail;
    /* The backup directory after the lock: its leftovers may be swept only by the one worthd. */
    if (backup_dir_open(cfg->backup_dir, cfg->db_path, cfg->socket_path, cfg->file_mode,
                        &d->backups, err, sizeof err) != 0)
        goto out_unlock;
    if (db_open(cfg->db_path, cfg->sync_full, &db, err, sizeof err) != 0)
        goto out_free_backups;
    if (db_set_max_mb(db, cfg->db_max_mb) != 0) {
        snprintf(err, sizeof err, "cannot cap %s at %llu MiB", cfg->db_path,
                 (unsigned long long)cfg->db_max_mb);
        goto out_close_db;
    }
    say_info("database %s (WAL, synchronous=%s)", cfg->db_path, cfg->sync_full ? "FULL" : "NORMAL");
    db_tighten(db, cfg->file_mode ? cfg->file_mode : 0600);
    retain_setup(db); /* a new file gives freed space back (auto_vacuum) */

    /* 3. The writer: the database connection is its from here on. */
    writer_opts_t wo = {.keep = cfg->keep, .group_max = 4096, .backups = d->backups};
    d->writer = writer_new(db, &wo, post_event, d);

    /* 4. Connections, the protocol and the listeners. */
    d->conns = conns_new(&d->loop, cfg);
    d->proto = proto_new(cfg, d->writer, d->conns, post_event, wake_loop, d);
    conn_handler_t handler;
    proto_handler(d->proto, &handler);
    conns_set_handler(d->conns, &handler);
    d->server = server_new(&d->loop, cfg, d->conns);

    /* 5. The outbox and the signals. */
    uv_async_init(&d->loop, &d->wake, on_wake);
    d->wake.data = d;
    for (size_t i = 0; i < N_SIGNALS; i++) {
        uv_signal_init(&d->loop, &d->sigs[i]);
        d->sigs[i].data = d;
        uv_signal_start(&d->sigs[i], on_signal, signums[i]);
    }

    /* 6. Recover before listening: nobody connects to a half-restored daemon. */
    int rec = recover(d, db, err, sizeof err);
    int ready = rec == 0, abandoned = rec == -2;
    if (abandoned)
        say_info("%s; stopping before listening", err);
    else if (!ready)
        say_error("%s", err);

    /* 7. The writer thread, the listeners, the metrics endpoint. */
    writer_start(d->writer);
    if (stop_signal)
        raise(stop_signal); /* the one noted during recovery, now to the loop's handler */
    writer_event(d->writer, NULL, "start", "{}");
    if (ready && server_listen(d->server) == 0 &&
        (!cfg->metrics || metrics_start(&d->loop, cfg->metrics, cfg->token != NULL, metrics_auth,
                                        render_metrics, d, &d->metrics) == 0)) {
        status = 0;
        /* 8. Serving: systemd hears it now, not before (Type=notify). */
        uint64_t wd = notify_watchdog_usec();
        if (wd) {
            uint64_t ms = wd / 2000 ? wd / 2000 : 1;
            uv_timer_init(&d->loop, &d->watchdog);
            uv_timer_start(&d->watchdog, on_watchdog, ms, ms);
            d->have_watchdog = 1;
            notify_watchdog();
            say_info("systemd watchdog: WATCHDOG=1 every %llu ms", (unsigned long long)ms);
        }
        if (cfg->retain_every_s) {
            uint64_t ms = (uint64_t)cfg->retain_every_s * 1000;
            uv_timer_init(&d->loop, &d->retain);
            d->retain.data = d;
            uv_timer_start(&d->retain, on_retain, ms, ms);
            d->have_retain = 1;
        }
        tell_ready(d);
    } else if (abandoned) {
        stop(d, "stop signal during recovery");
        status = 0;
    } else {
        stop(d, "start-up failed");
        status = 1;
    }

    uv_run(&d->loop, UV_RUN_DEFAULT);
    if (uv_loop_close(&d->loop) != 0) {
        say_error("event loop did not close cleanly");
        status = 1;
    }
    writer_free(d->writer); /* NULL after stop() */
    proto_free(d->proto);
    server_free(d->server);
    conns_free(d->conns);
    backup_dir_free(d->backups);
    close(lock);
    goto out_free;

out_close_db:
    sqlite3_close(db);
out_free_backups:
    backup_dir_free(d->backups);
out_unlock:
    close(lock);
out_fail:
    say_error("%s", err);
    uv_loop_close(&d->loop);
out_free:
    arena_uninstall();
    pthread_mutex_destroy(&d->mu);
    mem_free(d->events);
    mem_free(d->draining);
    mem_free(d);
    if (status == 0)
        say_info("stopped");
    return status;
}
