/*
 * tdlambda.c - true online TD(lambda) with dutch traces (van Seijen & Sutton 2014;
 * van Seijen, Mahmood, Pilarski, Machado & Sutton 2016, JMLR 17).
 *
 * Per source: the trace z, V_old (the previous step's V(x') under the weights
 * of that step) and the discount of the previous transition, which decays the
 * trace so that irregular sampling (per-transition g) is handled:
 *   z  = g_prev*lambda*z + (1 - alpha*g_prev*lambda*z.phi) phi
 *   w += alpha*(delta + V - V_old) z - alpha*(V - V_old) phi
 * A terminal transition resets the source's trace.  O(n) per transition; the
 * trace of a source is allocated when the source is first seen.
 */
#include <string.h>

#include "learn/est_impl.h"
#include "common/mem.h"

struct slot {
    double *z;
    double v_old;
    double g_prev;
};

struct tdl {
    struct slot *s; /* nsrc */
};

static void tdl_init(struct est *e)
{
    struct tdl *t = mem_calloc(1, sizeof *t);
    t->s = mem_calloc(e->nsrc, sizeof *t->s);
    e->k = t;
}

static void tdl_reset(struct est *e)
{
    struct tdl *t = e->k;
    for (size_t i = 0; i < e->nsrc; i++) {
        mem_free(t->s[i].z);
        memset(&t->s[i], 0, sizeof t->s[i]);
    }
}

static void tdl_free(struct est *e)
{
    tdl_reset(e);
    struct tdl *t = e->k;
    mem_free(t->s);
    mem_free(t);
}

static int tdl_observe(struct est *e, size_t src, const double *phi, double r, const double *phin,
                       double g, int terminal, double v, double vn)
{
    (void)phin;
    struct tdl *t = e->k;
    struct slot *s = &t->s[src];
    size_t n = e->n;
    double a = e->p.alpha, lam = e->p.lambda;
    if (!s->z)
        s->z = mem_calloc(n, sizeof *s->z);

    double delta = r + g * vn - v;
    double gl = s->g_prev * lam;
    double zphi = est_dot(n, s->z, phi);
    double c = 1.0 - a * gl * zphi;
    for (size_t i = 0; i < n; i++)
        s->z[i] = gl * s->z[i] + c * phi[i];
    est_axpy(n, a * (delta + v - s->v_old), s->z, e->w);
    est_axpy(n, -a * (v - s->v_old), phi, e->w);

    if (terminal) {
        memset(s->z, 0, n * sizeof *s->z);
        s->v_old = 0.0;
        s->g_prev = 0.0;
    } else {
        s->v_old = vn;
        s->g_prev = g;
    }
    return 0;
}

static void tdl_save(const struct est *e, ser_w *w)
{
    const struct tdl *t = e->k;
    for (size_t i = 0; i < e->nsrc; i++) {
        est_put_opt(w, t->s[i].z, e->n);
        ser_put_f64(w, t->s[i].v_old);
        ser_put_f64(w, t->s[i].g_prev);
    }
}

static void tdl_load(struct est *e, ser_r *r, unsigned version)
{
    (void)version; /* no change between formats 1 and 2 */
    struct tdl *t = e->k;
    for (size_t i = 0; i < e->nsrc && !r->err; i++) {
        est_get_opt(r, &t->s[i].z, e->n);
        t->s[i].v_old = ser_get_f64(r);
        t->s[i].g_prev = ser_get_f64(r);
    }
}

const struct est_ops est_tdlambda_ops = {
    .init = tdl_init,
    .free = tdl_free,
    .reset = tdl_reset,
    .observe = tdl_observe,
    .save = tdl_save,
    .load = tdl_load,
};
