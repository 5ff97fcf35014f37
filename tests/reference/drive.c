/*
 * drive.c - test driver: feeds binary transitions to one estimator and prints its weights.
 *
 * For tests only (test_numpy_ref.py compares what it prints with numpy); not part of worthd.
 *   drive KIND N [key=value ...] [--every K] [--train P] [--at FILE]
 * builds an estimator of kind KIND (est_kind_parse) over N features, with the est_params_t
 * fields named by the keys set over est_params_default.  stdin holds records of 2N+3
 * little-endian float64: phi[N], r, phi_next[N], g, terminal (0 or 1); each goes to
 * est_observe on source 0.  lstd is refitted with est_train before weights are printed.
 * Output: the weights (est_weight_count), one per line, "%.17g"; with --every K instead
 * one line of space-separated weights after every K records, and a last line for the final
 * weights when the record count is 0 or not a multiple of K.  --train P runs est_train with
 * P passes after the last record; --at FILE prints "value sd" at each row of N float64 in
 * FILE instead of the weights.  stderr gets one line of est_stats.
 * Exit status: 0 ok, 2 bad usage or malformed input, 1 when an est_* call fails.
 */
#include <ctype.h>
#include <errno.h>
#include <inttypes.h>
#include <limits.h>
#include <math.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "learn/est.h"
#include "common/mem.h"
#include "worth/errors.h"

enum ptype { P_F64, P_UINT, P_U64, P_GUARD, P_ACT, P_HIDDEN };

#define KEY(name, type)                                                                            \
    {                                                                                              \
#name, type, offsetof(est_params_t, name)                                                  \
    }
static const struct {
    const char *name;
    enum ptype type;
    size_t off;
} keys[] = {
    KEY(alpha, P_F64),     KEY(init, P_F64),     KEY(lambda, P_F64),
    KEY(nstep, P_UINT),    KEY(horizon, P_UINT), KEY(max_episode, P_UINT),
    KEY(forget, P_F64),    KEY(delta, P_F64),    KEY(guard, P_GUARD),
    KEY(trace_cap, P_F64), KEY(ridge, P_F64),    KEY(refit_every, P_UINT),
    KEY(capacity, P_UINT), KEY(batch, P_UINT),   KEY(steps_per_obs, P_UINT),
    KEY(decay, P_F64),     KEY(tol, P_F64),      KEY(seed, P_U64),
    KEY(hidden, P_HIDDEN), KEY(act, P_ACT),      KEY(target_every, P_UINT),
    KEY(clip, P_F64),      KEY(members, P_UINT),
};

static const char *const guards[] = {
    [EST_GUARD_REGULARISE] = "regularise",
    [EST_GUARD_TRACE] = "trace",
    [EST_GUARD_NONE] = "none",
};

static void vmessage(const char *fmt, va_list ap)
{
    fprintf(stderr, "drive: ");
    vfprintf(stderr, fmt, ap);
    fputc('\n', stderr);
}

/* Bad command line: message and usage, exit 2. */
static _Noreturn void usage(const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    vmessage(fmt, ap);
    va_end(ap);
    fprintf(stderr, "usage: drive KIND N [key=value ...] [--every K] < records\n"
                    "  KIND: td td_n td_lambda mc rls_td lstd replay; N: features >= 1\n"
                    "  keys: alpha init lambda nstep horizon max_episode forget delta\n"
                    "        guard=regularise|trace|none trace_cap ridge refit_every capacity\n"
                    "        batch steps_per_obs decay tol seed hidden=W1,W2,..\n"
                    "        act=tanh|relu target_every clip members\n"
                    "  --train P: est_train with P passes at the end\n"
                    "  --at FILE: print 'value sd' at each row of n float64 in FILE instead\n"
                    "  record: 2N+3 little-endian float64: phi[N] r phi_next[N] g terminal\n");
    exit(2);
}

/* Malformed input: message, exit 2. */
static _Noreturn void bad_input(const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    vmessage(fmt, ap);
    va_end(ap);
    exit(2);
}

static _Noreturn void est_failed(const char *call, int rc, const char *detail)
{
    fprintf(stderr, "drive: %s failed: %s%s%s\n", call, worth_err_name(rc), *detail ? ": " : "",
            detail);
    exit(1);
}

/* Decimal digits only (strtoull would take a sign or blanks), no overflow; 1 if valid. */
static int parse_u64(const char *s, uint64_t *out)
{
    char *end;
    if (!isdigit((unsigned char)s[0]))
        return 0;
    errno = 0;
    unsigned long long v = strtoull(s, &end, 10);
    if (errno || *end)
        return 0;
    *out = v;
    return 1;
}

/* A whole strtod number (est_new checks ranges and finiteness); 1 if valid. */
static int parse_f64(const char *s, double *out)
{
    char *end;
    *out = strtod(s, &end);
    return end != s && !*end;
}

/* Sets the field named before '=' in arg; returns 0 on an unknown key or bad value. */
static int set_param(est_params_t *p, const char *arg)
{
    const char *val = strchr(arg, '=');
    if (!val)
        return 0;
    size_t klen = (size_t)(val++ - arg);
    for (size_t i = 0; i < sizeof keys / sizeof keys[0]; i++) {
        if (strlen(keys[i].name) != klen || strncmp(arg, keys[i].name, klen) != 0)
            continue;
        void *field = (char *)p + keys[i].off;
        uint64_t u;
        switch (keys[i].type) {
        case P_F64:
            return parse_f64(val, field);
        case P_U64:
            return parse_u64(val, field);
        case P_UINT:
            if (!parse_u64(val, &u) || u > UINT_MAX)
                return 0;
            *(unsigned *)field = (unsigned)u;
            return 1;
        case P_ACT:
            if (strcmp(val, "tanh") == 0 || strcmp(val, "relu") == 0) {
                *(enum est_act *)field = val[0] == 't' ? EST_ACT_TANH : EST_ACT_RELU;
                return 1;
            }
            return 0;
        case P_HIDDEN: {
            est_hidden_t *h = field;
            memset(h, 0, sizeof *h);
            for (const char *s = val; *s; h->count++) {
                char *end;
                unsigned long v = strtoul(s, &end, 10);
                if (end == s || h->count == EST_MLP_MAX_LAYERS || v > UINT_MAX)
                    return 0;
                h->width[h->count] = (unsigned)v;
                s = *end == ',' ? end + 1 : end;
                if (*end && *end != ',')
                    return 0;
            }
            return h->count > 0;
        }
        case P_GUARD:
            for (size_t g = 0; g < sizeof guards / sizeof guards[0]; g++)
                if (guards[g] && strcmp(val, guards[g]) == 0) {
                    *(enum est_guard *)field = (enum est_guard)g;
                    return 1;
                }
            return 0;
        }
    }
    return 0;
}

static double le_f64(const unsigned char *b)
{
    uint64_t u = 0;
    for (int i = 7; i >= 0; i--)
        u = u << 8 | b[i];
    double d;
    memcpy(&d, &u, sizeof d);
    return d;
}

/* Refits lstd, then prints the weights on one line (sep ' ') or one per line (sep '\n'). */
static void print_weights(struct est *e, char sep)
{
    if (est_params(e)->kind == EST_LSTD) {
        est_train_t rep;
        int rc = est_train(e, &(est_train_opts_t){.passes = 1}, &rep);
        if (rc)
            est_failed("est_train", rc, "");
    }
    const double *w = est_weights(e);
    size_t n = est_weight_count(e);
    for (size_t i = 0; i < n; i++)
        printf("%.17g%c", w[i], i + 1 < n ? sep : '\n');
}

/* Refits lstd, then prints "value sd" (sd NAN when the kind has none) at every row of n
 * float64 in path. */
static void print_values(struct est *e, const char *path, unsigned char *raw, double *x)
{
    size_t n = est_features(e);
    if (est_params(e)->kind == EST_LSTD) {
        est_train_t rep;
        int rc = est_train(e, &(est_train_opts_t){.passes = 1}, &rep);
        if (rc)
            est_failed("est_train", rc, "");
    }
    FILE *f = fopen(path, "rb");
    if (!f)
        bad_input("cannot open %s", path);
    size_t got;
    while ((got = fread(raw, 1, n * 8, f)) > 0) {
        if (got < n * 8)
            bad_input("%s ends inside a row", path);
        for (size_t i = 0; i < n; i++)
            x[i] = le_f64(raw + 8 * i);
        double sd = NAN;
        double v = est_value(e, x);
        if (est_sd(e, x, &sd) != 0)
            sd = NAN;
        printf("%.17g %.17g\n", v, sd);
    }
    fclose(f);
}

int main(int argc, char **argv)
{
    if (argc < 3)
        usage("need KIND and N");
    int kind = est_kind_parse(argv[1]);
    if (kind < 0)
        usage("unknown estimator kind '%s'", argv[1]);
    uint64_t n, every = 0, train = 0;
    const char *at = NULL;
    if (!parse_u64(argv[2], &n) || n < 1 || n > 100000)
        usage("N must be a feature count 1..100000, not '%s'", argv[2]);
    est_params_t p;
    est_params_default((enum est_kind)kind, &p);
    for (int i = 3; i < argc; i++) {
        if (strcmp(argv[i], "--every") == 0) {
            if (i + 1 == argc || !parse_u64(argv[++i], &every) || every < 1)
                usage("--every needs a record count K >= 1");
        } else if (strcmp(argv[i], "--train") == 0) {
            if (i + 1 == argc || !parse_u64(argv[++i], &train) || train < 1)
                usage("--train needs a pass count P >= 1");
        } else if (strcmp(argv[i], "--at") == 0) {
            if (i + 1 == argc)
                usage("--at needs a file");
            at = argv[++i];
        } else if (!set_param(&p, argv[i])) {
            usage("bad parameter '%s'", argv[i]);
        }
    }

    char err[256] = "";
    struct est *e;
    int rc = est_new(&p, n, 1, &e, err, sizeof err);
    if (rc)
        est_failed("est_new", rc, err);

    size_t len = 2 * n + 3, count = 0;
    unsigned char *raw = mem_alloc(len * 8);
    double *x = mem_alloc(len * sizeof *x);
    size_t got;
    while ((got = fread(raw, 1, len * 8, stdin)) > 0) {
        if (got < len * 8)
            bad_input("input ends inside record %zu", count);
        for (size_t i = 0; i < len; i++)
            x[i] = le_f64(raw + 8 * i);
        double term = x[2 * n + 2];
        if (term != 0.0 && term != 1.0)
            bad_input("record %zu: terminal must be 0 or 1", count);
        rc = est_observe(e, 0, x, x[n], x + n + 1, x[2 * n + 1], term == 1.0);
        if (rc) {
            snprintf(err, sizeof err, "record %zu", count);
            est_failed("est_observe", rc, err);
        }
        count++;
        if (every && count % every == 0)
            print_weights(e, ' ');
    }
    if (ferror(stdin))
        bad_input("cannot read stdin");
    if (train) {
        est_train_t rep;
        rc = est_train(e, &(est_train_opts_t){.passes = (unsigned)train}, &rep);
        if (rc)
            est_failed("est_train", rc, "");
        fprintf(stderr, "train: passes=%u steps=%" PRIu64 " change=%.3g converged=%d\n", rep.passes,
                rep.steps, rep.change, rep.converged);
    }
    if (at)
        print_values(e, at, raw, x);
    else if (!every || count == 0 || count % every != 0)
        print_weights(e, every ? ' ' : '\n');

    est_stats_t st;
    est_stats(e, &st);
    fprintf(stderr, "stats: updates=%" PRIu64 " guarded=%" PRIu64 " refits=%" PRIu64 "\n",
            st.updates, st.guarded, st.refits);
    mem_free(raw);
    mem_free(x);
    est_free(e);
    return fflush(stdout) == 0 ? 0 : 1;
}
