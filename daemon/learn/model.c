/*
 * model.c - a feature map, a discount and several estimators over one stream.
 *
 * Owns its feature map, estimators, source table and the phi workspaces.  Run
 * by the model's learner thread; model_value may run elsewhere on a copy.
 * The replay over worker threads (model_replay_*) is model_replay.c; the
 * struct and the two helpers it shares with this file are in model_impl.h.
 * It must never hand an estimator a transition it has not fully validated,
 * and never allocate per transition (only the first transition of a new
 * source allocates that source's buffers inside the estimators).
 *
 * Discount of a transition: gamma_per_s^dt when the model has a per-second
 * discount and the transition carries dt, else the per-step gamma.
 *
 * Saved state: u32 magic "WMOD", u32 version, u32 estimator count, u32
 * source count, u64 applied, u64 clipped, the source names (u32 length +
 * bytes), then each estimator's est_save bytes prefixed by a u64 length, the
 * diagnostics' state (diag_save), from format 3 the headline's (health_save),
 * and a u32 CRC-32 of everything before it.
 */
#include "learn/model.h"

#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <string.h>

#include "common/fail.h"
#include "common/mem.h"
#include "learn/model_impl.h"
#include "learn/ser.h"
#include "worth/errors.h"

#define MODEL_MAGIC 0x444f4d57u /* "WMOD" */

int model_new(const model_spec_t *spec, struct model **out, char *err, size_t errlen)
{
    int rc;
    if (!(spec->gamma >= 0 && spec->gamma <= 1))
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "gamma must be in [0, 1]");
    if (!(spec->gamma_per_s == 0 || (spec->gamma_per_s > 0 && spec->gamma_per_s <= 1)))
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "gamma_per_s must be in (0, 1]");
    if (spec->n_est < 1 || spec->n_est > MODEL_MAX_EST)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "a model runs 1..%d estimators",
                        MODEL_MAX_EST);
    if (spec->primary >= spec->n_est)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "primary estimator index out of range");
    size_t nsrc = spec->max_sources ? spec->max_sources : MODEL_DEFAULT_SOURCES;
    if (nsrc > EST_MAX_SOURCES)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "max_sources must be 1..%d",
                        EST_MAX_SOURCES);
    for (size_t i = 0; i < spec->n_est; i++) {
        if (!spec->est_names[i])
            return err_fail(err, errlen, WORTH_E_BAD_PARAM, "estimator %zu has no name", i);
        size_t len = strlen(spec->est_names[i]);
        if (len < 1 || len > MODEL_NAME_MAX)
            return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                            "estimator %zu: name must be 1..%d bytes", i, MODEL_NAME_MAX);
        for (size_t j = 0; j < i; j++)
            if (strcmp(spec->est_names[i], spec->est_names[j]) == 0)
                return err_fail(err, errlen, WORTH_E_BAD_PARAM, "estimator name \"%s\" repeats",
                                spec->est_names[i]);
    }

    struct feat *f = NULL;
    rc = feat_new(&spec->feat, &f, err, errlen);
    if (rc)
        return rc;
    /* The feature map is small next to the estimators: size those before allocating them. */
    if (spec->max_bytes > 0) {
        size_t n = feat_count(f);
        double need = model_footprint(spec, n) + spec->base_bytes;
        if (need > spec->max_bytes) {
            feat_free(f);
            return err_fail(err, errlen, WORTH_E_TOO_LARGE,
                            "the model would hold up to %.0f MiB (%zu features, %zu estimators, "
                            "%zu sources), over the limit of %.0f MiB",
                            ceil(need / 1048576.0), n, spec->n_est, nsrc,
                            floor(spec->max_bytes / 1048576.0));
        }
    }
    struct model *m = mem_calloc(1, sizeof *m);
    m->feat = f;
    m->dims = feat_dims(f);
    m->n = feat_count(f);
    m->gamma = spec->gamma;
    m->gamma_per_s = spec->gamma_per_s;
    m->primary = spec->primary;
    m->max_sources = nsrc;
    for (size_t i = 0; i < spec->n_est; i++) {
        char sub[200];
        rc = est_new(&spec->est[i], m->n, nsrc, &m->est[i], sub, sizeof sub);
        if (rc) {
            err_fail(err, errlen, rc, "estimator \"%s\": %s", spec->est_names[i], sub);
            goto out_free_model;
        }
        m->n_est = i + 1;
        snprintf(m->names[i], sizeof m->names[i], "%s", spec->est_names[i]);
    }
    diag_params_t dp;
    if (spec->diag)
        dp = *spec->diag;
    else
        diag_params_default(spec->gamma, &dp);
    rc = diag_new(&dp, m->n_est, nsrc, &m->diag, err, errlen);
    if (rc)
        goto out_free_model;
    m->pred = mem_calloc(m->n_est, sizeof *m->pred);
    m->sd = mem_calloc(m->n_est, sizeof *m->sd);
    m->td = mem_calloc(m->n_est, sizeof *m->td);
    m->st = mem_calloc(m->n_est, sizeof *m->st);
    m->health = health_new(m->n_est, m->n, spec->primary_auto, spec->primary, spec->est);
    diag_drift_home(m->diag, health_headline(m->health));
    m->sources = mem_calloc(nsrc, sizeof *m->sources);
    m->phi = mem_calloc(m->n, sizeof *m->phi);
    m->phin = mem_calloc(m->n, sizeof *m->phin);
    m->work = mem_calloc(feat_work_size(f), sizeof *m->work);
    *out = m;
    return 0;

out_free_model:
    model_free(m);
    return rc;
}

double model_replay_footprint(size_t dims, size_t n, size_t n_est)
{
    /* The ring, last_x and last_phi, and the replay's own struct and workers (under 4 KiB). */
    return (double)replay_ring_of(n, n_est) * replay_chunk_bytes(replay_cap_of(n), n, n_est) +
           (double)(dims + n) * sizeof(double) + 4096.0;
}

double model_footprint(const model_spec_t *spec, size_t n)
{
    size_t nsrc = spec->max_sources ? spec->max_sources : MODEL_DEFAULT_SOURCES;
    double bytes = 4.0 * (double)n * sizeof(double); /* phi, phi', feature workspace */
    for (size_t i = 0; i < spec->n_est; i++)
        bytes += est_footprint(&spec->est[i], n, nsrc);
    diag_params_t dp;
    if (spec->diag)
        dp = *spec->diag;
    else
        diag_params_default(spec->gamma, &dp);
    bytes += diag_footprint(&dp, spec->n_est, nsrc);
    bytes += (double)nsrc * (MODEL_NAME_MAX + 1);
    /* The learner's replay (its ring of chunks) lives as long as the model. */
    bytes += model_replay_footprint(spec->feat.dims, n, spec->n_est);
    return bytes;
}

void model_free(struct model *m)
{
    if (!m)
        return;
    for (size_t i = 0; i < m->n_est; i++)
        est_free(m->est[i]);
    feat_free(m->feat);
    diag_free(m->diag);
    health_free(m->health);
    mem_free(m->pred);
    mem_free(m->sd);
    mem_free(m->td);
    mem_free(m->st);
    mem_free(m->sources);
    mem_free(m->phi);
    mem_free(m->phin);
    mem_free(m->work);
    mem_free(m);
}

void model_reset(struct model *m)
{
    for (size_t i = 0; i < m->n_est; i++)
        est_reset(m->est[i]);
    diag_reset(m->diag);
    health_reset(m->health);
    memset(m->sources, 0, m->max_sources * sizeof *m->sources);
    m->n_sources = 0;
    m->applied = m->clipped = 0;
}

static int finite_vec(const double *v, size_t n)
{
    for (size_t i = 0; i < n; i++)
        if (!isfinite(v[i]))
            return 0;
    return 1;
}

/* Returns the slot of source name, or -1 when it is new. */
static long find_source(const struct model *m, const char *name)
{
    for (size_t i = 0; i < m->n_sources; i++)
        if (strcmp(m->sources[i], name) == 0)
            return (long)i;
    return -1;
}

int model_check(const struct model *m, const model_obs_t *t, char *err, size_t errlen)
{
    if (!t->x || t->x_len != m->dims)
        return err_fail(err, errlen, WORTH_E_BAD_DIMENSION, "x has %zu values, the model has %zu",
                        t->x ? t->x_len : 0, m->dims);
    if (!t->terminal && (!t->x_next || t->x_next_len != m->dims))
        return err_fail(err, errlen, WORTH_E_BAD_DIMENSION,
                        "x_next has %zu values, the model has %zu", t->x_next ? t->x_next_len : 0,
                        m->dims);
    if (t->x_next && t->x_next_len != m->dims)
        return err_fail(err, errlen, WORTH_E_BAD_DIMENSION,
                        "x_next has %zu values, the model has %zu", t->x_next_len, m->dims);
    if (!finite_vec(t->x, m->dims))
        return err_fail(err, errlen, WORTH_E_BAD_NUMBER, "x holds a NaN or infinite value");
    if (t->x_next && !finite_vec(t->x_next, m->dims))
        return err_fail(err, errlen, WORTH_E_BAD_NUMBER, "x_next holds a NaN or infinite value");
    if (!isfinite(t->r))
        return err_fail(err, errlen, WORTH_E_BAD_NUMBER, "r is NaN or infinite");
    if (!isnan(t->dt_s) && !(isfinite(t->dt_s) && t->dt_s >= 0))
        return err_fail(err, errlen, WORTH_E_BAD_NUMBER, "dt must be a finite number >= 0");
    const char *src = t->source ? t->source : "";
    if (strlen(src) > MODEL_NAME_MAX)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "source name longer than %d bytes",
                        MODEL_NAME_MAX);
    if (find_source(m, src) < 0 && m->n_sources >= m->max_sources)
        return err_fail(err, errlen, WORTH_E_TOO_MANY_SOURCES,
                        "source \"%s\" would be the model's %zu-th; its limit is %zu", src,
                        m->n_sources + 1, m->max_sources);
    return 0;
}

long model_source_slot(struct model *m, const model_obs_t *t)
{
    const char *src = t->source ? t->source : "";
    long slot = find_source(m, src);
    if (slot < 0) {
        slot = (long)m->n_sources++;
        snprintf(m->sources[slot], sizeof m->sources[slot], "%s", src);
    }
    return slot;
}

void model_pred_sd(const struct est *e, const double *phi, double *sd)
{
    /* Only rls_td and ensemble have an sd.  rls_td gives its own while it learns (the pass
     * over P it makes anyway): model_learnt_sd reads it after the update. */
    enum est_kind k = est_params(e)->kind;
    if (k != EST_ENSEMBLE || est_sd(e, phi, sd) != 0)
        *sd = NAN;
}

void model_learnt_sd(const struct est *e, double *sd)
{
    if (est_params(e)->kind == EST_RLS_TD)
        *sd = est_last_sd(e);
}

double model_discount(const struct model *m, const model_obs_t *t)
{
    if (!isnan(t->dt_s) && m->gamma_per_s > 0)
        return pow(m->gamma_per_s, t->dt_s);
    return m->gamma;
}

int model_observe(struct model *m, const model_obs_t *t, char *err, size_t errlen)
{
    int rc = model_check(m, t, err, errlen);
    if (rc)
        return rc;
    long slot = model_source_slot(m, t);
    double g = model_discount(m, t);

    m->clipped += feat_eval(m->feat, t->x, m->phi, m->work);
    if (!t->terminal)
        m->clipped += feat_eval(m->feat, t->x_next, m->phin, m->work);
    for (size_t i = 0; i < m->n_est; i++) {
        model_pred_sd(m->est[i], m->phi, &m->sd[i]);
        rc = est_observe(m->est[i], (size_t)slot, m->phi, t->r, t->terminal ? NULL : m->phin, g,
                         t->terminal);
        CHECK(rc == 0); /* everything was validated above */
        model_learnt_sd(m->est[i], &m->sd[i]);
        /* The prediction the diagnostics score: V(x) before this update, as est_observe saw it
         * (NAN once the estimator has diverged: the diagnostics then leave it out). */
        m->pred[i] = est_last_value(m->est[i]);
        m->td[i] = est_last_td(m->est[i]);
        est_stats(m->est[i], &m->st[i]);
    }
    diag_observe_sd(m->diag, (size_t)slot, m->pred, m->sd, t->r, g, t->terminal, m->td,
                    health_headline(m->health));
    health_update(m->health, m->st, m->diag);
    m->applied++;
    return 0;
}

int model_train(struct model *m, size_t i, const est_train_opts_t *o, est_train_t *rep)
{
    if (i >= m->n_est)
        return WORTH_E_BAD_PARAM;
    return est_train(m->est[i], o, rep);
}

size_t model_diverged(const struct model *m)
{
    size_t k = 0;
    for (size_t i = 0; i < m->n_est; i++)
        k += (size_t)est_diverged(m->est[i]);
    return k;
}

int model_est_diverged(const struct model *m, size_t i)
{
    return i < m->n_est && est_diverged(m->est[i]);
}

size_t model_dims(const struct model *m)
{
    return m->dims;
}

size_t model_features(const struct model *m)
{
    return m->n;
}

size_t model_n_est(const struct model *m)
{
    return m->n_est;
}

size_t model_primary(const struct model *m)
{
    return m->primary;
}

size_t model_headline(const struct model *m)
{
    return health_headline(m->health);
}

const struct health *model_health(const struct model *m)
{
    return m->health;
}

/* Every estimator's counters now (they are what health_update last saw once flushed). */
static void stats_now(const struct model *m, est_stats_t *st)
{
    for (size_t i = 0; i < m->n_est; i++)
        est_stats(m->est[i], &st[i]);
}

void model_est_health(const struct model *m, size_t i, health_est_t *out)
{
    est_stats_t st[MODEL_MAX_EST];
    const char *names[MODEL_MAX_EST];
    stats_now(m, st);
    for (size_t k = 0; k < m->n_est; k++)
        names[k] = m->names[k];
    health_est(m->health, i, st, m->diag, names, out);
}

void model_head(const struct model *m, health_head_t *out)
{
    const char *names[MODEL_MAX_EST];
    for (size_t i = 0; i < m->n_est; i++)
        names[i] = m->names[i];
    est_stats_t st[MODEL_MAX_EST];
    stats_now(m, st);
    health_head(m->health, st, m->diag, names, out);
}

const char *model_source_name(const struct model *m, size_t i)
{
    return i < m->n_sources ? m->sources[i] : NULL;
}

size_t model_max_sources(const struct model *m)
{
    return m->max_sources;
}

const char *model_est_name(const struct model *m, size_t i)
{
    return i < m->n_est ? m->names[i] : NULL;
}

int model_est_find(const struct model *m, const char *name)
{
    for (size_t i = 0; i < m->n_est; i++)
        if (strcmp(m->names[i], name) == 0)
            return (int)i;
    return -1;
}

const struct est *model_est(const struct model *m, size_t i)
{
    return i < m->n_est ? m->est[i] : NULL;
}

const struct feat *model_feat(const struct model *m)
{
    return m->feat;
}

const struct diag *model_diag(const struct model *m)
{
    return m->diag;
}

const diag_params_t *model_diag_params(const struct model *m)
{
    return diag_params(m->diag);
}

void model_counts(const struct model *m, model_counts_t *out)
{
    out->applied = m->applied;
    out->clipped = m->clipped;
    out->sources = m->n_sources;
}

size_t model_work_size(const struct model *m)
{
    return m->n + feat_work_size(m->feat);
}

int model_value(const struct model *m, const double *x, size_t len, double *values, double *sd,
                double *work)
{
    if (len != m->dims)
        return WORTH_E_BAD_DIMENSION;
    if (!finite_vec(x, len))
        return WORTH_E_BAD_NUMBER;
    double *phi = work;
    feat_eval(m->feat, x, phi, work + m->n);
    for (size_t i = 0; i < m->n_est; i++) {
        values[i] = est_value(m->est[i], phi);
        if (sd && est_sd(m->est[i], phi, &sd[i]) != 0)
            sd[i] = NAN;
    }
    return 0;
}

size_t model_snap_size(const struct model *m)
{
    size_t total = 0;
    for (size_t i = 0; i < m->n_est; i++)
        total += est_snap_size(m->est[i]);
    return total;
}

void model_snap(const struct model *m, double *out)
{
    for (size_t i = 0; i < m->n_est; i++) {
        est_snap(m->est[i], out);
        out += est_snap_size(m->est[i]);
    }
}

int model_snap_value(const struct model *m, const double *snap, const double *x, size_t len,
                     double *values, double *sd, double *work)
{
    if (len != m->dims)
        return WORTH_E_BAD_DIMENSION;
    if (!finite_vec(x, len))
        return WORTH_E_BAD_NUMBER;
    double *phi = work, s;
    feat_eval(m->feat, x, phi, work + m->n);
    for (size_t i = 0; i < m->n_est; i++) {
        values[i] = est_snap_value(m->est[i], snap, phi, &s);
        if (sd)
            sd[i] = s;
        snap += est_snap_size(m->est[i]);
    }
    return 0;
}

static int save_all(const struct model *m, ser_w *w)
{
    ser_put_u32(w, MODEL_MAGIC);
    ser_put_u32(w, MODEL_FORMAT_VERSION);
    ser_put_u32(w, (uint32_t)m->n_est);
    ser_put_u32(w, (uint32_t)m->n_sources);
    ser_put_u64(w, m->applied);
    ser_put_u64(w, m->clipped);
    for (size_t i = 0; i < m->n_sources; i++) {
        size_t len = strlen(m->sources[i]);
        ser_put_u32(w, (uint32_t)len);
        ser_put_bytes(w, m->sources[i], len);
    }
    for (size_t i = 0; i < m->n_est; i++) {
        size_t len = 0;
        est_save(m->est[i], NULL, 0, &len);
        ser_put_u64(w, len);
        if (w->buf && w->len + len <= w->cap) {
            int rc = est_save(m->est[i], w->buf + w->len, len, &len);
            CHECK(rc == 0);
        }
        w->len += len;
    }
    diag_save(m->diag, w);
    health_save(m->health, w);
    return 0;
}

int model_save(const struct model *m, uint8_t *buf, size_t cap, size_t *len)
{
    ser_w w = {buf, cap, 0};
    save_all(m, &w);
    *len = w.len + 4;
    if (!buf || *len > cap)
        return WORTH_E_TOO_LARGE;
    size_t body = w.len;
    ser_put_u32(&w, ser_crc32(buf, body));
    return 0;
}

static int load_body(struct model *m, const uint8_t *buf, size_t len, char *err, size_t errlen)
{
    ser_r r = {buf, len - 4, 0, 0};
    ser_get_u32(&r);
    uint32_t version = ser_get_u32(&r);
    uint32_t n_est = ser_get_u32(&r), n_src = ser_get_u32(&r);
    if (n_est != m->n_est)
        return err_fail(err, errlen, WORTH_E_MISMATCH, "state has %u estimators, model has %zu",
                        n_est, m->n_est);
    if (n_src > m->max_sources)
        return err_fail(err, errlen, WORTH_E_MISMATCH, "state has %u sources, model allows %zu",
                        n_src, m->max_sources);
    m->applied = ser_get_u64(&r);
    m->clipped = ser_get_u64(&r);
    memset(m->sources, 0, m->max_sources * sizeof *m->sources);
    for (uint32_t i = 0; i < n_src; i++) {
        uint32_t sl = ser_get_u32(&r);
        if (r.err || sl > MODEL_NAME_MAX)
            return err_fail(err, errlen, WORTH_E_CORRUPT, "source name %u is malformed", i);
        ser_get_bytes(&r, m->sources[i], sl);
    }
    m->n_sources = n_src;
    for (size_t i = 0; i < m->n_est; i++) {
        uint64_t el = ser_get_u64(&r);
        if (r.err || el > r.len - r.pos)
            return err_fail(err, errlen, WORTH_E_CORRUPT, "estimator %zu state is cut short", i);
        char sub[200];
        int rc = est_load(m->est[i], r.buf + r.pos, (size_t)el, sub, sizeof sub);
        if (rc)
            return err_fail(err, errlen, rc, "estimator \"%s\": %s", m->names[i], sub);
        r.pos += (size_t)el;
    }
    diag_load(m->diag, &r, version);
    if (version >= 3) {
        health_load(m->health, &r);
    } else {
        health_reset(m->health);
        for (size_t i = 0; i < m->n_est; i++)
            est_stats(m->est[i], &m->st[i]);
        health_seen(m->health, m->st);
    }
    if (r.err || r.pos != r.len)
        return err_fail(err, errlen, WORTH_E_CORRUPT, "model state has trailing or missing bytes");
    return 0;
}

int model_state_check(const uint8_t *buf, size_t len, char *err, size_t errlen)
{
    if (len < 36) /* the header and the checksum of a model with no estimator state */
        return err_fail(err, errlen, WORTH_E_CORRUPT, "model state too short (%zu bytes)", len);
    ser_r h = {buf, len, 0, 0};
    uint32_t magic = ser_get_u32(&h), version = ser_get_u32(&h);
    if (magic != MODEL_MAGIC)
        return err_fail(err, errlen, WORTH_E_CORRUPT, "not a model state (bad magic)");
    ser_r t = {buf + len - 4, 4, 0, 0};
    if (ser_get_u32(&t) != ser_crc32(buf, len - 4))
        return err_fail(err, errlen, WORTH_E_CORRUPT, "model state fails its checksum");
    if (version < MODEL_FORMAT_OLDEST || version > MODEL_FORMAT_VERSION)
        return err_fail(err, errlen, WORTH_E_CORRUPT,
                        "model state format %u, this build reads %d to %d", version,
                        MODEL_FORMAT_OLDEST, MODEL_FORMAT_VERSION);
    return 0;
}

int model_load(struct model *m, const uint8_t *buf, size_t len, char *err, size_t errlen)
{
    int rc = model_state_check(buf, len, err, errlen);
    if (rc)
        return rc;

    size_t blen = 0;
    model_save(m, NULL, 0, &blen);
    uint8_t *backup = mem_alloc(blen);
    CHECK(model_save(m, backup, blen, &blen) == 0);
    rc = load_body(m, buf, len, err, errlen);
    if (rc) {
        model_reset(m);
        CHECK(load_body(m, backup, blen, NULL, 0) == 0);
    }
    mem_free(backup);
    return rc;
}
