/*
 * model_replay.c - a long run of transitions learnt with a model's
 * estimators on worker threads (recovery, rollback with replay); the API is
 * the model_replay_* part of model.h.
 *
 * Owns the ring of chunks, the worker threads and their mutex and conditions;
 * the model is borrowed and belongs to the replay until model_replay_flush
 * or _end returns.  Three stages per chunk of transitions: (A) on the
 * pushing thread, check, source slot, discount and features; (B) on the
 * workers, each estimator over the whole chunk in order (a worker owns a
 * fixed set of estimators, so no estimator is ever touched by two threads);
 * (C) on the pushing thread, the diagnostics and the counters in order.  The
 * chunks form a ring: while the workers run B on the chunks handed out, the
 * pusher runs A on the next, and C on a chunk once the workers are done with
 * it and before it is filled again.  Stage A touches only the source table,
 * the feature workspace and clipped; B only its estimators; C only the
 * diagnostics and applied: the stages share no mutable state but the chunks,
 * whose hand-over goes through the mutex.
 *
 * It must never let two threads touch one estimator, learn a transition out
 * of order or before model_check passed it, or allocate per transition
 * (chunks are allocated in model_replay_new): the result is bit for bit
 * that of model_observe on each transition.
 */
#include "learn/model.h"

#include <pthread.h>
#include <string.h>
#include <sys/resource.h>
#include <unistd.h>

#include "common/fail.h"
#include "common/mem.h"
#include "learn/model_impl.h"

/*
 * Rough flops per transition below which worker threads cost more than they
 * save (a hand-over is some microseconds): td alone at any n the daemon
 * sees, or RLS-TD below about 40 features.
 */
#define PARALLEL_MIN_COST 10000.0

struct chunk {
    size_t count;
    double *phi, *phin; /* cap x n each */
    double *r, *g;      /* cap each */
    int *term;          /* cap */
    size_t *slot;       /* cap */
    double *pred;       /* cap x n_est: each estimator's V(x) before its update */
    double *sd;         /* cap x n_est: and its own sd there (NAN: none) */
    est_stats_t *st;    /* cap x n_est: and its counters after the update */
    double *td;         /* cap x n_est: each estimator's TD error */
};

struct worker {
    struct model_replay *r;
    pthread_t thread;
    size_t n_est;
    size_t est[MODEL_MAX_EST]; /* the estimators this worker updates */
};

struct model_replay {
    struct model *m;
    size_t cap;       /* transitions a chunk holds */
    struct chunk *ch; /* ring chunks */
    size_t ring;
    size_t fill;      /* index of the chunk stage A fills: gen % ring */
    size_t n_workers; /* 0: stage B runs on the pushing thread */
    struct worker *w;
    size_t all[MODEL_MAX_EST]; /* every estimator, for the single-thread case */
    pthread_mutex_t mu;
    pthread_cond_t go, done;
    uint64_t gen;      /* chunks handed out so far (the one filling is number gen) */
    uint64_t finished; /* chunks whose stage C has run: finished..gen-1 are out */
    size_t *left;      /* ring: workers still learning each chunk handed out */
    int stop;
    int nice; /* added to each worker's nice value */
    /* The last x_next pushed and its features: a stream whose x is the previous
     * x_next (the usual case) evaluates features once per transition, not twice.
     * feat_eval is a pure function of x, so the bits are the same. */
    int have_last;
    size_t last_clip;
    double *last_x, *last_phi;
    model_replay_fn after; /* stage C callback, or NULL */
    void *after_ctx;
};

/* model_replay_footprint (model.c) allows 4 KiB for the struct and its workers. */
_Static_assert(sizeof(struct model_replay) + MODEL_MAX_EST * sizeof(struct worker) <= 4096,
               "model_replay_footprint's allowance");

/* Rough flops per transition of estimator e, to balance the workers. */
static double est_cost(const struct est *e, size_t n)
{
    const est_params_t *p = est_params(e);
    double dn = (double)n;
    switch (p->kind) {
    case EST_RLS_TD:
        return 6.0 * dn * dn * (p->forget < 1.0 ? 1.5 : 1.0);
    case EST_LSTD:
        return 2.0 * dn * dn + dn * dn * dn / (3.0 * p->refit_every);
    case EST_REPLAY:
        return 4.0 * dn * p->batch * p->steps_per_obs + 4.0 * dn;
    case EST_MLP:
    case EST_ENSEMBLE: { /* forward, target and backward passes of every member */
        double w = (double)est_weight_count(e);
        return 6.0 * w * p->batch * p->steps_per_obs + 4.0 * w;
    }
    default:
        return 6.0 * dn;
    }
}

/* Stage B: the estimators in est[0..k) over chunk c, each in transition order. */
static void learn_chunk(struct model *m, struct chunk *c, const size_t *est, size_t k)
{
    size_t n = m->n, ne = m->n_est;
    for (size_t j = 0; j < k; j++) {
        size_t i = est[j];
        struct est *e = m->est[i];
        for (size_t t = 0; t < c->count; t++) {
            model_pred_sd(e, c->phi + t * n, &c->sd[t * ne + i]);
            int rc = est_observe(e, c->slot[t], c->phi + t * n, c->r[t],
                                 c->term[t] ? NULL : c->phin + t * n, c->g[t], c->term[t]);
            CHECK(rc == 0); /* stage A validated it */
            model_learnt_sd(e, &c->sd[t * ne + i]);
            c->pred[t * ne + i] = est_last_value(e);
            est_stats(e, &c->st[t * ne + i]);
            c->td[t * ne + i] = est_last_td(e);
        }
    }
}

/* Stage C: diagnostics, counters and the callback, in transition order. */
static void finish_chunk(struct model_replay *r, struct chunk *c)
{
    struct model *m = r->m;
    for (size_t t = 0; t < c->count; t++) {
        diag_observe_sd(m->diag, c->slot[t], c->pred + t * m->n_est, c->sd + t * m->n_est, c->r[t],
                        c->g[t], c->term[t], c->td + t * m->n_est, health_headline(m->health));
        health_update(m->health, c->st + t * m->n_est, m->diag);
        m->applied++;
        if (r->after)
            r->after(r->after_ctx);
    }
    c->count = 0;
}

static void *work(void *arg)
{
    struct worker *w = arg;
    struct model_replay *r = w->r;
    uint64_t seen = 0; /* chunks this worker has learnt */
    /* Linux keeps a nice value per thread; failing to change it only costs latency. */
    if (r->nice)
        (void)setpriority(PRIO_PROCESS, 0, getpriority(PRIO_PROCESS, 0) + r->nice);
    pthread_mutex_lock(&r->mu);
    for (;;) {
        while (r->gen == seen && !r->stop)
            pthread_cond_wait(&r->go, &r->mu);
        if (r->gen == seen)
            break; /* stopped, and nothing handed out is left */
        size_t j = (size_t)(seen % r->ring);
        pthread_mutex_unlock(&r->mu);
        learn_chunk(r->m, &r->ch[j], w->est, w->n_est);
        pthread_mutex_lock(&r->mu);
        seen++;
        if (--r->left[j] == 0)
            pthread_cond_signal(&r->done);
    }
    pthread_mutex_unlock(&r->mu);
    return NULL;
}

/* Runs stage C, in order, on every chunk handed out up to number upto (exclusive). */
static void finish_upto(struct model_replay *r, uint64_t upto)
{
    for (; r->finished < upto; r->finished++) {
        size_t j = (size_t)(r->finished % r->ring);
        pthread_mutex_lock(&r->mu);
        while (r->left[j])
            pthread_cond_wait(&r->done, &r->mu);
        pthread_mutex_unlock(&r->mu);
        finish_chunk(r, &r->ch[j]);
    }
}

/* Hands the chunk being filled to the workers (or learns it here) and switches chunks. */
static void hand_over(struct model_replay *r)
{
    struct chunk *c = &r->ch[r->fill];
    if (c->count == 0)
        return;
    if (r->n_workers == 0) {
        learn_chunk(r->m, c, r->all, r->m->n_est);
        finish_chunk(r, c);
        return;
    }
    /*
     * Stage C needs only its chunk (each estimator's results were copied into
     * it), so it runs when the ring needs the chunk again, off the path the
     * workers wait on; the callback's contract (model.h) lets the estimators
     * be that far ahead.
     */
    pthread_mutex_lock(&r->mu);
    r->left[r->fill] = r->n_workers;
    r->gen++;
    pthread_cond_broadcast(&r->go);
    pthread_mutex_unlock(&r->mu);
    r->fill = (size_t)(r->gen % r->ring);
    if (r->gen >= r->ring) /* the chunk to fill next, learnt and finished */
        finish_upto(r, r->gen - r->ring + 1);
}

/* Waits for every chunk handed out and runs stage C on them. */
static void collect(struct model_replay *r)
{
    finish_upto(r, r->gen);
}

static void chunk_init(struct chunk *c, size_t cap, size_t n, size_t n_est)
{
    c->count = 0;
    c->phi = mem_alloc(cap * n * sizeof *c->phi);
    c->phin = mem_alloc(cap * n * sizeof *c->phin);
    c->r = mem_alloc(cap * sizeof *c->r);
    c->g = mem_alloc(cap * sizeof *c->g);
    c->term = mem_alloc(cap * sizeof *c->term);
    c->slot = mem_alloc(cap * sizeof *c->slot);
    c->pred = mem_alloc(cap * n_est * sizeof *c->pred);
    c->sd = mem_alloc(cap * n_est * sizeof *c->sd);
    c->st = mem_alloc(cap * n_est * sizeof *c->st);
    c->td = mem_alloc(cap * n_est * sizeof *c->td);
}

static void chunk_free(struct chunk *c)
{
    mem_free(c->phi);
    mem_free(c->phin);
    mem_free(c->r);
    mem_free(c->g);
    mem_free(c->term);
    mem_free(c->slot);
    mem_free(c->pred);
    mem_free(c->sd);
    mem_free(c->st);
    mem_free(c->td);
}

struct model_replay *model_replay_new(struct model *m, unsigned threads, int nice)
{
    struct model_replay *r = mem_calloc(1, sizeof *r);
    r->m = m;
    r->nice = nice;
    r->last_x = mem_alloc(m->dims * sizeof *r->last_x);
    r->last_phi = mem_alloc(m->n * sizeof *r->last_phi);
    r->cap = replay_cap_of(m->n);
    for (size_t i = 0; i < m->n_est; i++)
        r->all[i] = i;

    double load[MODEL_MAX_EST], cost[MODEL_MAX_EST], total = 0;
    int taken[MODEL_MAX_EST];
    size_t to_of[MODEL_MAX_EST]; /* each estimator's worker; all three set per try below */
    for (size_t i = 0; i < m->n_est; i++)
        total += cost[i] = est_cost(m->est[i], m->n);
    size_t want = threads;
    if (want == 0) {
        long cores = sysconf(_SC_NPROCESSORS_ONLN);
        /* One core: nothing runs alongside the pusher, so learn on it. */
        want = cores > 1 && total >= PARALLEL_MIN_COST ? (size_t)cores : 0;
    }
    if (want > m->n_est)
        want = m->n_est;
    /* Without workers every chunk is learnt as soon as it is full: one is enough. */
    r->ring = want ? replay_ring_of(m->n, m->n_est) : 1;
    r->ch = mem_calloc(r->ring, sizeof *r->ch);
    r->left = mem_calloc(r->ring, sizeof *r->left);
    for (size_t i = 0; i < r->ring; i++)
        chunk_init(&r->ch[i], r->cap, m->n, m->n_est);
    if (want == 0)
        return r;

    /*
     * Costliest estimator first, each to the least loaded worker.  A worker
     * left with under a quarter of the busiest one's load (td beside RLS-TD)
     * would cost more in wake-ups than it saves, and a thread more than the
     * cores can run at once: one worker fewer, until none is that light.
     */
    for (;;) {
        memset(load, 0, sizeof load);
        memset(taken, 0, sizeof taken);
        memset(to_of, 0, sizeof to_of);
        for (size_t k = 0; k < m->n_est; k++) {
            size_t best = m->n_est;
            for (size_t i = 0; i < m->n_est; i++)
                if (!taken[i] && (best == m->n_est || cost[i] > cost[best]))
                    best = i;
            taken[best] = 1;
            size_t to = 0;
            for (size_t j = 1; j < want; j++)
                if (load[j] < load[to])
                    to = j;
            load[to] += cost[best];
            to_of[best] = to;
        }
        double lo = load[0], hi = load[0];
        for (size_t j = 1; j < want; j++) {
            lo = load[j] < lo ? load[j] : lo;
            hi = load[j] > hi ? load[j] : hi;
        }
        if (want == 1 || threads || lo >= hi / 4) /* a count asked for is kept */
            break;
        want--;
    }
    r->n_workers = want;
    r->w = mem_calloc(want, sizeof *r->w);
    for (size_t i = 0; i < m->n_est; i++) /* each worker's estimators in index order */
        r->w[to_of[i]].est[r->w[to_of[i]].n_est++] = i;
    pthread_mutex_init(&r->mu, NULL);
    pthread_cond_init(&r->go, NULL);
    pthread_cond_init(&r->done, NULL);
    for (size_t j = 0; j < want; j++) {
        r->w[j].r = r;
        CHECK(pthread_create(&r->w[j].thread, NULL, work, &r->w[j]) == 0);
    }
    return r;
}

int model_replay_push(struct model_replay *r, const model_obs_t *t, char *err, size_t errlen)
{
    struct model *m = r->m;
    int rc = model_check(m, t, err, errlen);
    if (rc) {
        model_replay_flush(r);
        return rc;
    }
    struct chunk *c = &r->ch[r->fill];
    size_t k = c->count, n = m->n;
    c->slot[k] = (size_t)model_source_slot(m, t);
    c->g[k] = model_discount(m, t);
    c->r[k] = t->r;
    c->term[k] = t->terminal != 0;
    if (r->have_last && memcmp(t->x, r->last_x, m->dims * sizeof *t->x) == 0) {
        memcpy(c->phi + k * n, r->last_phi, n * sizeof *r->last_phi);
        m->clipped += r->last_clip;
    } else {
        m->clipped += feat_eval(m->feat, t->x, c->phi + k * n, m->work);
    }
    r->have_last = !t->terminal;
    if (!t->terminal) {
        r->last_clip = feat_eval(m->feat, t->x_next, c->phin + k * n, m->work);
        m->clipped += r->last_clip;
        memcpy(r->last_x, t->x_next, m->dims * sizeof *t->x_next);
        memcpy(r->last_phi, c->phin + k * n, n * sizeof *r->last_phi);
    }
    if (++c->count == r->cap)
        hand_over(r);
    return 0;
}

void model_replay_set_after(struct model_replay *r, model_replay_fn fn, void *ctx)
{
    r->after = fn;
    r->after_ctx = ctx;
}

void model_replay_flush(struct model_replay *r)
{
    hand_over(r);
    collect(r);
}

void model_replay_end(struct model_replay *r)
{
    if (!r)
        return;
    model_replay_flush(r);
    if (r->n_workers) {
        pthread_mutex_lock(&r->mu);
        r->stop = 1;
        pthread_cond_broadcast(&r->go);
        pthread_mutex_unlock(&r->mu);
        for (size_t j = 0; j < r->n_workers; j++)
            pthread_join(r->w[j].thread, NULL);
        pthread_mutex_destroy(&r->mu);
        pthread_cond_destroy(&r->go);
        pthread_cond_destroy(&r->done);
        mem_free(r->w);
    }
    for (size_t i = 0; i < r->ring; i++)
        chunk_free(&r->ch[i]);
    mem_free(r->ch);
    mem_free(r->left);
    mem_free(r->last_x);
    mem_free(r->last_phi);
    mem_free(r);
}
