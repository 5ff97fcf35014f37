/*
 * event.h - what the learner and writer threads tell the loop thread.
 *
 * The threads that learn and write never touch a connection: they post an
 * event (copied by the post callback into the loop's outbox) and the loop
 * delivers it to the protocol, which owns the replies.  Each event names the
 * model by its queue (core/queue.h), the one object all three threads share.
 */
#ifndef WORTH_EVENT_H
#define WORTH_EVENT_H

#include <stdint.h>

struct queue;

enum event_kind {
    EV_PROGRESS, /* a training pass finished */
    EV_TRAINED,  /* a train request finished (rc, pass, change, converged; seq: the mini-batch
                    steps; text: why it was cut short, or NULL; owned) */
    EV_EXITED,   /* the learner thread has ended; join it */
    EV_REPLY,    /* a reply for conn_id: rc, and text (owned by the event) */
    EV_DURABLE,  /* the model's records before queue position seq are committed */
    EV_FAILED,   /* its records before position seq failed to commit (text: why, owned) */
    EV_RELEASED  /* the writer has forgotten the model */
};

/* Plain data, passed by pointer to the post callback, which must copy it. */
typedef struct event_t {
    enum event_kind kind;
    struct queue *q; /* the model; NULL for a reply about no live model */
    uint64_t conn_id;
    int rc;
    unsigned pass, of;
    double change;
    int converged;
    uint64_t seq;
    char *text; /* EV_REPLY: the fields after "ok":true, or the error message */
} event_t;

/* Called on a learner or writer thread; copies *ev; must not block for long. */
typedef void (*event_post_fn)(void *ctx, const event_t *ev);
/* Called on a learner thread when it frees queue space a producer waits for. */
typedef void (*event_wake_fn)(void *ctx);

#endif /* WORTH_EVENT_H */
