/*
 * feed_rows.c - the transition half of `worth feed`: a CSV of transitions
 * (x0.., r, xn0.., optional terminal, source, t, dt, pseq; or columns named
 * with --x, --x-next, --r, --terminal) or JSON lines of transitions.  Maps
 * the header, checks every cell, and sends the rows in file order: rows
 * without source, t or dt in observe.bulk frames, the others in observe
 * batches, each row with its producer sequence (resend-safe).  A row worthd
 * refuses is mapped back to its file line (feed.c's header comment has the
 * rules).  Runs on the CLI's only thread; owns the frame buffers.
 */
#include <ctype.h>
#include <errno.h>
#include <math.h>
#include <stddef.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

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
int transitions_run(struct feed *fd, FILE *f, char **hdr, long nh, const char *first,
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
            if ((len = feed_line(fd, f, &line, &lcap, &lineno)) == -1)
                break;
            if (len < 0) {
                ex = EXIT_USAGE;
                goto out_stop;
            }
            text = line;
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
