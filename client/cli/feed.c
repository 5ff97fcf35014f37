/*
 * feed.c - `worth feed MODEL FILE|-`: streams a file into a model, in file
 * order: transitions (a CSV with a header row, or JSON lines), or a
 * historian's samples (a wide or a long CSV: samples.c).
 *
 * Reads the input one line at a time (constant memory whatever its size),
 * checks every cell before anything is sent, and sends the rows in order.
 * The form is told from the header (or declared with --format): x0.. and
 * xn0.. columns make a transition file, tag and value columns a long sample
 * file, a time column without those a wide sample file.
 *
 * Transitions: rows without source, t or dt go in observe.bulk frames
 * (--frame rows each), rows with them in observe batches; when a row needs
 * the other path, the pending frame is sent first, so the model learns the
 * rows in file order.  Every row carries a producer sequence (pseq): its
 * pseq column, else its line number, so that feeding the same file again
 * (after a kill, or by mistake) learns nothing twice: worthd skips the rows
 * at or below the last pseq it logged for their source, and the summary says
 * how many.  Standard input is not resumed unless --resume says so (a pipe
 * has no identity: its line numbers start again on every run), nor is a file
 * fed with --no-resume.
 *
 * A malformed row is reported as FILE:LINE: column C: reason (sample files:
 * FILE:LINE: CODE: reason); --on-error skip counts it and goes on, stop (the
 * default) sends the rows before it and exits 2 saying how many were fed.
 * worthd rejects a frame as a whole and names the bad record's index; the
 * CLI maps it back to the file line, and under skip drops that row and sends
 * the frame again.  A feed is therefore never partial and silent: every row
 * is fed, reported as skipped, or counted in the stop message.  The summary
 * also says what was not used: values clipped to the declared ranges (stats'
 * clipped before and after, once the model has learnt the feed), columns not
 * read, rows without t (a rollback by time window cannot leave them out) and
 * time going backwards.  Runs on the CLI's only thread; owns the line buffer
 * and the frame buffers.
 */
#include <ctype.h>
#include <errno.h>
#include <math.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>
#include <sys/stat.h>
#include <time.h>
#include <unistd.h>

#include "feed.h"

#define BATCH_MAX 1024 /* rows in one observe batch (rows with source, t or dt) */
#define MAXTSRC   1024 /* sources whose last t feed follows (for "time going backwards") */

/* One parsed transition row. */
struct rec {
    double x[MAXDIMS], xn[MAXDIMS];
    double r, t, dt; /* t, dt: NAN when absent */
    int terminal;
    char source[64]; /* "" when absent */
    size_t line;
    uint64_t pseq; /* 0 when not resumed */
};

/* CSV column indices of each field; NONE when absent. */
#define NONE ((size_t)-1)
struct cols {
    size_t x[MAXDIMS], xn[MAXDIMS];
    size_t r, terminal, source, t, dt, pseq;
    size_t ncols;
    char **names; /* header cells (owned) */
};

/* The transition path's frames and the last t of each source. */
struct tpath {
    /* Pending bulk frame: nbulk records of 2*dims+2 doubles, their lines and pseqs. */
    double *bulk;
    size_t *bulk_line, nbulk;
    uint64_t *bulk_pseq;
    /* Pending batch of rows with source, t or dt. */
    struct rec *batch;
    size_t nbatch;
    /* Last t per source, for counting time going backwards. */
    char (*tsrc)[64];
    double *tlast;
    size_t ntsrc, tcur;
};

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

/* ---- what both paths share (feed.h) --------------------------------------------------------- */

void feed_bar_clear(struct feed *fd)
{
    if (fd->drawn) {
        fputs("\r\033[K", stderr);
        fd->drawn = 0;
    }
}

static void fmt_eta(char *buf, size_t len, double s)
{
    if (!(s >= 0) || s > 359999)
        snprintf(buf, len, "--:--");
    else if (s >= 3600)
        snprintf(buf, len, "%d:%02d:%02d", (int)s / 3600, (int)s / 60 % 60, (int)s % 60);
    else
        snprintf(buf, len, "%d:%02d", (int)s / 60, (int)s % 60);
}

void feed_bar_draw(struct feed *fd, int force)
{
    if (!fd->tty)
        return;
    double t = now_s();
    if (!force && t - fd->last_draw < 0.1)
        return;
    fd->last_draw = t;
    double el = t - fd->t0;
    uint64_t rows = fd->rows;
    double rate = el > 0 ? rows / el : 0;
    if (fd->size > 0) {
        enum { W = 24 };
        double frac = (double)fd->bytes / (double)fd->size;
        if (frac > 1)
            frac = 1;
        char bar[W + 1], eta[32];
        for (int i = 0; i < W; i++)
            bar[i] = i < (int)(frac * W) ? '#' : '-';
        bar[W] = 0;
        fmt_eta(eta, sizeof eta, frac > 0 ? el * (1 - frac) / frac : -1);
        fprintf(stderr, "\r%s [%s] %3.0f%%  %llu rows  %.0f rows/s  ETA %s\033[K", fd->name, bar,
                frac * 100, (unsigned long long)rows, rate, eta);
    } else {
        fprintf(stderr, "\r%s: %llu rows  %.0f rows/s\033[K", fd->name, (unsigned long long)rows,
                rate);
    }
    if (fd->skipped)
        fprintf(stderr, "  %llu skipped", (unsigned long long)fd->skipped);
    fflush(stderr);
    fd->drawn = 1;
}

void feed_row_error(struct feed *fd, size_t line, const char *code, const char *fmt, ...)
{
    char text[700];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(text, sizeof text, fmt, ap);
    va_end(ap);
    feed_bar_clear(fd);
    fprintf(stderr, "%s:%zu: %s%s%s%s\n", fd->name, line, code ? code : "", code ? ": " : "", text,
            fd->skip ? " (row skipped)" : "");
    if (!fd->skip && !fd->err_line) {
        snprintf(fd->err_code, sizeof fd->err_code, "%s", code ? code : "bad_row");
        snprintf(fd->err_msg, sizeof fd->err_msg, "%s", text);
        fd->err_line = line;
    }
}

int feed_number(const struct feed *fd, const char *cell, double *out)
{
    if (!fd->dec_comma)
        return parse_double(cell, out);
    char buf[128];
    size_t n = strlen(cell);
    if (n >= sizeof buf || strchr(cell, '.'))
        return -1; /* "1.234,5": a thousands separator, or a point where a comma belongs */
    memcpy(buf, cell, n + 1);
    for (char *p = buf; *p; p++)
        if (*p == ',')
            *p = '.';
    return parse_double(buf, out);
}

void feed_ignore(struct feed *fd, const char *name)
{
    size_t n = strlen(fd->ignored);
    if (n + strlen(name) + 3 < sizeof fd->ignored)
        snprintf(fd->ignored + n, sizeof fd->ignored - n, "%s%s", n ? ", " : "", name);
    else if (n + 4 < sizeof fd->ignored && !strstr(fd->ignored, "..."))
        strcpy(fd->ignored + n, ", ...");
}

static double stat_num(const char *json, const char *key)
{
    cJSON *r = cJSON_Parse(json);
    const cJSON *v = cJSON_GetObjectItemCaseSensitive(r, key);
    double out = cJSON_IsNumber(v) ? v->valuedouble : NAN;
    cJSON_Delete(r);
    return out;
}

void feed_settle(struct feed *fd)
{
    /* Bounded: at most the connection's timeout (30 s by default), in 10 ms polls. */
    int ms = fd->cli->timeout_ms > 0 ? fd->cli->timeout_ms : 30000;
    for (int i = 0; i < ms / 10; i++) {
        const char *json;
        if (worth_stats(fd->cli->c, fd->model, &json) != 0)
            return;
        if (stat_num(json, "applied") >= (double)fd->seq)
            return;
        usleep(10000);
    }
}

/* ---- transitions -------------------------------------------------------------------------- */

/* Sends the first n rows of the pending frame (bulk or batch); the library's code. */
static int send_rows(struct feed *fd, struct tpath *tp, int bulk, size_t n)
{
    worth_client *c = fd->cli->c;
    int rc = 0;
    if (n == 0)
        return 0;
    worth_ingest_t in;
    memset(&in, 0, sizeof in);
    if (bulk) {
        /* One bulk per run of consecutive pseqs (header pseq N numbers the records N, N+1...). */
        size_t w = 2 * fd->dims + 2;
        for (size_t i = 0; i < n && rc == 0;) {
            size_t j = i + 1;
            while (j < n && tp->bulk_pseq[i] && tp->bulk_pseq[j] == tp->bulk_pseq[j - 1] + 1)
                j++;
            worth_ingest_t one;
            rc = worth_observe_bulk_pseq(c, fd->model, fd->dims, tp->bulk + i * w, j - i, NULL,
                                         tp->bulk_pseq[i], 0, &one);
            if (rc == 0) {
                in.skipped += one.skipped;
                in.seq = one.seq;
            }
            i = j;
        }
    } else {
        for (size_t i = 0; i < n && rc == 0; i++) {
            const struct rec *r = &tp->batch[i];
            worth_transition t = {r->x, r->r,  r->xn,  r->terminal, r->source[0] ? r->source : NULL,
                                  r->t, r->dt, r->pseq};
            rc = worth_observe_queue(c, fd->model, fd->dims, &t, NULL);
        }
        if (rc == 0)
            rc = worth_flush(c, NULL);
        if (rc == 0)
            worth_last_ingest(c, &in);
    }
    if (rc == 0) {
        fd->seq = in.seq;
        fd->logged += in.skipped;
    }
    return rc;
}

/* Drops row i of the pending frame. */
static void drop_row(struct feed *fd, struct tpath *tp, int bulk, size_t i)
{
    if (bulk) {
        size_t w = 2 * fd->dims + 2, m = tp->nbulk - i - 1;
        memmove(tp->bulk + i * w, tp->bulk + (i + 1) * w, m * w * sizeof(double));
        memmove(tp->bulk_line + i, tp->bulk_line + i + 1, m * sizeof(size_t));
        memmove(tp->bulk_pseq + i, tp->bulk_pseq + i + 1, m * sizeof(uint64_t));
        tp->nbulk--;
    } else {
        memmove(tp->batch + i, tp->batch + i + 1, (tp->nbatch - i - 1) * sizeof *tp->batch);
        tp->nbatch--;
    }
}

/*
 * Sends the pending frame.  Returns EXIT_OK, or the exit code after printing
 * the error (a row worthd rejected under stop: EXIT_SERVER, after sending the
 * rows before it).
 */
static int flush_frame(struct feed *fd, struct tpath *tp, int bulk)
{
    size_t *n = bulk ? &tp->nbulk : &tp->nbatch;
    while (*n > 0) {
        int rc = send_rows(fd, tp, bulk, *n);
        if (rc == 0) {
            fd->fed += *n;
            *n = 0;
            break;
        }
        const char *code = worth_error_name(fd->cli->c), *msg = worth_error_message(fd->cli->c);
        long idx = worth_error_index(fd->cli->c);
        int per_row = rc == WORTH_E_BAD_NUMBER || rc == WORTH_E_BAD_PARAM ||
                      rc == WORTH_E_BAD_DIMENSION || rc == WORTH_E_TOO_MANY_SOURCES ||
                      rc == WORTH_E_BAD_REQUEST;
        size_t first = bulk ? tp->bulk_line[0] : tp->batch[0].line;
        /* A bulk of several runs: the index counts from the run that failed; not mapped. */
        if (bulk && idx >= 0) {
            for (size_t i = 1; i < *n; i++)
                if (tp->bulk_pseq[i] != tp->bulk_pseq[i - 1] + 1 || !tp->bulk_pseq[i]) {
                    idx = -1;
                    break;
                }
        }
        if (idx < 0 || (size_t)idx >= *n || !per_row) {
            feed_bar_clear(fd);
            fprintf(stderr, "%s:%zu: a frame of %zu rows from this line was refused\n", fd->name,
                    first, *n);
            snprintf(fd->err_code, sizeof fd->err_code, "%s", code ? code : "?");
            snprintf(fd->err_msg, sizeof fd->err_msg, "%s", msg ? msg : "");
            fd->err_line = first;
            *n = 0; /* not fed; the stop message counts only what was */
            int ex = cli_fail(fd->cli, rc);
            if (rc == WORTH_E_TOO_LARGE && bulk)
                fprintf(stderr, "worth: hint: --frame N with N at most worthd's --max-batch\n");
            return ex;
        }
        size_t line = bulk ? tp->bulk_line[idx] : tp->batch[idx].line;
        int first_error = !fd->skip && !fd->err_line;
        feed_row_error(fd, line, NULL, "worthd refused the row: %s: %s", code ? code : "?",
                       msg ? msg : "");
        if (first_error && code) /* the summary names worthd's own code, not bad_row */
            snprintf(fd->err_code, sizeof fd->err_code, "%s", code);
        if (fd->skip) {
            drop_row(fd, tp, bulk, (size_t)idx);
            fd->skipped++;
            continue;
        }
        /* Stop: the rows before the bad one are fed, as for a malformed row. */
        if (idx > 0) {
            rc = send_rows(fd, tp, bulk, (size_t)idx);
            if (rc != 0)
                return cli_fail(fd->cli, rc);
            fd->fed += (size_t)idx;
        }
        *n = 0;
        return EXIT_SERVER;
    }
    return EXIT_OK;
}

static int flush_all(struct feed *fd, struct tpath *tp)
{
    int ex = flush_frame(fd, tp, 1);
    if (ex == EXIT_OK)
        ex = flush_frame(fd, tp, 0);
    return ex;
}

/* Counts rows whose t is before the previous t of their source, and rows without t. */
static void track_t(struct feed *fd, struct tpath *tp, const struct rec *r)
{
    if (isnan(r->t)) {
        fd->no_t++;
        return;
    }
    fd->has_t = 1;
    size_t i = tp->tcur;
    if (i >= tp->ntsrc || strcmp(tp->tsrc[i], r->source) != 0) {
        for (i = 0; i < tp->ntsrc && strcmp(tp->tsrc[i], r->source) != 0; i++)
            ;
        if (i == tp->ntsrc) {
            if (tp->ntsrc == MAXTSRC)
                return;
            snprintf(tp->tsrc[i], sizeof tp->tsrc[i], "%s", r->source);
            tp->tlast[i] = -INFINITY;
            tp->ntsrc++;
        }
        tp->tcur = i;
    }
    if (r->t < tp->tlast[i]) {
        if (!fd->backwards)
            fd->backwards_line = r->line;
        fd->backwards++;
    }
    tp->tlast[i] = r->t;
}

/* Queues one parsed row on the path it needs, sending the other path's frame first. */
static int add_row(struct feed *fd, struct tpath *tp, const struct rec *r)
{
    int batch = r->source[0] || !isnan(r->t) || !isnan(r->dt);
    int ex;
    track_t(fd, tp, r);
    if (batch) {
        if (tp->nbulk && (ex = flush_frame(fd, tp, 1)))
            return ex;
        tp->batch[tp->nbatch++] = *r;
        if (tp->nbatch == BATCH_MAX)
            return flush_frame(fd, tp, 0);
        return EXIT_OK;
    }
    if (tp->nbatch && (ex = flush_frame(fd, tp, 0)))
        return ex;
    double *p = tp->bulk + tp->nbulk * (2 * fd->dims + 2);
    memcpy(p, r->x, fd->dims * sizeof(double));
    p[fd->dims] = r->r;
    memcpy(p + fd->dims + 1, r->xn, fd->dims * sizeof(double));
    p[2 * fd->dims + 1] = r->terminal ? 1.0 : 0.0;
    tp->bulk_line[tp->nbulk] = r->line;
    tp->bulk_pseq[tp->nbulk++] = r->pseq;
    if (tp->nbulk == fd->frame)
        return flush_frame(fd, tp, 1);
    return EXIT_OK;
}

static size_t find_col(const struct cols *cs, const char *name)
{
    for (size_t i = 0; i < cs->ncols; i++)
        if (strcmp(cs->names[i], name) == 0)
            return i;
    return NONE;
}

/* The first of up to three names "<prefix><d>" present in the header. */
static size_t find_indexed(const struct cols *cs, const char *const *prefixes, size_t d)
{
    for (const char *const *p = prefixes; *p; p++) {
        char name[32];
        snprintf(name, sizeof name, "%s%zu", *p, d);
        size_t c = find_col(cs, name);
        if (c != NONE)
            return c;
    }
    return NONE;
}

/* Maps "COL,COL,..." (from flag) onto out[dims]; EXIT_OK or EXIT_USAGE. */
static int map_list(struct feed *fd, struct cols *cs, const char *flag, const char *list,
                    size_t *out)
{
    char *copy = strdup(list), **cells = NULL;
    size_t cap = 0;
    if (!copy)
        return cli_error(EXIT_USAGE, "out of memory");
    long n = csv_split(copy, &cells, &cap);
    int ex = EXIT_OK;
    if (n != (long)fd->dims) {
        ex = cli_usage("feed", "%s names %ld columns; model %s has %zu dims", flag, n, fd->model,
                       fd->dims);
    } else {
        for (long i = 0; i < n && ex == EXIT_OK; i++)
            if ((out[i] = find_col(cs, cells[i])) == NONE)
                ex = cli_error(EXIT_USAGE, "%s:1: the header has no column \"%s\" (from %s)",
                               fd->name, cells[i], flag);
    }
    free(cells);
    free(copy);
    return ex;
}

/* Copies the header cells into cs->names (control bytes shown as '?'). */
static int copy_header(struct cols *cs, char **cells, long nc)
{
    cs->ncols = (size_t)nc;
    cs->names = calloc((size_t)nc, sizeof *cs->names);
    if (!cs->names)
        return cli_error(EXIT_USAGE, "out of memory");
    for (long i = 0; i < nc; i++) {
        if (!(cs->names[i] = strdup(cells[i])))
            return cli_error(EXIT_USAGE, "out of memory");
        /* Names appear in messages: control bytes show as '?' (such a name matches nothing). */
        for (char *q = cs->names[i]; *q; q++)
            if ((unsigned char)*q < 0x20 || *q == 0x7f)
                *q = '?';
    }
    return EXIT_OK;
}

/* Resolves the transition columns from the header; EXIT_OK or EXIT_USAGE with a message. */
static int map_header(struct feed *fd, struct cols *cs, const struct feed_opts *fo)
{
    static const char *const px[] = {"x", "x_", NULL};
    static const char *const pxn[] = {"xn", "x_next", "x_next_", "xn_", NULL};
    int ex;
    if (fo->x) {
        if ((ex = map_list(fd, cs, "--x", fo->x, cs->x)))
            return ex;
    } else {
        for (size_t d = 0; d < fd->dims; d++)
            if ((cs->x[d] = find_indexed(cs, px, d)) == NONE)
                return cli_error(EXIT_USAGE,
                                 "%s:1: the header has no column x%zu (model %s has %zu dims: "
                                 "x0..x%zu, or name the columns with --x)",
                                 fd->name, d, fd->model, fd->dims, fd->dims - 1);
    }
    if (fo->xn) {
        if ((ex = map_list(fd, cs, "--x-next", fo->xn, cs->xn)))
            return ex;
    } else {
        for (size_t d = 0; d < fd->dims; d++)
            if ((cs->xn[d] = find_indexed(cs, pxn, d)) == NONE)
                return cli_error(EXIT_USAGE,
                                 "%s:1: the header has no column xn%zu (model %s has %zu dims: "
                                 "xn0..xn%zu, or name the columns with --x-next)",
                                 fd->name, d, fd->model, fd->dims, fd->dims - 1);
    }
    const char *rn = fo->r ? fo->r : "r";
    if ((cs->r = find_col(cs, rn)) == NONE)
        return cli_error(EXIT_USAGE, "%s:1: the header has no column \"%s\" (the reward%s)",
                         fd->name, rn, fo->r ? ", from --r" : "; name it with --r");
    if (fo->terminal) {
        if ((cs->terminal = find_col(cs, fo->terminal)) == NONE)
            return cli_error(EXIT_USAGE, "%s:1: the header has no column \"%s\" (from --terminal)",
                             fd->name, fo->terminal);
    } else {
        cs->terminal = find_col(cs, "terminal");
    }
    cs->source = find_col(cs, fo->source ? fo->source : "source");
    if (fo->source && cs->source == NONE)
        return cli_error(EXIT_USAGE, "%s:1: the header has no column \"%s\" (from --source)",
                         fd->name, fo->source);
    cs->t = find_col(cs, fo->time ? fo->time : "t");
    if (fo->time && cs->t == NONE)
        return cli_error(EXIT_USAGE, "%s:1: the header has no column \"%s\" (from --time)",
                         fd->name, fo->time);
    cs->dt = find_col(cs, "dt");
    cs->pseq = find_col(cs, "pseq");
    fd->has_t = cs->t != NONE;
    /* Every other column is not read: the summary lists them. */
    for (size_t i = 0; i < cs->ncols; i++) {
        int used = i == cs->r || i == cs->terminal || i == cs->source || i == cs->t ||
                   i == cs->dt || i == cs->pseq;
        for (size_t d = 0; d < fd->dims && !used; d++)
            used = i == cs->x[d] || i == cs->xn[d];
        if (!used)
            feed_ignore(fd, cs->names[i]);
    }
    return EXIT_OK;
}

/* A cell's problem as "column NAME: reason" into err. */
static int cell_number(const struct feed *fd, const struct cols *cs, char **cells, size_t c,
                       double *out, char *err, size_t errlen)
{
    char shown[48];
    if (feed_number(fd, cells[c], out) == 0)
        return 0;
    if (!cells[c][0])
        snprintf(err, errlen, "column %s: empty, a number is needed", cs->names[c]);
    else
        snprintf(err, errlen, "column %s: \"%s\" is not a finite number", cs->names[c],
                 show_cell(cells[c], shown, sizeof shown));
    return -1;
}

static int parse_bool(const char *s, int *out)
{
    if (!*s || strcmp(s, "0") == 0 || strcasecmp(s, "false") == 0)
        *out = 0;
    else if (strcmp(s, "1") == 0 || strcasecmp(s, "true") == 0)
        *out = 1;
    else
        return -1;
    return 0;
}

/* Parses one CSV row into r; 0, or -1 with the reason in err. */
static int csv_row(struct feed *fd, const struct cols *cs, char **cells, long nc, struct rec *r,
                   char *err, size_t errlen)
{
    if ((size_t)nc != cs->ncols) {
        if ((size_t)nc < cs->ncols)
            snprintf(err, errlen, "column %s: missing (the row has %ld cells, the header %zu)",
                     cs->names[nc], nc, cs->ncols);
        else
            snprintf(err, errlen, "the row has %ld cells, the header %zu", nc, cs->ncols);
        return -1;
    }
    r->terminal = 0;
    if (cs->terminal != NONE && parse_bool(cells[cs->terminal], &r->terminal) != 0) {
        char shown[48];
        snprintf(err, errlen, "column %s: \"%s\" is not 0, 1, true or false",
                 cs->names[cs->terminal], show_cell(cells[cs->terminal], shown, sizeof shown));
        return -1;
    }
    for (size_t d = 0; d < fd->dims; d++)
        if (cell_number(fd, cs, cells, cs->x[d], &r->x[d], err, errlen))
            return -1;
    if (cell_number(fd, cs, cells, cs->r, &r->r, err, errlen))
        return -1;
    for (size_t d = 0; d < fd->dims; d++) {
        /* A terminal row may leave x_next empty; the x values stand in (ignored by worthd). */
        if (r->terminal && !cells[cs->xn[d]][0])
            r->xn[d] = r->x[d];
        else if (cell_number(fd, cs, cells, cs->xn[d], &r->xn[d], err, errlen))
            return -1;
    }
    r->t = r->dt = NAN;
    r->source[0] = 0;
    if (cs->t != NONE && cells[cs->t][0] && cell_number(fd, cs, cells, cs->t, &r->t, err, errlen))
        return -1;
    if (cs->dt != NONE && cells[cs->dt][0]) {
        if (cell_number(fd, cs, cells, cs->dt, &r->dt, err, errlen))
            return -1;
        if (r->dt < 0) {
            snprintf(err, errlen, "column %s: %.40s is negative", cs->names[cs->dt], cells[cs->dt]);
            return -1;
        }
    }
    if (cs->source != NONE && cells[cs->source][0]) {
        if (strlen(cells[cs->source]) > 63) {
            snprintf(err, errlen, "column %s: longer than 63 bytes", cs->names[cs->source]);
            return -1;
        }
        strcpy(r->source, cells[cs->source]);
    }
    if (fd->resume && cs->pseq != NONE) {
        long long v;
        if (parse_int(cells[cs->pseq], 1, (1LL << 53) - 1, &v) != 0) {
            char shown[48];
            snprintf(err, errlen, "column %s: \"%s\" is not an integer 1..2^53-1",
                     cs->names[cs->pseq], show_cell(cells[cs->pseq], shown, sizeof shown));
            return -1;
        }
        r->pseq = (uint64_t)v;
    }
    return 0;
}

/* JSON lines ----------------------------------------------------------------------------------- */

static int json_vector(const cJSON *o, const char *key, size_t dims, double *out, char *err,
                       size_t errlen)
{
    const cJSON *a = cJSON_GetObjectItemCaseSensitive(o, key);
    if (!cJSON_IsArray(a)) {
        snprintf(err, errlen, "field %s: %s", key, a ? "not an array" : "missing");
        return -1;
    }
    int n = cJSON_GetArraySize(a);
    if (n != (int)dims) {
        snprintf(err, errlen, "field %s: has %d values, the model has %zu dims", key, n, dims);
        return -1;
    }
    size_t i = 0;
    const cJSON *e;
    cJSON_ArrayForEach(e, a)
    {
        if (!cJSON_IsNumber(e) || !isfinite(e->valuedouble)) {
            snprintf(err, errlen, "field %s: element %zu is not a finite number", key, i);
            return -1;
        }
        out[i++] = e->valuedouble;
    }
    return 0;
}

static int json_number(const cJSON *o, const char *key, int required, double *out, char *err,
                       size_t errlen)
{
    const cJSON *v = cJSON_GetObjectItemCaseSensitive(o, key);
    if (!v || cJSON_IsNull(v)) {
        if (!required)
            return 0;
        snprintf(err, errlen, "field %s: missing", key);
        return -1;
    }
    if (!cJSON_IsNumber(v) || !isfinite(v->valuedouble)) {
        snprintf(err, errlen, "field %s: not a finite number", key);
        return -1;
    }
    *out = v->valuedouble;
    return 0;
}

static int json_row(struct feed *fd, const char *line, size_t len, struct rec *r, char *err,
                    size_t errlen)
{
    const char *end = NULL;
    cJSON *o = cJSON_ParseWithLengthOpts(line, len, &end, 0);
    int rc = -1;
    if (!o) {
        snprintf(err, errlen, "not valid JSON");
        return -1;
    }
    for (const char *p = end; p && p < line + len; p++)
        if (!isspace((unsigned char)*p)) {
            snprintf(err, errlen, "text after the JSON object");
            goto out;
        }
    if (!cJSON_IsObject(o)) {
        snprintf(err, errlen, "not a JSON object");
        goto out;
    }
    r->terminal = 0;
    const cJSON *term = cJSON_GetObjectItemCaseSensitive(o, "terminal");
    if (term && !cJSON_IsNull(term)) {
        if (cJSON_IsBool(term))
            r->terminal = cJSON_IsTrue(term);
        else if (cJSON_IsNumber(term) && (term->valuedouble == 0 || term->valuedouble == 1))
            r->terminal = term->valuedouble == 1;
        else {
            snprintf(err, errlen, "field terminal: not true, false, 0 or 1");
            goto out;
        }
    }
    if (json_vector(o, "x", fd->dims, r->x, err, errlen))
        goto out;
    if (json_number(o, "r", 1, &r->r, err, errlen))
        goto out;
    const cJSON *xn = cJSON_GetObjectItemCaseSensitive(o, "x_next");
    if (r->terminal && (!xn || cJSON_IsNull(xn)))
        memcpy(r->xn, r->x, fd->dims * sizeof(double));
    else if (json_vector(o, "x_next", fd->dims, r->xn, err, errlen))
        goto out;
    r->t = r->dt = NAN;
    if (json_number(o, "t", 0, &r->t, err, errlen) || json_number(o, "dt", 0, &r->dt, err, errlen))
        goto out;
    if (!isnan(r->dt) && r->dt < 0) {
        snprintf(err, errlen, "field dt: negative");
        goto out;
    }
    r->source[0] = 0;
    const cJSON *src = cJSON_GetObjectItemCaseSensitive(o, "source");
    if (src && !cJSON_IsNull(src)) {
        if (!cJSON_IsString(src) || !src->valuestring[0] || strlen(src->valuestring) > 63) {
            snprintf(err, errlen, "field source: not a string of 1..63 bytes");
            goto out;
        }
        strcpy(r->source, src->valuestring);
    }
    const cJSON *ps = cJSON_GetObjectItemCaseSensitive(o, "pseq");
    if (fd->resume && ps && !cJSON_IsNull(ps)) {
        if (!cJSON_IsNumber(ps) || ps->valuedouble < 1 || ps->valuedouble > 9007199254740991.0 ||
            ps->valuedouble != floor(ps->valuedouble)) {
            snprintf(err, errlen, "field pseq: not an integer 1..2^53-1");
            goto out;
        }
        r->pseq = (uint64_t)ps->valuedouble;
    }
    rc = 0;
out:
    cJSON_Delete(o);
    return rc;
}

/*
 * The transition path: the rest of f after the first line (its CSV header
 * cells in hdr, or, for JSON lines, the first row itself in first).
 */
static int transitions_run(struct feed *fd, FILE *f, char **hdr, long nh, const char *first,
                           size_t first_len, const struct feed_opts *fo, size_t lineno)
{
    struct tpath tp;
    struct cols cs;
    memset(&tp, 0, sizeof tp);
    memset(&cs, 0, sizeof cs);
    char *line = NULL, **cells = NULL;
    size_t lcap = 0, ccap = 0;
    int json = fd->form == FORM_JSONL, ex = EXIT_OK;
    struct rec *r = malloc(sizeof *r);
    tp.bulk = malloc(fd->frame * (2 * fd->dims + 2) * sizeof(double));
    tp.bulk_line = malloc(fd->frame * sizeof(size_t));
    tp.bulk_pseq = malloc(fd->frame * sizeof(uint64_t));
    tp.batch = malloc(BATCH_MAX * sizeof *tp.batch);
    tp.tsrc = malloc(MAXTSRC * sizeof *tp.tsrc);
    tp.tlast = malloc(MAXTSRC * sizeof *tp.tlast);
    if (!r || !tp.bulk || !tp.bulk_line || !tp.bulk_pseq || !tp.batch || !tp.tsrc || !tp.tlast) {
        ex = cli_error(EXIT_USAGE, "out of memory");
        goto out;
    }
    if (!json) {
        if ((ex = copy_header(&cs, hdr, nh)) || (ex = map_header(fd, &cs, fo)))
            goto out;
    }
    /* The library must not send a batch by itself: the CLI maps errors to its own rows. */
    worth_set_batch_max(fd->cli->c, BATCH_MAX + 1);
    char err[512];
    errno = 0;
    for (int pass = 0;; pass++) {
        ssize_t len;
        const char *text;
        if (pass == 0 && first) {
            text = first; /* JSON lines: the first row was read to tell the form */
            len = (ssize_t)first_len;
        } else {
            if ((len = getline(&line, &lcap, f)) < 0)
                break;
            lineno++;
            fd->bytes += (size_t)len;
            text = line;
            if (strspn(line, " \t\r\n") == (size_t)len)
                continue;
            if (memchr(line, 0, (size_t)len)) {
                ex = cli_error(EXIT_USAGE, "%s:%zu: a NUL byte: not a text file", fd->name, lineno);
                goto out_stop;
            }
        }
        fd->rows++;
        int bad;
        memset(r, 0, offsetof(struct rec, line));
        r->pseq = 0;
        if (json) {
            bad = json_row(fd, text, (size_t)len, r, err, sizeof err);
        } else {
            long nc = csv_split_sep(line, fd->sep, &cells, &ccap);
            if (nc == -2) {
                ex = cli_error(EXIT_USAGE, "out of memory");
                goto out_stop;
            }
            if (nc < 0) {
                snprintf(err, sizeof err, "unterminated quote");
                bad = -1;
            } else {
                bad = csv_row(fd, &cs, cells, nc, r, err, sizeof err);
            }
        }
        if (bad) {
            feed_row_error(fd, lineno, NULL, "%s", err);
            if (!fd->skip) {
                ex = EXIT_USAGE;
                goto out_stop;
            }
            fd->skipped++;
            continue;
        }
        r->line = lineno;
        if (fd->resume && !r->pseq)
            r->pseq = lineno;
        if ((ex = add_row(fd, &tp, r)))
            goto out_stop;
        if ((lineno & 255) == 0)
            feed_bar_draw(fd, 0);
    }
    if (ferror(f)) {
        ex = cli_error(EXIT_USAGE, "%s: read error after line %zu: %s", fd->name, lineno,
                       strerror(errno));
        goto out_stop;
    }
    ex = flush_all(fd, &tp);
    goto out;
out_stop:
    /* Rows before the error are sent (stop means "up to here"), then the count is said. */
    if (ex != EXIT_CONNECT) {
        int ex2 = flush_all(fd, &tp);
        if (ex2 == EXIT_CONNECT)
            ex = ex2;
    }
out:
    if (cs.names)
        for (size_t i = 0; i < cs.ncols; i++)
            free(cs.names[i]);
    free(cs.names);
    free(tp.bulk);
    free(tp.bulk_line);
    free(tp.bulk_pseq);
    free(tp.batch);
    free(tp.tsrc);
    free(tp.tlast);
    free(r);
    free(cells);
    free(line);
    return ex;
}

/* The command ----------------------------------------------------------------------------------
 */

static int has_suffix(const char *s, const char *suf)
{
    size_t n = strlen(s), k = strlen(suf);
    return n >= k && strcasecmp(s + n - k, suf) == 0;
}

static const char *form_name(enum feed_form f)
{
    static const char *const n[] = {"auto", "transitions", "jsonl", "wide", "long"};
    return n[f];
}

/* Prints the end of a feed: the summary (stdout), warnings, or why it stopped (stderr). */
static void summary(struct feed *fd, int ex, double clipped)
{
    feed_bar_clear(fd);
    double el = now_s() - fd->t0;
    double rate = el > 0 ? fd->fed / el : 0;
    int samples = fd->form == FORM_WIDE || fd->form == FORM_LONG;
    if (fd->cli->json) {
        cJSON *o = cJSON_CreateObject();
        cJSON_AddBoolToObject(o, "ok", ex == EXIT_OK);
        cJSON_AddStringToObject(o, "model", fd->model);
        cJSON_AddStringToObject(o, "form", form_name(fd->form));
        struct {
            const char *k;
            uint64_t v;
            int show;
        } counts[] = {{"rows", fd->rows, 1},
                      {"fed", fd->fed, 1},
                      {"skipped", fd->skipped, 1},
                      {"logged", fd->logged, 1},
                      {"seq", fd->seq, 1},
                      {"paired", fd->paired, samples},
                      {"gaps", fd->gaps, samples},
                      {"bad_quality", fd->bad_quality, samples},
                      {"bad_samples", fd->bad_samples, fd->form == FORM_LONG},
                      {"no_t", fd->no_t, !samples},
                      {"backwards", fd->backwards, !samples}};
        for (size_t i = 0; i < sizeof counts / sizeof counts[0]; i++)
            if (counts[i].show)
                cJSON_AddNumberToObject(o, counts[i].k, (double)counts[i].v);
        if (!isnan(clipped))
            cJSON_AddNumberToObject(o, "clipped", clipped);
        cJSON *ign = cJSON_AddArrayToObject(o, "ignored_columns");
        char copy[sizeof fd->ignored];
        snprintf(copy, sizeof copy, "%s", fd->ignored);
        char *save = NULL;
        for (char *t = strtok_r(copy, ",", &save); t && ign; t = strtok_r(NULL, ",", &save)) {
            while (*t == ' ')
                t++;
            cJSON_AddItemToArray(ign, cJSON_CreateString(t));
        }
        cJSON_AddNumberToObject(o, "seconds", round(el * 1000) / 1000);
        if (ex && fd->err_line) {
            cJSON *e = cJSON_AddObjectToObject(o, "error");
            cJSON_AddStringToObject(e, "code", fd->err_code);
            cJSON_AddNumberToObject(e, "line", (double)fd->err_line);
            cJSON_AddStringToObject(e, "message", fd->err_msg);
        }
        char *text = cJSON_PrintUnformatted(o);
        if (text)
            puts(text);
        cJSON_free(text);
        cJSON_Delete(o);
    } else if (ex == EXIT_OK) {
        printf("fed %llu rows in %.2f s (%.0f rows/s), %llu skipped\n", (unsigned long long)fd->fed,
               el, rate, (unsigned long long)fd->skipped);
        if (samples)
            printf("samples: %llu transitions paired, %llu gaps (no transition across them), "
                   "%llu already logged\n",
                   (unsigned long long)fd->paired, (unsigned long long)fd->gaps,
                   (unsigned long long)fd->logged);
        else if (fd->logged)
            printf("%llu rows already logged (skipped by worthd)\n",
                   (unsigned long long)fd->logged);
        if (fd->bad_quality)
            printf("%llu rows flagged bad left out%s\n", (unsigned long long)fd->bad_quality,
                   fd->form == FORM_LONG ? " (their samples with them)" : "");
    }
    if (ex != EXIT_OK)
        fprintf(stderr, "worth: feed stopped: %llu rows fed before the error, %llu skipped\n",
                (unsigned long long)fd->fed, (unsigned long long)fd->skipped);
    /* What was not used, on stderr (so that stdout stays one summary). */
    if (!isnan(clipped) && clipped > 0)
        fprintf(stderr,
                "worth: warning: %.0f values were outside the model's declared ranges and "
                "clipped\n",
                clipped);
    if (fd->ignored[0])
        fprintf(stderr, "worth: warning: columns not read: %s\n", fd->ignored);
    if (!samples && fd->no_t && fd->has_t)
        fprintf(stderr,
                "worth: note: %llu rows carry no t: a rollback by time window (--exclude-time) "
                "cannot leave them out (--exclude-seq can)\n",
                (unsigned long long)fd->no_t);
    if (fd->backwards)
        fprintf(stderr, "worth: warning: t goes backwards %llu times (first at line %zu)\n",
                (unsigned long long)fd->backwards, fd->backwards_line);
    if (!samples && fd->logged)
        fprintf(stderr,
                "worth: note: %llu rows were skipped as already logged (their pseq, the row's "
                "line number, is at or below the last worthd logged for their source); if %s "
                "is not a resend, feed it with --no-resume\n",
                (unsigned long long)fd->logged, fd->name);
}

/* Tells the form of a CSV from its header; FORM_AUTO when it cannot (said). */
static enum feed_form tell_form(struct feed *fd, char **hdr, long nh, const struct feed_opts *fo)
{
    int has_tag = samples_has_column(hdr, nh, fo->tag_col, SAMPLE_TAG_NAMES) >= 0;
    int has_value = samples_has_column(hdr, nh, fo->value_col, SAMPLE_VALUE_NAMES) >= 0;
    if (has_tag && has_value)
        return FORM_LONG;
    int has_x = fo->x != NULL, has_xn = fo->xn != NULL;
    for (long i = 0; i < nh; i++) {
        has_x |= strcmp(hdr[i], "x0") == 0 || strcmp(hdr[i], "x_0") == 0;
        has_xn |= strcmp(hdr[i], "xn0") == 0 || strcmp(hdr[i], "x_next0") == 0 ||
                  strcmp(hdr[i], "x_next_0") == 0 || strcmp(hdr[i], "xn_0") == 0;
    }
    if ((has_x && has_xn) || fo->x || fo->xn)
        return FORM_TRANSITIONS; /* --x or --x-next alone: say what is missing */
    if (samples_has_column(hdr, nh, fo->time, SAMPLE_TIME_NAMES) >= 0)
        return FORM_WIDE;
    if (has_x)
        return FORM_TRANSITIONS; /* x0.. without xn0..: say what is missing */
    cli_error(EXIT_USAGE,
              "%s:1: cannot tell the file's form: no x0 and xn0 columns (transitions), no time "
              "column (a wide sample file), no tag and value columns (a long file); "
              "--format says it (see 'worth help feed')",
              fd->name);
    if (nh == 1 && strchr(hdr[0], ';'))
        fprintf(stderr, "worth: hint: the header holds ';': --delimiter ';'\n");
    return FORM_AUTO;
}

int cmd_feed(struct cli *cli, int argc, char **argv)
{
    char *pos[2];
    int np, resume_on = 0, resume_off = 0, dec_comma = 0;
    struct feed_opts fo;
    memset(&fo, 0, sizeof fo);
    const char *on_error = NULL, *frame_s = NULL, *format = NULL, *reward = NULL, *tfmt = NULL,
               *delim = NULL;
    const struct opt opts[] = {{"--x", &fo.x, NULL},
                               {"--x-next", &fo.xn, NULL},
                               {"--r", &fo.r, NULL},
                               {"--reward", &reward, NULL},
                               {"--terminal", &fo.terminal, NULL},
                               {"--time", &fo.time, NULL},
                               {"--source", &fo.source, NULL},
                               {"--quality", &fo.quality, NULL},
                               {"--good", &fo.good, NULL},
                               {"--bad", &fo.bad, NULL},
                               {"--map", &fo.map, NULL},
                               {"--tag-column", &fo.tag_col, NULL},
                               {"--value-column", &fo.value_col, NULL},
                               {"--ignore-tags", &fo.ignore_tags, NULL},
                               {"--time-format", &tfmt, NULL},
                               {"--delimiter", &delim, NULL},
                               {"--decimal-comma", NULL, &dec_comma},
                               {"--resume", NULL, &resume_on},
                               {"--no-resume", NULL, &resume_off},
                               {"--on-error", &on_error, NULL},
                               {"--frame", &frame_s, NULL},
                               {"--format", &format, NULL},
                               {0}};
    int ex = parse_args("feed", argc, argv, opts, pos, 2, 2, &np);
    if (ex)
        return ex;
    struct feed fd;
    memset(&fd, 0, sizeof fd);
    fd.cli = cli;
    fd.model = pos[0];
    fd.path = pos[1];
    fd.name = strcmp(fd.path, "-") == 0 ? "<stdin>" : fd.path;
    fd.frame = 4096;
    fd.sep = ',';
    fd.dec_comma = dec_comma;
    if (reward && fo.r && strcmp(reward, fo.r) != 0)
        return cli_usage("feed", "--reward and --r name the same column; give one");
    if (reward)
        fo.r = reward;
    if (resume_on && resume_off)
        return cli_usage("feed", "give --resume or --no-resume, not both");
    fd.resume = resume_off ? 0 : resume_on ? 1 : strcmp(fd.path, "-") != 0;
    if (on_error && strcmp(on_error, "skip") == 0)
        fd.skip = 1;
    else if (on_error && strcmp(on_error, "stop") != 0)
        return cli_usage("feed", "--on-error must be stop or skip, not \"%s\"", on_error);
    long long fr;
    if (frame_s) {
        if (parse_int(frame_s, 1, 65536, &fr) != 0)
            return cli_usage("feed", "--frame must be an integer 1..65536, not \"%s\"", frame_s);
        fd.frame = (size_t)fr;
    }
    if (tfmt) {
        static const char *const tf[] = {"auto", "iso", "s", "ms"};
        int k = -1;
        for (int i = 0; i < 4; i++)
            if (strcmp(tfmt, tf[i]) == 0)
                k = i;
        if (k < 0)
            return cli_usage("feed", "--time-format must be auto, iso, s or ms, not \"%s\"", tfmt);
        fo.tfmt = (enum feed_tfmt)k;
    }
    if (delim) {
        if (strcmp(delim, "tab") == 0 || strcmp(delim, "\\t") == 0)
            fd.sep = '\t';
        else if (strlen(delim) == 1 && delim[0] != '"' && delim[0] != '\n' && delim[0] != '\r')
            fd.sep = delim[0];
        else
            return cli_usage("feed", "--delimiter takes one character (',', ';', tab), not \"%s\"",
                             delim);
        if (fd.sep == '.' || (isdigit((unsigned char)fd.sep)) || fd.sep == '-')
            return cli_usage("feed", "--delimiter '%c' would split numbers", fd.sep);
    }
    if (fd.dec_comma && fd.sep == ',')
        return cli_usage("feed", "--decimal-comma needs another --delimiter than ',' (e.g. ';')");
    if (format) {
        static const struct {
            const char *name;
            enum feed_form form;
        } forms[] = {{"csv", FORM_TRANSITIONS},
                     {"transitions", FORM_TRANSITIONS},
                     {"jsonl", FORM_JSONL},
                     {"wide", FORM_WIDE},
                     {"long", FORM_LONG}};
        for (size_t i = 0; i < sizeof forms / sizeof forms[0]; i++)
            if (strcmp(format, forms[i].name) == 0)
                fd.form = forms[i].form;
        if (fd.form == FORM_AUTO)
            return cli_usage("feed", "--format must be csv, jsonl, wide or long, not \"%s\"",
                             format);
    } else if (has_suffix(fd.path, ".jsonl") || has_suffix(fd.path, ".json")) {
        fd.form = FORM_JSONL;
    }
    if (fd.form == FORM_JSONL && (fo.x || fo.xn || fo.r || fo.terminal))
        return cli_usage("feed", "--x, --x-next, --r and --terminal map CSV columns; this input "
                                 "is JSON lines");

    FILE *f = strcmp(fd.path, "-") == 0 ? stdin : fopen(fd.path, "r");
    if (!f)
        return cli_error(EXIT_USAGE, "%s: cannot open: %s", fd.path, strerror(errno));
    struct stat st;
    if (fstat(fileno(f), &st) == 0) {
        if (S_ISDIR(st.st_mode)) {
            if (f != stdin)
                fclose(f);
            return cli_error(EXIT_USAGE, "%s: is a directory", fd.path);
        }
        if (S_ISREG(st.st_mode))
            fd.size = (size_t)st.st_size;
    }
    char *line = NULL, **cells = NULL;
    size_t lcap = 0, ccap = 0, lineno = 0;
    ssize_t len = -1;
    double clipped0 = NAN, clipped = NAN;
    ex = EXIT_OK;
    if ((ex = cli_spec(cli, fd.model, &fd.ms, NULL)))
        goto out;
    fd.dims = fd.ms.dims;
    fd.tty = cli_tty();
    fd.t0 = now_s();
    const char *json_stats;
    if (worth_stats(cli->c, fd.model, &json_stats) == 0)
        clipped0 = stat_num(json_stats, "clipped");
    /* The first non-blank line: the header, or the first JSON row. */
    errno = 0;
    while ((len = getline(&line, &lcap, f)) >= 0) {
        lineno++;
        fd.bytes += (size_t)len;
        if (lineno == 1 && len >= 3 && memcmp(line, "\xEF\xBB\xBF", 3) == 0) {
            /* A UTF-8 byte-order mark (spreadsheet exports) is not part of the header. */
            memmove(line, line + 3, (size_t)len - 2);
            len -= 3;
        }
        if (strspn(line, " \t\r\n") != (size_t)len)
            break;
    }
    if (len < 0) {
        if (ferror(f))
            ex = cli_error(EXIT_USAGE, "%s: read error: %s", fd.name, strerror(errno));
        else if (fd.form == FORM_JSONL)
            ex = EXIT_OK; /* an empty JSON lines input feeds nothing */
        else
            ex = cli_error(EXIT_USAGE, "%s: empty input: no header row", fd.name);
        if (ex == EXIT_OK)
            summary(&fd, ex, NAN);
        goto out;
    }
    if (memchr(line, 0, (size_t)len)) {
        ex = cli_error(EXIT_USAGE, "%s:%zu: a NUL byte: not a text file", fd.name, lineno);
        goto out;
    }
    if (fd.form == FORM_AUTO && line[strspn(line, " \t\r\n")] == '{')
        fd.form = FORM_JSONL;
    if (fd.form == FORM_JSONL && (fo.x || fo.xn || fo.r || fo.terminal)) {
        ex = cli_usage(
            "feed", "--x, --x-next, --r and --terminal map CSV columns; %s is JSON lines", fd.name);
        goto out;
    }
    long nh = 0;
    if (fd.form != FORM_JSONL) {
        nh = csv_split_sep(line, fd.sep, &cells, &ccap);
        if (nh == -2) {
            ex = cli_error(EXIT_USAGE, "out of memory");
            goto out;
        }
        if (nh < 0) {
            ex = cli_error(EXIT_USAGE, "%s:%zu: header: unterminated quote", fd.name, lineno);
            goto out;
        }
        if (fd.form == FORM_AUTO && (fd.form = tell_form(&fd, cells, nh, &fo)) == FORM_AUTO) {
            ex = EXIT_USAGE;
            goto out;
        }
    }
    int samples = fd.form == FORM_WIDE || fd.form == FORM_LONG;
    if (samples && resume_off) {
        ex = cli_usage("feed", "--no-resume applies to transitions: worthd always skips a "
                               "sample at or before the last it logged for its source");
        goto out;
    }
    if (!samples && (fo.quality || fo.good || fo.bad || fo.map || fo.tag_col || fo.value_col ||
                     fo.ignore_tags || fo.tfmt)) {
        ex = cli_usage("feed",
                       "--quality, --good, --bad, --map, --tag-column, --value-column, "
                       "--ignore-tags and --time-format read sample files; %s is %s",
                       fd.name, fd.form == FORM_JSONL ? "JSON lines" : "a transition file");
        goto out;
    }
    if (samples && (fo.x || fo.xn)) {
        ex = cli_usage("feed",
                       "--x and --x-next map a transition file's columns; %s is a %s "
                       "sample file (--map COLUMN=DIM names its columns)",
                       fd.name, fd.form == FORM_WIDE ? "wide" : "long");
        goto out;
    }
    if (samples)
        ex = samples_run(&fd, f, cells, nh, &fo, lineno);
    else
        ex = transitions_run(&fd, f, cells, nh, fd.form == FORM_JSONL ? line : NULL, (size_t)len,
                             &fo, lineno);
    /* Clipped values are counted as the model learns: wait for it to learn the feed. */
    if (fd.fed && ex != EXIT_CONNECT && !isnan(clipped0)) {
        feed_settle(&fd);
        if (worth_stats(cli->c, fd.model, &json_stats) == 0)
            clipped = stat_num(json_stats, "clipped") - clipped0;
    }
    feed_bar_draw(&fd, 1);
    summary(&fd, ex, clipped);
out:
    free(cells);
    free(line);
    if (f != stdin)
        fclose(f);
    return ex;
}
