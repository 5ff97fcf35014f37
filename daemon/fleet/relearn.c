/*
 * relearn.c - rollback in a fleet: a model re-learnt from the stream with
 * windows left out.
 *
 * A rollback is a message in the model's own subject,
 *   {"op":"model.rollback","model":M,"exclude":[{"seq":[lo,hi]},{"t":[lo,hi]},...]}
 * put there by the owner when it is asked (ask.c).  Being in the stream, it
 * is met at the same place by every node that ever replays the shard, so a
 * takeover honours it exactly: when applied at sequence S, the model is built
 * afresh from its spec and re-learns its own messages after its model.create
 * and before S, read back from the stream in order, leaving out the
 * transitions in any window the model's rollbacks named (stream sequences, or
 * plant times "t" of the transitions); the windows stay with the model (and
 * its checkpoints) and apply to later messages too.  The state is then what a
 * single node fed only the kept transitions holds, bit for bit.
 *
 * The re-learning runs on the fleet thread (leases are renewed before the
 * next fetch by lease_guard); it reads the model's messages only, through a
 * consumer filtered to its subject and deleted afterwards.
 */
#include <inttypes.h>
#include <math.h>
#include <stdio.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "common/say.h"
#include "fleet/fleet_impl.h"

int relearn_windows(const cJSON *exclude, struct fwin *w, size_t room, char *err, size_t errlen)
{
    if (!cJSON_IsArray(exclude) || cJSON_GetArraySize(exclude) == 0) {
        snprintf(err, errlen,
                 "\"exclude\" must be a non-empty array of {\"seq\":[lo,hi]} or "
                 "{\"t\":[lo,hi]}");
        return -1;
    }
    size_t n = 0;
    for (const cJSON *e = exclude->child; e; e = e->next) {
        const cJSON *sq = cJSON_GetObjectItemCaseSensitive(e, "seq");
        const cJSON *t = cJSON_GetObjectItemCaseSensitive(e, "t");
        const cJSON *a = sq ? sq : t;
        if (!cJSON_IsObject(e) || !a || (sq && t) || cJSON_GetArraySize(e) != 1 ||
            !cJSON_IsArray(a) || cJSON_GetArraySize(a) != 2 || !cJSON_IsNumber(a->child) ||
            !cJSON_IsNumber(a->child->next)) {
            snprintf(err, errlen, "exclude[%zu]: give {\"seq\":[lo,hi]} or {\"t\":[lo,hi]}", n);
            return -1;
        }
        double lo = a->child->valuedouble, hi = a->child->next->valuedouble;
        if (!isfinite(lo) || !isfinite(hi) || lo > hi || (sq && lo < 1)) {
            snprintf(err, errlen, "exclude[%zu]: [%g, %g] is not a window (lo <= hi%s)", n, lo, hi,
                     sq ? ", sequences from 1" : "");
            return -1;
        }
        if (n == room) {
            snprintf(err, errlen, "more than %d windows for one model", FLEET_MAX_WINDOWS);
            return -1;
        }
        w[n++] = (struct fwin){.by_time = t != NULL, .lo = lo, .hi = hi};
    }
    return (int)n;
}

/* Re-learns f from the stream: its messages after create_seq and before seq.  Returns 0, or
 * -1 when the stream could not be read back (f then half re-learnt: the caller restores). */
static int replay(struct node *nd, struct shard *s, struct fmodel *f, uint64_t seq)
{
    char filter[128], name[128];
    snprintf(filter, sizeof filter, "worth.t.%u.%s", s->id, f->name);
    snprintf(name, sizeof name, "rb_%s_%ld_%" PRIu64, nd->o.node, (long)getpid(), seq);
    jsOptions jo = nd->jo;
    jo.Wait = 5000;
    jsConsumerConfig cc;
    jsConsumerConfig_Init(&cc);
    cc.Durable = name;
    cc.FilterSubject = filter;
    cc.AckPolicy = js_AckNone;
    cc.DeliverPolicy = js_DeliverByStartSequence;
    cc.OptStartSeq = f->create_seq + 1;
    cc.InactiveThreshold = 60LL * 1000 * 1000 * 1000;
    jsConsumerInfo *ci = NULL;
    jsSubOptions so;
    jsSubOptions_Init(&so);
    so.Stream = FLEET_STREAM;
    so.Consumer = name;
    natsSubscription *sub = NULL;
    natsStatus st = js_AddConsumer(&ci, nd->js, FLEET_STREAM, &cc, &jo, NULL);
    jsConsumerInfo_Destroy(ci);
    if (st == NATS_OK)
        st = js_PullSubscribe(&sub, nd->js, filter, name, &jo, &so, NULL);
    int rc = st == NATS_OK ? 0 : -1;
    for (int done = f->create_seq + 1 >= seq; rc == 0 && !done;) {
        natsMsgList list = {0};
        st = natsSubscription_Fetch(&list, sub, FLEET_BATCH, 5000, NULL);
        if (st != NATS_OK) { /* the messages before seq are in the stream: they must come */
            rc = -1;
            natsMsgList_Destroy(&list);
            break;
        }
        for (int i = 0; i < list.Count && !done; i++) {
            jsMsgMetaData *meta = NULL;
            if (natsMsg_GetMetaData(&meta, list.Msgs[i]) != NATS_OK)
                continue;
            uint64_t q = meta->Sequence.Stream;
            int last = meta->NumPending == 0; /* the model's newest message */
            jsMsgMetaData_Destroy(meta);
            if (q >= seq) {
                done = 1;
                break;
            }
            cJSON *root = cJSON_ParseWithLength(natsMsg_GetData(list.Msgs[i]),
                                                (size_t)natsMsg_GetDataLength(list.Msgs[i]));
            const cJSON *op = cJSON_GetObjectItemCaseSensitive(root, "op");
            if (!op) /* transitions; a second create or an earlier rollback: superseded */
                fmodel_learn(nd, f, root, q);
            else if (!cJSON_IsString(op) || (strcmp(op->valuestring, "model.create") != 0 &&
                                             strcmp(op->valuestring, "model.rollback") != 0))
                f->rejected++;
            else if (strcmp(op->valuestring, "model.create") == 0)
                f->rejected++;
            cJSON_Delete(root);
            done = done || last || q + 1 >= seq;
        }
        natsMsgList_Destroy(&list);
    }
    if (sub) {
        natsSubscription_Unsubscribe(sub);
        natsSubscription_Destroy(sub);
    }
    js_DeleteConsumer(nd->js, FLEET_STREAM, name, &jo, NULL);
    return rc;
}

void relearn_apply(struct node *nd, struct shard *s, struct fmodel *f, const cJSON *root,
                   uint64_t seq)
{
    struct fwin w[FLEET_MAX_WINDOWS];
    char err[256];
    int n = relearn_windows(cJSON_GetObjectItemCaseSensitive(root, "exclude"), w,
                            FLEET_MAX_WINDOWS - f->n_excl, err, sizeof err);
    if (n < 0) {
        say_warn("fleet: model %s: rollback at seq %" PRIu64 " refused: %s", f->name, seq, err);
        f->rejected++;
        return;
    }
    /* Keep the model as it is until the re-learning has succeeded. */
    struct fmodel keep = *f;
    f->m = NULL;
    if (fmodel_rebuild(f) != 0) {
        *f = keep;
        f->rejected++;
        return;
    }
    memcpy(f->excl + f->n_excl, w, (size_t)n * sizeof *w);
    f->n_excl += (size_t)n;
    int64_t t0 = fleet_now_ms();
    if (replay(nd, s, f, seq) != 0) {
        say_error("fleet: model %s: rollback at seq %" PRIu64 " not done: the stream could not "
                  "be read back (%s); the model goes on as it was",
                  f->name, seq, nats_GetLastError(NULL));
        model_free(f->m);
        *f = keep;
        f->rejected++;
        return;
    }
    model_free(keep.m);
    f->rollbacks++;
    say_info("fleet: model %s rolled back at seq %" PRIu64 ": %" PRIu64 " transitions re-learnt, "
             "%" PRIu64 " left out, in %" PRId64 " ms",
             f->name, seq, f->applied, f->excluded, fleet_now_ms() - t0);
}
