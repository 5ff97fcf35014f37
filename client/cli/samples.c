/*
 * samples.c - `worth feed` of historian exports: samples as a plant's
 * gateway or historian writes them, sent to worthd as samples (worthd pairs
 * them into transitions; schema/protocol.md, "Samples").
 *
 * Two forms.  A wide file has one sample a row: a time column, one column
 * per tag (mapped to the model's dimensions by name, or by --map), a reward
 * column, and optional source, quality and terminal columns; columns it does
 * not read are listed in the summary.  A long file has one reading a row,
 * time, tag, value (and optional source and quality): the rows of one
 * (source, time) are pivoted into one sample.  A long file must list each
 * source's rows in time order (rows of one time together or not, sources
 * interleaved or not): a sample is complete when its source's time moves on
 * or the file ends, and a tag missing then is an error that names it, never
 * a zero.
 *
 * Rules, each with a stable code in its message ("FILE:LINE: CODE: ..."):
 * bad_time (not a time), implausible_time (a number that is neither seconds
 * nor milliseconds of 1990..2100 when the unit is detected), mixed_time_units
 * (ISO and numbers, or seconds and milliseconds, in one file), time_backwards
 * and duplicate_time (per source; worthd refuses both, but here they are told
 * by line), unknown_tag and missing_tag (long files), bad_quality (a quality
 * flag that is neither a declared good nor a declared bad value), bad_value
 * (a cell that is not a number), bad_row (a row of the wrong width).  A row
 * flagged bad is skipped and counted, not an error.  Under --on-error stop
 * (the default) the samples before the error are sent and acknowledged, and
 * the feed ends with exit 2 (1 when worthd refused a sample).
 *
 * Samples go out in file order (for a long file: in the order their
 * (source, time) first appears), in frames of --frame: a frame of one source
 * as an observe.bulk of "form":"samples", a frame of several sources as
 * observe requests of at most 1024 samples, so that worthd pairs the same
 * transitions in the same order either way.  Resending is safe: worthd skips
 * the samples at or before the last it logged for their source, and the
 * summary counts them.  Runs on the CLI's only thread; owns its tables and
 * the pending frame.
 */
#include <ctype.h>
#include <errno.h>
#include <math.h>
#include <stdarg.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include "feed.h"
#include "isotime.h"

#define MAXSRC     4096 /* distinct sources one file may name (worthd allows at most 1024) */
#define HASH       8192 /* slots of the source table (a power of two, twice MAXSRC) */
#define JSON_MAX   1024 /* samples in one observe request (a frame of several sources) */
#define NONE       (-1L)
#define T_REWARD   (-10) /* tag targets besides a dimension index (-2: a unit mismatch) */
#define T_TERMINAL (-11)
#define T_IGNORE   (-12)
/*
 * What the row functions return: 0 (the row is sent or queued), SKIP (left
 * out and counted, not an error), BAD (a row error, said), or FATAL(ex) for
 * an exit code that ends the feed (a failed send).
 */
#define SKIP        1
#define BAD         (-1)
#define FATAL(ex)   (-100 - (ex))
#define EXIT_OF(rc) (-(rc)-100)

const char *const SAMPLE_TIME_NAMES[] = {"time", "timestamp", "t", "ts", "datetime", NULL};
const char *const SAMPLE_TAG_NAMES[] = {"tag", "tagname", "tag_name", "name", NULL};
const char *const SAMPLE_VALUE_NAMES[] = {"value", "val", NULL};
static const char *const REWARD_NAMES[] = {"r", "reward", NULL};
static const char *const SOURCE_NAMES[] = {"source", NULL};
static const char *const QUALITY_NAMES[] = {"quality", "quality_flag", "q", NULL};
static const char *const TERMINAL_NAMES[] = {"terminal", NULL};

struct source {
    char name[64]; /* "" for the default source */
    double last_t; /* time of its last sample sent (or queued) */
    int has_last;
    size_t last_line;
    uint64_t cur; /* long files: its sample being assembled (a key's number) */
    int has_cur;
};

/* A long file's sample being assembled from its rows. */
struct key {
    double t, r, x[MAXDIMS];
    int terminal, bad, final;
    uint64_t have;         /* bit d: dimension d given */
    int have_r, have_term; /* the reward, terminal given */
    int src;
    size_t line; /* its first row */
};

/* A tag of a long file and what it feeds. */
struct tag {
    char *name;
    int target; /* a dimension, T_REWARD, T_TERMINAL or T_IGNORE */
};

struct smp {
    struct feed *fd;
    const struct feed_opts *fo;
    size_t dims, ncols;
    long c_time, c_reward, c_source, c_quality, c_terminal, c_tag, c_value;
    long col_dim[1024]; /* wide: the dimension each column feeds, NONE */
    /* Quality flags (case-insensitive). */
    char *good_buf, *bad_buf, *good[64], *bad[64];
    size_t ngood, nbad;
    int bad_any; /* --bad '*': every value not good is bad */
    /* Time: the file's kind (ISO, seconds or milliseconds). */
    int tkind; /* ISOTIME_* of the first time, 0 before it */
    int seen_s, seen_ms;
    /* Sources, by name. */
    struct source *src;
    size_t nsrc;
    int slot[HASH]; /* index + 1 into src, 0 free */
    /* Long files: the tags seen, and the samples being assembled (in first-appearance order). */
    struct tag *tags;
    size_t ntags, tcap;
    struct tag *maps; /* from --map: tag or column -> dimension */
    size_t nmaps;
    char *map_buf;
    struct key *keys;
    uint64_t kbase, khead, ktail; /* keys khead..ktail-1 live at keys[k - kbase] */
    size_t kcap;
    char *ignore_buf, *ignore[256];
    size_t nignore;
    int ignore_all;
    /* The pending frame: n samples of dims + 3 doubles (t, x, r, terminal), their source, line. */
    double *rec;
    int *rsrc;
    size_t *rline, n;
    worth_sample *js; /* JSON_MAX, for frames of several sources */
    uint64_t bad_samples;
};

/* ---- small helpers -------------------------------------------------------------------------- */

int samples_has_column(char **hdr, long nh, const char *given, const char *const *names)
{
    for (long i = 0; i < nh; i++) {
        if (given) {
            if (strcmp(hdr[i], given) == 0)
                return (int)i;
            continue;
        }
        for (const char *const *n = names; *n; n++)
            if (strcasecmp(hdr[i], *n) == 0)
                return (int)i;
    }
    return -1;
}

/* Whether s is one of names (case-insensitive). */
static int in_names(const char *s, const char *const *names)
{
    for (const char *const *n = names; *n; n++)
        if (strcasecmp(s, *n) == 0)
            return 1;
    return 0;
}

/* Splits a comma-separated list (copied into *buf, owned by the caller) into out[max]. */
static size_t split_list(const char *list, char **buf, char **out, size_t max)
{
    *buf = strdup(list ? list : "");
    size_t n = 0;
    char *save = NULL;
    for (char *t = *buf ? strtok_r(*buf, ",", &save) : NULL; t && n < max;
         t = strtok_r(NULL, ",", &save)) {
        while (*t == ' ')
            t++;
        size_t l = strlen(t);
        while (l > 0 && t[l - 1] == ' ')
            t[--l] = 0;
        if (*t)
            out[n++] = t;
    }
    return n;
}

/*
 * Whether a header cell or tag names dimension name: "level", or with a unit
 * "level [m]", "level[m]", "level (m)".  *unit gets the unit written there
 * (into ubuf) or "" when none.
 */
static int names_dim(const char *cell, const char *name, char *ubuf, size_t ulen)
{
    size_t n = strlen(name);
    ubuf[0] = 0;
    if (strncmp(cell, name, n) != 0)
        return 0;
    const char *p = cell + n;
    if (!*p)
        return 1;
    while (*p == ' ')
        p++;
    char close = *p == '[' ? ']' : *p == '(' ? ')' : 0;
    if (!close)
        return 0;
    const char *q = strchr(p + 1, close);
    if (!q || q[1])
        return 0;
    snprintf(ubuf, ulen, "%.*s", (int)(q - p - 1), p + 1);
    return 1;
}

/* The dimension a column or tag feeds (--map first, then the names); NONE; -2 a unit mismatch. */
static long dim_of(struct smp *S, const char *cell, char *why, size_t whylen)
{
    const struct mspec *ms = &S->fd->ms;
    for (size_t i = 0; i < S->nmaps; i++)
        if (strcmp(S->maps[i].name, cell) == 0)
            return S->maps[i].target;
    for (size_t d = 0; d < S->dims; d++) {
        char unit[64];
        if (names_dim(cell, ms->name[d], unit, sizeof unit)) {
            if (unit[0] && strcmp(unit, ms->unit[d]) != 0) {
                snprintf(why, whylen, "\"%s\" is in %s, the model's %s in %s", cell, unit,
                         ms->name[d], ms->unit[d][0] ? ms->unit[d] : "no unit");
                return -2;
            }
            return (long)d;
        }
    }
    return NONE;
}

/* The source named name (added when new); its index, or -1 past MAXSRC. */
static int source_of(struct smp *S, const char *name)
{
    uint32_t h = 2166136261u;
    for (const unsigned char *p = (const unsigned char *)name; *p; p++)
        h = (h ^ *p) * 16777619u;
    for (uint32_t i = h & (HASH - 1);; i = (i + 1) & (HASH - 1)) {
        int k = S->slot[i];
        if (k == 0) {
            if (S->nsrc >= MAXSRC)
                return -1;
            struct source *s = &S->src[S->nsrc];
            memset(s, 0, sizeof *s);
            snprintf(s->name, sizeof s->name, "%s", name);
            S->slot[i] = (int)++S->nsrc;
            return (int)S->nsrc - 1;
        }
        if (strcmp(S->src[k - 1].name, name) == 0)
            return k - 1;
    }
}

static const char *source_shown(const struct smp *S, int src)
{
    return S->src[src].name[0] ? S->src[src].name : "(default)";
}

/* ---- the header ----------------------------------------------------------------------------- */

/* The column of a role: the one --OPTION names (required to exist), or a default name. */
static int find_role(struct smp *S, char **hdr, long nh, const char *given, const char *opt,
                     const char *const *names, long *out)
{
    *out = samples_has_column(hdr, nh, given, names);
    if (given && *out < 0)
        return cli_error(EXIT_USAGE, "%s:1: the header has no column \"%s\" (from %s)", S->fd->name,
                         given, opt);
    return EXIT_OK;
}

static int parse_maps(struct smp *S)
{
    if (!S->fo->map)
        return EXIT_OK;
    char *items[MAXDIMS * 4];
    size_t n = split_list(S->fo->map, &S->map_buf, items, MAXDIMS * 4);
    S->maps = calloc(n ? n : 1, sizeof *S->maps);
    if (!S->map_buf || !S->maps)
        return cli_error(EXIT_USAGE, "out of memory");
    for (size_t i = 0; i < n; i++) {
        char *eq = strrchr(items[i], '=');
        if (!eq || eq == items[i] || !eq[1])
            return cli_usage("feed",
                             "--map takes COLUMN=DIM,... (or TAG=DIM for a long file), "
                             "not \"%s\"",
                             items[i]);
        *eq = 0;
        long d = mspec_dim(&S->fd->ms, eq + 1);
        if (d < 0) {
            char names[512];
            mspec_names(&S->fd->ms, names, sizeof names);
            return cli_usage("feed", "--map %s=%s: model %s has no dimension \"%s\" (%s)", items[i],
                             eq + 1, S->fd->model, eq + 1, names);
        }
        S->maps[S->nmaps].name = items[i];
        S->maps[S->nmaps++].target = (int)d;
    }
    return EXIT_OK;
}

static int parse_quality(struct smp *S)
{
    S->ngood = split_list(S->fo->good ? S->fo->good : "good,ok,1", &S->good_buf, S->good, 64);
    S->nbad = split_list(S->fo->bad ? S->fo->bad : "bad,uncertain,0", &S->bad_buf, S->bad, 64);
    if (!S->good_buf || !S->bad_buf)
        return cli_error(EXIT_USAGE, "out of memory");
    for (size_t i = 0; i < S->nbad; i++)
        if (strcmp(S->bad[i], "*") == 0)
            S->bad_any = 1;
    if (S->ngood == 0)
        return cli_usage("feed", "--good needs at least one value");
    if ((S->fo->good || S->fo->bad) && S->c_quality < 0)
        return cli_usage("feed", "--good and --bad need a quality column (--quality COL, or one "
                                 "named quality)");
    return EXIT_OK;
}

/* Lists the quality values of the declaration for a message. */
static void quality_lists(const struct smp *S, char *buf, size_t len)
{
    size_t n = (size_t)snprintf(buf, len, "good:");
    for (size_t i = 0; i < S->ngood && n < len; i++)
        n += (size_t)snprintf(buf + n, len - n, "%s%s", i ? "," : " ", S->good[i]);
    if (n < len)
        n += (size_t)snprintf(buf + n, len - n, "; bad:");
    for (size_t i = 0; i < S->nbad && n < len; i++)
        n += (size_t)snprintf(buf + n, len - n, "%s%s", i ? "," : " ", S->bad[i]);
}

static int header_wide(struct smp *S, char **hdr, long nh)
{
    struct feed *fd = S->fd;
    const struct feed_opts *fo = S->fo;
    for (long i = 0; i < nh; i++)
        S->col_dim[i] = NONE;
    for (size_t i = 0; i < S->nmaps; i++)
        if (samples_has_column(hdr, nh, S->maps[i].name, NULL) < 0)
            return cli_error(EXIT_USAGE, "%s:1: the header has no column \"%s\" (from --map)",
                             fd->name, S->maps[i].name);
    long role[5] = {S->c_time, S->c_reward, S->c_source, S->c_quality, S->c_terminal};
    for (long i = 0; i < nh; i++) {
        int is_role = 0;
        for (int k = 0; k < 5; k++)
            is_role |= role[k] == i;
        if (is_role)
            continue;
        char why[300];
        long d = dim_of(S, hdr[i], why, sizeof why);
        if (d == -2)
            return cli_error(EXIT_USAGE, "%s:1: column %s", fd->name, why);
        if (d >= 0) {
            for (long j = 0; j < i; j++)
                if (S->col_dim[j] == d)
                    return cli_error(EXIT_USAGE,
                                     "%s:1: columns \"%s\" and \"%s\" both give dimension %s",
                                     fd->name, hdr[j], hdr[i], fd->ms.name[d]);
            S->col_dim[i] = d;
        } else {
            feed_ignore(fd, hdr[i]);
        }
    }
    for (size_t d = 0; d < S->dims; d++) {
        long c = NONE;
        for (long i = 0; i < nh; i++)
            if (S->col_dim[i] == (long)d)
                c = i;
        if (c == NONE) {
            char names[512];
            mspec_names(&fd->ms, names, sizeof names);
            return cli_error(EXIT_USAGE,
                             "%s:1: no column for dimension %s of model %s (its dims: %s); "
                             "name a column with --map COLUMN=%s",
                             fd->name, fd->ms.name[d], fd->model, names, fd->ms.name[d]);
        }
    }
    (void)fo;
    return EXIT_OK;
}

static int header_long(struct smp *S, char **hdr, long nh)
{
    long role[7] = {S->c_time, S->c_tag, S->c_value, S->c_source, S->c_quality, NONE, NONE};
    for (long i = 0; i < nh; i++) {
        int is_role = 0;
        for (int k = 0; k < 5; k++)
            is_role |= role[k] == i;
        if (!is_role)
            feed_ignore(S->fd, hdr[i]);
    }
    S->nignore = split_list(S->fo->ignore_tags, &S->ignore_buf, S->ignore, 256);
    for (size_t i = 0; i < S->nignore; i++)
        if (strcmp(S->ignore[i], "*") == 0)
            S->ignore_all = 1;
    return S->ignore_buf ? EXIT_OK : cli_error(EXIT_USAGE, "out of memory");
}

/* ---- sending ------------------------------------------------------------------------------- */

/* Sends pending samples off..off+k-1 as one request; the library's code. */
static int send_some(struct smp *S, size_t off, size_t k, int single)
{
    struct feed *fd = S->fd;
    size_t w = S->dims + 3;
    worth_ingest_t in;
    int rc;
    if (single) {
        const char *src = S->src[S->rsrc[off]].name;
        rc = worth_observe_samples_bulk(fd->cli->c, fd->model, S->dims, src[0] ? src : NULL,
                                        S->rec + off * w, k, 0, &in);
    } else {
        for (size_t i = 0; i < k; i++) {
            const double *r = S->rec + (off + i) * w;
            const char *src = S->src[S->rsrc[off + i]].name;
            S->js[i].source = src[0] ? src : NULL;
            S->js[i].t = r[0];
            S->js[i].x = r + 1;
            S->js[i].r = r[1 + S->dims];
            S->js[i].terminal = r[2 + S->dims] != 0;
        }
        rc = worth_observe_samples(fd->cli->c, fd->model, S->dims, S->js, k, &in);
    }
    if (rc == 0) {
        fd->fed += k;
        fd->logged += in.skipped;
        fd->paired += in.paired;
        fd->gaps += in.gaps;
        fd->seq = in.seq;
    }
    return rc;
}

static void drop_pending(struct smp *S, size_t i)
{
    size_t w = S->dims + 3, m = S->n - i - 1;
    memmove(S->rec + i * w, S->rec + (i + 1) * w, m * w * sizeof(double));
    memmove(S->rsrc + i, S->rsrc + i + 1, m * sizeof *S->rsrc);
    memmove(S->rline + i, S->rline + i + 1, m * sizeof *S->rline);
    S->n--;
}

/*
 * Sends the pending frame.  EXIT_OK, or the exit code after the message (a
 * sample worthd refused under stop: EXIT_SERVER, after the samples before it).
 */
static int flush_pending(struct smp *S)
{
    struct feed *fd = S->fd;
    size_t off = 0;
    while (off < S->n) {
        int single = 1;
        for (size_t i = off + 1; i < S->n && single; i++)
            single = S->rsrc[i] == S->rsrc[off];
        size_t k = single ? S->n - off : (S->n - off < JSON_MAX ? S->n - off : JSON_MAX);
        int rc = send_some(S, off, k, single);
        if (rc == 0) {
            off += k;
            continue;
        }
        long idx = worth_error_index(fd->cli->c);
        const char *code = worth_error_name(fd->cli->c), *msg = worth_error_message(fd->cli->c);
        int per_row = rc == WORTH_E_BAD_NUMBER || rc == WORTH_E_BAD_PARAM ||
                      rc == WORTH_E_BAD_DIMENSION || rc == WORTH_E_TOO_MANY_SOURCES ||
                      rc == WORTH_E_BAD_REQUEST || rc == WORTH_E_OUT_OF_ORDER;
        if (idx < 0 || (size_t)idx >= k || !per_row) {
            feed_bar_clear(fd);
            fprintf(stderr, "%s:%zu: a frame of %zu samples from this line was refused\n", fd->name,
                    S->rline[off], k);
            snprintf(fd->err_code, sizeof fd->err_code, "%s", code ? code : "?");
            snprintf(fd->err_msg, sizeof fd->err_msg, "%s", msg ? msg : "");
            fd->err_line = S->rline[off];
            S->n = 0;
            int ex = cli_fail(fd->cli, rc);
            if (rc == WORTH_E_TOO_LARGE)
                fprintf(stderr, "worth: hint: --frame N with N at most worthd's --max-batch\n");
            return ex;
        }
        feed_row_error(fd, S->rline[off + (size_t)idx], code ? code : "?",
                       "worthd refused the "
                       "sample: %s",
                       msg ? msg : "");
        if (fd->skip) {
            drop_pending(S, off + (size_t)idx);
            fd->skipped++;
            continue;
        }
        if (idx > 0 && (rc = send_some(S, off, (size_t)idx, single)) != 0) {
            S->n = 0;
            return cli_fail(fd->cli, rc);
        }
        S->n = 0;
        return EXIT_SERVER;
    }
    S->n = 0;
    return EXIT_OK;
}

/*
 * Queues one sample after checking its time against its source's last: 0,
 * BAD (time_backwards or duplicate_time, said), or FATAL(ex) when sending the
 * full frame failed.
 */
static int push(struct smp *S, int src, double t, const double *x, double r, int terminal,
                size_t line)
{
    struct feed *fd = S->fd;
    struct source *so = &S->src[src];
    if (so->has_last && !(t > so->last_t)) {
        char a[64], b[64];
        isotime_format(t, a, sizeof a);
        isotime_format(so->last_t, b, sizeof b);
        if (t == so->last_t)
            feed_row_error(fd, line, "duplicate_time",
                           "source %s has a sample at %s already (line %zu)", source_shown(S, src),
                           a, so->last_line);
        else
            feed_row_error(fd, line, "time_backwards",
                           "source %s: %s is before %s (line %zu); samples of a source must go "
                           "forward in time",
                           source_shown(S, src), a, b, so->last_line);
        return BAD;
    }
    so->last_t = t;
    so->has_last = 1;
    so->last_line = line;
    size_t w = S->dims + 3;
    double *p = S->rec + S->n * w;
    p[0] = t;
    memcpy(p + 1, x, S->dims * sizeof(double));
    p[1 + S->dims] = r;
    p[2 + S->dims] = terminal ? 1.0 : 0.0;
    S->rsrc[S->n] = src;
    S->rline[S->n++] = line;
    fd->pending++;
    if (S->n == fd->frame) {
        int ex = flush_pending(S);
        fd->pending = 0;
        if (ex)
            return FATAL(ex);
    }
    return 0;
}

/* ---- reading a row ------------------------------------------------------------------------- */

/* The time of a cell: 0 with *t (seconds since 1970), or -1 (said). */
static int row_time(struct smp *S, const char *cell, size_t line, double *t)
{
    struct feed *fd = S->fd;
    char err[256], shown[64];
    double v;
    int k = isotime_classify(cell, fd->dec_comma, &v, err, sizeof err);
    show_cell(cell, shown, sizeof shown);
    enum feed_tfmt tf = S->fo->tfmt;
    if (k == ISOTIME_NONE) {
        feed_row_error(fd, line, "bad_time", "\"%s\" is not a time: %s", shown, err);
        return -1;
    }
    int numeric = k != ISOTIME_ISO;
    if (tf == TFMT_ISO && numeric) {
        feed_row_error(fd, line, "bad_time",
                       "\"%s\" is a number; --time-format iso reads ISO-8601 times only", shown);
        return -1;
    }
    if ((tf == TFMT_S || tf == TFMT_MS) && !numeric) {
        feed_row_error(fd, line, "bad_time",
                       "\"%s\" is not a number; --time-format %s reads epoch %s", shown,
                       tf == TFMT_S ? "s" : "ms", tf == TFMT_S ? "seconds" : "milliseconds");
        return -1;
    }
    if (S->tkind && (S->tkind == ISOTIME_ISO) != (k == ISOTIME_ISO)) {
        feed_row_error(fd, line, "mixed_time_units",
                       "\"%s\": the file's times so far are %s; one file must use one kind", shown,
                       S->tkind == ISOTIME_ISO ? "ISO-8601" : "numbers");
        return -1;
    }
    if (numeric) {
        /* Seconds and milliseconds in one file: the unit of one of them is wrong. */
        if ((S->seen_s && k == ISOTIME_MS) || (S->seen_ms && k == ISOTIME_S)) {
            feed_row_error(fd, line, "mixed_time_units",
                           "\"%s\" looks like %s since 1970, earlier times like %s: one file "
                           "must use one unit",
                           shown, k == ISOTIME_S ? "seconds" : "milliseconds",
                           k == ISOTIME_S ? "milliseconds" : "seconds");
            return -1;
        }
        if (tf == TFMT_AUTO && k == ISOTIME_NUMBER) {
            feed_row_error(fd, line, "implausible_time",
                           "\"%s\" is neither seconds nor milliseconds since 1970 of a time in "
                           "1990..2100; declare --time-format s or ms to read it as it is",
                           shown);
            return -1;
        }
        int ms = tf == TFMT_MS || (tf == TFMT_AUTO && k == ISOTIME_MS);
        *t = ms ? v / 1000.0 : v;
    } else {
        *t = v;
    }
    if (!S->tkind)
        S->tkind = k;
    S->seen_s |= k == ISOTIME_S;
    S->seen_ms |= k == ISOTIME_MS;
    return 0;
}

/* The quality flag: 0 good, 1 bad (counted), -1 an unknown flag (said). */
static int row_quality(struct smp *S, const char *cell, size_t line)
{
    for (size_t i = 0; i < S->ngood; i++)
        if (strcasecmp(cell, S->good[i]) == 0)
            return 0;
    for (size_t i = 0; i < S->nbad; i++)
        if (strcasecmp(cell, S->bad[i]) == 0)
            return 1;
    if (S->bad_any && cell[0])
        return 1;
    char lists[400], shown[64];
    quality_lists(S, lists, sizeof lists);
    feed_row_error(S->fd, line, "bad_quality",
                   "quality flag \"%s\" is neither good nor bad (%s; declare with --good, --bad)",
                   show_cell(cell, shown, sizeof shown), lists);
    return -1;
}

static int row_number(struct smp *S, const char *cell, const char *what, size_t line, double *v)
{
    if (feed_number(S->fd, cell, v) == 0)
        return 0;
    char shown[64];
    feed_row_error(S->fd, line, "bad_value", "%s: \"%s\" is not a finite number%s", what,
                   show_cell(cell, shown, sizeof shown),
                   !S->fd->dec_comma && strchr(cell, ',') ? " (--decimal-comma reads 4,2)" : "");
    return -1;
}

static int row_bool(struct smp *S, const char *cell, size_t line, int *out)
{
    if (!*cell || strcmp(cell, "0") == 0 || strcasecmp(cell, "false") == 0)
        *out = 0;
    else if (strcmp(cell, "1") == 0 || strcasecmp(cell, "true") == 0)
        *out = 1;
    else {
        char shown[64];
        feed_row_error(S->fd, line, "bad_value", "terminal: \"%s\" is not 0, 1, true or false",
                       show_cell(cell, shown, sizeof shown));
        return -1;
    }
    return 0;
}

/* The source of a row: its index, or -1 (said). */
static int row_source(struct smp *S, char **cells, size_t line)
{
    const char *name = S->c_source >= 0 ? cells[S->c_source] : "";
    if (strlen(name) > 63) {
        feed_row_error(S->fd, line, "bad_value", "source: longer than 63 bytes");
        return -1;
    }
    int src = source_of(S, name);
    if (src < 0)
        feed_row_error(S->fd, line, "bad_value", "more than %d sources in one file", MAXSRC);
    return src;
}

/* One row of a wide file: 0, SKIP (bad quality), BAD or FATAL(ex). */
static int wide_row(struct smp *S, char **cells, long nc, size_t line)
{
    struct feed *fd = S->fd;
    if ((size_t)nc != S->ncols) {
        feed_row_error(fd, line, "bad_row", "the row has %ld cells, the header %zu", nc, S->ncols);
        return -1;
    }
    if (S->c_quality >= 0) {
        int q = row_quality(S, cells[S->c_quality], line);
        if (q < 0)
            return -1;
        if (q) {
            fd->bad_quality++;
            return SKIP;
        }
    }
    double t, x[MAXDIMS], r;
    int terminal = 0;
    if (row_time(S, cells[S->c_time], line, &t))
        return -1;
    for (size_t i = 0; i < S->ncols; i++)
        if (S->col_dim[i] >= 0 &&
            row_number(S, cells[i], fd->ms.name[S->col_dim[i]], line, &x[S->col_dim[i]]))
            return -1;
    if (row_number(S, cells[S->c_reward], "reward", line, &r))
        return -1;
    if (S->c_terminal >= 0 && row_bool(S, cells[S->c_terminal], line, &terminal))
        return -1;
    int src = row_source(S, cells, line);
    if (src < 0)
        return -1;
    return push(S, src, t, x, r, terminal, line);
}

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
    long d = dim_of(S, tag, why, sizeof why);
    if (d == -2) {
        feed_row_error(S->fd, line, "unknown_tag", "tag %s", why);
        return -2;
    }
    if (d < 0) {
        const char *rw = S->fo->r, *tm = S->fo->terminal;
        if (rw ? strcmp(tag, rw) == 0 : in_names(tag, REWARD_NAMES))
            d = T_REWARD;
        else if (tm ? strcmp(tag, tm) == 0 : in_names(tag, TERMINAL_NAMES))
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
                       source_shown(S, k->src), when, d < S->dims ? "dimension " : "reward",
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
        int rc =
            key_check(S, k) == 0 ? push(S, k->src, k->t, k->x, k->r, k->terminal, k->line) : BAD;
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
static int long_row(struct smp *S, char **cells, long nc, size_t line)
{
    struct feed *fd = S->fd;
    if ((size_t)nc != S->ncols) {
        feed_row_error(fd, line, "bad_row", "the row has %ld cells, the header %zu", nc, S->ncols);
        return -1;
    }
    int target = tag_target(S, cells[S->c_tag], line);
    if (target == NONE || target == -2)
        return BAD;
    double t;
    if (row_time(S, cells[S->c_time], line, &t))
        return -1;
    int src = row_source(S, cells, line);
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
                           source_shown(S, src), a, b, cur->line);
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
                       source_shown(S, src), cells[S->c_tag], when);
        return -1;
    }
    if (flag)
        *flag = 1;
    else
        k->have |= (uint64_t)1 << target;
    if (S->c_quality >= 0) {
        int q = row_quality(S, cells[S->c_quality], line);
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
        if (row_bool(S, cells[S->c_value], line, &k->terminal))
            return -1;
    } else {
        double v;
        if (row_number(S, cells[S->c_value], what, line, &v))
            return -1;
        if (target >= 0)
            k->x[target] = v;
        else
            k->r = v;
    }
    return 0;
}

/* At the end of a long file every source's sample is whole (or missing a tag). */
static int long_end(struct smp *S)
{
    for (size_t i = 0; i < S->nsrc; i++)
        if (S->src[i].has_cur) {
            key_at(S, S->src[i].cur)->final = 1;
            S->src[i].has_cur = 0;
        }
    return emit_keys(S);
}

/* ---- the run ------------------------------------------------------------------------------- */

static void smp_free(struct smp *S)
{
    free(S->good_buf);
    free(S->bad_buf);
    free(S->map_buf);
    free(S->maps);
    free(S->ignore_buf);
    for (size_t i = 0; i < S->ntags; i++)
        free(S->tags[i].name);
    free(S->tags);
    free(S->keys);
    free(S->src);
    free(S->rec);
    free(S->rsrc);
    free(S->rline);
    free(S->js);
}

int samples_run(struct feed *fd, FILE *f, char **hdr, long nh, const struct feed_opts *fo,
                size_t lineno)
{
    struct smp *S = calloc(1, sizeof *S);
    if (!S)
        return cli_error(EXIT_USAGE, "out of memory");
    S->fd = fd;
    S->fo = fo;
    S->dims = fd->dims;
    S->ncols = (size_t)nh;
    int ex = EXIT_OK;
    char *line = NULL, **cells = NULL;
    size_t lcap = 0, ccap = 0;
    if (nh > 1024) {
        ex = cli_error(EXIT_USAGE, "%s:1: more than 1024 columns", fd->name);
        goto out;
    }
    S->src = calloc(MAXSRC, sizeof *S->src);
    S->rec = malloc(fd->frame * (S->dims + 3) * sizeof(double));
    S->rsrc = malloc(fd->frame * sizeof *S->rsrc);
    S->rline = malloc(fd->frame * sizeof *S->rline);
    S->js = malloc(JSON_MAX * sizeof *S->js);
    if (!S->src || !S->rec || !S->rsrc || !S->rline || !S->js) {
        ex = cli_error(EXIT_USAGE, "out of memory");
        goto out;
    }
    int wide = fd->form == FORM_WIDE;
    if ((ex = find_role(S, hdr, nh, fo->time, "--time", SAMPLE_TIME_NAMES, &S->c_time)) ||
        (ex = find_role(S, hdr, nh, fo->source, "--source", SOURCE_NAMES, &S->c_source)) ||
        (ex = find_role(S, hdr, nh, fo->quality, "--quality", QUALITY_NAMES, &S->c_quality)))
        goto out;
    if (S->c_time < 0) {
        ex = cli_error(EXIT_USAGE,
                       "%s:1: the header has no time column (time, timestamp, t; or "
                       "name it with --time)",
                       fd->name);
        goto out;
    }
    if (wide) {
        if ((ex = find_role(S, hdr, nh, fo->r, "--reward", REWARD_NAMES, &S->c_reward)) ||
            (ex =
                 find_role(S, hdr, nh, fo->terminal, "--terminal", TERMINAL_NAMES, &S->c_terminal)))
            goto out;
        S->c_tag = S->c_value = NONE;
        if (S->c_reward < 0) {
            ex = cli_error(EXIT_USAGE,
                           "%s:1: the header has no reward column (r, reward; or name "
                           "it with --reward)",
                           fd->name);
            goto out;
        }
    } else {
        if ((ex =
                 find_role(S, hdr, nh, fo->tag_col, "--tag-column", SAMPLE_TAG_NAMES, &S->c_tag)) ||
            (ex = find_role(S, hdr, nh, fo->value_col, "--value-column", SAMPLE_VALUE_NAMES,
                            &S->c_value)))
            goto out;
        S->c_reward = S->c_terminal = NONE;
        if (S->c_tag < 0 || S->c_value < 0) {
            ex = cli_error(EXIT_USAGE,
                           "%s:1: a long file needs a tag and a value column (tag, "
                           "value; or --tag-column, --value-column)",
                           fd->name);
            goto out;
        }
    }
    if ((ex = parse_maps(S)) || (ex = parse_quality(S)) ||
        (ex = wide ? header_wide(S, hdr, nh) : header_long(S, hdr, nh)))
        goto out;

    ssize_t len;
    errno = 0;
    while ((len = getline(&line, &lcap, f)) >= 0) {
        lineno++;
        fd->bytes += (size_t)len;
        if (strspn(line, " \t\r\n") == (size_t)len)
            continue;
        if (memchr(line, 0, (size_t)len)) {
            ex = cli_error(EXIT_USAGE, "%s:%zu: a NUL byte: not a text file", fd->name, lineno);
            goto out_stop;
        }
        fd->rows++;
        long nc = csv_split_sep(line, fd->sep, &cells, &ccap);
        int rc;
        if (nc == -2) {
            ex = cli_error(EXIT_USAGE, "out of memory");
            goto out_stop;
        } else if (nc < 0) {
            feed_row_error(fd, lineno, "bad_row", "unterminated quote");
            rc = -1;
        } else {
            rc = wide ? wide_row(S, cells, nc, lineno) : long_row(S, cells, nc, lineno);
        }
        if (rc == BAD) {
            if (!fd->skip) {
                ex = EXIT_USAGE;
                goto out_stop;
            }
            fd->skipped++;
        } else if (rc <= FATAL(0)) {
            ex = EXIT_OF(rc);
            goto out_stop;
        }
        if ((lineno & 255) == 0)
            feed_bar_draw(fd, 0);
    }
    if (ferror(f)) {
        ex = cli_error(EXIT_USAGE, "%s: read error after line %zu: %s", fd->name, lineno,
                       strerror(errno));
        goto out_stop;
    }
    if (!wide) {
        int rc = long_end(S);
        if (rc != 0) {
            ex = EXIT_OF(rc);
            goto out_stop;
        }
    }
    ex = flush_pending(S);
    goto out;
out_stop:
    /* The samples before the error are sent (stop means "up to here"). */
    if (ex != EXIT_CONNECT) {
        int ex2 = flush_pending(S);
        if (ex2 == EXIT_CONNECT)
            ex = ex2;
    }
out:
    fd->bad_samples = S->bad_samples;
    smp_free(S);
    free(S);
    free(cells);
    free(line);
    return ex;
}
