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

#include "samples_impl.h"

const char *const SAMPLE_TIME_NAMES[] = {"time", "timestamp", "t", "ts", "datetime", NULL};
const char *const SAMPLE_TAG_NAMES[] = {"tag", "tagname", "tag_name", "name", NULL};
const char *const SAMPLE_VALUE_NAMES[] = {"value", "val", NULL};
const char *const REWARD_NAMES[] = {"r", "reward", NULL};
const char *const SOURCE_NAMES[] = {"source", NULL};
const char *const QUALITY_NAMES[] = {"quality", "quality_flag", "q", NULL};
const char *const TERMINAL_NAMES[] = {"terminal", NULL};

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
int smp_in_names(const char *s, const char *const *names)
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
long smp_dim_of(struct smp *S, const char *cell, char *why, size_t whylen)
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
int smp_source_of(struct smp *S, const char *name)
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

const char *smp_source_shown(const struct smp *S, int src)
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
void smp_quality_lists(const struct smp *S, char *buf, size_t len)
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
        long d = smp_dim_of(S, hdr[i], why, sizeof why);
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
    while ((len = feed_line(fd, f, &line, &lcap, &lineno)) != -1) {
        if (len < 0) {
            ex = EXIT_USAGE;
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
            rc = wide ? smp_wide_row(S, cells, nc, lineno) : smp_long_row(S, cells, nc, lineno);
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
        int rc = smp_long_end(S);
        if (rc != 0) {
            ex = EXIT_OF(rc);
            goto out_stop;
        }
    }
    ex = smp_flush_pending(S);
    goto out;
out_stop:
    /* The samples before the error are sent (stop means "up to here"). */
    if (ex != EXIT_CONNECT) {
        int ex2 = smp_flush_pending(S);
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
