/*
 * queue.c - a model's record ring and its three cursors (queue.h).
 *
 * Owns the ring of fixed-size records (a header and 2 * dims doubles each),
 * the cursors and the lock that guards them.  Three threads share it:
 *   the loop fills slots at head (queue_slot, queue_commit);
 *   the writer appends [durable, head) to the log and, after COMMIT, advances
 *   durable (queue_pending, queue_set_durable);
 *   the learner takes [taken, durable) to apply (queue_take) and releases
 *   what it has applied (queue_release), which may lag what it took.
 * So a record is applied only once it is in the log.  It must never drop a
 * committed record, nor let the producer overwrite one not yet released.
 *
 * Invariants.
 * 1. tail <= taken <= durable <= head, each only grows, head - tail <= cap;
 *    all four change under mu.
 * 2. Slots in [tail, head) are written by nobody; the loop writes only beyond
 *    head, the writer only rewrites a record's type to QREC_DEAD (and a
 *    rollback's plan) before advancing durable past it.
 * 3. Seqs: the loop numbers transitions from 1 per model, never reusing one,
 *    also across restarts (recovery starts from the log's last seq).
 * 4. cut = QUEUE_CUT_STOP once stopped, plus the rollbacks committed and not
 *    yet applied (or gone).
 */
#include "core/queue.h"

#include <pthread.h>
#include <stdio.h>
#include <string.h>

#include "common/mem.h"

struct queue {
    char name[MODEL_NAME_MAX + 1];
    size_t dims;
    pthread_mutex_t mu;
    pthread_cond_t cond;
    unsigned char *ring;
    size_t cap, stride;
    uint64_t head, durable, taken, tail; /* invariant 1 */
    int stop, discard, want_space;
    int unpaired;          /* under mu: a commit of sources failed; see queue_mark_unpaired */
    atomic_int cut;        /* invariant 4 */
    uint64_t seq;          /* loop thread: last seq given out */
    int64_t db_id;         /* set by the writer before the first durable advance */
    uint64_t ckpt_count;   /* under mu: the writer's count of valid checkpoints */
    double ckpt_newest_at; /* under mu */
};

static size_t stride_of(size_t dims)
{
    return (sizeof(queue_rec_t) + 2 * dims * sizeof(double) + 7) & ~(size_t)7;
}

double queue_footprint(size_t dims, size_t cap)
{
    return (double)cap * (double)stride_of(dims);
}

struct queue *queue_new(const char *name, size_t dims, size_t cap, uint64_t seq)
{
    struct queue *q = mem_calloc(1, sizeof *q);
    snprintf(q->name, sizeof q->name, "%s", name);
    q->dims = dims;
    q->cap = cap;
    q->stride = stride_of(dims);
    q->ring = mem_calloc(cap, q->stride);
    q->seq = seq;
    pthread_mutex_init(&q->mu, NULL);
    pthread_cond_init(&q->cond, NULL);
    return q;
}

queue_rec_t *queue_rec(struct queue *q, uint64_t k)
{
    return (queue_rec_t *)(q->ring + (size_t)(k % q->cap) * q->stride);
}

void queue_free(struct queue *q)
{
    if (!q)
        return;
    for (uint64_t k = q->tail; k < q->head; k++) {
        queue_rec_t *r = queue_rec(q, k);
        if (r->type == QREC_ROLLBACK && r->job) {
            mem_free(r->job->blob);
            mem_free(r->job);
        }
    }
    pthread_mutex_destroy(&q->mu);
    pthread_cond_destroy(&q->cond);
    mem_free(q->ring);
    mem_free(q);
}

size_t queue_space(struct queue *q)
{
    pthread_mutex_lock(&q->mu);
    size_t used = (size_t)(q->head - q->tail);
    pthread_mutex_unlock(&q->mu);
    return q->cap - used;
}

queue_rec_t *queue_slot(struct queue *q, size_t i)
{
    /* head is written only by this (loop) thread: reading it unlocked is safe. */
    return queue_rec(q, q->head + i);
}

void queue_slot_copy(struct queue *q, size_t to, size_t from)
{
    memcpy(queue_slot(q, to), queue_slot(q, from), q->stride);
}

uint64_t queue_commit(struct queue *q, size_t k)
{
    for (size_t i = 0; i < k; i++) {
        queue_rec_t *r = queue_rec(q, q->head + i);
        r->last = i + 1 == k;
        if (r->type == QREC_OBS) {
            r->seq = ++q->seq;
        } else {
            r->seq = q->seq;
            if (r->type == QREC_ROLLBACK)
                atomic_fetch_add(&q->cut, 1); /* cut short a training ahead of it */
        }
    }
    pthread_mutex_lock(&q->mu);
    q->head += k;
    pthread_mutex_unlock(&q->mu);
    return q->seq;
}

void queue_want_space(struct queue *q)
{
    pthread_mutex_lock(&q->mu);
    q->want_space = 1;
    pthread_mutex_unlock(&q->mu);
}

uint64_t queue_last_seq(const struct queue *q)
{
    return q->seq;
}

uint64_t queue_position(const struct queue *q)
{
    return q->head; /* written only by the loop thread, which asks */
}

void queue_pending(struct queue *q, uint64_t *from, uint64_t *to)
{
    pthread_mutex_lock(&q->mu);
    *from = q->durable;
    *to = q->head;
    pthread_mutex_unlock(&q->mu);
}

void queue_set_durable(struct queue *q, uint64_t to)
{
    pthread_mutex_lock(&q->mu);
    if (to > q->durable)
        q->durable = to;
    pthread_cond_signal(&q->cond);
    pthread_mutex_unlock(&q->mu);
}

void queue_mark_unpaired(struct queue *q)
{
    pthread_mutex_lock(&q->mu);
    q->unpaired = 1;
    pthread_mutex_unlock(&q->mu);
}

int queue_unpaired(struct queue *q, uint64_t *unwritten)
{
    pthread_mutex_lock(&q->mu);
    int u = q->unpaired;
    *unwritten = q->head - q->durable;
    pthread_mutex_unlock(&q->mu);
    return u;
}

void queue_unmark_unpaired(struct queue *q)
{
    pthread_mutex_lock(&q->mu);
    q->unpaired = 0;
    pthread_mutex_unlock(&q->mu);
}

void queue_rollback_gone(struct queue *q)
{
    atomic_fetch_sub(&q->cut, 1);
}

void queue_rollback_done(struct queue *q)
{
    atomic_fetch_sub(&q->cut, 1);
}

int queue_take(struct queue *q, size_t max, uint64_t *from, uint64_t *to)
{
    pthread_mutex_lock(&q->mu);
    while (q->durable == q->taken && !(q->stop && (q->discard || q->head == q->taken)))
        pthread_cond_wait(&q->cond, &q->mu);
    int more = !(q->stop && (q->discard || q->head == q->taken));
    *from = q->taken;
    *to = more ? q->durable : q->head;
    if (more && *to - *from > max)
        *to = *from + max;
    if (more)
        q->taken = *to;
    pthread_mutex_unlock(&q->mu);
    return more;
}

int queue_idle(struct queue *q)
{
    pthread_mutex_lock(&q->mu);
    int idle = q->durable == q->taken;
    pthread_mutex_unlock(&q->mu);
    return idle;
}

int queue_release(struct queue *q, uint64_t to, int *empty)
{
    pthread_mutex_lock(&q->mu);
    if (to > q->tail && to <= q->taken)
        q->tail = to;
    *empty = q->durable == q->tail;
    int wake = q->want_space;
    q->want_space = 0;
    pthread_mutex_unlock(&q->mu);
    return wake;
}

void queue_stop(struct queue *q, int discard)
{
    pthread_mutex_lock(&q->mu);
    if (!q->stop)
        atomic_fetch_add(&q->cut,
                         QUEUE_CUT_STOP); /* a training running now ends at its next step */
    q->stop = 1;
    q->discard |= discard;
    pthread_cond_signal(&q->cond);
    pthread_mutex_unlock(&q->mu);
}

int queue_discarding(struct queue *q)
{
    pthread_mutex_lock(&q->mu);
    int d = q->discard;
    pthread_mutex_unlock(&q->mu);
    return d;
}

void queue_discard(struct queue *q)
{
    pthread_mutex_lock(&q->mu);
    q->discard = 1;
    pthread_mutex_unlock(&q->mu);
}

const atomic_int *queue_cut(const struct queue *q)
{
    return &q->cut;
}

int queue_stopping(const struct queue *q)
{
    return atomic_load(&q->cut) >= QUEUE_CUT_STOP;
}

const char *queue_name(const struct queue *q)
{
    return q->name;
}

size_t queue_dims(const struct queue *q)
{
    return q->dims;
}

size_t queue_depth(struct queue *q)
{
    pthread_mutex_lock(&q->mu);
    size_t n = (size_t)(q->head - q->tail);
    pthread_mutex_unlock(&q->mu);
    return n;
}

int64_t queue_db_id(const struct queue *q)
{
    return q->db_id;
}

void queue_set_db_id(struct queue *q, int64_t id)
{
    q->db_id = id;
}

void queue_set_checkpoint_info(struct queue *q, uint64_t count, double newest_at)
{
    pthread_mutex_lock(&q->mu);
    q->ckpt_count = count;
    q->ckpt_newest_at = newest_at;
    pthread_mutex_unlock(&q->mu);
}

void queue_checkpoint_info(struct queue *q, uint64_t *count, double *newest_at)
{
    pthread_mutex_lock(&q->mu);
    *count = q->ckpt_count;
    *newest_at = q->ckpt_newest_at;
    pthread_mutex_unlock(&q->mu);
}
