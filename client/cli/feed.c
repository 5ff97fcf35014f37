/*
 * feed.c - `worth feed MODEL FILE|-`: streams transitions from a CSV file
 * (with a header row) or from JSON lines into a model.
 *
 * Reads the input one line at a time (constant memory whatever its size),
 * checks every cell before anything is sent, and sends the rows in order:
 * rows without source, t or dt go in observe.bulk frames (worth_observe_bulk,
 * --frame rows each), rows with them in observe batches (worth_observe_queue
 * and worth_flush); when a row needs the other path, the pending frame is
 * sent first, so the model learns the rows in file order.  A malformed row is
 * reported as FILE:LINE: column C: reason; --on-error skip counts it and goes
 * on, stop (the default) sends the rows before it and exits 2 saying how many
 * were fed.  worthd rejects a frame as a whole and names the bad record's
 * index; the CLI maps it back to the file line, and under skip drops that row
 * and sends the frame again.  A feed is therefore never partial and silent:
 * every row is fed, reported as skipped, or counted in the stop message.
 * Runs on the CLI's only thread; owns the line buffer and the frame buffers.
 */
#include <ctype.h>
#include <errno.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <time.h>

#include "cli.h"

#define MAXD      64   /* protocol v1: dims 1..64 */
#define BATCH_MAX 1024 /* rows in one observe batch (rows with source, t or dt) */

/* One parsed row. */
struct rec {
    double x[MAXD], xn[MAXD];
    double r, t, dt; /* t, dt: NAN when absent */
    int terminal;
    char source[64]; /* "" when absent */
    size_t line;
};

/* CSV column indices of each field; NONE when absent. */
#define NONE ((size_t)-1)
struct cols {
    size_t x[MAXD], xn[MAXD];
    size_t r, terminal, source, t, dt;
    size_t ncols;
    char **names; /* header cells (owned) */
};

struct feed {
    struct cli *cli;
    const char *model, *path, *name; /* name: path as shown in messages */
    size_t dims;
    int skip;     /* --on-error skip */
    size_t frame; /* rows per bulk frame */
    /* Pending bulk frame: nbulk records of 2*dims+2 doubles, and their lines. */
    double *bulk;
    size_t *bulk_line, nbulk;
    /* Pending batch of rows with source, t or dt. */
    struct rec *batch;
    size_t nbatch;
    uint64_t fed, skipped, seq;
    /* Progress. */
    int tty;
    size_t bytes, size; /* size 0: unknown (a pipe) */
    double t0, last_draw;
    int drawn;
};

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

/* Erases the progress bar before a message goes to stderr. */
static void bar_clear(struct feed *fd)
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

static void bar_draw(struct feed *fd, int force)
{
    if (!fd->tty)
        return;
    double t = now_s();
    if (!force && t - fd->last_draw < 0.1)
        return;
    fd->last_draw = t;
    double el = t - fd->t0;
    uint64_t rows = fd->fed + fd->nbulk + fd->nbatch;
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

/* A row-level message: "NAME:LINE: text"; under skip it says the row was skipped. */
static void row_msg(struct feed *fd, size_t line, const char *text)
{
    bar_clear(fd);
    fprintf(stderr, "%s:%zu: %s%s\n", fd->name, line, text, fd->skip ? " (row skipped)" : "");
}

/* The index worthd names in a rejection: "batch[N]: ..." or "record N ...". */
static long error_index(const char *msg)
{
    const char *p;
    if (!msg)
        return -1;
    if ((p = strstr(msg, "batch[")))
        p += 6;
    else if ((p = strstr(msg, "record ")))
        p += 7;
    else
        return -1;
    if (!isdigit((unsigned char)*p))
        return -1;
    return strtol(p, NULL, 10);
}

/* Sends the first n rows of the pending frame (bulk or batch); the library's code. */
static int send_rows(struct feed *fd, int bulk, size_t n)
{
    worth_client *c = fd->cli->c;
    uint64_t seq = 0;
    int rc;
    if (n == 0)
        return 0;
    if (bulk) {
        rc = worth_observe_bulk(c, fd->model, fd->dims, fd->bulk, n, 0, &seq);
    } else {
        rc = 0;
        for (size_t i = 0; i < n && rc == 0; i++) {
            const struct rec *r = &fd->batch[i];
            worth_transition t = {r->x, r->r,  r->xn, r->terminal, r->source[0] ? r->source : NULL,
                                  r->t, r->dt, 0};
            rc = worth_observe_queue(c, fd->model, fd->dims, &t, &seq);
        }
        if (rc == 0)
            rc = worth_flush(c, &seq);
    }
    if (rc == 0)
        fd->seq = seq;
    return rc;
}

/* Drops row i of the pending frame. */
static void drop_row(struct feed *fd, int bulk, size_t i)
{
    if (bulk) {
        size_t w = 2 * fd->dims + 2;
        memmove(fd->bulk + i * w, fd->bulk + (i + 1) * w, (fd->nbulk - i - 1) * w * sizeof(double));
        memmove(fd->bulk_line + i, fd->bulk_line + i + 1, (fd->nbulk - i - 1) * sizeof(size_t));
        fd->nbulk--;
    } else {
        memmove(fd->batch + i, fd->batch + i + 1, (fd->nbatch - i - 1) * sizeof *fd->batch);
        fd->nbatch--;
    }
}

/*
 * Sends the pending frame.  Returns EXIT_OK, or the exit code after printing
 * the error (a row worthd rejected under stop: EXIT_SERVER, after sending the
 * rows before it).
 */
static int flush_frame(struct feed *fd, int bulk)
{
    size_t *n = bulk ? &fd->nbulk : &fd->nbatch;
    while (*n > 0) {
        int rc = send_rows(fd, bulk, *n);
        if (rc == 0) {
            fd->fed += *n;
            *n = 0;
            break;
        }
        const char *code = worth_error_name(fd->cli->c), *msg = worth_error_message(fd->cli->c);
        long idx = error_index(msg);
        int per_row = rc == WORTH_E_BAD_NUMBER || rc == WORTH_E_BAD_PARAM ||
                      rc == WORTH_E_BAD_DIMENSION || rc == WORTH_E_TOO_MANY_SOURCES ||
                      rc == WORTH_E_BAD_REQUEST;
        size_t first = bulk ? fd->bulk_line[0] : fd->batch[0].line;
        if (idx < 0 || (size_t)idx >= *n || !per_row) {
            bar_clear(fd);
            fprintf(stderr, "%s:%zu: a frame of %zu rows from this line was refused\n", fd->name,
                    first, *n);
            *n = 0; /* not fed; the stop message counts only what was */
            int ex = cli_fail(fd->cli, rc);
            if (rc == WORTH_E_TOO_LARGE && bulk)
                fprintf(stderr, "worth: hint: --frame N with N at most worthd's --max-batch\n");
            return ex;
        }
        size_t line = bulk ? fd->bulk_line[idx] : fd->batch[idx].line;
        char text[700];
        snprintf(text, sizeof text, "worthd refused the row: %s: %s", code ? code : "?",
                 msg ? msg : "");
        row_msg(fd, line, text);
        if (fd->skip) {
            drop_row(fd, bulk, (size_t)idx);
            fd->skipped++;
            continue;
        }
        /* Stop: the rows before the bad one are fed, as for a malformed row. */
        if (idx > 0) {
            rc = send_rows(fd, bulk, (size_t)idx);
            if (rc != 0)
                return cli_fail(fd->cli, rc);
            fd->fed += (size_t)idx;
        }
        *n = 0;
        return EXIT_SERVER;
    }
    return EXIT_OK;
}

static int flush_all(struct feed *fd)
{
    int ex = flush_frame(fd, 1);
    if (ex == EXIT_OK)
        ex = flush_frame(fd, 0);
    return ex;
}

/* Queues one parsed row on the path it needs, sending the other path's frame first. */
static int add_row(struct feed *fd, const struct rec *r)
{
    int batch = r->source[0] || !isnan(r->t) || !isnan(r->dt);
    int ex;
    if (batch) {
        if (fd->nbulk && (ex = flush_frame(fd, 1)))
            return ex;
        fd->batch[fd->nbatch++] = *r;
        if (fd->nbatch == BATCH_MAX)
            return flush_frame(fd, 0);
        return EXIT_OK;
    }
    if (fd->nbatch && (ex = flush_frame(fd, 0)))
        return ex;
    double *p = fd->bulk + fd->nbulk * (2 * fd->dims + 2);
    memcpy(p, r->x, fd->dims * sizeof(double));
    p[fd->dims] = r->r;
    memcpy(p + fd->dims + 1, r->xn, fd->dims * sizeof(double));
    p[2 * fd->dims + 1] = r->terminal ? 1.0 : 0.0;
    fd->bulk_line[fd->nbulk++] = r->line;
    if (fd->nbulk == fd->frame)
        return flush_frame(fd, 1);
    return EXIT_OK;
}

/* CSV ---------------------------------------------------------------------------------------- */

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

struct feed_opts {
    const char *x, *xn, *r, *terminal;
};

/* Resolves the columns from the header cells; EXIT_OK or EXIT_USAGE with a message. */
static int map_header(struct feed *fd, struct cols *cs, char **cells, long nc,
                      const struct feed_opts *fo)
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
    cs->source = find_col(cs, "source");
    cs->t = find_col(cs, "t");
    cs->dt = find_col(cs, "dt");
    return EXIT_OK;
}

/* A cell's problem as "column NAME: reason" into err. */
static int cell_number(const struct cols *cs, char **cells, size_t c, double *out, char *err,
                       size_t errlen)
{
    char shown[48];
    if (parse_double(cells[c], out) == 0)
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
        if (cell_number(cs, cells, cs->x[d], &r->x[d], err, errlen))
            return -1;
    if (cell_number(cs, cells, cs->r, &r->r, err, errlen))
        return -1;
    for (size_t d = 0; d < fd->dims; d++) {
        /* A terminal row may leave x_next empty; the x values stand in (ignored by worthd). */
        if (r->terminal && !cells[cs->xn[d]][0])
            r->xn[d] = r->x[d];
        else if (cell_number(cs, cells, cs->xn[d], &r->xn[d], err, errlen))
            return -1;
    }
    r->t = r->dt = NAN;
    r->source[0] = 0;
    if (cs->t != NONE && cells[cs->t][0] && cell_number(cs, cells, cs->t, &r->t, err, errlen))
        return -1;
    if (cs->dt != NONE && cells[cs->dt][0]) {
        if (cell_number(cs, cells, cs->dt, &r->dt, err, errlen))
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
    rc = 0;
out:
    cJSON_Delete(o);
    return rc;
}

/* The command -----------------------------------------------------------------------------------
 */

static int has_suffix(const char *s, const char *suf)
{
    size_t n = strlen(s), k = strlen(suf);
    return n >= k && strcasecmp(s + n - k, suf) == 0;
}

/* Prints the end of a feed: the summary (stdout) or why it stopped (stderr). */
static void summary(struct feed *fd, int ex)
{
    bar_clear(fd);
    double el = now_s() - fd->t0;
    double rate = el > 0 ? fd->fed / el : 0;
    if (fd->cli->json) {
        printf("{\"ok\":%s,\"model\":\"%s\",\"fed\":%llu,\"skipped\":%llu,\"seq\":%llu,"
               "\"seconds\":%.3f}\n",
               ex ? "false" : "true", fd->model, (unsigned long long)fd->fed,
               (unsigned long long)fd->skipped, (unsigned long long)fd->seq, el);
    } else if (ex == EXIT_OK) {
        printf("fed %llu rows in %.2f s (%.0f rows/s), %llu skipped\n", (unsigned long long)fd->fed,
               el, rate, (unsigned long long)fd->skipped);
    }
    if (ex != EXIT_OK)
        fprintf(stderr, "worth: feed stopped: %llu rows fed before the error, %llu skipped\n",
                (unsigned long long)fd->fed, (unsigned long long)fd->skipped);
}

int cmd_feed(struct cli *cli, int argc, char **argv)
{
    char *pos[2];
    int np;
    struct feed_opts fo = {0};
    const char *on_error = NULL, *frame_s = NULL, *format = NULL;
    const struct opt opts[] = {{"--x", &fo.x, NULL},
                               {"--x-next", &fo.xn, NULL},
                               {"--r", &fo.r, NULL},
                               {"--terminal", &fo.terminal, NULL},
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
    int json = -1; /* -1: decide from the first non-blank character */
    if (format) {
        if (strcmp(format, "csv") == 0)
            json = 0;
        else if (strcmp(format, "jsonl") == 0)
            json = 1;
        else
            return cli_usage("feed", "--format must be csv or jsonl, not \"%s\"", format);
    } else if (has_suffix(fd.path, ".jsonl") || has_suffix(fd.path, ".json")) {
        json = 1;
    }
    if (json == 1 && (fo.x || fo.xn || fo.r || fo.terminal))
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
    struct cols cs;
    memset(&cs, 0, sizeof cs);
    struct rec *r = malloc(sizeof *r);
    int have_header = 0;
    ex = EXIT_OK;
    if (!r) {
        ex = cli_error(EXIT_USAGE, "out of memory");
        goto out;
    }
    if ((ex = cli_model(cli, fd.model, &fd.dims, NULL)))
        goto out;
    fd.bulk = malloc(fd.frame * (2 * fd.dims + 2) * sizeof(double));
    fd.bulk_line = malloc(fd.frame * sizeof(size_t));
    fd.batch = malloc(BATCH_MAX * sizeof *fd.batch);
    if (!fd.bulk || !fd.bulk_line || !fd.batch) {
        ex = cli_error(EXIT_USAGE, "out of memory");
        goto out;
    }
    /* The library must not send a batch by itself: the CLI maps errors to its own rows. */
    worth_set_batch_max(cli->c, BATCH_MAX + 1);
    fd.tty = cli_tty();
    fd.t0 = now_s();
    ssize_t len;
    char err[512];
    errno = 0;
    while ((len = getline(&line, &lcap, f)) >= 0) {
        lineno++;
        fd.bytes += (size_t)len;
        if (lineno == 1 && len >= 3 && memcmp(line, "\xEF\xBB\xBF", 3) == 0) {
            /* A UTF-8 byte-order mark (spreadsheet exports) is not part of the header. */
            memmove(line, line + 3, (size_t)len - 2);
            len -= 3;
        }
        size_t lead = strspn(line, " \t\r\n");
        if (lead == (size_t)len)
            continue;
        if (json < 0)
            json = line[lead] == '{';
        if (json && (fo.x || fo.xn || fo.r || fo.terminal)) {
            ex = cli_usage("feed",
                           "--x, --x-next, --r and --terminal map CSV columns; %s is "
                           "JSON lines",
                           fd.name);
            goto out;
        }
        if (memchr(line, 0, (size_t)len)) {
            ex = cli_error(EXIT_USAGE, "%s:%zu: a NUL byte: not a text file", fd.name, lineno);
            goto out_stop;
        }
        int bad;
        if (json) {
            bad = json_row(&fd, line, (size_t)len, r, err, sizeof err);
        } else {
            long nc = csv_split(line, &cells, &ccap);
            if (nc == -2) {
                ex = cli_error(EXIT_USAGE, "out of memory");
                goto out_stop;
            }
            if (!have_header) {
                if (nc < 0) {
                    ex = cli_error(EXIT_USAGE, "%s:%zu: header: unterminated quote", fd.name,
                                   lineno);
                    goto out;
                }
                have_header = 1;
                if ((ex = map_header(&fd, &cs, cells, nc, &fo)))
                    goto out;
                continue;
            }
            if (nc < 0) {
                snprintf(err, sizeof err, "unterminated quote");
                bad = -1;
            } else {
                bad = csv_row(&fd, &cs, cells, nc, r, err, sizeof err);
            }
        }
        if (bad) {
            row_msg(&fd, lineno, err);
            if (!fd.skip) {
                ex = EXIT_USAGE;
                goto out_stop;
            }
            fd.skipped++;
            continue;
        }
        r->line = lineno;
        if ((ex = add_row(&fd, r)))
            goto out_stop;
        if ((lineno & 255) == 0)
            bar_draw(&fd, 0);
    }
    if (ferror(f)) {
        ex = cli_error(EXIT_USAGE, "%s: read error after line %zu: %s", fd.name, lineno,
                       strerror(errno));
        goto out_stop;
    }
    if (json <= 0 && !have_header) {
        ex = cli_error(EXIT_USAGE, "%s: empty input: no header row", fd.name);
        goto out;
    }
    ex = flush_all(&fd);
    bar_draw(&fd, 1);
    summary(&fd, ex);
    goto out;
out_stop:
    /* Rows before the error are sent (stop means "up to here"), then the count is said. */
    if (ex != EXIT_CONNECT) {
        int ex2 = flush_all(&fd);
        if (ex2 == EXIT_CONNECT)
            ex = ex2;
    }
    summary(&fd, ex);
out:
    if (cs.names)
        for (size_t i = 0; i < cs.ncols; i++)
            free(cs.names[i]);
    free(cs.names);
    free(fd.bulk);
    free(fd.bulk_line);
    free(fd.batch);
    free(r);
    free(cells);
    free(line);
    if (f != stdin)
        fclose(f);
    return ex;
}
