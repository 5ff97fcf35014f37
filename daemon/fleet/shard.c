/*
 * shard.c - one shard on its owner: restore, consume in stream order, learn,
 * checkpoint.
 *
 * A shard's state is a pure function of the stream: its newest checkpoint
 * (the models' states after every message up to a sequence) and the messages
 * after it, applied in stream order by the same model_observe as the single
 * node.  So whichever node computed a checkpoint, and whichever node replays
 * after it, the weights come out bit for bit the same (on hosts that run the
 * same kernels, see worthd(8)).
 *
 * The messages of a model, in order: one model.create (the spec, as the
 * socket protocol's request), then transitions - one object as `observe`
 * takes it, or {"batch":[...]} - and model.rollback (relearn.c).  A message that cannot be applied
 * (no such model, a bad vector, malformed JSON) is counted and skipped, the same way on every
 * replay.
 *
 * Checkpoint format (little-endian, ser.h): "WFC1", u32 version 1, u32 shard,
 * u64 seq, u32 models, then per model: u32 + name, u32 + canonical spec, u64
 * applied, rejected, last_seq, create_seq, excluded, rollbacks, u32 windows
 * and each (u32 by_time, f64 lo, f64 hi), u32 + model_save bytes; a CRC-32 of
 * all before it.  Stored in chunks of FLEET_CHUNK under s<shard>.<seq>.<i>, then
 * the head s<shard> = {"seq","len","chunks","node"} is written with a
 * compare-and-set on its revision, only forward (a head never goes back to an
 * older sequence, whoever writes it).
 */
#include <cjson/cJSON.h>
#include <inttypes.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "common/say.h"
#include "fleet/fleet_impl.h"
#include "learn/ser.h"
#include "worth/errors.h"

#define CK_MAGIC   0x31434657u /* "WFC1" */
#define CK_VERSION 1u

/* Applies one message of the stream (subject worth.t.<shard>.<model>). */
static void apply_msg(struct node *nd, struct shard *s, const char *subj, const char *data, int len,
                      uint64_t seq)
{
    const char *name = fleet_subject_model(subj);
    if (!name || !spec_name_ok(name))
        return;
    struct fmodel *f = fmodel_find(s, name);
    cJSON *root = cJSON_ParseWithLength(data, (size_t)len);
    const cJSON *op = cJSON_GetObjectItemCaseSensitive(root, "op");
    if (cJSON_IsString(op) && strcmp(op->valuestring, "model.create") == 0)
        fmodel_create(s, f, name, root, seq);
    else if (!f) /* no_such_model: nothing to count it against */
        ;
    else if (cJSON_IsString(op) && strcmp(op->valuestring, "model.rollback") == 0)
        relearn_apply(nd, s, f, root, seq);
    else if (op)
        f->rejected++;
    else
        fmodel_learn(nd, f, root, seq);
    if ((f = fmodel_find(s, name)) && f->last_seq < seq)
        f->last_seq = seq;
    cJSON_Delete(root);
}

int shard_pump(struct node *nd, struct shard *s)
{
    natsMsgList list = {0};
    jsFetchRequest fr;
    jsFetchRequest_Init(&fr);
    fr.Batch = FLEET_BATCH;
    fr.NoWait = true;
    natsStatus st = natsSubscription_FetchRequest(&list, s->pull, &fr);
    if (st == NATS_TIMEOUT || st == NATS_NOT_FOUND) {
        natsMsgList_Destroy(&list);
        s->pending = 0;
        return 0;
    }
    if (st != NATS_OK) {
        say_debug("fleet: shard %u: fetch: %s", s->id, natsStatus_GetText(st));
        natsMsgList_Destroy(&list);
        return -1;
    }
    int taken = 0;
    natsMsg *last = NULL;
    for (int i = 0; i < list.Count; i++) {
        natsMsg *m = list.Msgs[i];
        jsMsgMetaData *meta = NULL;
        if (natsMsg_GetMetaData(&meta, m) != NATS_OK)
            continue;
        uint64_t seq = meta->Sequence.Stream;
        s->pending = meta->NumPending;
        jsMsgMetaData_Destroy(meta);
        last = m;
        if (seq <= s->seq) /* a redelivery of what is learnt already */
            continue;
        apply_msg(nd, s, natsMsg_GetSubject(m), natsMsg_GetData(m), natsMsg_GetDataLength(m), seq);
        s->seq = seq;
        taken++;
    }
    if (last)
        natsMsg_Ack(last, &nd->jo);
    natsMsgList_Destroy(&list);
    return taken;
}

/* --- checkpoints --- */

static void put_str(ser_w *w, const char *p, size_t n)
{
    ser_put_u32(w, (uint32_t)n);
    ser_put_bytes(w, p, n);
}

/* Serialises s into buf (NULL to size); returns the bytes. */
static size_t ck_encode(const struct shard *s, uint8_t *buf, size_t cap)
{
    ser_w w = {buf, cap, 0};
    ser_put_u32(&w, CK_MAGIC);
    ser_put_u32(&w, CK_VERSION);
    ser_put_u32(&w, s->id);
    ser_put_u64(&w, s->seq);
    ser_put_u32(&w, (uint32_t)s->n_models);
    for (size_t i = 0; i < s->n_models; i++) {
        const struct fmodel *f = &s->models[i];
        put_str(&w, f->name, strlen(f->name));
        put_str(&w, f->spec->canonical, strlen(f->spec->canonical));
        ser_put_u64(&w, f->applied);
        ser_put_u64(&w, f->rejected);
        ser_put_u64(&w, f->last_seq);
        ser_put_u64(&w, f->create_seq);
        ser_put_u64(&w, f->excluded);
        ser_put_u64(&w, f->rollbacks);
        ser_put_u32(&w, (uint32_t)f->n_excl);
        for (size_t k = 0; k < f->n_excl; k++) {
            ser_put_u32(&w, (uint32_t)f->excl[k].by_time);
            ser_put_f64(&w, f->excl[k].lo);
            ser_put_f64(&w, f->excl[k].hi);
        }
        size_t len = 0;
        model_save(f->m, NULL, 0, &len);
        ser_put_u32(&w, (uint32_t)len);
        if (buf && w.len + len <= cap)
            model_save(f->m, buf + w.len, len, &len);
        w.len += len;
    }
    uint32_t crc = buf && w.len <= cap ? ser_crc32(buf, w.len) : 0;
    ser_put_u32(&w, crc);
    return w.len;
}

/* Restores s's models from a checkpoint; returns 0 or -1 (err filled; s left empty). */
static int ck_decode(struct shard *s, const uint8_t *buf, size_t len, char *err, size_t errlen)
{
    ser_r tail = {buf, len, len >= 4 ? len - 4 : 0, 0};
    if (len < 28 || ser_crc32(buf, len - 4) != ser_get_u32(&tail)) {
        snprintf(err, errlen, "checkpoint fails its CRC-32");
        return -1;
    }
    ser_r r = {buf, len - 4, 0, 0};
    if (ser_get_u32(&r) != CK_MAGIC || ser_get_u32(&r) != CK_VERSION || ser_get_u32(&r) != s->id) {
        snprintf(err, errlen, "not a checkpoint of shard %u in format %u", s->id, CK_VERSION);
        return -1;
    }
    uint64_t seq = ser_get_u64(&r);
    uint32_t n = ser_get_u32(&r);
    for (uint32_t i = 0; i < n && !r.err; i++) {
        char name[MODEL_NAME_MAX + 1];
        uint32_t nl = ser_get_u32(&r);
        if (nl > MODEL_NAME_MAX || r.pos + nl > r.len)
            break;
        ser_get_bytes(&r, name, nl);
        name[nl] = 0;
        uint32_t sl = ser_get_u32(&r);
        if (r.pos + sl > r.len)
            break;
        cJSON *js = cJSON_ParseWithLength((const char *)buf + r.pos, sl);
        r.pos += sl;
        spec_t *sp = NULL;
        int rc = js ? spec_parse(js, &sp, err, errlen) : -1;
        cJSON_Delete(js);
        if (rc != 0) {
            snprintf(err, errlen, "model %s: stored spec does not parse", name);
            goto fail;
        }
        struct fmodel *f = fmodel_add(s, sp, err, errlen);
        if (!f)
            goto fail;
        f->applied = ser_get_u64(&r);
        f->rejected = ser_get_u64(&r);
        f->last_seq = ser_get_u64(&r);
        f->create_seq = ser_get_u64(&r);
        f->excluded = ser_get_u64(&r);
        f->rollbacks = ser_get_u64(&r);
        uint32_t nw = ser_get_u32(&r);
        if (nw > FLEET_MAX_WINDOWS)
            break;
        for (uint32_t k = 0; k < nw; k++) {
            f->excl[k].by_time = (int)ser_get_u32(&r);
            f->excl[k].lo = ser_get_f64(&r);
            f->excl[k].hi = ser_get_f64(&r);
        }
        f->n_excl = nw;
        uint32_t ml = ser_get_u32(&r);
        if (r.err || r.pos + ml > r.len || model_load(f->m, buf + r.pos, ml, err, errlen) != 0)
            goto fail;
        r.pos += ml;
    }
    if (r.err || r.pos != r.len || s->n_models != n) {
        snprintf(err, errlen, "checkpoint of shard %u is truncated", s->id);
        goto fail;
    }
    s->seq = s->ck_seq = seq;
    return 0;
fail:
    for (size_t i = 0; i < s->n_models; i++)
        fmodel_free(&s->models[i]);
    s->n_models = 0;
    return -1;
}

/* Reads the head of s's checkpoint: 0 with *seq, *len, *chunks, *rev; 1 when there is none;
 * -1 on error. */
static int ck_head(struct node *nd, const struct shard *s, uint64_t *seq, size_t *len,
                   unsigned *chunks, uint64_t *rev)
{
    char key[32];
    snprintf(key, sizeof key, "s%u", s->id);
    kvEntry *e = NULL;
    natsStatus st = kvStore_Get(&e, nd->ckpt, key);
    if (st == NATS_NOT_FOUND)
        return 1;
    if (st != NATS_OK)
        return -1;
    cJSON *h = cJSON_ParseWithLength(kvEntry_Value(e), (size_t)kvEntry_ValueLen(e));
    const cJSON *js = cJSON_GetObjectItemCaseSensitive(h, "seq");
    const cJSON *jl = cJSON_GetObjectItemCaseSensitive(h, "len");
    const cJSON *jc = cJSON_GetObjectItemCaseSensitive(h, "chunks");
    int ok = cJSON_IsNumber(js) && cJSON_IsNumber(jl) && cJSON_IsNumber(jc);
    if (ok) {
        *seq = (uint64_t)js->valuedouble;
        *len = (size_t)jl->valuedouble;
        *chunks = (unsigned)jc->valuedouble;
        *rev = kvEntry_Revision(e);
    }
    cJSON_Delete(h);
    kvEntry_Destroy(e);
    return ok ? 0 : -1;
}

static void ck_purge(struct node *nd, const struct shard *s, uint64_t seq, unsigned chunks)
{
    for (unsigned i = 0; i < chunks; i++) {
        char key[64];
        snprintf(key, sizeof key, "s%u.%" PRIu64 ".%u", s->id, seq, i);
        kvStore_Purge(nd->ckpt, key, NULL);
    }
}

int shard_checkpoint(struct node *nd, struct shard *s)
{
    if (s->seq == s->ck_seq)
        return 0;
    size_t len = ck_encode(s, NULL, 0);
    uint8_t *buf = malloc(len);
    if (!buf)
        return -1;
    ck_encode(s, buf, len);
    unsigned chunks = (unsigned)((len + FLEET_CHUNK - 1) / FLEET_CHUNK);
    int rc = -1;
    for (unsigned i = 0; i < chunks; i++) {
        char key[64];
        snprintf(key, sizeof key, "s%u.%" PRIu64 ".%u", s->id, s->seq, i);
        size_t off = (size_t)i * FLEET_CHUNK, n = len - off < FLEET_CHUNK ? len - off : FLEET_CHUNK;
        if (kvStore_Put(NULL, nd->ckpt, key, buf + off, (int)n) != NATS_OK)
            goto out;
    }
    uint64_t old_seq = 0, rev = 0;
    size_t old_len = 0;
    unsigned old_chunks = 0;
    int h = ck_head(nd, s, &old_seq, &old_len, &old_chunks, &rev);
    if (h < 0)
        goto out;
    if (h == 0 && old_seq >= s->seq) { /* another owner got further: keep theirs */
        ck_purge(nd, s, s->seq, chunks);
        s->ck_seq = s->seq;
        rc = 0;
        goto out;
    }
    char key[32], head[200];
    snprintf(key, sizeof key, "s%u", s->id);
    int hl = snprintf(head, sizeof head,
                      "{\"seq\":%" PRIu64 ",\"len\":%zu,\"chunks\":%u,\"node\":\"%s\"}", s->seq,
                      len, chunks, nd->o.node);
    natsStatus st = h == 1 ? kvStore_Create(NULL, nd->ckpt, key, head, hl)
                           : kvStore_Update(NULL, nd->ckpt, key, head, hl, rev);
    if (st != NATS_OK) {
        ck_purge(nd, s, s->seq, chunks);
        goto out;
    }
    if (h == 0)
        ck_purge(nd, s, old_seq, old_chunks);
    s->ck_seq = s->seq;
    s->ck_ms = fleet_now_ms();
    rc = 0;
out:
    free(buf);
    if (rc)
        say_warn("fleet: shard %u: checkpoint at seq %" PRIu64 " not stored (%s)", s->id, s->seq,
                 nats_GetLastError(NULL));
    return rc;
}

/* Loads the newest checkpoint of s.  Returns 0 (also when there is none) or -1. */
static int ck_restore(struct node *nd, struct shard *s)
{
    uint64_t seq = 0, rev = 0;
    size_t len = 0;
    unsigned chunks = 0;
    int h = ck_head(nd, s, &seq, &len, &chunks, &rev);
    if (h == 1) {
        s->seq = s->ck_seq = 0;
        return 0;
    }
    if (h < 0 || chunks != (len + FLEET_CHUNK - 1) / FLEET_CHUNK)
        return -1;
    uint8_t *buf = malloc(len ? len : 1);
    if (!buf)
        return -1;
    size_t got = 0;
    for (unsigned i = 0; i < chunks; i++) {
        char key[64];
        snprintf(key, sizeof key, "s%u.%" PRIu64 ".%u", s->id, seq, i);
        kvEntry *e = NULL;
        if (kvStore_Get(&e, nd->ckpt, key) != NATS_OK) {
            free(buf);
            return -1;
        }
        size_t n = (size_t)kvEntry_ValueLen(e);
        if (got + n <= len)
            memcpy(buf + got, kvEntry_Value(e), n);
        got += n;
        kvEntry_Destroy(e);
    }
    char err[256] = "";
    int rc = got == len ? ck_decode(s, buf, len, err, sizeof err) : -1;
    free(buf);
    if (rc)
        say_error("fleet: shard %u: checkpoint at seq %" PRIu64 " unusable: %s", s->id, seq,
                  err[0] ? err : "chunks missing");
    return rc;
}

int shard_open(struct node *nd, struct shard *s)
{
    if (ck_restore(nd, s) != 0)
        return -1;
    char filter[64];
    snprintf(filter, sizeof filter, "worth.t.%u.>", s->id);
    snprintf(s->consumer, sizeof s->consumer, "w_%s_s%u", nd->o.node, s->id);
    /* Consumer operations get longer than the others: with a server of three down, a
     * replicated consumer's creation waits for its group's election. */
    jsOptions jo = nd->jo;
    jo.Wait = 5000;
    js_DeleteConsumer(nd->js, FLEET_STREAM, s->consumer, &jo, NULL);
    jsConsumerConfig cc;
    jsConsumerConfig_Init(&cc);
    cc.Durable = s->consumer;
    cc.FilterSubject = filter;
    cc.AckPolicy = js_AckAll;
    cc.MaxAckPending = 100000;
    cc.DeliverPolicy = s->seq ? js_DeliverByStartSequence : js_DeliverAll;
    cc.OptStartSeq = s->seq ? s->seq + 1 : 0;
    cc.InactiveThreshold = 600LL * 1000 * 1000 * 1000;
    /* Replicated like the stream (a consumer of one replica, placed on a server that is
     * down, cannot be created at all; this one survives the loss of a server). */
    jsConsumerInfo *ci = NULL;
    jsErrCode jerr = 0;
    natsStatus st = js_AddConsumer(&ci, nd->js, FLEET_STREAM, &cc, &jo, &jerr);
    jsConsumerInfo_Destroy(ci);
    jsSubOptions so;
    jsSubOptions_Init(&so);
    so.Stream = FLEET_STREAM;
    so.Consumer = s->consumer;
    if (st == NATS_OK)
        st = js_PullSubscribe(&s->pull, nd->js, filter, s->consumer, &jo, &so, &jerr);
    char asks[64];
    snprintf(asks, sizeof asks, "worth.q.%u.>", s->id);
    if (st == NATS_OK)
        st = natsConnection_Subscribe(&s->asks, nd->nc, asks, ask_queue, nd);
    if (st != NATS_OK) {
        say_error("fleet: shard %u: consumer not opened: %s (%d: %s)", s->id,
                  natsStatus_GetText(st), (int)jerr, nats_GetLastError(NULL));
        shard_close(nd, s, 1);
        return -1;
    }
    s->ck_ms = fleet_now_ms();
    s->fetch_fail_ms = 0;
    return 0;
}

void shard_close(struct node *nd, struct shard *s, int delete_consumer)
{
    if (s->asks) {
        natsSubscription_Unsubscribe(s->asks);
        natsSubscription_Destroy(s->asks);
        s->asks = NULL;
    }
    if (s->pull) {
        natsSubscription_Unsubscribe(s->pull);
        natsSubscription_Destroy(s->pull);
        s->pull = NULL;
    }
    if (delete_consumer && s->consumer[0])
        js_DeleteConsumer(nd->js, FLEET_STREAM, s->consumer, &nd->jo, NULL);
    for (size_t i = 0; i < s->n_models; i++)
        fmodel_free(&s->models[i]);
    free(s->models);
    s->models = NULL;
    s->n_models = s->cap_models = 0;
    s->seq = s->ck_seq = s->pending = 0;
    s->owned = 0;
}
