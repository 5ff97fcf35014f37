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

ssize_t feed_line(struct feed *fd, FILE *f, char **line, size_t *cap, size_t *lineno)
{
    ssize_t len;
    while ((len = getline(line, cap, f)) >= 0) {
        (*lineno)++;
        fd->bytes += (size_t)len;
        if (strspn(*line, " \t\r\n") == (size_t)len)
            continue;
        if (memchr(*line, 0, (size_t)len)) {
            cli_error(EXIT_USAGE, "%s:%zu: a NUL byte: not a text file", fd->name, *lineno);
            return -2;
        }
        return len;
    }
    return -1;
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
