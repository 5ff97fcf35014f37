/*
 * learner.c - a model's learner thread and the snapshot its queries read.
 *
 * Owns the model, its record queue (core/queue.h), the two snapshot buffers,
 * the learning history and the thread.  The loop thread fills the queue, the
 * writer thread logs it, and this thread applies what is durable, in order:
 * so a record is learnt only once it is in the log, and the model is always
 * the log's replay.  It must never let the loop touch the model's mutable
 * state, and never drop an accepted record.
 *
 * The learner thread pushes observations through a model_replay: it checks
 * them and evaluates features while the estimators learn earlier chunks on
 * worker threads (when the estimators are costly enough to gain from it), and
 * it takes each one's drift alarm in order; a record's slot is released once
 * it is learnt.  The replay is flushed before anything else touches the model
 * (a checkpoint, a training, a rollback, publishing), so the model is then
 * exactly what learning each record alone would have made.
 *
 * Invariant: the front snapshot is read only under snap_mu; the swap is
 * under snap_mu.
 */
#include "live/learner.h"

#include <math.h>
#include <pthread.h>
#include <stdatomic.h>
#include <stdint.h>
#include <sys/resource.h>
#include <stdarg.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

#include "core/queue.h"
#include "live/alarms.h"
#include "live/pairing.h"
#include "store/db.h"
#include "common/fail.h"
#include "common/mem.h"
#include "common/say.h"
#include "worth/errors.h"
#include "store/history.h"
#include "store/writer.h"

/*
 * Learning runs at a lower priority than the loop thread (nice + LEARN_NICE,
 * workers included): under load the loop, which answers queries and takes
 * requests, gets the CPU first, while learning still has every idle cycle.
 */
#define LEARN_NICE 5

/* Records handled between two looks at the queue's lock. */
#define CHUNK 256
/* Publish at most this often while busy (always when the queue empties); each first waits
 * until the replay has learnt everything pushed, idling its workers for a moment. */
#define PUBLISH_NS 10000000

struct snap {
    double *data; /* model_snap */
    uint64_t applied;
    model_counts_t counts;
    est_stats_t est[MODEL_MAX_EST];
    diag_est_t realised[MODEL_MAX_EST];
    health_est_t health[MODEL_MAX_EST];
    health_head_t head;
    diag_drift_t drift, drift_est[MODEL_MAX_EST];
    size_t drift_follows;
    double spread, returns_rms;
    double last_update;
    double plant_t;
    size_t n_inputs;
    learner_input_t inputs[LEARNER_INPUTS_MAX];
};

struct learner {
    char name[MODEL_NAME_MAX + 1];
    char *spec_json;
    struct model *m;
    size_t dims, n_est;
    learner_opts_t o;
    struct queue *q;      /* the records, shared with the loop and the writer */
    uint64_t training;    /* loop thread: last training ordinal given out */
    spec_meta_t meta;     /* loop thread: names, units, sample rules */
    struct pairing *pair; /* loop thread: the source table's mirror (a superset: rollbacks free
                             no slot), with each source's last sample and pseq */

    size_t max_src;

    /* Learner thread only. */
    uint64_t applied_seq, model_training, since_checkpoint;
    double plant_t;       /* the t of the last transition learnt that had one; NAN: none */
    uint64_t alarms_seen; /* drift alarms already reported */
    uint64_t clears_seen; /* and their clearings */
    struct inputs *in;    /* the direct input checks (made by learner_set_meta) */
    int tainted;          /* a replay after a rollback failed: the model is not the log's replay */
    size_t diverged_seen; /* estimators whose divergence has been reported */
    unsigned diverged_mask;  /* which (bit i: estimator i; MODEL_MAX_EST <= 32) */
    struct model_replay *rp; /* learns observations with the estimators on worker threads */
    uint64_t cb_k;           /* ring index of the next observation observed() reports */

    /* Snapshots (invariant 4). */
    pthread_mutex_t snap_mu;
    struct snap snaps[2];
    struct history_buf *hist; /* history rows not yet stored (store/history.h) */
    int front;
    double *qwork; /* loop-thread query workspace */

    pthread_t thread;
    int joined;
    event_post_fn post;
    event_wake_fn wake;
    void *ctx;
};

static double wall_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

static uint64_t mono_ns(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (uint64_t)ts.tv_sec * 1000000000u + (uint64_t)ts.tv_nsec;
}

static queue_rec_t *rec_at(struct learner *l, uint64_t k)
{
    return queue_rec(l->q, k);
}

/* Hands the history rows gathered to the writer, now that the estimators are whole. */
static void hist_store(struct learner *l)
{
    history_buf_store(l->hist, l->m, l->o.writer, l->q, wall_s());
}

double learner_history_width(const struct learner *l)
{
    return l->meta.period_s > 0 ? HISTORY_PERIODS * l->meta.period_s : HISTORY_DEFAULT_S;
}

/* Takes a history row when the transitions observed (in order) reach a new bucket. */
static void hist_take(struct learner *l, const queue_rec_t *r)
{
    history_buf_take(l->hist, l->m, r->seq, r->t_s, learner_history_width(l), wall_s());
}

/* Fills the back snapshot from the model and swaps it to the front.  Learner thread. */
static void publish(struct learner *l, double last_update)
{
    struct snap *b = &l->snaps[1 - l->front];
    model_snap(l->m, b->data);
    b->applied = l->applied_seq;
    model_counts(l->m, &b->counts);
    const struct diag *dg = model_diag(l->m);
    for (size_t i = 0; i < l->n_est; i++) {
        est_stats(model_est(l->m, i), &b->est[i]);
        diag_est(dg, i, &b->realised[i]);
        model_est_health(l->m, i, &b->health[i]);
        diag_drift_est(dg, i, &b->drift_est[i]);
    }
    b->drift_follows = diag_drift_followed(dg);
    model_head(l->m, &b->head);
    b->returns_rms = diag_returns_rms(dg);
    diag_drift(dg, &b->drift);
    b->spread = diag_spread(dg);
    b->last_update = last_update;
    b->plant_t = l->plant_t;
    b->n_inputs = 0;
    if (l->in) {
        inputs_active_t act[LEARNER_INPUTS_MAX];
        b->n_inputs = inputs_list(l->in, act, LEARNER_INPUTS_MAX);
        for (size_t i = 0; i < b->n_inputs && i < LEARNER_INPUTS_MAX; i++) {
            learner_input_t *o = &b->inputs[i];
            o->kind = (int)act[i].kind;
            snprintf(o->src, sizeof o->src, "%s", inputs_source_name(l->in, act[i].src));
            o->dim = act[i].dim;
            o->since = act[i].since;
        }
    }
    pthread_mutex_lock(&l->snap_mu);
    l->front = 1 - l->front;
    pthread_mutex_unlock(&l->snap_mu);
    history_buf_fill(l->hist, b->est);
    if (history_buf_ripe(l->hist, last_update))
        history_buf_flush(l->hist, l->o.writer, l->q, last_update);
}

/* Posts a reply for conn_id: rc 0 with text the fields after "ok":true, else the message. */
__attribute__((format(printf, 4, 5))) static void reply(struct learner *l, uint64_t conn_id, int rc,
                                                        const char *fmt, ...)
{
    char buf[512];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(buf, sizeof buf, fmt, ap);
    va_end(ap);
    event_t ev = {.kind = EV_REPLY, .q = l->q, .conn_id = conn_id, .rc = rc};
    ev.text = mem_strdup(buf);
    l->post(l->ctx, &ev);
}

/* db_abandon_fn: a replay on the learner thread gives up when the learner is asked to stop. */
static int stopping(void *ctx)
{
    struct learner *l = ctx;
    return queue_stopping(l->q);
}

/* Serialises the model and hands it to the writer. */
static void checkpoint(struct learner *l, const char *label, uint64_t conn_id)
{
    if (l->tainted) {
        if (conn_id)
            reply(l, conn_id, WORTH_E_DAMAGED,
                  "model %s holds part of a replay that failed; it is not checkpointed until "
                  "worthd restarts and rebuilds it from the log",
                  l->name);
        l->since_checkpoint = 0;
        return;
    }
    hist_store(l); /* the rows up to a checkpoint are stored before it (recovery starts there) */
    size_t len = 0;
    model_save(l->m, NULL, 0, &len);
    uint8_t *blob = mem_alloc(len);
    CHECK(model_save(l->m, blob, len, &len) == 0);
    writer_store_checkpoint(l->o.writer, l->q, l->applied_seq, l->model_training, l->plant_t,
                            (unsigned)model_diverged(l->m), label, blob, len, conn_id);
    l->since_checkpoint = 0;
}

struct train_ctx {
    struct learner *l;
    uint64_t conn_id;
};

static void on_pass(void *ctx, unsigned pass, unsigned of, double change)
{
    struct train_ctx *t = ctx;
    event_t ev = {.kind = EV_PROGRESS,
                  .q = t->l->q,
                  .conn_id = t->conn_id,
                  .pass = pass,
                  .of = of,
                  .change = change};
    t->l->post(t->l->ctx, &ev);
}

/* Restores the checkpoint of a rollback plan and replays the log after it. */
static void rollback(struct learner *l, queue_rec_t *r)
{
    queue_plan_t *p = r->job;
    char err[256];
    if (p->rc) {
        reply(l, r->conn_id, p->rc, "%s", p->err);
        return;
    }
    if (model_load(l->m, p->blob, p->blob_len, err, sizeof err) != 0) {
        say_error("model %s: checkpoint %lld cannot be restored: %s", l->name,
                  (long long)p->checkpoint, err);
        reply(l, r->conn_id, WORTH_E_BAD_DATABASE, "checkpoint %lld cannot be restored: %s",
              (long long)p->checkpoint, err);
        return;
    }
    uint64_t replayed = 0, last_training = p->cp_training;
    double plant_t = p->cp_plant_t;
    if (p->replay) {
        sqlite3 *ro = NULL;
        db_start_t from = {p->checkpoint, p->cp_seq, p->cp_training, p->cp_plant_t};
        int rc = db_open_ro(l->o.db_path, &ro, err, sizeof err) ? WORTH_E_STORAGE_ERROR : 0;
        if (rc == 0)
            rc = db_replay(ro, queue_db_id(l->q), l->m, &from, r->seq, &replayed, &last_training,
                           NULL, stopping, l, err, sizeof err);
        sqlite3_close(ro);
        plant_t = from.plant_t;
        if (rc) {
            /*
             * The model now holds part of a replay: it must never be checkpointed,
             * or a recovery would start from a state the log does not describe.  The
             * next start rebuilds it from the log (the rollback is committed there).
             */
            l->tainted = 1;
            if (rc == WORTH_E_CANCELLED)
                queue_discard(l->q); /* what is queued is in the log: the next start learns it */
            say_error("model %s: replay after rollback failed: %s; it is not checkpointed "
                      "until worthd restarts and rebuilds it from the log",
                      l->name, err);
            reply(l, r->conn_id, rc, "restored checkpoint %lld but the replay failed: %s",
                  (long long)p->checkpoint, err);
            l->model_training = last_training;
            return;
        }
    }
    l->model_training = last_training;
    l->applied_seq = r->seq;
    l->plant_t = plant_t;
    publish(l, wall_s()); /* queries after the reply see the restored weights */
    say_info("model %s: rolled back to checkpoint %lld (seq %llu): %llu undone, %llu replayed",
             l->name, (long long)p->checkpoint, (unsigned long long)p->cp_seq,
             (unsigned long long)p->undone, (unsigned long long)replayed);
    /* A window of t excludes nothing that has no t: said, so the caller can tell. */
    char untimed[48] = "";
    if (p->by_t)
        snprintf(untimed, sizeof untimed, ",\"untimed\":%llu", (unsigned long long)p->untimed);
    reply(l, r->conn_id, 0, ",\"checkpoint\":%lld,\"seq\":%llu,\"undone\":%llu,\"replayed\":%llu%s",
          (long long)p->checkpoint, (unsigned long long)p->cp_seq, (unsigned long long)p->undone,
          (unsigned long long)replayed, untimed);
}

/*
 * Reports each estimator that has diverged since the last look: logged, and
 * recorded as an event.  Divergence is decided per transition inside the
 * estimator (est.h), so when and why are the same in every replay; this only
 * tells the operator.  The seq given is the transition at the update count
 * the estimator recorded, when no rollback intervened.
 */
static void report_divergence(struct learner *l)
{
    size_t n = model_diverged(l->m);
    if (n == l->diverged_seen)
        return;
    l->diverged_seen = n;
    for (size_t i = 0; i < l->n_est; i++) {
        if (!model_est_diverged(l->m, i) || l->diverged_mask & (1u << i))
            continue;
        l->diverged_mask |= 1u << i;
        est_stats_t st;
        est_stats(model_est(l->m, i), &st);
        uint64_t back = st.updates - st.diverged_at;
        uint64_t seq = l->applied_seq > back ? l->applied_seq - back : 0;
        say_error("model %s: estimator %s diverged (%s) at its update %llu, about seq %llu; it "
                  "answers no values and is not checkpointed until the model is rolled back",
                  l->name, model_est_name(l->m, i), st.why ? st.why : "?",
                  (unsigned long long)st.diverged_at, (unsigned long long)seq);
        char detail[300];
        int n = snprintf(detail, sizeof detail,
                         "{\"estimator\":\"%s\",\"update\":%llu,\"seq\":%llu,\"reason\":\"%s\"",
                         model_est_name(l->m, i), (unsigned long long)st.diverged_at,
                         (unsigned long long)seq, st.why ? st.why : "");
        if (!isnan(l->plant_t))
            n += snprintf(detail + n, sizeof detail - (size_t)n, ",\"t\":%.17g", l->plant_t);
        snprintf(detail + n, sizeof detail - (size_t)n, "}");
        writer_event(l->o.writer, l->q, "diverged", detail);
    }
}

/* The estimators already diverged in a restored state were reported when it happened. */
static void divergence_seen(struct learner *l)
{
    l->diverged_seen = model_diverged(l->m);
    l->diverged_mask = 0;
    for (size_t i = 0; i < l->n_est; i++)
        if (model_est_diverged(l->m, i))
            l->diverged_mask |= 1u << i;
}

/*
 * Called in order for each observation once the diagnostics have taken it
 * (model_replay's stage C): the drift alarm is checked per transition, as
 * if each were learnt alone.
 */
static void observed(void *ctx)
{
    struct learner *l = ctx;
    queue_rec_t *r;
    do /* sources' records between observations are not learnt */
        r = rec_at(l, l->cb_k++);
    while (r->type != QREC_OBS);
    l->applied_seq = r->seq;
    hist_take(l, r);
    diag_drift_t dr;
    diag_drift(model_diag(l->m), &dr);
    if (dr.alarms != l->alarms_seen) {
        l->alarms_seen = dr.alarms;
        alarms_drift(l->o.writer, l->q, l->name, &dr, l->applied_seq,
                     model_diag_params(l->m)->drift.on_drift, l->plant_t);
    }
    if (dr.clears != l->clears_seen) {
        l->clears_seen = dr.clears;
        alarms_drift_cleared(l->o.writer, l->q, l->name, &dr, l->applied_seq, l->plant_t);
    }
}

/* inputs_event_fn: an input check raised or cleared. */
static void on_input(void *ctx, const inputs_event_t *ev)
{
    struct learner *l = ctx;
    alarms_input(l->o.writer, l->q, l->name, &l->meta, ev);
}

/* Hands an observation to the model's replay (learnt on worker threads; observed() runs for
 * it later, in order).  A checkpoint due after it waits until all pushed is learnt. */
static void learn(struct learner *l, queue_rec_t *r)
{
    model_obs_t o = {
        .x = r->v,
        .x_len = l->dims,
        .r = r->r,
        .x_next = r->terminal ? NULL : r->v + l->dims,
        .x_next_len = l->dims,
        .terminal = (int)r->terminal,
        .source = r->src,
        .dt_s = r->dt_s,
    };
    char err[200];
    int rc = model_replay_push(l->rp, &o, err, sizeof err);
    /* The loop validated the record and mirrors the source table: a refusal is a bug. */
    if (rc) {
        say_error("model %s: accepted transition refused: %s", l->name, err);
        CHECK(rc == 0);
    }
    l->since_checkpoint++;
    if (!isnan(r->t_s))
        l->plant_t = r->t_s;
    if (l->in) {
        inputs_observe(l->in, r->src, r->t_s, r->v, on_input, l);
        inputs_tick(l->in, l->plant_t, on_input, l);
    }
    if (l->o.checkpoint_every && l->since_checkpoint >= l->o.checkpoint_every) {
        model_replay_flush(l->rp);
        checkpoint(l, NULL, 0);
    }
}

/*
 * Runs a train request.  It is cut short, at a mini-batch step, when the
 * learner is asked to stop (worthd stopping, the model dropped) or a rollback
 * waits behind it; what it learnt so far is kept, and the log is told how
 * many steps it took before anything else is learnt, so a replay runs exactly
 * those.  A checkpoint follows either way: recovery then restores the result
 * instead of training again before worthd can listen.
 */
static void train(struct learner *l, queue_rec_t *r)
{
    est_train_t rep = {.passes = 0};
    struct train_ctx t = {l, r->conn_id};
    est_train_opts_t to = {
        .passes = r->passes, .progress = on_pass, .ctx = &t, .cancel = queue_cut(l->q)};
    int rc = model_train(l->m, r->est, &to, &rep);
    const char *why = NULL;
    if (rep.cancelled) {
        why = queue_stopping(l->q)
                  ? (queue_discarding(l->q) ? "the model was dropped" : "worthd is stopping")
                  : "a rollback was requested";
        say_info("model %s: training %llu cut short after %llu mini-batch steps (%u of %u passes): "
                 "%s",
                 l->name, (unsigned long long)r->ordinal, (unsigned long long)rep.steps, rep.passes,
                 r->passes, why);
        if (!queue_discarding(l->q))
            writer_cut_training(l->o.writer, l->q, r->ordinal, rep.steps);
    }
    l->model_training = r->ordinal;
    if (!queue_discarding(l->q))
        checkpoint(l, NULL, 0);
    report_divergence(l);
    publish(l, wall_s()); /* queries after the reply see the trained weights */
    event_t ev = {.kind = EV_TRAINED,
                  .q = l->q,
                  .conn_id = r->conn_id,
                  .rc = rc,
                  .pass = rep.passes,
                  .of = r->passes,
                  .change = rep.change,
                  .converged = rep.converged,
                  .seq = rep.steps};
    if (why)
        ev.text = mem_strdup(why);
    l->post(l->ctx, &ev);
}

static void apply(struct learner *l, queue_rec_t *r)
{
    switch (r->type) {
    case QREC_OBS:
        break; /* observations go through learn() */
    case QREC_TRAIN:
        train(l, r);
        return;
    case QREC_CHECKPOINT:
        checkpoint(l, r->est ? r->src : NULL, r->conn_id);
        return;
    case QREC_ROLLBACK:
        rollback(l, r);
        queue_rollback_done(l->q); /* this rollback no longer cuts a training short */
        l->applied_seq = r->seq;
        l->since_checkpoint = 0;
        mem_free(r->job->blob);
        mem_free(r->job);
        r->job = NULL;
        return;
    case QREC_DEAD:
        if (r->seq > l->applied_seq)
            l->applied_seq = r->seq;
        return;
    }
}

static void *run(void *arg)
{
    struct learner *l = arg;
    /* Linux keeps a nice value per thread; failing to change it only costs latency. */
    (void)setpriority(PRIO_PROCESS, 0, getpriority(PRIO_PROCESS, 0) + LEARN_NICE);
    uint64_t last_pub = mono_ns();
    double last_update = 0;
    int dirty = 0, flushed = 1;
    for (;;) {
        uint64_t from, to;
        if (!queue_take(l->q, CHUNK, &from, &to)) {
            /* Dropped: requests still queued get their one reply. */
            for (uint64_t k = from; k < to; k++) {
                queue_rec_t *r = rec_at(l, k);
                if (r->type == QREC_TRAIN) {
                    event_t ev = {.kind = EV_TRAINED,
                                  .q = l->q,
                                  .conn_id = r->conn_id,
                                  .rc = WORTH_E_NO_SUCH_MODEL};
                    l->post(l->ctx, &ev);
                } else if (r->type == QREC_CHECKPOINT || r->type == QREC_ROLLBACK) {
                    reply(l, r->conn_id, WORTH_E_NO_SUCH_MODEL, "model %s was dropped", l->name);
                }
            }
            break;
        }

        /*
         * Observations are pushed to the replay; anything else first waits
         * until every observation before it has been learnt.  The model is
         * whole again (flushed) before it is published.  The callbacks walk the
         * queue from cb_k, still in the last round while it has some in flight.
         */
        if (flushed)
            l->cb_k = from;
        for (uint64_t k = from; k < to; k++) {
            queue_rec_t *r = rec_at(l, k);
            if (r->type == QREC_OBS) {
                learn(l, r);
                continue;
            }
            if (r->type == QREC_SOURCE)
                continue; /* for the log only */
            model_replay_flush(l->rp);
            l->cb_k = k + 1;
            apply(l, r);
        }
        /*
         * Caught up, or a snapshot due: flush, then publish.  Else chunks stay in flight across
         * rounds and only the records learnt (callbacks run: before cb_k) are released.
         */
        uint64_t now = mono_ns(), done = l->cb_k;
        int due = queue_idle(l->q) || now - last_pub >= PUBLISH_NS;
        if (due) {
            model_replay_flush(l->rp);
            report_divergence(l);
            done = to;
        }
        flushed = due;
        last_update = wall_s();
        dirty = 1;

        int empty = 0, wake = queue_release(l->q, done, &empty);
        if (due) {
            publish(l, last_update);
            last_pub = now;
            dirty = 0;
            if (empty) /* caught up: the history rows need not wait for more work */
                history_buf_flush(l->hist, l->o.writer, l->q, last_update);
        }
        if (wake)
            l->wake(l->ctx);
    }
    model_replay_end(l->rp);
    l->rp = NULL;
    if (!queue_discarding(l->q) && l->since_checkpoint > 0)
        checkpoint(l, NULL, 0); /* the clean-shutdown checkpoint */
    if (dirty)
        publish(l, last_update);
    if (!queue_discarding(l->q))
        hist_store(l);
    event_t ev = {.kind = EV_EXITED, .q = l->q};
    l->post(l->ctx, &ev);
    return NULL;
}

double learner_footprint(size_t dims, const learner_opts_t *o)
{
    return queue_footprint(dims, o->queue_cap) + history_buf_footprint();
}

struct learner *learner_new(const char *name, char *spec_json, struct model *m,
                            const learner_opts_t *o, event_post_fn post, event_wake_fn wake,
                            void *ctx)
{
    struct learner *l = mem_calloc(1, sizeof *l);
    snprintf(l->name, sizeof l->name, "%s", name);
    l->spec_json = spec_json;
    l->m = m;
    l->o = *o;
    l->dims = model_dims(m);
    l->n_est = model_n_est(m);
    l->q = queue_new(name, l->dims, o->queue_cap, o->seq);
    l->applied_seq = o->seq;
    l->plant_t = o->plant_t;
    l->training = o->training;
    l->model_training = o->model_training;
    l->max_src = model_max_sources(m);
    l->meta.dims = l->dims;
    l->meta.max_gap_s = INFINITY;
    l->pair = pairing_new(&l->meta, l->max_src);
    model_counts_t c;
    model_counts(m, &c);
    for (size_t i = 0; i < c.sources; i++)
        pairing_note(l->pair, model_source_name(m, i));
    l->post = post;
    l->wake = wake;
    l->ctx = ctx;
    pthread_mutex_init(&l->snap_mu, NULL);
    size_t ss = model_snap_size(m);
    for (int i = 0; i < 2; i++)
        l->snaps[i].data = mem_calloc(ss, sizeof(double));
    l->hist = history_buf_new(l->n_est, o->plant_t);
    diag_drift_t dr0;
    diag_drift(model_diag(m), &dr0);
    l->alarms_seen = dr0.alarms; /* alarms of a recovered model were reported before */
    l->clears_seen = dr0.clears;
    divergence_seen(l);
    publish(l, 0); /* the initial (or recovered) weights answer until the first update */
    l->qwork = mem_calloc(model_work_size(m), sizeof(double));
    l->rp = model_replay_new(m, 0, LEARN_NICE);
    model_replay_set_after(l->rp, observed, l);
    CHECK(pthread_create(&l->thread, NULL, run, l) == 0);
    return l;
}

void learner_stop(struct learner *l, int discard)
{
    queue_stop(l->q, discard);
}

void learner_join(struct learner *l)
{
    if (!l->joined) {
        pthread_join(l->thread, NULL);
        l->joined = 1;
    }
}

void learner_free(struct learner *l)
{
    if (!l)
        return;
    learner_stop(l, 1);
    learner_join(l);
    pthread_mutex_destroy(&l->snap_mu);
    for (int i = 0; i < 2; i++)
        mem_free(l->snaps[i].data);
    mem_free(l->qwork);
    history_buf_free(l->hist);
    queue_free(l->q);
    pairing_free(l->pair);
    inputs_free(l->in);
    mem_free(l->spec_json);
    model_free(l->m);
    mem_free(l);
}

struct queue *learner_queue(const struct learner *l)
{
    return l->q;
}

uint64_t learner_commit(struct learner *l, size_t k)
{
    for (size_t i = 0; i < k; i++) {
        queue_rec_t *r = queue_slot(l->q, i);
        if (r->type == QREC_OBS || r->type == QREC_SOURCE)
            pairing_note(l->pair, r->src);
    }
    uint64_t seq = queue_commit(l->q, k);
    writer_kick(l->o.writer);
    return seq;
}

uint64_t learner_next_training(struct learner *l)
{
    return ++l->training;
}

int learner_set_meta(struct learner *l, const spec_meta_t *meta, sqlite3 *db, int64_t model_id,
                     char *err, size_t errlen)
{
    CHECK(meta->dims == l->dims);
    l->meta = *meta;
    pairing_set_meta(l->pair, meta);
    /* Before the first record: the queue's lock hands it to the learner thread. */
    if (!l->in)
        l->in = inputs_new(&meta->inputs, l->dims, meta->lo, meta->hi, l->max_src);
    return db ? pairing_load(l->pair, db, model_id, err, errlen) : 0;
}

struct pairing *learner_pairing(const struct learner *l)
{
    return l->pair;
}

int learner_pairing_check(struct learner *l, char *err, size_t errlen)
{
    uint64_t unwritten;
    if (!queue_unpaired(l->q, &unwritten))
        return 0;
    if (unwritten)
        return err_fail(err, errlen, WORTH_E_STORAGE_ERROR,
                        "a commit of model %s's samples failed; its pairing is reloaded from the "
                        "log once the requests before are answered: resend",
                        l->name);
    sqlite3 *ro = NULL;
    int rc = db_open_ro(l->o.db_path, &ro, err, errlen) ? WORTH_E_STORAGE_ERROR : 0;
    if (rc == 0)
        rc = pairing_load(l->pair, ro, queue_db_id(l->q), err, errlen);
    sqlite3_close(ro);
    if (rc)
        return rc;
    queue_unmark_unpaired(l->q);
    say_info("model %s: the pairing of its samples was reloaded from the log", l->name);
    return 0;
}

const char *learner_name(const struct learner *l)
{
    return l->name;
}

const char *learner_spec(const struct learner *l)
{
    return l->spec_json;
}

const spec_meta_t *learner_meta(const struct learner *l)
{
    return &l->meta;
}

const struct model *learner_model(const struct learner *l)
{
    return l->m;
}

int learner_value(struct learner *l, const double *x, size_t len, double *values, double *sd,
                  uint64_t *seq)
{
    *seq = learner_read_begin(l);
    int rc = learner_read_value(l, x, len, values, sd);
    learner_read_end(l);
    return rc;
}

uint64_t learner_read_begin(struct learner *l)
{
    pthread_mutex_lock(&l->snap_mu);
    return l->snaps[l->front].applied;
}

int learner_read_value(struct learner *l, const double *x, size_t len, double *values, double *sd)
{
    return model_snap_value(l->m, l->snaps[l->front].data, x, len, values, sd, l->qwork);
}

void learner_read_end(struct learner *l)
{
    pthread_mutex_unlock(&l->snap_mu);
}

void learner_stats(struct learner *l, learner_stats_t *out)
{
    memset(out, 0, sizeof *out);
    pthread_mutex_lock(&l->snap_mu);
    const struct snap *s = &l->snaps[l->front];
    out->applied = s->applied;
    out->counts = s->counts;
    memcpy(out->est, s->est, sizeof out->est);
    memcpy(out->realised, s->realised, sizeof out->realised);
    memcpy(out->health, s->health, sizeof out->health);
    out->head = s->head;
    out->returns_rms = s->returns_rms;
    out->drift = s->drift;
    memcpy(out->drift_est, s->drift_est, sizeof out->drift_est);
    out->drift_follows = s->drift_follows;
    out->spread = s->spread;
    out->horizon = diag_horizon(model_diag(l->m));
    out->last_update = s->last_update;
    out->plant_t = s->plant_t;
    out->n_inputs = s->n_inputs;
    memcpy(out->inputs, s->inputs, sizeof out->inputs);
    pthread_mutex_unlock(&l->snap_mu);
    out->received = queue_last_seq(l->q);
    out->queued = queue_depth(l->q);
    queue_checkpoint_info(l->q, &out->checkpoints, &out->newest_checkpoint_at);
}
