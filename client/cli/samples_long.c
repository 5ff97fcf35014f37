/*
 * samples_long.c - long historian files (time, tag, value rows): the
 * tags and what each feeds, and the samples being assembled per (source,
 * time) until their source's time moves on or the file ends.  See samples.c
 * for the rules.
 */
#include <ctype.h>
#include <errno.h>
#include <math.h>
#include <stdarg.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include "samples_impl.h"

/* ---- long files ---------------------------------------------------------------------------- */

static struct key *key_at(struct smp *S, uint64_t k)
{
    return &S->keys[k - S->kbase];
}

/* What a tag feeds: a dimension, T_REWARD, T_TERMINAL, T_IGNORE; NONE unknown; -2 unit (said). */
static int tag_target(struct smp *S, const char *tag, size_t line)
{
    for (size_t i = 0; i < S->ntags; i++)
        if (strcmp(S->tags[i].name, tag) == 0)
            return S->tags[i].target;
    char why[300];
    long d = smp_dim_of(S, tag, why, sizeof why);
    if (d == -2) {
        feed_row_error(S->fd, line, "unknown_tag", "tag %s", why);
        return -2;
    }
    if (d < 0) {
        const char *rw = S->fo->r, *tm = S->fo->terminal;
        if (rw ? strcmp(tag, rw) == 0 : smp_in_names(tag, REWARD_NAMES))
            d = T_REWARD;
        else if (tm ? strcmp(tag, tm) == 0 : smp_in_names(tag, TERMINAL_NAMES))
            d = T_TERMINAL;
        else {
            for (size_t i = 0; i < S->nignore; i++)
                if (strcmp(S->ignore[i], tag) == 0)
                    d = T_IGNORE;
            if (d == NONE && S->ignore_all)
                d = T_IGNORE;
        }
    }
    if (d == NONE) {
        char names[512], shown[80];
        mspec_names(&S->fd->ms, names, sizeof names);
        feed_row_error(S->fd, line, "unknown_tag",
                       "tag \"%s\" is no dimension of model %s (%s) nor its reward (%s); map it "
                       "with --map %s=DIM or leave it out with --ignore-tags %s",
                       show_cell(tag, shown, sizeof shown), S->fd->model, names,
                       S->fo->r ? S->fo->r : "r", shown, shown);
        return NONE;
    }
    if (S->ntags == S->tcap) {
        size_t nc = S->tcap ? 2 * S->tcap : 16;
        struct tag *g = realloc(S->tags, nc * sizeof *g);
        if (!g) {
            feed_row_error(S->fd, line, "bad_row", "out of memory");
            return NONE;
        }
        S->tags = g;
        S->tcap = nc;
    }
    S->tags[S->ntags].name = strdup(tag);
    if (!S->tags[S->ntags].name) {
        feed_row_error(S->fd, line, "bad_row", "out of memory");
        return NONE;
    }
    S->tags[S->ntags++].target = (int)d;
    if (d == T_IGNORE)
        feed_ignore(S->fd, tag);
    return (int)d;
}

/* Checks a key is whole: 0, or -1 after saying which tag is missing. */
static int key_check(struct smp *S, const struct key *k)
{
    for (size_t d = 0; d <= S->dims; d++) {
        if (d < S->dims ? (int)((k->have >> d) & 1) : k->have_r)
            continue;
        char when[64];
        isotime_format(k->t, when, sizeof when);
        feed_row_error(S->fd, k->line, "missing_tag",
                       "source %s at %s has no %s%s: every sample needs every dimension and the "
                       "reward",
                       smp_source_shown(S, k->src), when, d < S->dims ? "dimension " : "reward",
                       d < S->dims ? S->fd->ms.name[d] : "");
        return -1;
    }
    return 0;
}

/*
 * Queues the whole keys at the head, in order: 0 or FATAL(ex).  A key missing
 * a tag, or out of time order, is said; under skip it is counted, under stop
 * it ends the feed (FATAL(EXIT_USAGE)).
 */
static int emit_keys(struct smp *S)
{
    while (S->khead < S->ktail && key_at(S, S->khead)->final) {
        struct key *k = key_at(S, S->khead++);
        if (k->bad) {
            S->bad_samples++;
            continue;
        }
        int rc = key_check(S, k) == 0 ? smp_push(S, k->src, k->t, k->x, k->r, k->terminal, k->line)
                                      : BAD;
        if (rc == BAD) {
            if (!S->fd->skip)
                return FATAL(EXIT_USAGE);
            S->fd->skipped++;
        } else if (rc != 0) {
            return rc;
        }
    }
    if (S->khead == S->ktail) { /* empty: start again at the front */
        S->kbase = S->khead;
    }
    return 0;
}

/* A new key for source src at time t: its number, or (uint64_t)-1 out of memory. */
static uint64_t key_new(struct smp *S, int src, double t, size_t line)
{
    if (S->ktail - S->kbase == S->kcap) {
        /* Compact (drop the keys before khead), then grow if still full. */
        size_t live = (size_t)(S->ktail - S->khead);
        if (live)
            memmove(S->keys, key_at(S, S->khead), live * sizeof *S->keys);
        S->kbase = S->khead;
        if (live == S->kcap) {
            size_t nc = S->kcap ? 2 * S->kcap : 64;
            struct key *g = realloc(S->keys, nc * sizeof *g);
            if (!g)
                return (uint64_t)-1;
            S->keys = g;
            S->kcap = nc;
        }
    }
    uint64_t n = S->ktail++;
    struct key *k = key_at(S, n);
    memset(k, 0, sizeof *k);
    k->t = t;
    k->src = src;
    k->line = line;
    return n;
}

/* One row of a long file: 0, SKIP (bad quality), BAD or FATAL(ex). */
int smp_long_row(struct smp *S, char **cells, long nc, size_t line)
{
    struct feed *fd = S->fd;
    if (smp_row_width(S, nc, line))
        return BAD;
    int target = tag_target(S, cells[S->c_tag], line);
    if (target == NONE || target == -2)
        return BAD;
    double t;
    if (smp_row_time(S, cells[S->c_time], line, &t))
        return -1;
    int src = smp_row_source(S, cells, line);
    if (src < 0)
        return -1;
    struct source *so = &S->src[src];
    if (so->has_cur && t != key_at(S, so->cur)->t) {
        struct key *cur = key_at(S, so->cur);
        if (t < cur->t) {
            char a[64], b[64];
            isotime_format(t, a, sizeof a);
            isotime_format(cur->t, b, sizeof b);
            feed_row_error(fd, line, "time_backwards",
                           "source %s: %s is before %s (line %zu); a long file must list each "
                           "source's rows in time order",
                           smp_source_shown(S, src), a, b, cur->line);
            return -1;
        }
        /* The source's time moves on: its sample so far is whole (or missing a tag). */
        cur->final = 1;
        so->has_cur = 0;
        int rc = emit_keys(S);
        if (rc != 0)
            return rc;
        so = &S->src[src];
    }
    if (target == T_IGNORE)
        return 0;
    if (!so->has_cur) {
        uint64_t k = key_new(S, src, t, line);
        if (k == (uint64_t)-1)
            return FATAL(cli_error(EXIT_USAGE, "out of memory"));
        so->cur = k;
        so->has_cur = 1;
    }
    struct key *k = key_at(S, so->cur);
    int *flag = target == T_REWARD ? &k->have_r : target == T_TERMINAL ? &k->have_term : NULL;
    if (flag ? *flag : (int)((k->have >> target) & 1)) {
        char when[64];
        isotime_format(t, when, sizeof when);
        feed_row_error(fd, line, "duplicate_time", "source %s: tag %s at %s is given twice",
                       smp_source_shown(S, src), cells[S->c_tag], when);
        return -1;
    }
    if (flag)
        *flag = 1;
    else
        k->have |= (uint64_t)1 << target;
    if (S->c_quality >= 0) {
        int q = smp_row_quality(S, cells[S->c_quality], line);
        if (q < 0)
            return -1;
        if (q) {
            fd->bad_quality++;
            k->bad = 1;
            return SKIP;
        }
    }
    if (k->bad)
        return 0;
    const char *what = target >= 0          ? fd->ms.name[target]
                       : target == T_REWARD ? "reward"
                                            : "terminal";
    if (target == T_TERMINAL) {
        if (smp_row_bool(S, cells[S->c_value], line, &k->terminal))
            return -1;
    } else {
        double v;
        if (smp_row_number(S, cells[S->c_value], what, line, &v))
            return -1;
        if (target >= 0)
            k->x[target] = v;
        else
            k->r = v;
    }
    return 0;
}

/* At the end of a long file every source's sample is whole (or missing a tag). */
int smp_long_end(struct smp *S)
{
    for (size_t i = 0; i < S->nsrc; i++)
        if (S->src[i].has_cur) {
            key_at(S, S->src[i].cur)->final = 1;
            S->src[i].has_cur = 0;
        }
    return emit_keys(S);
}
