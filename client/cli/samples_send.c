/*
 * samples_send.c - the historian-export reader's pending frame (sent as an
 * observe.bulk of samples, or as observe requests when it holds several
 * sources), and the reading of one row's cells: time, quality, numbers,
 * flags, source; a wide file's row.  See samples.c for the rules.
 */
#include <ctype.h>
#include <errno.h>
#include <math.h>
#include <stdarg.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include "samples_impl.h"

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
int smp_flush_pending(struct smp *S)
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
int smp_push(struct smp *S, int src, double t, const double *x, double r, int terminal, size_t line)
{
    struct feed *fd = S->fd;
    struct source *so = &S->src[src];
    if (so->has_last && !(t > so->last_t)) {
        char a[64], b[64];
        isotime_format(t, a, sizeof a);
        isotime_format(so->last_t, b, sizeof b);
        if (t == so->last_t)
            feed_row_error(fd, line, "duplicate_time",
                           "source %s has a sample at %s already (line %zu)",
                           smp_source_shown(S, src), a, so->last_line);
        else
            feed_row_error(fd, line, "time_backwards",
                           "source %s: %s is before %s (line %zu); samples of a source must go "
                           "forward in time",
                           smp_source_shown(S, src), a, b, so->last_line);
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
        int ex = smp_flush_pending(S);
        fd->pending = 0;
        if (ex)
            return FATAL(ex);
    }
    return 0;
}

/* ---- reading a row ------------------------------------------------------------------------- */

/* The time of a cell: 0 with *t (seconds since 1970), or -1 (said). */
int smp_row_time(struct smp *S, const char *cell, size_t line, double *t)
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
int smp_row_quality(struct smp *S, const char *cell, size_t line)
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
    smp_quality_lists(S, lists, sizeof lists);
    feed_row_error(S->fd, line, "bad_quality",
                   "quality flag \"%s\" is neither good nor bad (%s; declare with --good, --bad)",
                   show_cell(cell, shown, sizeof shown), lists);
    return -1;
}

int smp_row_number(struct smp *S, const char *cell, const char *what, size_t line, double *v)
{
    if (feed_number(S->fd, cell, v) == 0)
        return 0;
    char shown[64];
    feed_row_error(S->fd, line, "bad_value", "%s: \"%s\" is not a finite number%s", what,
                   show_cell(cell, shown, sizeof shown),
                   !S->fd->dec_comma && strchr(cell, ',') ? " (--decimal-comma reads 4,2)" : "");
    return -1;
}

int smp_row_bool(struct smp *S, const char *cell, size_t line, int *out)
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
int smp_row_source(struct smp *S, char **cells, size_t line)
{
    const char *name = S->c_source >= 0 ? cells[S->c_source] : "";
    if (strlen(name) > 63) {
        feed_row_error(S->fd, line, "bad_value", "source: longer than 63 bytes");
        return -1;
    }
    int src = smp_source_of(S, name);
    if (src < 0)
        feed_row_error(S->fd, line, "bad_value", "more than %d sources in one file", MAXSRC);
    return src;
}

/* Whether the row has as many cells as the header: 0, or -1 (said, bad_row). */
int smp_row_width(struct smp *S, long nc, size_t line)
{
    if ((size_t)nc == S->ncols)
        return 0;
    feed_row_error(S->fd, line, "bad_row", "the row has %ld cells, the header %zu", nc, S->ncols);
    return -1;
}

/* One row of a wide file: 0, SKIP (bad quality), BAD or FATAL(ex). */
int smp_wide_row(struct smp *S, char **cells, long nc, size_t line)
{
    struct feed *fd = S->fd;
    if (smp_row_width(S, nc, line))
        return BAD;
    if (S->c_quality >= 0) {
        int q = smp_row_quality(S, cells[S->c_quality], line);
        if (q < 0)
            return -1;
        if (q) {
            fd->bad_quality++;
            return SKIP;
        }
    }
    double t, x[MAXDIMS], r;
    int terminal = 0;
    if (smp_row_time(S, cells[S->c_time], line, &t))
        return -1;
    for (size_t i = 0; i < S->ncols; i++)
        if (S->col_dim[i] >= 0 &&
            smp_row_number(S, cells[i], fd->ms.name[S->col_dim[i]], line, &x[S->col_dim[i]]))
            return -1;
    if (smp_row_number(S, cells[S->c_reward], "reward", line, &r))
        return -1;
    if (S->c_terminal >= 0 && smp_row_bool(S, cells[S->c_terminal], line, &terminal))
        return -1;
    int src = smp_row_source(S, cells, line);
    if (src < 0)
        return -1;
    return smp_push(S, src, t, x, r, terminal, line);
}
