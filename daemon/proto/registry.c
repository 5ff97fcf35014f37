/*
 * registry.c - the models the loop serves: live ones, dropped ones not yet
 * freed, and quarantined ones.
 *
 * Loop thread.  A slot holds a model's learner and how far its log is
 * durable.  A dropped model's slot lives on until its learner has exited,
 * the writer has released it and no waiting reply refers to it.  A model
 * quarantined at start-up (recover.c) has no learner: it keeps its name
 * until model.drop, and requests naming it answer damaged.
 */

#include <cjson/cJSON.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "common/ct.h"
#include "common/jw.h"
#include "common/mem.h"
#include "core/queue.h"
#include "core/arena.h"
#include "proto/internal.h"
#include "core/spec.h"
#include "common/say.h"
#include "store/backup.h"
#include "worth/errors.h"

/* ---- registry -------------------------------------------------------------------------- */

struct slot *reg_find_slot(struct proto *p, const char *name, size_t *at)
{
    for (size_t i = 0; i < p->n; i++)
        if (strcmp(learner_name(p->models[i]->l), name) == 0) {
            if (at)
                *at = i;
            return p->models[i];
        }
    return NULL;
}

struct learner *reg_find_model(struct proto *p, const char *name, size_t *at)
{
    struct slot *sl = reg_find_slot(p, name, at);
    return sl ? sl->l : NULL;
}

/* The quarantined model of that name, or NULL. */
struct quarantined *reg_find_damaged(struct proto *p, const char *name, size_t *at)
{
    for (size_t i = 0; i < p->n_damaged; i++)
        if (strcmp(p->damaged[i].name, name) == 0) {
            if (at)
                *at = i;
            return &p->damaged[i];
        }
    return NULL;
}

/* Answers a request naming a quarantined model: damaged, with the row and the remedy. */
void reg_reply_damaged(struct proto *p, struct conn *c, const char *id,
                       const struct quarantined *dm)
{
    char msg[900], fix[128] = "Repair it while worthd is stopped (its start-up log says how)";
    if (dm->seq)
        snprintf(fix, sizeof fix,
                 "Correct or delete transition %llu of its log while worthd is stopped",
                 (unsigned long long)dm->seq);
    snprintf(msg, sizeof msg,
             "model \"%.64s\" is quarantined since start-up and not served: %s.  %s, or drop "
             "the model (model.drop) and create it again",
             dm->name, dm->reason, fix);
    char seq[40];
    snprintf(seq, sizeof seq, ",\"seq\":%llu", (unsigned long long)dm->seq);
    reply_format_error_with(p, id, WORTH_E_DAMAGED, -1, msg, seq);
    reply_send(c, p->out.b, p->out.len);
    ops_count_error(p, c, WORTH_E_DAMAGED);
}

/* The slot of learner l, live or dropped. */
struct slot *reg_slot_of(struct proto *p, const struct queue *q)
{
    if (!q)
        return NULL;
    for (size_t i = 0; i < p->n; i++)
        if (learner_queue(p->models[i]->l) == q)
            return p->models[i];
    for (size_t i = 0; i < p->n_dropped; i++)
        if (learner_queue(p->dropped[i]->l) == q)
            return p->dropped[i];
    return NULL;
}

void reg_sweep(struct proto *p)
{
    for (size_t i = p->n_dropped; i-- > 0;)
        reg_maybe_free(p, p->dropped[i]);
}

struct learner *proto_model(const struct proto *p, size_t i)
{
    return p->models[i]->l;
}

size_t proto_n_damaged(const struct proto *p)
{
    return p->n_damaged;
}

const char *proto_damaged_name(const struct proto *p, size_t i)
{
    return p->damaged[i].name;
}

struct slot *reg_new_slot(struct learner *l, uint64_t durable)
{
    struct slot *sl = mem_calloc(1, sizeof *sl);
    sl->l = l;
    sl->durable = durable;
    return sl;
}

/* Frees a dropped slot once nothing refers to it any more. */
void reg_maybe_free(struct proto *p, struct slot *sl)
{
    if (!sl->gone || !sl->exited || !sl->released || sl->refs)
        return;
    for (size_t i = 0; i < p->n_dropped; i++)
        if (p->dropped[i] == sl) {
            p->dropped[i] = p->dropped[--p->n_dropped];
            break;
        }
    learner_free(sl->l);
    mem_free(sl);
}

/*
 * Takes a model out of the registry: its learner stops, its waiting replies
 * fail.  With tell_writer, the writer marks it dropped in the database and
 * replies to conn_id (0: nobody) whether that was stored.
 */
void reg_unregister(struct proto *p, size_t at, int tell_writer, uint64_t conn_id)
{
    struct slot *sl = p->models[at];
    p->models[at] = p->models[--p->n];
    sl->gone = 1;
    learner_stop(sl->l, 1);
    if (tell_writer)
        writer_drop_model(p->w, learner_queue(sl->l), conn_id);
    else
        sl->released = 1;
    if (p->n_dropped == p->cap_dropped) {
        p->cap_dropped = p->cap_dropped ? 2 * p->cap_dropped : 8;
        p->dropped = mem_realloc(p->dropped, p->cap_dropped * sizeof *p->dropped);
    }
    p->dropped[p->n_dropped++] = sl;
    conns_each(p->conns, reply_flush_one, p);
}

/* Drops the quarantined model at `at`: marked dropped in the database, its name free again. */
void reg_forget_damaged(struct proto *p, size_t at, uint64_t conn_id)
{
    struct quarantined *dm = &p->damaged[at];
    writer_drop_damaged(p->w, dm->id, dm->name, conn_id);
    say_info("model %s (quarantined) dropped", dm->name);
    mem_free(dm->name);
    mem_free(dm->reason);
    p->damaged[at] = p->damaged[--p->n_damaged];
}

size_t proto_n_models(const struct proto *p)
{
    return p->n;
}

void proto_learner_opts(const struct proto *p, learner_opts_t *o)
{
    memset(o, 0, sizeof *o);
    o->queue_cap = p->o->queue;
    o->checkpoint_every = p->o->checkpoint_every;
    o->db_path = p->o->db_path;
    o->writer = p->w;
    o->plant_t = NAN;
}

void proto_add_recovered(struct proto *p, struct learner *l)
{
    CHECK(p->n < p->o->max_models);
    p->models[p->n++] = reg_new_slot(l, 0);
}

void proto_add_damaged(struct proto *p, int64_t id, const char *name, uint64_t seq,
                       const char *reason)
{
    p->damaged = mem_realloc(p->damaged, (p->n_damaged + 1) * sizeof *p->damaged);
    p->damaged[p->n_damaged++] =
        (struct quarantined){mem_strdup(name), id, seq, mem_strdup(reason)};
}
