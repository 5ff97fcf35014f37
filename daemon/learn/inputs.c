/*
 * inputs.c - frozen, out-of-range and silent inputs (see inputs.h).
 *
 * Owns a table of sources (names, last plant time, silent flag) and, per
 * source, each dimension's reference value, the plant time it last moved,
 * its running rate of change, and the plant time it left its range.  A
 * source's dimension array is allocated when the source is first seen;
 * nothing after.  Learner thread only.  It must never raise a check twice
 * without clearing it in between.
 */
#include "learn/inputs.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "common/mem.h"

/* Weight of one sample in the running rate of change (about 100 samples of memory). */
#define RATE_W 0.01
/* The rate of change above which a dimension "usually changes". */
#define RATE_MIN 0.5

struct dim {
    double ref;     /* the value when it last moved */
    double moved_t; /* plant time it last moved */
    double rate;    /* running share of samples on which it moved */
    int frozen;
    double out_t; /* plant time it left its range; NAN: in range */
    int out;
};

struct source {
    char name[64];
    uint64_t n;    /* transitions seen */
    double last_t; /* plant time of the last */
    int silent;
    struct dim *d;
};

struct inputs {
    inputs_params_t p;
    size_t dims, n, cap;
    double lo[64], hi[64];
    struct source *s;
};

void inputs_params_default(inputs_params_t *p)
{
    memset(p, 0, sizeof *p);
    p->frozen_periods = 5;
    p->frozen_tol = 1e-9;
    p->range_periods = 3;
    p->silent_periods = 10;
}

struct inputs *inputs_new(const inputs_params_t *p, size_t dims, const double *lo, const double *hi,
                          size_t max_sources)
{
    struct inputs *in = mem_calloc(1, sizeof *in);
    in->p = *p;
    in->dims = dims < 64 ? dims : 64;
    for (size_t i = 0; i < in->dims; i++) {
        in->lo[i] = lo ? lo[i] : -INFINITY;
        in->hi[i] = hi ? hi[i] : INFINITY;
    }
    in->cap = max_sources;
    in->s = mem_calloc(max_sources, sizeof *in->s);
    return in;
}

void inputs_free(struct inputs *in)
{
    if (!in)
        return;
    for (size_t i = 0; i < in->n; i++)
        mem_free(in->s[i].d);
    mem_free(in->s);
    mem_free(in);
}

static double period(const struct inputs *in)
{
    return in->p.period_s > 0 ? in->p.period_s : 1.0;
}

static struct source *find(struct inputs *in, const char *name)
{
    for (size_t i = 0; i < in->n; i++)
        if (strcmp(in->s[i].name, name) == 0)
            return &in->s[i];
    if (in->n == in->cap)
        return NULL; /* the model refuses more sources than this; never reached */
    struct source *s = &in->s[in->n++];
    snprintf(s->name, sizeof s->name, "%s", name);
    s->d = mem_calloc(in->dims, sizeof *s->d);
    for (size_t i = 0; i < in->dims; i++)
        s->d[i].out_t = NAN;
    return s;
}

static void emit(inputs_event_fn fn, void *ctx, enum inputs_kind k, int raised,
                 const struct source *s, int dim, double t, double since, double value)
{
    inputs_event_t ev = {k, raised, s->name, dim, t, since, value};
    if (fn)
        fn(ctx, &ev);
}

void inputs_observe(struct inputs *in, const char *src, double t, const double *x,
                    inputs_event_fn fn, void *ctx)
{
    struct source *s = find(in, src ? src : "");
    if (!s)
        return;
    /* Without a t, a transition counts one period after the last. */
    if (isnan(t))
        t = s->n ? s->last_t + period(in) : 0.0;
    if (s->silent) {
        s->silent = 0;
        emit(fn, ctx, INPUTS_SILENT, 0, s, -1, t, s->last_t, NAN);
    }
    double frozen_s = in->p.frozen_periods * period(in), out_s = in->p.range_periods * period(in);
    for (size_t i = 0; i < in->dims; i++) {
        struct dim *d = &s->d[i];
        double v = x[i];
        double tol =
            in->p.frozen_tol * (isfinite(in->hi[i] - in->lo[i]) ? in->hi[i] - in->lo[i] : 1.0);
        if (s->n == 0) {
            d->ref = v;
            d->moved_t = t;
        } else if (fabs(v - d->ref) > tol) {
            if (d->frozen) {
                d->frozen = 0;
                emit(fn, ctx, INPUTS_FROZEN, 0, s, (int)i, t, d->moved_t, v);
            }
            d->rate += RATE_W * (1.0 - d->rate);
            d->ref = v;
            d->moved_t = t;
        } else if (!d->frozen) {
            d->rate -= RATE_W * d->rate;
            /* The rate is that before the run began: a run of k unchanged samples took
             * (1 - RATE_W)^k off it, and is given back before comparing. */
            double run = (t - d->moved_t) / period(in);
            double before = d->rate / pow(1.0 - RATE_W, run > 0 ? run : 0);
            if (t - d->moved_t >= frozen_s && before >= RATE_MIN) {
                d->frozen = 1;
                emit(fn, ctx, INPUTS_FROZEN, 1, s, (int)i, t, d->moved_t, v);
            }
        }
        int outside = v < in->lo[i] || v > in->hi[i];
        if (!outside) {
            if (d->out)
                emit(fn, ctx, INPUTS_OUT_OF_RANGE, 0, s, (int)i, t, d->out_t, v);
            d->out = 0;
            d->out_t = NAN;
        } else {
            if (isnan(d->out_t))
                d->out_t = t;
            if (!d->out && t - d->out_t > out_s) {
                d->out = 1;
                emit(fn, ctx, INPUTS_OUT_OF_RANGE, 1, s, (int)i, t, d->out_t, v);
            }
        }
    }
    s->n++;
    s->last_t = t;
}

void inputs_tick(struct inputs *in, double now, inputs_event_fn fn, void *ctx)
{
    if (isnan(now))
        return;
    double lim = in->p.silent_periods * period(in);
    for (size_t i = 0; i < in->n; i++) {
        struct source *s = &in->s[i];
        if (!s->silent && s->n && now - s->last_t > lim) {
            s->silent = 1;
            emit(fn, ctx, INPUTS_SILENT, 1, s, -1, now, s->last_t, NAN);
        }
    }
}

size_t inputs_list(const struct inputs *in, inputs_active_t *out, size_t max)
{
    size_t k = 0;
    for (size_t i = 0; i < in->n; i++) {
        const struct source *s = &in->s[i];
        if (s->silent && k++ < max)
            out[k - 1] = (inputs_active_t){INPUTS_SILENT, i, -1, s->last_t};
        for (size_t j = 0; j < in->dims; j++) {
            if (s->d[j].frozen && k++ < max)
                out[k - 1] = (inputs_active_t){INPUTS_FROZEN, i, (int)j, s->d[j].moved_t};
            if (s->d[j].out && k++ < max)
                out[k - 1] = (inputs_active_t){INPUTS_OUT_OF_RANGE, i, (int)j, s->d[j].out_t};
        }
    }
    return k;
}

const char *inputs_source_name(const struct inputs *in, size_t src)
{
    return src < in->n ? in->s[src].name : "";
}

const char *inputs_kind_name(enum inputs_kind k)
{
    static const char *const names[3] = {"input_frozen", "input_out_of_range", "source_silent"};
    return names[k];
}
