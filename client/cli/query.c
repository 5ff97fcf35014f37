/*
 * query.c - the commands of `worth` that ask a model what it knows: value
 * (of one state, or of every state of a CSV file), stats (counters,
 * per-estimator figures and realised returns) and events (the recorded
 * history of a model or of the daemon).
 *
 * Arguments are checked before connecting; answers are printed as aligned
 * tables, or with --json as worthd's reply lines unchanged.  A states file is
 * read whole and checked cell by cell before the first request, then valued
 * in requests of at most 4096 states.  Replies are parsed defensively: a
 * missing field prints as "-".  Runs on the CLI's only thread; owns the
 * states of one value --file while it runs.
 */
#include <errno.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "cli.h"

/*
 * The dimension a states file's header cell names: the dimension's name,
 * optionally followed by its unit in brackets ("level [m]", "level (m)"), or
 * x<d> / x_<d>.  -1 for none.
 */
static long header_dim(const struct mspec *ms, const char *cell)
{
    for (size_t d = 0; d < ms->dims; d++) {
        char a[32], b[32];
        snprintf(a, sizeof a, "x%zu", d);
        snprintf(b, sizeof b, "x_%zu", d);
        if (strcmp(cell, a) == 0 || strcmp(cell, b) == 0)
            return (long)d;
        size_t n = strlen(ms->name[d]);
        if (ms->named && strncmp(cell, ms->name[d], n) == 0 &&
            (!cell[n] || (cell[n] == ' ' && (cell[n + 1] == '[' || cell[n + 1] == '('))))
            return (long)d;
    }
    return -1;
}

/* Values of the states of a CSV file (a header naming the dimensions, or positional columns). */
static int value_file(struct cli *cli, const char *model, const char *path, const struct mspec *ms,
                      const char *estimator)
{
    size_t dims = ms->dims;
    FILE *f = strcmp(path, "-") == 0 ? stdin : fopen(path, "r");
    if (!f)
        return cli_error(EXIT_USAGE, "%s: cannot open: %s", path, strerror(errno));
    char *line = NULL, **cells = NULL;
    size_t lcap = 0, ccap = 0, n = 0, cap = 0, lineno = 0;
    size_t col[64];
    int have_cols = 0, ex = EXIT_OK;
    double *xs = NULL;
    ssize_t len;
    while ((len = getline(&line, &lcap, f)) >= 0) {
        lineno++;
        if (strspn(line, " \t\r\n") == (size_t)len)
            continue;
        long nc = csv_split(line, &cells, &ccap);
        if (nc < 0) {
            ex = cli_error(EXIT_USAGE, "%s:%zu: %s", path, lineno,
                           nc == -1 ? "unterminated quote" : "out of memory");
            goto out;
        }
        if (!have_cols) {
            have_cols = 1;
            double tmp;
            if (parse_double(cells[0], &tmp) != 0) {
                /* A header: the dimensions' names (or x0..), else the first D columns. */
                size_t found = 0;
                for (size_t d = 0; d < dims; d++)
                    col[d] = (size_t)-1;
                for (long k = 0; k < nc; k++) {
                    long d = header_dim(ms, cells[k]);
                    if (d >= 0 && col[d] == (size_t)-1) {
                        col[d] = (size_t)k;
                        found++;
                    }
                }
                if (found == 0) {
                    for (size_t j = 0; j < dims; j++)
                        col[j] = j;
                } else if (found < dims) {
                    for (size_t d = 0; d < dims; d++)
                        if (col[d] == (size_t)-1) {
                            char names[512];
                            mspec_names(ms, names, sizeof names);
                            ex =
                                cli_error(EXIT_USAGE, "%s:%zu: no column %s (the model's dims: %s)",
                                          path, lineno, ms->name[d], names);
                            goto out;
                        }
                }
                continue;
            }
            for (size_t j = 0; j < dims; j++)
                col[j] = j;
        }
        if (n == cap) {
            cap = cap ? 2 * cap : 256;
            double *g = realloc(xs, cap * dims * sizeof *g);
            if (!g) {
                ex = cli_error(EXIT_USAGE, "out of memory");
                goto out;
            }
            xs = g;
        }
        for (size_t d = 0; d < dims; d++) {
            if (col[d] >= (size_t)nc) {
                ex = cli_error(EXIT_USAGE, "%s:%zu: column %zu: missing (the model has %zu dims)",
                               path, lineno, col[d] + 1, dims);
                goto out;
            }
            if (parse_double(cells[col[d]], &xs[n * dims + d]) != 0) {
                char shown[48];
                ex =
                    cli_error(EXIT_USAGE, "%s:%zu: column %zu: \"%s\" is not a finite number", path,
                              lineno, col[d] + 1, show_cell(cells[col[d]], shown, sizeof shown));
                goto out;
            }
        }
        n++;
    }
    if (ferror(f)) {
        ex = cli_error(EXIT_USAGE, "%s: read error: %s", path, strerror(errno));
        goto out;
    }
    if (n == 0) {
        ex = cli_error(EXIT_USAGE, "%s: no states", path);
        goto out;
    }
    /* At most CHUNK states a request keeps the line far below worthd's --max-line. */
    enum { CHUNK = 4096 };
    struct table *t = cli->json ? NULL : table_new(dims + 1);
    if (!cli->json && !t) {
        ex = cli_error(EXIT_USAGE, "out of memory");
        goto out;
    }
    if (t) {
        const char *hdr[65];
        static char names[65][100];
        for (size_t d = 0; d < dims; d++) {
            if (ms->named)
                mspec_label(ms, d, names[d], sizeof names[d]);
            else
                snprintf(names[d], sizeof names[d], "x%zu", d);
            hdr[d] = names[d];
        }
        mspec_vlabel(ms, estimator ? estimator : "VALUE", names[dims], sizeof names[dims]);
        hdr[dims] = names[dims];
        table_row(t, hdr);
    }
    double *vals = malloc((n < CHUNK ? n : CHUNK) * sizeof *vals);
    if (!vals) {
        table_free(t);
        ex = cli_error(EXIT_USAGE, "out of memory");
        goto out;
    }
    for (size_t i = 0; i < n && ex == EXIT_OK; i += CHUNK) {
        size_t k = n - i < CHUNK ? n - i : CHUNK;
        if (cli->json) {
            cJSON *r = cli_request("value", model);
            cJSON *arr = cJSON_AddArrayToObject(r, "xs");
            for (size_t j = 0; arr && j < k; j++) {
                cJSON *v = cJSON_CreateDoubleArray(xs + (i + j) * dims, (int)dims);
                if (!v || !cJSON_AddItemToArray(arr, v)) {
                    cJSON_Delete(v);
                    arr = NULL;
                }
            }
            if (estimator)
                cJSON_AddStringToObject(r, "estimator", estimator);
            if (!arr) {
                cJSON_Delete(r);
                r = NULL;
            }
            ex = cli_raw(cli, r);
            continue;
        }
        if ((ex = cli_connect(cli)))
            break;
        uint64_t seq;
        int rc = worth_values(cli->c, model, xs + i * dims, k, dims, estimator, vals, &seq);
        if (rc) {
            ex = cli_fail(cli, rc);
            break;
        }
        for (size_t j = 0; j < k; j++) {
            char cellbuf[65][32];
            const char *row[65];
            for (size_t d = 0; d < dims; d++) {
                fmt_num(cellbuf[d], sizeof cellbuf[d], xs[(i + j) * dims + d]);
                row[d] = cellbuf[d];
            }
            fmt_num(cellbuf[dims], sizeof cellbuf[dims], vals[j]);
            row[dims] = cellbuf[dims];
            table_row(t, row);
        }
    }
    if (t && ex == EXIT_OK)
        table_print(t, stdout);
    table_free(t);
    free(vals);
out:
    free(xs);
    free(cells);
    free(line);
    if (f != stdin)
        fclose(f);
    return ex;
}

/* Writes "lo .. hi" of a [lo, hi] pair, or "-". */
static void fmt_interval(char *buf, size_t len, const cJSON *iv)
{
    char a[32], b[32];
    if (!cJSON_IsArray(iv) || cJSON_GetArraySize(iv) != 2) {
        snprintf(buf, len, "-");
        return;
    }
    fmt_json(a, sizeof a, cJSON_GetArrayItem(iv, 0));
    fmt_json(b, sizeof b, cJSON_GetArrayItem(iv, 1));
    snprintf(buf, len, "%s .. %s", a, b);
}

/* One estimator's row: name (with * for the headline), value, sd, interval, health. */
static void value_row(struct table *t, const char *name, int head, const cJSON *v, const cJSON *h)
{
    char n[72], a[32], b[32], c[72];
    snprintf(n, sizeof n, "%.63s%s", name, head ? " *" : "");
    fmt_json(a, sizeof a, v);
    if (!cJSON_IsNumber(v))
        snprintf(a, sizeof a, "-");
    const cJSON *sd = json_get(h, "sd");
    if (cJSON_IsNumber(sd))
        fmt_json(b, sizeof b, sd);
    else
        snprintf(b, sizeof b, "-");
    fmt_interval(c, sizeof c, json_get(h, "interval95"));
    const cJSON *st = json_get(h, "state");
    table_rowv(t, n, a, b, c, cJSON_IsString(st) ? st->valuestring : "?");
}

/*
 * The value reply on a terminal: every estimator's value, its own sd, its 95%
 * interval and its health, the headline marked *, then why the headline is
 * the one, the reasons of the estimators that are not ok, and the spread.
 */
static void print_value(const cJSON *r, const struct mspec *ms, const char *estimator)
{
    struct table *t = table_new(5);
    if (!t)
        return;
    char hv[64], hs[64], hi[64];
    mspec_vlabel(ms, "VALUE", hv, sizeof hv);
    mspec_vlabel(ms, "SD", hs, sizeof hs);
    mspec_vlabel(ms, "95% INTERVAL", hi, sizeof hi);
    table_rowv(t, "ESTIMATOR", hv, hs, hi, "HEALTH");
    const cJSON *ests = json_get(r, "estimators"), *health = json_get(r, "health"), *e;
    const cJSON *pr = json_get(r, "primary");
    const cJSON *pn = json_get(pr, "name");
    if (estimator) /* the reply carries that estimator's figures at its top */
        value_row(t, estimator, 0, json_get(r, "value"), r);
    cJSON_ArrayForEach(e, ests)
    {
        int head = cJSON_IsString(pn) && strcmp(pn->valuestring, e->string) == 0;
        value_row(t, e->string, head, e, json_get(health, e->string));
    }
    table_print(t, stdout);
    table_free(t);
    const cJSON *why = json_get(pr, "reason");
    if (cJSON_IsString(pn))
        printf("* headline: %s; %s\n", pn->valuestring,
               cJSON_IsString(why) ? why->valuestring : "");
    const cJSON *w = json_get(r, "why");
    if (estimator && cJSON_IsString(w))
        printf("%s: %s\n", estimator, w->valuestring);
    cJSON_ArrayForEach(e, health)
    {
        const cJSON *ew = json_get(e, "why");
        if (cJSON_IsString(ew))
            printf("%s: %s\n", e->string, ew->valuestring);
    }
    const cJSON *sp = json_get(r, "spread");
    if (sp) {
        char a[32];
        fmt_json(a, sizeof a, sp);
        printf("spread: %s%s%s (largest minus smallest value of the estimators that answer)\n", a,
               ms->reward_unit[0] ? " " : "", ms->reward_unit);
    }
    const cJSON *seq = json_get(r, "seq");
    printf("(seq %.0f)\n", cJSON_IsNumber(seq) ? seq->valuedouble : 0.0);
}

int cmd_value(struct cli *cli, int argc, char **argv)
{
    char *pos[66];
    int np;
    const char *file = NULL, *estimator = NULL;
    const struct opt opts[] = {{"--file", &file, NULL}, {"--estimator", &estimator, NULL}, {0}};
    int ex = parse_args("value", argc, argv, opts, pos, 66, 1, &np);
    if (ex)
        return ex;
    const char *model = pos[0];
    if (file && np > 1)
        return cli_usage("value", "give the state either as values or with --file, not both");
    if (!file && np < 2)
        return cli_usage("value", "missing the state (X1 X2 ..., NAME=X ... or --file STATES.csv)");
    /* The state: D numbers in order, or NAME=X for every dimension (checked before connecting). */
    double v[64];
    int named = 0;
    for (int i = 1; i < np; i++) {
        const char *eq = strchr(pos[i], '=');
        if (i == 1)
            named = eq != NULL;
        else if (named != (eq != NULL))
            return cli_usage("value", "give the state as X1 X2 ... or as NAME=X ..., not both");
        const char *num = eq ? eq + 1 : pos[i];
        if (eq && eq == pos[i])
            return cli_usage("value", "\"%s\": a dimension's name must come before '='", pos[i]);
        if (parse_double(num, &v[i - 1]) != 0)
            return eq ? cli_usage("value", "%.*s: \"%s\" is not a finite number",
                                  (int)(eq - pos[i]), pos[i], num)
                      : cli_usage("value", "X%d \"%s\" is not a finite number", i, pos[i]);
    }
    struct mspec ms;
    if ((ex = cli_spec(cli, model, &ms, NULL)))
        return ex;
    size_t dims = ms.dims;
    if (file)
        return value_file(cli, model, file, &ms, estimator);
    double x[64];
    if (named) {
        int seen[64] = {0};
        for (int i = 1; i < np; i++) {
            char name[64];
            snprintf(name, sizeof name, "%.*s", (int)(strchr(pos[i], '=') - pos[i]), pos[i]);
            long d = -1;
            for (size_t k = 0; k < dims; k++)
                if (strcmp(ms.name[k], name) == 0)
                    d = (long)k;
            char names[512];
            mspec_names(&ms, names, sizeof names);
            if (d < 0)
                return cli_usage("value", "model %s has no dimension \"%s\" (its dims: %s)", model,
                                 name, names);
            if (seen[d]++)
                return cli_usage("value", "%s is given twice", name);
            x[d] = v[i - 1];
        }
        for (size_t k = 0; k < dims; k++)
            if (!seen[k])
                return cli_usage("value", "missing %s=X (model %s has %zu dims: all are needed)",
                                 ms.name[k], model, dims);
    } else {
        if ((size_t)(np - 1) != dims)
            return cli_usage("value", "model %s has %zu dims, got %d values", model, dims, np - 1);
        memcpy(x, v, dims * sizeof *x);
    }
    if (cli->json) {
        cJSON *r = cli_request("value", model);
        cJSON *a = cJSON_CreateDoubleArray(x, (int)dims);
        if (!a || !cJSON_AddItemToObject(r, "x", a)) {
            cJSON_Delete(a);
            cJSON_Delete(r);
            r = NULL;
        }
        if (r && estimator)
            cJSON_AddStringToObject(r, "estimator", estimator);
        return cli_raw(cli, r);
    }
    cJSON *req = cli_request("value", model);
    cJSON *xa = req ? cJSON_CreateDoubleArray(x, (int)dims) : NULL;
    if (!xa || !cJSON_AddItemToObject(req, "x", xa) ||
        (estimator && !cJSON_AddStringToObject(req, "estimator", estimator))) {
        cJSON_Delete(xa);
        cJSON_Delete(req);
        return cli_error(EXIT_USAGE, "out of memory");
    }
    char *text = cJSON_PrintUnformatted(req);
    cJSON_Delete(req);
    const char *line = NULL;
    if (!text)
        return cli_error(EXIT_USAGE, "out of memory");
    int rc = worth_request(cli->c, text, &line);
    free(text);
    if (rc)
        return cli_fail(cli, rc);
    cJSON *r = cJSON_Parse(line);
    if (!r)
        return cli_error(EXIT_USAGE, "worthd's value reply is not JSON");
    if (ms.named) {
        /* The state as read: "level = 4.2 m, demand = 180 m3/h". */
        fputs("state:", stdout);
        for (size_t k = 0; k < dims; k++) {
            char num[32];
            fmt_num(num, sizeof num, x[k]);
            printf("%s %s = %s%s%s", k ? "," : "", ms.name[k], num, ms.unit[k][0] ? " " : "",
                   ms.unit[k]);
        }
        fputc('\n', stdout);
    }
    print_value(r, &ms, estimator);
    cJSON_Delete(r);
    return EXIT_OK;
}

/* Whether a figure of stats is in the reward's unit (TD errors, values, their spread). */
static int in_reward_unit(const char *key)
{
    static const char *const keys[] = {"td_rms", "td_last",     "spread",     "bias",
                                       "rms",    "bias_window", "rms_window", NULL};
    for (const char *const *k = keys; *k; k++)
        if (strcmp(*k, key) == 0)
            return 1;
    return 0;
}

/* Prints a table of one object under each estimator: heads[0] names the table, heads[1..n]
 * the columns, keys[0..n) the object's fields (n <= EST_TABLE_MAX). */
#define EST_TABLE_MAX 8
static void est_table(const cJSON *ests, const char *sub, const char *const *heads,
                      const char *const *keys, int n)
{
    struct table *t = table_new((size_t)n + 1);
    if (!t)
        return;
    table_row(t, heads);
    const cJSON *e;
    cJSON_ArrayForEach(e, ests)
    {
        const cJSON *o = json_get(e, sub);
        char c[EST_TABLE_MAX][64];
        const char *row[EST_TABLE_MAX + 1] = {e->string};
        for (int k = 0; k < n && k < EST_TABLE_MAX; k++) {
            fmt_json(c[k], sizeof c[k], json_get(o, keys[k]));
            row[k + 1] = c[k];
        }
        table_row(t, row);
    }
    printf("\n");
    table_print(t, stdout);
    table_free(t);
}

int cmd_stats(struct cli *cli, int argc, char **argv)
{
    cJSON *r = NULL;
    int ex = cli_query(cli, "stats", argc, argv, worth_stats, &r);
    if (!r)
        return ex;
    /* The reward's unit, for the figures in it (a model.get; none when it has no unit). */
    struct mspec ms;
    const char *model = json_get(r, "model") && cJSON_IsString(json_get(r, "model"))
                            ? json_get(r, "model")->valuestring
                            : NULL;
    const char *json;
    memset(&ms, 0, sizeof ms);
    if (model && worth_model_info(cli->c, model, &json) == 0) {
        cJSON *g = cJSON_Parse(json);
        if (g && mspec_read(g, &ms) != 0)
            memset(&ms, 0, sizeof ms);
        cJSON_Delete(g);
    }
    const char *unit = ms.reward_unit;
    struct table *t = table_new(2);
    if (t)
        table_left(t);
    const cJSON *e;
    char v[256];
    for (e = r->child; t && e; e = e->next) {
        if (strcmp(e->string, "ok") == 0 || strcmp(e->string, "id") == 0 || cJSON_IsArray(e) ||
            strcmp(e->string, "estimators") == 0)
            continue;
        if (cJSON_IsObject(e)) { /* e.g. drift: one row per figure, "drift.alarms" */
            const cJSON *f;
            cJSON_ArrayForEach(f, e)
            {
                char key[96];
                snprintf(key, sizeof key, "%s.%s", e->string, f->string);
                fmt_json(v, sizeof v, f);
                table_rowv(t, key, v);
            }
            continue;
        }
        fmt_json(v, sizeof v, e);
        if (unit[0] && cJSON_IsNumber(e) && in_reward_unit(e->string)) {
            size_t n = strlen(v);
            snprintf(v + n, sizeof v - n, " %s", unit);
        }
        table_rowv(t, e->string, v);
    }
    if (t)
        table_print(t, stdout);
    table_free(t);
    /* Per-estimator figures: the union of their keys, in order of first appearance. */
    const cJSON *ests = json_get(r, "estimators");
    const char *keys[32];
    size_t nk = 0;
    cJSON_ArrayForEach(e, ests)
    {
        const cJSON *f;
        cJSON_ArrayForEach(f, e)
        {
            if (cJSON_IsObject(f) || strcmp(f->string, "why") == 0)
                continue; /* realised, coverage and the reasons: below */
            size_t k = 0;
            while (k < nk && strcmp(keys[k], f->string) != 0)
                k++;
            if (k == nk && nk < 31)
                keys[nk++] = f->string;
        }
    }
    t = cJSON_GetArraySize(ests) ? table_new(nk + 1) : NULL;
    if (t) {
        const char *row[33];
        char cellbuf[33][64];
        row[0] = "ESTIMATOR";
        for (size_t k = 0; k < nk; k++) {
            size_t j = 0;
            for (; keys[k][j] && j < 40; j++)
                cellbuf[k][j] =
                    (char)(keys[k][j] >= 'a' && keys[k][j] <= 'z' ? keys[k][j] - 32 : keys[k][j]);
            cellbuf[k][j] = 0;
            if (unit[0] && in_reward_unit(keys[k]))
                snprintf(cellbuf[k] + j, sizeof cellbuf[k] - j, " [%.20s]", unit);
            row[k + 1] = cellbuf[k];
        }
        table_row(t, row);
        cJSON_ArrayForEach(e, ests)
        {
            row[0] = e->string;
            for (size_t k = 0; k < nk; k++) {
                const cJSON *f = json_get(e, keys[k]);
                if (f && strcmp(keys[k], "last_update") == 0 && cJSON_IsNumber(f) &&
                    f->valuedouble > 0) {
                    time_t s = (time_t)f->valuedouble;
                    struct tm tm;
                    if (localtime_r(&s, &tm))
                        strftime(cellbuf[k], sizeof cellbuf[k], "%Y-%m-%dT%H:%M:%S", &tm);
                } else {
                    fmt_json(cellbuf[k], sizeof cellbuf[k], f);
                }
                row[k + 1] = cellbuf[k];
            }
            table_row(t, row);
        }
        printf("\n");
        table_print(t, stdout);
        table_free(t);
    }
    if (cJSON_GetArraySize(ests)) {
        /* Realised returns: how each estimator's predictions compared with what happened. */
        char h[5][64];
        static const char *const hk[4] = {"BIAS", "RMS", "BIAS_WINDOW", "RMS_WINDOW"};
        for (int k = 0; k < 4; k++)
            mspec_vlabel(&ms, hk[k], h[k], sizeof h[k]);
        const char *const rh[6] = {"REALISED", "N", h[0], h[1], h[2], h[3]};
        static const char *const rk[5] = {"n", "bias", "rms", "bias_window", "rms_window"};
        est_table(ests, "realised", rh, rk, 5);
        /* Coverage: the share of realised returns inside V +- 1 and 2 own sd, +- 2 RMS and the
         * reported 95% interval (V +- HALF95), over the window (schema/protocol.md). */
        mspec_vlabel(&ms, "HALF95", h[4], sizeof h[4]);
        const char *const ch[7] = {"COVERAGE", "SD1", "SD2", "RMS2", "INTERVAL95", "K95", h[4]};
        static const char *const ck[6] = {"sd1", "sd2", "rms2", "interval95", "k95", "half95"};
        est_table(ests, "coverage", ch, ck, 6);
        /* Each estimator's own drift test; the model's alarm follows the headline's
         * (drift.follows). */
        static const char *const dh[6] = {"DRIFT",  "ARMED",           "ACTIVE",
                                          "RAISED", "LAST_ONSET_STEP", "STATISTIC"};
        static const char *const dk[5] = {"armed", "active", "raised", "last_onset_step",
                                          "statistic"};
        est_table(ests, "drift", dh, dk, 5);
    }
    int said = 0;
    cJSON_ArrayForEach(e, ests)
    {
        const cJSON *w = json_get(e, "why"), *h = json_get(e, "health");
        if (cJSON_IsString(w))
            printf("%s%s %s: %s\n", said++ ? "" : "\n", e->string,
                   cJSON_IsString(h) ? h->valuestring : "", w->valuestring);
    }
    cJSON_Delete(r);
    return EXIT_OK;
}

int cmd_events(struct cli *cli, int argc, char **argv)
{
    const char *since = NULL, *limit = NULL;
    struct opt opts[] = {{"--since", &since, NULL}, {"--limit", &limit, NULL}, {NULL, NULL, NULL}};
    char *pos[1] = {NULL};
    int np;
    int ex = parse_args("events", argc, argv, opts, pos, 1, 0, &np);
    if (ex)
        return ex;
    double sv = 0;
    long long lv = 1000;
    char why[300];
    if (since && parse_time(since, &sv, why, sizeof why))
        return cli_usage("events",
                         "--since must be a time: seconds since 1970 or ISO-8601 with a zone "
                         "(%s)",
                         why);
    if (limit && parse_int(limit, 1, 100000, &lv))
        return cli_usage("events", "--limit must be an integer 1..100000");
    cJSON *req = cJSON_CreateObject();
    if (!req)
        return cli_error(EXIT_USAGE, "out of memory");
    cJSON_AddStringToObject(req, "op", "events");
    if (np)
        cJSON_AddStringToObject(req, "model", pos[0]);
    cJSON_AddNumberToObject(req, "since", sv);
    cJSON_AddNumberToObject(req, "limit", (double)lv);
    if (cli->json)
        return cli_raw(cli, req);
    if ((ex = cli_connect(cli))) {
        cJSON_Delete(req);
        return ex;
    }
    char *text = cJSON_PrintUnformatted(req);
    cJSON_Delete(req);
    const char *json;
    int rc = worth_request(cli->c, text ? text : "{}", &json);
    cJSON_free(text);
    if (rc)
        return cli_fail(cli, rc);
    cJSON *r = cli_reply(json);
    if (!r)
        return EXIT_SERVER;
    struct table *t = table_new(4);
    if (t) {
        table_left(t);
        table_rowv(t, "EVENT", "TIME", "KIND", "DETAIL");
        const cJSON *e;
        cJSON_ArrayForEach(e, json_get(r, "events"))
        {
            char id[32], when[64], detail[256];
            fmt_json(id, sizeof id, json_get(e, "event"));
            time_t at = (time_t)json_get(e, "at")->valuedouble;
            struct tm tm;
            if (localtime_r(&at, &tm))
                strftime(when, sizeof when, "%Y-%m-%d %H:%M:%S", &tm);
            else
                snprintf(when, sizeof when, "-");
            fmt_json(detail, sizeof detail, json_get(e, "detail"));
            table_rowv(t, id, when, json_get(e, "kind")->valuestring, detail);
        }
        table_print(t, stdout);
        table_free(t);
    }
    cJSON_Delete(r);
    return EXIT_OK;
}
