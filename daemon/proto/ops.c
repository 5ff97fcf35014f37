/*
 * ops.c - what operations staff need of the protocol: who may do what
 * (roles), the counts of requests and errors the metrics show, audit events
 * for the requests that change state, and the requests status, retention and
 * model.purge.
 *
 * Loop thread.  A connection's role comes from its token (auth, over TCP or
 * the Unix socket) or from its Unix peer's credentials (the peer rules,
 * --unix-role otherwise); a TCP listener without tokens (the operator's
 * --allow-tcp-without-token) gives admin, as before roles existed.  The ops
 * a role allows are listed here, and an op not listed needs admin: a new
 * request is refused to read and write clients until it is listed.  It never
 * logs a token: a token is named by its name in the token file.
 */
#include <cjson/cJSON.h>
#include <math.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

#include "common/ct.h"
#include "common/jw.h"
#include "common/mem.h"
#include "common/say.h"
#include "core/queue.h"
#include "proto/internal.h"
#include "store/retain.h"
#include "worth/errors.h"

#ifndef WORTH_VERSION
#define WORTH_VERSION "0.0.0"
#endif

/* The ops a read role may send; write adds those that feed a model (observe*). */
static const char *const read_ops[] = {"hello",  "model.list", "model.get", "value",
                                       "stats",  "history",    "events",    "checkpoints",
                                       "status", "sources",    NULL};
/* The admin requests that destroy or undo something: recorded as audit events. */
static const char *const destructive_ops[] = {"rollback", "model.drop", "model.purge", "retention",
                                              NULL};

static int listed(const char *const *list, const char *op)
{
    for (const char *const *r = list; *r; r++)
        if (strcmp(*r, op) == 0)
            return 1;
    return 0;
}

/* The least role op needs (auth: none, it is how a role is had). */
static int op_role(const char *op)
{
    if (strcmp(op, "auth") == 0)
        return ROLE_NONE;
    for (const char *const *r = read_ops; *r; r++)
        if (strcmp(*r, op) == 0)
            return ROLE_READ;
    if (strncmp(op, "observe", 7) == 0)
        return ROLE_WRITE;
    return ROLE_ADMIN;
}

static double wall_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

/* ---- roles ------------------------------------------------------------------------------- */

void ops_conn_init(struct proto *p, struct conn *c, proto_conn_t *pc, int needs_auth)
{
    (void)p;
    pc->op = -1;
    pc->role = needs_auth ? ROLE_NONE : ROLE_ADMIN;
    snprintf(pc->who, sizeof pc->who, "connection %llu", (unsigned long long)conn_id(c));
}

void ops_peer(struct proto *p, struct conn *c, const conn_peer_t *peer)
{
    proto_conn_t *pc = pconn(c);
    int rule = 0;
    pc->role = roles_of_peer(p->o->roles, peer->uid, peer->groups, peer->n_groups,
                             p->o->unix_role ? p->o->unix_role : ROLE_ADMIN, &rule);
    snprintf(pc->who, sizeof pc->who, "uid %u (pid %d)", (unsigned)peer->uid, peer->pid);
    say_debug("connection %llu: %s, role %s%s", (unsigned long long)conn_id(c), pc->who,
              role_name(pc->role), rule ? " (a --peer-role rule)" : "");
}

int ops_auth(struct req *rq, const char *token)
{
    proto_conn_t *pc = pconn(rq->c);
    const struct proto *p = rq->p;
    size_t len = strlen(token);
    const char *who = NULL;
    int role;
    if (p->o->roles)
        role = roles_of_token(p->o->roles, token, len, &who);
    else /* a configuration without a token table (the fuzz target's): one token, admin */
        role = ct_equal(token, len, p->o->token, strlen(p->o->token)) ? ROLE_ADMIN : ROLE_NONE;
    if (role == ROLE_NONE)
        return 0;
    pc->role = role;
    snprintf(pc->who, sizeof pc->who, "%s (connection %llu)", who ? who : "the token",
             (unsigned long long)conn_id(rq->c));
    return 1;
}

/*
 * Records who asked for a request that changes state: logged; and, for one that destroys or
 * undoes something, a daemon-wide audit event naming the op, the model, who and the role
 * (daemon-wide, so that a model's own events stay those of its learning).
 */
static void audit(struct req *rq, const char *op)
{
    proto_conn_t *pc = pconn(rq->c);
    const cJSON *m = field(rq->root, "model");
    const char *model = cJSON_IsString(m) && m->valuestring ? m->valuestring : NULL;

    jw_t d;
    jw_init(&d);
    jw_lit(&d, "{\"op\":");
    jw_str(&d, op);
    if (model) {
        jw_lit(&d, ",\"model\":");
        jw_str(&d, model);
    }
    jw_lit(&d, ",\"by\":");
    jw_str(&d, pc->who);
    jw_lit(&d, ",\"role\":");
    jw_str(&d, role_name(pc->role));
    jw_lit(&d, "}");
    say_info("%s%s%.64s asked by %s (role %s)", op, model ? " of " : "", model ? model : "",
             pc->who, role_name(pc->role));
    if (listed(destructive_ops, op))
        writer_event(rq->p->w, NULL, "audit", d.b);
    jw_close(&d);
}

int ops_admit(struct req *rq, size_t i, const char *op)
{
    struct proto *p = rq->p;
    proto_conn_t *pc = pconn(rq->c);
    pc->op = (int)i;
    p->n_requests[i]++;
    int need = op_role(op);
    if (pc->role < need) {
        FAIL(rq, WORTH_E_FORBIDDEN, "%s needs the role %s; this connection (%s) has %s", op,
             role_name(need), pc->who, role_name(pc->role));
        say_warn("%s refused to %s (role %s, needs %s)", op, pc->who, role_name(pc->role),
                 role_name(need));
        return 1;
    }
    if (need == ROLE_ADMIN)
        audit(rq, op);
    return 0;
}

void ops_count_error(struct proto *p, struct conn *c, int code)
{
    proto_conn_t *pc = pconn(c);
    size_t op = pc && pc->op >= 0 ? (size_t)pc->op : proto_n_ops();
    int k = -code;
    if (k > 0 && k < PROTO_CODES)
        p->n_errors[op * PROTO_CODES + (size_t)k]++;
}

uint64_t proto_requests(const struct proto *p, size_t op)
{
    return p->n_requests[op];
}

uint64_t proto_errors(const struct proto *p, size_t op, int code)
{
    int k = -code;
    return k > 0 && k < PROTO_CODES ? p->n_errors[op * PROTO_CODES + (size_t)k] : 0;
}

size_t proto_op_count(void)
{
    return proto_n_ops();
}

const char *proto_op(size_t i)
{
    return i < proto_n_ops() ? proto_op_name(i) : "none";
}

double proto_started_at(const struct proto *p)
{
    return p->started_at;
}

/* ---- status ------------------------------------------------------------------------------ */

/* The members of a served model that the loop knows. */
static char *model_json(struct learner *l)
{
    learner_stats_t st;
    learner_stats(l, &st);
    const struct model *m = learner_model(l);
    static const char *const health[] = {"ok", "unhealthy", "diverged"};
    jw_t o;
    jw_init(&o);
    jw_lit(&o, ",\"model\":");
    jw_str(&o, learner_name(l));
    jw_fmt(&o,
           ",\"state\":\"ok\",\"received\":%llu,\"applied\":%llu,\"queue\":%llu,"
           "\"clipped\":%llu,\"health\":{",
           (unsigned long long)st.received, (unsigned long long)st.applied,
           (unsigned long long)(st.received - st.applied), (unsigned long long)st.counts.clipped);
    size_t healthy = 0;
    for (size_t e = 0; e < model_n_est(m); e++) {
        int h = st.est[e].health;
        healthy += h == EST_HEALTH_OK;
        if (e)
            jw_lit(&o, ",");
        jw_str(&o, model_est_name(m, e));
        jw_lit(&o, ":");
        jw_str(&o, h >= 0 && h <= 2 ? health[h] : "?");
    }
    jw_fmt(&o, "},\"healthy\":%zu,\"estimators\":%zu,\"last_update\":", healthy, model_n_est(m));
    if (st.last_update > 0) {
        jw_num(&o, st.last_update);
        jw_lit(&o, ",\"wall_age_s\":");
        jw_num(&o, wall_s() - st.last_update);
    } else {
        jw_lit(&o, "null,\"wall_age_s\":null");
    }
    jw_fmt(&o, ",\"checkpoints\":%llu", (unsigned long long)st.checkpoints);
    return jw_take(&o);
}

int do_status(struct req *rq)
{
    struct proto *p = rq->p;
    proto_conn_t *pc = pconn(rq->c);
    double now = wall_s();
    size_t n, tcp, unauthed;
    conns_count(p->conns, &n, &tcp, &unauthed);
    jw_t h;
    jw_init(&h);
    jw_fmt(&h, ",\"server\":\"worthd\",\"version\":\"%s\",\"protocol\":%d,\"started_at\":",
           WORTH_VERSION, PROTO_VERSION);
    jw_num(&h, p->started_at);
    jw_lit(&h, ",\"uptime_s\":");
    jw_num(&h, now - p->started_at);
    jw_lit(&h, ",\"now\":");
    jw_num(&h, now);
    jw_fmt(&h, ",\"connections\":{\"open\":%zu,\"tcp\":%zu,\"unauthenticated\":%zu}", n, tcp,
           unauthed);
    jw_lit(&h, ",\"you\":{\"role\":");
    jw_str(&h, role_name(pc->role));
    jw_lit(&h, ",\"who\":");
    jw_str(&h, pc->who);
    jw_lit(&h, "},\"retention\":{\"days\":");
    jw_num(&h, p->o->retain_days);
    jw_fmt(&h, ",\"transitions\":%llu,\"every_s\":%u}",
           (unsigned long long)p->o->retain_transitions, p->o->retain_every_s);
    size_t total = p->n + p->n_damaged;
    status_model_t *ms = mem_calloc(total ? total : 1, sizeof *ms);
    for (size_t i = 0; i < p->n; i++) {
        ms[i].q = learner_queue(p->models[i]->l);
        ms[i].json = model_json(p->models[i]->l);
    }
    for (size_t i = 0; i < p->n_damaged; i++) {
        const struct quarantined *dm = &p->damaged[i];
        jw_t o;
        jw_init(&o);
        jw_lit(&o, ",\"model\":");
        jw_str(&o, dm->name);
        jw_fmt(&o, ",\"state\":\"damaged\",\"seq\":%llu,\"reason\":", (unsigned long long)dm->seq);
        jw_str(&o, dm->reason);
        ms[p->n + i].db_id = dm->id;
        ms[p->n + i].json = jw_take(&o);
    }
    fld_keep_id(rq);
    writer_status(p->w, h.b, ms, total, p->o->db_max_mb, conn_id(rq->c));
    jw_close(&h);
    conn_wait(rq->c);
    return PROTO_DONE;
}

/* ---- retention --------------------------------------------------------------------------- */

/* Reads a bound of a policy: absent (RETAIN_KEEP), null (RETAIN_INHERIT) or a number. */
static int read_bound(struct req *rq, const char *name, double hi, int whole, int *change,
                      double *v)
{
    const cJSON *f = field(rq->root, name);
    *change = RETAIN_KEEP;
    if (!f)
        return 0;
    if (cJSON_IsNull(f)) {
        *change = RETAIN_INHERIT;
        return 0;
    }
    if (!cJSON_IsNumber(f))
        return FAIL(rq, WORTH_E_BAD_REQUEST, "\"%s\" must be a number or null", name), -1;
    *v = f->valuedouble;
    if (!isfinite(*v) || *v < 0 || *v > hi || (whole && *v != floor(*v)))
        return FAIL(rq, WORTH_E_BAD_PARAM, "\"%s\" must be %s 0..%.0f (0: keep everything)", name,
                    whole ? "an integer" : "a number", hi),
               -1;
    *change = RETAIN_SET;
    return 0;
}

int do_retention(struct req *rq)
{
    static const char *const keys[] = {"op", "id", "model", "days", "transitions", "run", NULL};
    const char *bad;
    if (!fld_only_keys(rq->root, keys, &bad))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "unknown field \"%.64s\" in retention", bad);
    struct learner *l = NULL;
    if (field(rq->root, "model") && !(l = fld_model(rq)))
        return PROTO_DONE;
    retain_req_t r = {0};
    double days = 0, n = 0;
    if (read_bound(rq, "days", 36500, 0, &r.change_days, &days) != 0 ||
        read_bound(rq, "transitions", 9007199254740992.0, 1, &r.change_transitions, &n) != 0)
        return PROTO_DONE;
    if ((r.change_days || r.change_transitions) && !l)
        return fail_done(rq, WORTH_E_BAD_REQUEST,
                         "a policy is set per model: give \"model\" (the daemon-wide one is "
                         "--retain-days and --retain-transitions)");
    const cJSON *run = field(rq->root, "run");
    if (run && !cJSON_IsBool(run))
        return fail_done(rq, WORTH_E_BAD_REQUEST, "\"run\" must be true or false");
    r.q = l ? learner_queue(l) : NULL;
    r.days = days;
    r.transitions = (uint64_t)n;
    r.run = cJSON_IsTrue(run);
    r.default_days = rq->p->o->retain_days;
    r.default_transitions = rq->p->o->retain_transitions;
    fld_keep_id(rq);
    writer_retain(rq->p->w, &r, conn_id(rq->c));
    conn_wait(rq->c);
    return PROTO_DONE;
}

/* ---- model.purge ------------------------------------------------------------------------- */

int do_purge(struct req *rq)
{
    struct proto *p = rq->p;
    const char *name = fld_string(rq, "model");
    if (!name)
        return PROTO_DONE;
    size_t at = 0;
    if (reg_find_model(p, name, &at)) {
        say_info("model %s dropped (to be purged)", name);
        reg_unregister(p, at, 1, 0); /* the drop is stored first; the purge's reply answers */
    } else if (reg_find_damaged(p, name, &at)) {
        reg_forget_damaged(p, at, 0);
    }
    fld_keep_id(rq);
    writer_purge(p->w, name, pconn(rq->c)->who, conn_id(rq->c));
    conn_wait(rq->c);
    return PROTO_DONE;
}
