/*
 * mlp.c - value networks trained by semi-gradient TD from a replay buffer
 * with Adam: the kind mlp (one network), and the training of the kind
 * ensemble (K networks on bootstrap masks; ensemble.c gives its answers).
 *
 * Every transition becomes an entry of a bounded ring of `capacity` entries
 * (x, x_end, R, G): with n-step targets (nstep = n) a source's last n steps
 * wait in its own small ring until n rewards are known, then the oldest
 * becomes the entry R = r_0 + g_0 r_1 + ... + g_0..g_{n-2} r_{n-1},
 * G = g_0 ... g_{n-1}, x_end = the x_next of the newest; a terminal
 * transition flushes the source's waiting steps with G = 0 (V(terminal) = 0).
 * With n = 1 the entry is (phi, phi', r, g), G = 0 when terminal.  An
 * ensemble also draws, per entry and member, a bootstrap mask bit
 * (probability 1/2) from its own generator.
 *
 * A training step, for each member k in turn: `batch` entries drawn uniformly
 * with replacement from member k's own generator; targets
 * y_i = R_i + G_i V_tgt(x_end_i), with V_tgt the target network (refreshed
 * every target_every steps) or, without one, the current weights; the loss
 * (1/2B) sum_i m_ik (V(x_i) - y_i)^2 with y held fixed (a semi-gradient; m
 * = 1 for mlp); its gradient clipped to norm `clip`; an Adam step of size
 * alpha_k = alpha / (1 + k / decay) (constant when decay = 0), k the steps
 * taken before.  After each transition steps_per_obs steps run; est_train
 * runs passes of ceil(size / batch) steps until a pass changes the weights
 * by less than tol relative to their norm, as the replay trainer does.
 *
 * Everything (buffer, masks, moments, target networks, batch workspaces) is
 * allocated at creation; only a source's first transition allocates its
 * n-step ring (n > 1).  Owning thread only.  The buffer, masks, moments,
 * target networks, waiting steps and generator states are all in the saved
 * state, so a restored estimator continues with the same bits.
 */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "learn/mlp_impl.h"
#include "common/fail.h"
#include "common/mem.h"
#include "worth/errors.h"

/* One member's optimiser state. */
struct member {
    double *m, *v; /* Adam's moments, P each */
    double *tgt;   /* its target network (P), or NULL without one */
    rng_t rng;     /* its mini-batch draws */
};

/* A source's steps waiting for their n-step return (nstep > 1). */
struct pend {
    double *phi;   /* nstep x n */
    double *r, *g; /* nstep each */
    size_t head, count;
};

struct mlp {
    mlpnet_t net;
    size_t K, P;            /* members, parameters of one */
    size_t cap, size, next; /* the ring of entries */
    double *x, *xe;         /* cap x n: x, and x_end (zeros when G = 0) */
    double *ret, *disc;     /* cap: R and G */
    uint8_t *mask;          /* cap x K bootstrap bits (ensemble), or NULL */
    rng_t mask_rng;
    struct member mem[EST_MLP_MAX_MEMBERS];
    struct pend *pend; /* nsrc rings when nstep > 1, else NULL */
    uint64_t steps;
    /* Workspaces of one step (and of a pass's start weights). */
    size_t *idx;
    double *bx, *bxe, *by, *bm, *H, *out, *oute, *err, *grad, *work, *w0;
};

const mlpnet_t *mlp_net(const struct est *e)
{
    return &((const struct mlp *)e->k)->net;
}

size_t mlp_members(const struct est *e)
{
    return e->p.kind == EST_ENSEMBLE ? e->p.members : 1;
}

uint64_t mlp_seed_init(uint64_t seed, size_t k)
{
    return seed + 2 * (uint64_t)k;
}

uint64_t mlp_seed_draw(uint64_t seed, size_t k)
{
    return seed + 2 * (uint64_t)k + 1;
}

/* The mask generator's seed, past every member's. */
static uint64_t seed_mask(uint64_t seed)
{
    return seed + 2 * (uint64_t)EST_MLP_MAX_MEMBERS;
}

int mlp_check(const est_params_t *p, size_t n, char *err, size_t errlen)
{
    const est_hidden_t *h = &p->hidden;
    if (h->count < 1 || h->count > EST_MLP_MAX_LAYERS)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "hidden must list 1..%d layer widths",
                        EST_MLP_MAX_LAYERS);
    for (unsigned i = 0; i < EST_MLP_MAX_LAYERS; i++) {
        if (i < h->count && (h->width[i] < 1 || h->width[i] > EST_MLP_MAX_WIDTH))
            return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                            "hidden[%u]: a layer's width must be 1..%d", i, EST_MLP_MAX_WIDTH);
        if (i >= h->count && h->width[i] != 0)
            return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                            "hidden: width %u given past the %u layers", i, h->count);
    }
    if (p->act != EST_ACT_TANH && p->act != EST_ACT_RELU)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "activation must be tanh or relu");
    if (p->kind == EST_ENSEMBLE && (p->members < 2 || p->members > EST_MLP_MAX_MEMBERS))
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "members must be 2..%d",
                        EST_MLP_MAX_MEMBERS);
    if (p->kind == EST_MLP && p->members != 1)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "an mlp is one network (members 1)");
    if (p->nstep < 1 || p->nstep > 1000)
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "n must be 1..1000");
    if (!(p->clip >= 0) || !isfinite(p->clip))
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "clip must be finite and >= 0");
    /* Sizes in double: a product of unsigned fields cannot overflow here. */
    mlpnet_t s;
    mlpnet_shape(&s, p, n);
    double weights = (double)s.params * (double)p->members;
    if (weights > EST_MLP_MAX_WEIGHTS)
        return err_fail(err, errlen, WORTH_E_TOO_LARGE,
                        "the networks would have %.0f weights, over the limit %d", weights,
                        EST_MLP_MAX_WEIGHTS);
    double batch = (double)p->batch * ((double)s.hidden + 2.0 * (double)s.widest + 2.0 * n) * 8;
    if (batch > 4e9)
        return err_fail(err, errlen, WORTH_E_TOO_LARGE,
                        "a mini-batch's workspace would exceed 4 GB");
    return 0;
}

size_t mlp_weight_count(const est_params_t *p, size_t n)
{
    mlpnet_t s;
    mlpnet_shape(&s, p, n);
    return s.params * (p->kind == EST_ENSEMBLE ? p->members : 1);
}

double mlp_footprint(const est_params_t *p, size_t n, size_t sources)
{
    mlpnet_t s;
    mlpnet_shape(&s, p, n);
    double K = p->kind == EST_ENSEMBLE ? p->members : 1, P = (double)s.params, nn = (double)n;
    double cap = p->capacity, B = p->batch;
    double d = 0;
    d += K * P * (3.0 + (p->target_every ? 1.0 : 0.0)); /* w, m, v, target */
    d += K * P + P;                                     /* pass start weights, gradient */
    d += cap * (2.0 * nn + 2.0);                        /* the buffer */
    d += p->kind == EST_ENSEMBLE ? cap * K / 8.0 : 0.0; /* its mask bytes */
    d += B * (2.0 * nn + 6.0 + (double)s.hidden + 2.0 * (double)s.widest); /* a batch */
    if (p->nstep > 1)
        d += (double)sources * (double)p->nstep * (nn + 2.0);
    return d * sizeof(double);
}

void mlp_init_w(struct est *e)
{
    mlpnet_t s;
    mlpnet_shape(&s, &e->p, e->n);
    size_t K = mlp_members(e);
    for (size_t k = 0; k < K; k++)
        mlpnet_init(&s, e->w + k * s.params, mlp_seed_init(e->p.seed, k), e->p.init);
}

void mlp_init(struct est *e)
{
    size_t n = e->n, B = e->p.batch;
    struct mlp *m = mem_calloc(1, sizeof *m);
    mlpnet_shape(&m->net, &e->p, n);
    m->K = mlp_members(e);
    m->P = m->net.params;
    m->cap = e->p.capacity;
    m->x = mem_calloc(m->cap * n, sizeof *m->x);
    m->xe = mem_calloc(m->cap * n, sizeof *m->xe);
    m->ret = mem_calloc(m->cap, sizeof *m->ret);
    m->disc = mem_calloc(m->cap, sizeof *m->disc);
    if (e->p.kind == EST_ENSEMBLE)
        m->mask = mem_calloc(m->cap * m->K, 1);
    for (size_t k = 0; k < m->K; k++) {
        m->mem[k].m = mem_calloc(m->P, sizeof(double));
        m->mem[k].v = mem_calloc(m->P, sizeof(double));
        if (e->p.target_every)
            m->mem[k].tgt = mem_calloc(m->P, sizeof(double));
    }
    if (e->p.nstep > 1)
        m->pend = mem_calloc(e->nsrc, sizeof *m->pend);
    m->idx = mem_calloc(B, sizeof *m->idx);
    m->bx = mem_calloc(B * n, sizeof(double));
    m->bxe = mem_calloc(B * n, sizeof(double));
    m->by = mem_calloc(B, sizeof(double));
    m->bm = mem_calloc(B, sizeof(double));
    m->out = mem_calloc(B, sizeof(double));
    m->oute = mem_calloc(B, sizeof(double));
    m->err = mem_calloc(B, sizeof(double));
    m->H = mem_calloc(B * m->net.hidden, sizeof(double));
    m->work = mem_calloc(2 * B * m->net.widest, sizeof(double));
    m->grad = mem_calloc(m->P, sizeof(double));
    m->w0 = mem_calloc(e->nw, sizeof(double));
    e->k = m;
    mlp_reset(e);
}

static void pend_free(struct mlp *m, size_t nsrc)
{
    for (size_t i = 0; m->pend && i < nsrc; i++) {
        mem_free(m->pend[i].phi);
        mem_free(m->pend[i].r);
        mem_free(m->pend[i].g);
        memset(&m->pend[i], 0, sizeof m->pend[i]);
    }
}

/* Runs after e->w holds the starting weights (est.c sets them first). */
void mlp_reset(struct est *e)
{
    struct mlp *m = e->k;
    m->size = m->next = 0;
    m->steps = 0;
    rng_init(&m->mask_rng, seed_mask(e->p.seed));
    for (size_t k = 0; k < m->K; k++) {
        struct member *mb = &m->mem[k];
        memset(mb->m, 0, m->P * sizeof *mb->m);
        memset(mb->v, 0, m->P * sizeof *mb->v);
        if (mb->tgt)
            memcpy(mb->tgt, e->w + k * m->P, m->P * sizeof *mb->tgt);
        rng_init(&mb->rng, mlp_seed_draw(e->p.seed, k));
    }
    pend_free(m, e->nsrc);
}

void mlp_free(struct est *e)
{
    struct mlp *m = e->k;
    pend_free(m, e->nsrc);
    mem_free(m->pend);
    mem_free(m->x);
    mem_free(m->xe);
    mem_free(m->ret);
    mem_free(m->disc);
    mem_free(m->mask);
    for (size_t k = 0; k < m->K; k++) {
        mem_free(m->mem[k].m);
        mem_free(m->mem[k].v);
        mem_free(m->mem[k].tgt);
    }
    mem_free(m->idx);
    mem_free(m->bx);
    mem_free(m->bxe);
    mem_free(m->by);
    mem_free(m->bm);
    mem_free(m->out);
    mem_free(m->oute);
    mem_free(m->err);
    mem_free(m->H);
    mem_free(m->work);
    mem_free(m->grad);
    mem_free(m->w0);
    mem_free(m);
}

/* Adds the entry (x, R, G, x_end) to the ring; x_end may be NULL when G is 0. */
static void insert(struct est *e, struct mlp *m, const double *x, double R, double G,
                   const double *xend)
{
    size_t n = e->n, at = m->next;
    memcpy(m->x + at * n, x, n * sizeof *x);
    if (xend && G != 0.0)
        memcpy(m->xe + at * n, xend, n * sizeof *xend);
    else
        memset(m->xe + at * n, 0, n * sizeof *m->xe);
    m->ret[at] = R;
    m->disc[at] = xend ? G : 0.0;
    if (m->mask)
        for (size_t k = 0; k < m->K; k++)
            m->mask[at * m->K + k] = (uint8_t)(rng_next(&m->mask_rng) >> 63);
    m->next = (at + 1) % m->cap;
    if (m->size < m->cap)
        m->size++;
}

/* Makes q's oldest waiting step an entry: its n-step return to x_end (NULL: terminal). */
static void emit_oldest(struct est *e, struct mlp *m, struct pend *q, const double *xend)
{
    size_t N = e->p.nstep;
    double R = 0.0, G = 1.0;
    for (size_t i = 0; i < q->count; i++) {
        size_t j = (q->head + i) % N;
        R += G * q->r[j];
        G *= q->g[j];
    }
    insert(e, m, q->phi + q->head * e->n, R, xend ? G : 0.0, xend);
    q->head = (q->head + 1) % N;
    q->count--;
}

/* One training step of member k. */
static void step_member(struct est *e, struct mlp *m, size_t k, double alpha)
{
    size_t n = e->n, B = e->p.batch, P = m->P;
    struct member *mb = &m->mem[k];
    double *w = e->w + k * P;
    for (size_t b = 0; b < B; b++)
        m->idx[b] = (size_t)rng_below(&mb->rng, m->size);
    for (size_t b = 0; b < B; b++) {
        size_t i = m->idx[b];
        memcpy(m->bx + b * n, m->x + i * n, n * sizeof *m->bx);
        memcpy(m->bxe + b * n, m->xe + i * n, n * sizeof *m->bxe);
        m->bm[b] = m->mask ? (double)m->mask[i * m->K + k] : 1.0;
    }
    mlpnet_forward(&m->net, mb->tgt ? mb->tgt : w, m->bxe, B, m->H, m->oute);
    for (size_t b = 0; b < B; b++) {
        size_t i = m->idx[b];
        m->by[b] = m->ret[i] + m->disc[i] * m->oute[b];
    }
    mlpnet_forward(&m->net, w, m->bx, B, m->H, m->out);
    for (size_t b = 0; b < B; b++)
        m->err[b] = m->bm[b] * (m->out[b] - m->by[b]) / (double)B;
    mlpnet_backward(&m->net, w, m->bx, B, m->H, m->err, m->grad, m->work);
    mlpnet_clip(P, m->grad, e->p.clip);
    mlpnet_adam(P, w, mb->m, mb->v, m->grad, m->steps + 1, alpha);
}

/* One step of every member, then the target networks' refresh when it is due. */
static void step(struct est *e, struct mlp *m)
{
    double a = e->p.alpha;
    if (e->p.decay > 0)
        a /= 1.0 + (double)m->steps / e->p.decay;
    for (size_t k = 0; k < m->K; k++)
        step_member(e, m, k, a);
    m->steps++;
    if (e->p.target_every && m->steps % e->p.target_every == 0)
        for (size_t k = 0; k < m->K; k++)
            memcpy(m->mem[k].tgt, e->w + k * m->P, m->P * sizeof(double));
}

int mlp_observe(struct est *e, size_t src, const double *phi, double r, const double *phin,
                double g, int terminal, double v, double vn)
{
    (void)v;
    (void)vn;
    struct mlp *m = e->k;
    size_t n = e->n, N = e->p.nstep;
    if (N == 1) {
        insert(e, m, phi, r, terminal ? 0.0 : g, terminal ? NULL : phin);
    } else {
        struct pend *q = &m->pend[src];
        if (!q->phi) {
            q->phi = mem_calloc(N * n, sizeof *q->phi);
            q->r = mem_calloc(N, sizeof *q->r);
            q->g = mem_calloc(N, sizeof *q->g);
        }
        size_t at = (q->head + q->count) % N;
        memcpy(q->phi + at * n, phi, n * sizeof *phi);
        q->r[at] = r;
        q->g[at] = g;
        q->count++;
        if (terminal)
            while (q->count)
                emit_oldest(e, m, q, NULL);
        else if (q->count == N)
            emit_oldest(e, m, q, phin);
    }
    if (m->size)
        for (unsigned k = 0; k < e->p.steps_per_obs; k++)
            step(e, m);
    return 0;
}

/* As replay.c's training: o->cancel and o->max_steps are read before every step, and nothing
 * but the steps changes the saved state (w0 is a workspace). */
int mlp_train(struct est *e, const est_train_opts_t *o, est_train_t *rep)
{
    struct mlp *m = e->k;
    size_t nw = e->nw;
    if (m->size == 0)
        return 0;
    size_t per_pass = (m->size + e->p.batch - 1) / e->p.batch;
    int rc = 0;
    for (unsigned p = 1; p <= o->passes; p++) {
        memcpy(m->w0, e->w, nw * sizeof *m->w0);
        size_t k = 0;
        for (; k < per_pass; k++) {
            if (o->max_steps && rep->steps == o->max_steps)
                break;
            if (est_train_cancelled(o)) {
                rc = WORTH_E_CANCELLED;
                break;
            }
            step(e, m);
            rep->steps++;
        }
        if (k == 0)
            break;
        double diff = 0.0, norm = 0.0;
        int finite = 1;
        for (size_t i = 0; i < nw; i++) {
            diff += (e->w[i] - m->w0[i]) * (e->w[i] - m->w0[i]);
            norm += m->w0[i] * m->w0[i];
            finite &= isfinite(e->w[i]) != 0;
        }
        rep->passes = p;
        rep->change = sqrt(diff) / (norm > 0 ? sqrt(norm) : 1.0);
        if (k < per_pass)
            break;
        rep->converged = rep->change < e->p.tol;
        if (o->progress)
            o->progress(o->ctx, p, o->passes, rep->change);
        if (rep->converged || !finite)
            break;
    }
    return rc;
}

void mlp_stats(const struct est *e, est_stats_t *st)
{
    const struct mlp *m = e->k;
    st->refits = m->steps;
}

static void put_rng(ser_w *w, const rng_t *r)
{
    for (int i = 0; i < 4; i++)
        ser_put_u64(w, r->s[i]);
}

static void get_rng(ser_r *r, rng_t *g)
{
    for (int i = 0; i < 4; i++)
        g->s[i] = ser_get_u64(r);
}

/*
 * Layout: steps, the mask generator, per member its generator, moments and
 * target network (when there is one), the ring's size and next position and
 * its filled entries in storage order (x, x_end, R, G, the K mask bytes),
 * and with nstep > 1 every source's waiting steps (a flag, their count,
 * then each step's phi, r and g, oldest first).
 */
void mlp_save(const struct est *e, ser_w *w)
{
    const struct mlp *m = e->k;
    size_t n = e->n;
    ser_put_u64(w, m->steps);
    put_rng(w, &m->mask_rng);
    for (size_t k = 0; k < m->K; k++) {
        const struct member *mb = &m->mem[k];
        put_rng(w, &mb->rng);
        ser_put_f64v(w, mb->m, m->P);
        ser_put_f64v(w, mb->v, m->P);
        if (mb->tgt)
            ser_put_f64v(w, mb->tgt, m->P);
    }
    ser_put_u64(w, m->size);
    ser_put_u64(w, m->next);
    for (size_t i = 0; i < m->size; i++) {
        ser_put_f64v(w, m->x + i * n, n);
        ser_put_f64v(w, m->xe + i * n, n);
        ser_put_f64(w, m->ret[i]);
        ser_put_f64(w, m->disc[i]);
        if (m->mask)
            ser_put_bytes(w, m->mask + i * m->K, m->K);
    }
    for (size_t s = 0; m->pend && s < e->nsrc; s++) {
        const struct pend *q = &m->pend[s];
        ser_put_u32(w, q->phi != NULL);
        if (!q->phi)
            continue;
        ser_put_u64(w, q->count);
        for (size_t i = 0; i < q->count; i++) {
            size_t j = (q->head + i) % e->p.nstep;
            ser_put_f64v(w, q->phi + j * n, n);
            ser_put_f64(w, q->r[j]);
            ser_put_f64(w, q->g[j]);
        }
    }
}

void mlp_load(struct est *e, ser_r *r, unsigned version)
{
    (void)version; /* the network kinds exist from format 3 on */
    struct mlp *m = e->k;
    size_t n = e->n, N = e->p.nstep;
    m->steps = ser_get_u64(r);
    get_rng(r, &m->mask_rng);
    for (size_t k = 0; k < m->K; k++) {
        struct member *mb = &m->mem[k];
        get_rng(r, &mb->rng);
        ser_get_f64v(r, mb->m, m->P);
        ser_get_f64v(r, mb->v, m->P);
        if (mb->tgt)
            ser_get_f64v(r, mb->tgt, m->P);
    }
    uint64_t size = ser_get_u64(r), next = ser_get_u64(r);
    if (r->err || size > m->cap || next >= m->cap || (size < m->cap && next != size)) {
        r->err = 1;
        return;
    }
    m->size = size;
    m->next = next;
    for (size_t i = 0; i < size; i++) {
        ser_get_f64v(r, m->x + i * n, n);
        ser_get_f64v(r, m->xe + i * n, n);
        m->ret[i] = ser_get_f64(r);
        m->disc[i] = ser_get_f64(r);
        if (m->mask)
            ser_get_bytes(r, m->mask + i * m->K, m->K);
    }
    pend_free(m, e->nsrc);
    for (size_t s = 0; m->pend && s < e->nsrc && !r->err; s++) {
        struct pend *q = &m->pend[s];
        uint32_t present = ser_get_u32(r);
        if (present > 1) {
            r->err = 1;
            return;
        }
        if (!present)
            continue;
        uint64_t count = ser_get_u64(r);
        /* A full ring is emptied at once, so at most N - 1 steps wait. */
        if (r->err || count >= N || count * (n + 2) * 8 > r->len - r->pos) {
            r->err = 1;
            return;
        }
        q->phi = mem_calloc(N * n, sizeof *q->phi);
        q->r = mem_calloc(N, sizeof *q->r);
        q->g = mem_calloc(N, sizeof *q->g);
        q->head = 0;
        q->count = count;
        for (size_t i = 0; i < count; i++) {
            ser_get_f64v(r, q->phi + i * n, n);
            q->r[i] = ser_get_f64(r);
            q->g[i] = ser_get_f64(r);
        }
    }
}

static double mlp_value(const struct est *e, const double *w, const double *phi, double *sd)
{
    double work[2 * EST_MLP_MAX_WIDTH];
    if (sd)
        *sd = NAN;
    return mlpnet_value(mlp_net(e), w, phi, work);
}

const struct est_ops est_mlp_ops = {
    .init_w = mlp_init_w,
    .value = mlp_value,
    .init = mlp_init,
    .free = mlp_free,
    .reset = mlp_reset,
    .observe = mlp_observe,
    .train = mlp_train,
    .save = mlp_save,
    .load = mlp_load,
    .stats = mlp_stats,
};
