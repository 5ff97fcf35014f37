/*
 * learner.c - a model's queue, learner thread and published snapshot.
 *
 * Owns the model, the record ring, the two snapshot buffers and the thread.
 * The loop thread produces records (head) and reads the front snapshot; the
 * learner thread consumes records (tail), owns the model's mutable state and
 * writes the back snapshot.  It must never let the loop thread touch the
 * model's mutable state, and never drop an accepted record.
 *
 * Invariants.
 * 1. head and tail only grow; head - tail <= cap; both change under mu.
 * 2. Records in [tail, head) are read by the learner only; slots outside it
 *    are written by the loop only.
 * 3. Seqs: record k (from 0) of the model's life is transition k + 1;
 *    `received` counts committed transitions, `applied` learnt ones.
 * 4. The front snapshot is read only under snap_mu; the swap is under snap_mu,
 *    so a reader never sees a half-written snapshot.
 */
#include "learner.h"

#include <math.h>
#include <pthread.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

#include "mem.h"
#include "say.h"
#include "worth/errors.h"

/* Records handled between two looks at the queue's lock. */
#define CHUNK 256
/* Publish at most this often while the queue is busy (it always publishes when it empties). */
#define PUBLISH_NS 1000000

struct snap {
    double *data; /* model_snap */
    uint64_t applied;
    model_counts_t counts;
    est_stats_t est[MODEL_MAX_EST];
    double last_update;
};

struct learner {
    char name[MODEL_NAME_MAX + 1];
    char *spec_json;
    struct model *m;
    size_t dims, n_est;

    /* Queue (invariants 1-3). */
    pthread_mutex_t mu;
    pthread_cond_t cond;
    unsigned char *ring;
    size_t cap, stride;
    uint64_t head, tail;
    int stop, discard, want_space;
    uint64_t received; /* loop thread only */

    /* Loop-side mirror of the model's source table (assigned in the same order). */
    char (*src)[MODEL_NAME_MAX + 1];
    size_t n_src, max_src;

    /* Snapshots (invariant 4). */
    pthread_mutex_t snap_mu;
    struct snap snaps[2];
    int front;
    double *qwork, *qvals, *qsd; /* loop-thread query workspace */

    pthread_t thread;
    int joined;
    learner_post_fn post;
    learner_wake_fn wake;
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

static learner_rec_t *rec_at(struct learner *l, uint64_t k)
{
    return (learner_rec_t *)(l->ring + (size_t)(k % l->cap) * l->stride);
}

/* Fills the back snapshot from the model and swaps it to the front.  Learner thread. */
static void publish(struct learner *l, uint64_t applied, double last_update)
{
    struct snap *b = &l->snaps[1 - l->front];
    model_snap(l->m, b->data);
    b->applied = applied;
    model_counts(l->m, &b->counts);
    for (size_t i = 0; i < l->n_est; i++)
        est_stats(model_est(l->m, i), &b->est[i]);
    b->last_update = last_update;
    pthread_mutex_lock(&l->snap_mu);
    l->front = 1 - l->front;
    pthread_mutex_unlock(&l->snap_mu);
}

struct train_ctx {
    struct learner *l;
    uint64_t conn_id;
};

static void on_pass(void *ctx, unsigned pass, unsigned of, double change)
{
    struct train_ctx *t = ctx;
    learner_event_t ev = {.kind = LEV_PROGRESS,
                          .l = t->l,
                          .conn_id = t->conn_id,
                          .pass = pass,
                          .of = of,
                          .change = change};
    t->l->post(t->l->ctx, &ev);
}

static void apply(struct learner *l, learner_rec_t *r)
{
    if (r->type == LREC_OBS) {
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
        int rc = model_observe(l->m, &o, err, sizeof err);
        /* The loop validated the record and mirrors the source table: a refusal is a bug. */
        if (rc) {
            say_error("model %s: accepted transition refused: %s", l->name, err);
            CHECK(rc == 0);
        }
        return;
    }
    est_train_t rep = {0, 0, 0};
    struct train_ctx t = {l, r->conn_id};
    int rc = model_train(l->m, r->est, r->passes, on_pass, &t, &rep);
    learner_event_t ev = {.kind = LEV_TRAINED,
                          .l = l,
                          .conn_id = r->conn_id,
                          .rc = rc,
                          .pass = rep.passes,
                          .of = r->passes,
                          .change = rep.change,
                          .converged = rep.converged};
    l->post(l->ctx, &ev);
}

static void *run(void *arg)
{
    struct learner *l = arg;
    uint64_t applied = 0, last_pub = mono_ns();
    double last_update = 0;
    int dirty = 0;
    for (;;) {
        pthread_mutex_lock(&l->mu);
        while (l->head == l->tail && !l->stop)
            pthread_cond_wait(&l->cond, &l->mu);
        if (l->stop && (l->discard || l->head == l->tail)) {
            /* Discarded train requests still get their one reply. */
            for (uint64_t k = l->tail; k < l->head; k++) {
                learner_rec_t *r = rec_at(l, k);
                if (r->type == LREC_TRAIN) {
                    learner_event_t ev = {.kind = LEV_TRAINED,
                                          .l = l,
                                          .conn_id = r->conn_id,
                                          .rc = WORTH_E_NO_SUCH_MODEL};
                    l->post(l->ctx, &ev);
                }
            }
            l->tail = l->head;
            pthread_mutex_unlock(&l->mu);
            break;
        }
        uint64_t from = l->tail, to = l->head;
        pthread_mutex_unlock(&l->mu);
        if (to - from > CHUNK)
            to = from + CHUNK;

        for (uint64_t k = from; k < to; k++) {
            learner_rec_t *r = rec_at(l, k);
            apply(l, r);
            applied += r->type == LREC_OBS;
        }
        last_update = wall_s();
        dirty = 1;

        pthread_mutex_lock(&l->mu);
        l->tail = to;
        int empty = l->head == l->tail, wake = l->want_space;
        l->want_space = 0;
        pthread_mutex_unlock(&l->mu);
        uint64_t now = mono_ns();
        if (empty || now - last_pub >= PUBLISH_NS) {
            publish(l, applied, last_update);
            last_pub = now;
            dirty = 0;
        }
        if (wake)
            l->wake(l->ctx);
    }
    if (dirty)
        publish(l, applied, last_update);
    learner_event_t ev = {.kind = LEV_EXITED, .l = l};
    l->post(l->ctx, &ev);
    return NULL;
}

struct learner *learner_new(const char *name, char *spec_json, struct model *m, size_t queue_cap,
                            learner_post_fn post, learner_wake_fn wake, void *ctx)
{
    struct learner *l = mem_calloc(1, sizeof *l);
    snprintf(l->name, sizeof l->name, "%s", name);
    l->spec_json = spec_json;
    l->m = m;
    l->dims = model_dims(m);
    l->n_est = model_n_est(m);
    l->cap = queue_cap;
    l->stride = (sizeof(learner_rec_t) + 2 * l->dims * sizeof(double) + 7) & ~(size_t)7;
    l->ring = mem_calloc(l->cap, l->stride);
    l->max_src = model_max_sources(m);
    l->post = post;
    l->wake = wake;
    l->ctx = ctx;
    pthread_mutex_init(&l->mu, NULL);
    pthread_cond_init(&l->cond, NULL);
    pthread_mutex_init(&l->snap_mu, NULL);
    size_t ss = model_snap_size(m);
    for (int i = 0; i < 2; i++)
        l->snaps[i].data = mem_calloc(ss, sizeof(double));
    model_snap(m, l->snaps[0].data); /* the initial weights answer until the first publish */
    for (size_t i = 0; i < l->n_est; i++)
        est_stats(model_est(m, i), &l->snaps[0].est[i]);
    l->qwork = mem_calloc(model_work_size(m), sizeof(double));
    l->qvals = mem_calloc(l->n_est, sizeof(double));
    l->qsd = mem_calloc(l->n_est, sizeof(double));
    CHECK(pthread_create(&l->thread, NULL, run, l) == 0);
    return l;
}

void learner_stop(struct learner *l, int discard)
{
    pthread_mutex_lock(&l->mu);
    l->stop = 1;
    l->discard |= discard;
    pthread_cond_signal(&l->cond);
    pthread_mutex_unlock(&l->mu);
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
    pthread_mutex_destroy(&l->mu);
    pthread_cond_destroy(&l->cond);
    pthread_mutex_destroy(&l->snap_mu);
    for (int i = 0; i < 2; i++)
        mem_free(l->snaps[i].data);
    mem_free(l->qwork);
    mem_free(l->qvals);
    mem_free(l->qsd);
    mem_free(l->ring);
    mem_free(l->src);
    mem_free(l->spec_json);
    model_free(l->m);
    mem_free(l);
}

size_t learner_space(struct learner *l)
{
    pthread_mutex_lock(&l->mu);
    size_t used = (size_t)(l->head - l->tail);
    pthread_mutex_unlock(&l->mu);
    return l->cap - used;
}

learner_rec_t *learner_slot(struct learner *l, size_t i)
{
    /* head is written only by this (loop) thread: reading it unlocked is safe. */
    return rec_at(l, l->head + i);
}

static long mirror_find(const struct learner *l, const char *name)
{
    for (size_t i = 0; i < l->n_src; i++)
        if (strcmp(l->src[i], name) == 0)
            return (long)i;
    return -1;
}

int learner_sources_fit(struct learner *l, const char *const *names, size_t k, size_t *bad,
                        char *err, size_t errlen)
{
    /* New names in this request, counted once each; requests rarely carry more than one. */
    size_t fresh = 0;
    for (size_t i = 0; i < k; i++) {
        const char *s = names[i] ? names[i] : "";
        if (mirror_find(l, s) >= 0)
            continue;
        int seen = 0;
        for (size_t j = 0; j < i && !seen; j++)
            seen = strcmp(names[j] ? names[j] : "", s) == 0;
        if (!seen && l->n_src + ++fresh > l->max_src) {
            snprintf(err, errlen, "source \"%s\" would exceed the model's %zu source slots", s,
                     l->max_src);
            if (bad)
                *bad = i;
            return WORTH_E_TOO_MANY_SOURCES;
        }
    }
    return 0;
}

uint64_t learner_commit(struct learner *l, size_t k)
{
    if (!l->src)
        l->src = mem_calloc(l->max_src, sizeof *l->src);
    for (size_t i = 0; i < k; i++) {
        learner_rec_t *r = rec_at(l, l->head + i);
        if (r->type == LREC_OBS) {
            l->received++;
            if (mirror_find(l, r->src) < 0) {
                CHECK(l->n_src < l->max_src);
                memcpy(l->src[l->n_src++], r->src, sizeof l->src[0]);
            }
        }
    }
    pthread_mutex_lock(&l->mu);
    l->head += k;
    pthread_cond_signal(&l->cond);
    pthread_mutex_unlock(&l->mu);
    return l->received;
}

void learner_want_space(struct learner *l)
{
    pthread_mutex_lock(&l->mu);
    l->want_space = 1;
    pthread_mutex_unlock(&l->mu);
}

const char *learner_name(const struct learner *l)
{
    return l->name;
}

const char *learner_spec(const struct learner *l)
{
    return l->spec_json;
}

const struct model *learner_model(const struct learner *l)
{
    return l->m;
}

int learner_value(struct learner *l, const double *x, size_t len, double *values, double *sd,
                  uint64_t *seq)
{
    pthread_mutex_lock(&l->snap_mu);
    const struct snap *s = &l->snaps[l->front];
    int rc = model_snap_value(l->m, s->data, x, len, values, sd, l->qwork);
    *seq = s->applied;
    pthread_mutex_unlock(&l->snap_mu);
    return rc;
}

void learner_stats(struct learner *l, learner_stats_t *out)
{
    memset(out, 0, sizeof *out);
    pthread_mutex_lock(&l->snap_mu);
    const struct snap *s = &l->snaps[l->front];
    out->applied = s->applied;
    out->counts = s->counts;
    memcpy(out->est, s->est, sizeof out->est);
    out->last_update = s->last_update;
    pthread_mutex_unlock(&l->snap_mu);
    out->received = l->received;
    pthread_mutex_lock(&l->mu);
    out->queued = (size_t)(l->head - l->tail);
    pthread_mutex_unlock(&l->mu);
}
