/*
 * pairing.c - samples into transitions, per source (pairing.h).
 *
 * Owns one slot per source: its last sample (t, x, r, terminal) and the last
 * producer sequence of its transitions.  A slot's two state buffers are
 * allocated the first time the source sends a sample, never per sample.
 * Loop thread only.
 *
 * The reward rule: with "next" (the default) a sample's r is what the step
 * that ends at it earned, so the transition A -> B carries B's r; with
 * "same" it is what the step that starts at it earns, so it carries A's.
 * A terminal sample ends its source's chain: the transition into it is
 * terminal (V(x_next) = 0), and the next sample starts a new chain.
 *
 * It must never pair across a gap longer than the model's limit, nor pair a
 * sample twice.
 */
#include "live/pairing.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "common/fail.h"
#include "common/mem.h"
#include "store/db.h"
#include "worth/errors.h"

struct source {
    char name[MODEL_NAME_MAX + 1];
    int have;         /* a last sample is known */
    double t, r;      /* its time and reward */
    int terminal;     /* its state was terminal */
    double *x, *next; /* dims each: the last sample's state, and room for the next one */
    uint64_t pseq;    /* the last producer sequence of a transition; 0: none */
};

struct pairing {
    spec_meta_t meta;
    struct source *src;
    size_t n, cap;
};

struct pairing *pairing_new(const spec_meta_t *meta, size_t max_sources)
{
    struct pairing *p = mem_calloc(1, sizeof *p);
    p->meta = *meta;
    p->cap = max_sources;
    p->src = mem_calloc(max_sources, sizeof *p->src);
    return p;
}

void pairing_free(struct pairing *p)
{
    if (!p)
        return;
    for (size_t i = 0; i < p->n; i++) {
        mem_free(p->src[i].x);
        mem_free(p->src[i].next);
    }
    mem_free(p->src);
    mem_free(p);
}

static struct source *find(const struct pairing *p, const char *name)
{
    for (size_t i = 0; i < p->n; i++)
        if (strcmp(p->src[i].name, name) == 0)
            return &p->src[i];
    return NULL;
}

/* The source's slot, added when new; NULL when the slots are full. */
static struct source *slot(struct pairing *p, const char *name)
{
    struct source *s = find(p, name);
    if (s || p->n == p->cap)
        return s;
    s = &p->src[p->n++];
    snprintf(s->name, sizeof s->name, "%s", name);
    return s;
}

/* The source's state buffers, allocated with its first sample. */
static void buffers(const struct pairing *p, struct source *s)
{
    if (!s->x) {
        s->x = mem_calloc(p->meta.dims, sizeof *s->x);
        s->next = mem_calloc(p->meta.dims, sizeof *s->next);
    }
}

void pairing_set_meta(struct pairing *p, const spec_meta_t *meta)
{
    CHECK(meta->dims == p->meta.dims);
    p->meta = *meta;
}

int pairing_fit(const struct pairing *p, const char *const *names, size_t k, size_t *bad, char *err,
                size_t errlen)
{
    /* New names in this request, counted once each; requests rarely carry more than one. */
    size_t fresh = 0;
    for (size_t i = 0; i < k; i++) {
        const char *s = names[i] ? names[i] : "";
        if (find(p, s))
            continue;
        int seen = 0;
        for (size_t j = 0; j < i && !seen; j++)
            seen = strcmp(names[j] ? names[j] : "", s) == 0;
        if (!seen && p->n + ++fresh > p->cap) {
            if (bad)
                *bad = i;
            return err_fail(err, errlen, WORTH_E_TOO_MANY_SOURCES,
                            "source \"%s\" would exceed the model's %zu source slots", s, p->cap);
        }
    }
    return 0;
}

void pairing_note(struct pairing *p, const char *source)
{
    CHECK(slot(p, source) != NULL);
}

int pairing_load(struct pairing *p, sqlite3 *db, int64_t model_id, char *err, size_t errlen)
{
    for (size_t i = 0; i < p->n; i++) {
        p->src[i].have = 0;
        p->src[i].pseq = 0;
    }
    sqlite3_stmt *st = NULL;
    if (sqlite3_prepare_v2(db,
                           "SELECT source, t, x, r, terminal, pseq FROM sources WHERE model = ?",
                           -1, &st, NULL) != SQLITE_OK)
        return err_fail(err, errlen, db_error_code(db), "cannot read sources: %s",
                        sqlite3_errmsg(db));
    sqlite3_bind_int64(st, 1, model_id);
    size_t bytes = p->meta.dims * sizeof(double);
    int rc, code = 0;
    while (code == 0 && (rc = sqlite3_step(st)) == SQLITE_ROW) {
        const char *name = (const char *)sqlite3_column_text(st, 0);
        int timed = sqlite3_column_type(st, 1) != SQLITE_NULL;
        struct source *s = name && strlen(name) <= MODEL_NAME_MAX ? slot(p, name) : NULL;
        if (!s) {
            code = err_fail(err, errlen, WORTH_E_DAMAGED,
                            "a row of sources names no source that fits the model");
        } else if (timed && (sqlite3_column_type(st, 2) != SQLITE_BLOB ||
                             (size_t)sqlite3_column_bytes(st, 2) != bytes ||
                             sqlite3_column_type(st, 3) == SQLITE_NULL)) {
            code = err_fail(err, errlen, WORTH_E_DAMAGED,
                            "the row of source \"%s\" in sources is damaged", name);
        } else {
            s->pseq = (uint64_t)sqlite3_column_int64(st, 5);
            if (timed) {
                buffers(p, s);
                memcpy(s->x, sqlite3_column_blob(st, 2), bytes);
                s->have = 1;
                s->t = sqlite3_column_double(st, 1);
                s->r = sqlite3_column_double(st, 3);
                s->terminal = sqlite3_column_int(st, 4) != 0;
            }
        }
    }
    if (code == 0 && rc != SQLITE_DONE)
        code =
            err_fail(err, errlen, db_error_code(db), "cannot read sources: %s", sqlite3_errmsg(db));
    sqlite3_finalize(st);
    return code;
}

/* Fills rec as a record of type for source, its other fields cleared. */
static void record(queue_rec_t *rec, uint32_t type, const char *source)
{
    rec->type = type;
    rec->terminal = 0;
    rec->ordinal = 0;
    rec->est = rec->passes = 0;
    rec->conn_id = 0;
    rec->job = NULL;
    rec->pseq = 0;
    rec->t_s = rec->dt_s = NAN;
    snprintf(rec->src, sizeof rec->src, "%s", source);
}

enum pair_outcome pairing_add(struct pairing *p, const pair_sample_t *smp, queue_rec_t *obs)
{
    size_t d = p->meta.dims;
    struct source *s = slot(p, smp->source);
    CHECK(s != NULL); /* the caller checked that the source fits */
    if (s->have && !(smp->t > s->t))
        return PAIR_SKIPPED;
    buffers(p, s);
    /* smp may live in *obs: take all of it before obs is written. */
    double t = smp->t, r = smp->r;
    int terminal = smp->terminal != 0;
    memcpy(s->next, smp->x, d * sizeof *s->next);
    enum pair_outcome out = PAIR_START;
    if (s->have && !s->terminal) {
        double dt = t - s->t;
        if (dt > p->meta.max_gap_s) {
            out = PAIR_GAP;
        } else {
            out = PAIR_PAIRED;
            record(obs, QREC_OBS, s->name);
            memcpy(obs->v, s->x, d * sizeof *obs->v);
            memcpy(obs->v + d, s->next, d * sizeof *obs->v);
            obs->r = p->meta.reward_same ? s->r : r;
            obs->terminal = (uint32_t)terminal;
            obs->t_s = s->t;
            obs->dt_s = dt;
        }
    }
    double *was = s->x;
    s->x = s->next;
    s->next = was;
    s->have = 1;
    s->t = t;
    s->r = r;
    s->terminal = terminal;
    return out;
}

void pairing_record(const struct pairing *p, const char *source, queue_rec_t *rec)
{
    const struct source *s = find(p, source);
    CHECK(s != NULL);
    record(rec, QREC_SOURCE, s->name);
    rec->pseq = s->pseq;
    if (!s->have)
        return;
    rec->est = 1;
    memcpy(rec->v, s->x, p->meta.dims * sizeof *rec->v);
    rec->t_s = s->t;
    rec->r = s->r;
    rec->terminal = (uint32_t)s->terminal;
}

double pairing_last_t(const struct pairing *p, const char *source)
{
    const struct source *s = find(p, source);
    return s && s->have ? s->t : -INFINITY;
}

uint64_t pairing_pseq(const struct pairing *p, const char *source)
{
    const struct source *s = find(p, source);
    return s ? s->pseq : 0;
}

void pairing_pseq_set(struct pairing *p, const char *source, uint64_t pseq)
{
    struct source *s = slot(p, source);
    CHECK(s != NULL);
    if (pseq > s->pseq)
        s->pseq = pseq;
}

size_t pairing_count(const struct pairing *p)
{
    return p->n;
}

void pairing_get(const struct pairing *p, size_t i, const char **source, double *t, uint64_t *pseq)
{
    const struct source *s = &p->src[i];
    *source = s->name;
    *t = s->have ? s->t : NAN;
    *pseq = s->pseq;
}
