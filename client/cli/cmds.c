/*
 * cmds.c - the short commands of `worth`: models, create, drop, show, value,
 * checkpoint, checkpoints, rollback, backup, train and stats.
 *
 * Each one checks its arguments before it connects (a usage error never needs
 * a daemon), then calls one typed function of libworth-client and prints the
 * answer as an aligned table, or, with --json, sends the same request through
 * worth_request and prints worthd's reply line unchanged.  Replies are parsed
 * defensively: a field missing from a reply prints as "-", never crashes.
 * Runs on the CLI's only thread; owns nothing beyond one command's call.
 */
#include <errno.h>
#include <limits.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "cli.h"

static cJSON *request(const char *op, const char *model)
{
    cJSON *r = cJSON_CreateObject();
    if (r && !cJSON_AddStringToObject(r, "op", op)) {
        cJSON_Delete(r);
        return NULL;
    }
    if (r && model && !cJSON_AddStringToObject(r, "model", model)) {
        cJSON_Delete(r);
        return NULL;
    }
    return r;
}

/* Formats a JSON scalar (or a short array) for a table cell. */
static void fmt_json(char *buf, size_t len, const cJSON *v)
{
    if (!v || cJSON_IsNull(v)) {
        snprintf(buf, len, "-");
    } else if (cJSON_IsNumber(v)) {
        double d = v->valuedouble;
        if (d == floor(d) && fabs(d) < 1e15)
            snprintf(buf, len, "%.0f", d);
        else
            snprintf(buf, len, "%.6g", d);
    } else if (cJSON_IsString(v)) {
        snprintf(buf, len, "%s", v->valuestring);
    } else if (cJSON_IsBool(v)) {
        snprintf(buf, len, "%s", cJSON_IsTrue(v) ? "true" : "false");
    } else {
        char *s = cJSON_PrintUnformatted(v);
        snprintf(buf, len, "%s", s ? s : "?");
        cJSON_free(s);
    }
}

static const cJSON *get(const cJSON *o, const char *k)
{
    return cJSON_GetObjectItemCaseSensitive(o, k);
}

/* Parses a reply owned by the library; prints a message and returns NULL when it is not JSON. */
static cJSON *parse_reply(const char *json)
{
    cJSON *r = json ? cJSON_Parse(json) : NULL;
    if (!r)
        cli_error(EXIT_SERVER, "internal: worthd's reply is not JSON");
    return r;
}

/* "k=v k=v" of every member of o except those named in skip (NULL-terminated). */
static void fmt_params(char *buf, size_t len, const cJSON *o, const char *const *skip)
{
    size_t n = 0;
    buf[0] = 0;
    for (const cJSON *e = o ? o->child : NULL; e; e = e->next) {
        int skipped = 0;
        for (const char *const *s = skip; *s; s++)
            skipped |= strcmp(*s, e->string) == 0;
        if (skipped)
            continue;
        char v[128];
        fmt_json(v, sizeof v, e);
        int w = snprintf(buf + n, len - n, "%s%s=%s", n ? " " : "", e->string, v);
        if (w < 0 || (size_t)w >= len - n)
            break;
        n += (size_t)w;
    }
}

int cmd_models(struct cli *cli, int argc, char **argv)
{
    char *pos[1];
    int np;
    int ex = parse_args("models", argc, argv, NULL, pos, 0, 0, &np);
    if (ex)
        return ex;
    if (cli->json)
        return cli_raw(cli, request("model.list", NULL));
    if ((ex = cli_connect(cli)))
        return ex;
    const char *json;
    int rc = worth_model_info(cli->c, NULL, &json);
    if (rc)
        return cli_fail(cli, rc);
    cJSON *r = parse_reply(json);
    if (!r)
        return EXIT_SERVER;
    const cJSON *models = get(r, "models");
    if (!cJSON_GetArraySize(models)) {
        printf("no models\n");
        cJSON_Delete(r);
        return EXIT_OK;
    }
    struct table *t = table_new(5);
    if (!t) {
        cJSON_Delete(r);
        return cli_error(EXIT_USAGE, "out of memory");
    }
    table_rowv(t, "MODEL", "DIMS", "FEATURES", "APPLIED", "ESTIMATORS");
    const cJSON *m;
    cJSON_ArrayForEach(m, models)
    {
        char name[128], dims[32], feat[32], applied[32], ests[512] = "";
        fmt_json(name, sizeof name, get(m, "model"));
        fmt_json(dims, sizeof dims, get(m, "dims"));
        fmt_json(feat, sizeof feat, get(m, "features"));
        fmt_json(applied, sizeof applied, get(m, "applied"));
        const cJSON *e;
        size_t n = 0;
        cJSON_ArrayForEach(e, get(m, "estimators"))
        {
            if (cJSON_IsString(e) && n + strlen(e->valuestring) + 2 < sizeof ests)
                n += (size_t)sprintf(ests + n, "%s%s", n ? "," : "", e->valuestring);
        }
        table_rowv(t, name, dims, feat, applied, ests);
    }
    table_print(t, stdout);
    table_free(t);
    cJSON_Delete(r);
    return EXIT_OK;
}

/* Reads all of path ("-" for stdin) into a NUL-terminated buffer (owned by the caller). */
static char *slurp(const char *path, size_t *len)
{
    FILE *f = strcmp(path, "-") == 0 ? stdin : fopen(path, "rb");
    if (!f)
        return NULL;
    size_t cap = 4096, n = 0;
    char *buf = malloc(cap);
    while (buf) {
        if (n + 1 >= cap) {
            char *g = cap < (64u << 20) ? realloc(buf, cap * 2) : NULL;
            if (!g) {
                free(buf);
                buf = NULL;
                errno = EFBIG;
                break;
            }
            buf = g;
            cap *= 2;
        }
        size_t k = fread(buf + n, 1, cap - n - 1, f);
        n += k;
        if (k == 0) {
            if (ferror(f)) {
                free(buf);
                buf = NULL;
            }
            break;
        }
    }
    if (f != stdin)
        fclose(f);
    if (buf) {
        buf[n] = 0;
        *len = n;
    }
    return buf;
}

int cmd_create(struct cli *cli, int argc, char **argv)
{
    char *pos[1];
    int np;
    int ex = parse_args("create", argc, argv, NULL, pos, 1, 1, &np);
    if (ex)
        return ex;
    const char *path = pos[0];
    size_t len = 0;
    char *text = slurp(path, &len);
    if (!text)
        return cli_error(EXIT_USAGE, "%s: cannot read: %s", path, strerror(errno));
    const char *end = NULL;
    cJSON *spec = cJSON_ParseWithOpts(text, &end, 1);
    if (!spec || !cJSON_IsObject(spec)) {
        /* Locate the parse error as line:column for the message. */
        const char *at = spec ? text : (end ? end : cJSON_GetErrorPtr());
        size_t line = 1, col = 1;
        for (const char *p = text; at && p < at && *p; p++) {
            if (*p == '\n') {
                line++;
                col = 1;
            } else {
                col++;
            }
        }
        cJSON_Delete(spec);
        free(text);
        if (!spec)
            return cli_error(EXIT_USAGE, "%s:%zu:%zu: not valid JSON", path, line, col);
        return cli_error(EXIT_USAGE, "%s: the spec must be a JSON object", path);
    }
    free(text);
    const cJSON *name = get(spec, "model");
    char model[128];
    fmt_json(model, sizeof model, name);
    cJSON_DeleteItemFromObjectCaseSensitive(spec, "op");
    if (cli->json) {
        if (!cJSON_AddStringToObject(spec, "op", "model.create")) {
            cJSON_Delete(spec);
            return cli_error(EXIT_USAGE, "out of memory");
        }
        return cli_raw(cli, spec);
    }
    char *line = cJSON_PrintUnformatted(spec);
    cJSON_Delete(spec);
    if (!line)
        return cli_error(EXIT_USAGE, "out of memory");
    if ((ex = cli_connect(cli))) {
        cJSON_free(line);
        return ex;
    }
    size_t features = 0;
    int rc = worth_model_create(cli->c, line, &features);
    cJSON_free(line);
    if (rc)
        return cli_fail(cli, rc);
    printf("created model %s with %zu features\n", model, features);
    return EXIT_OK;
}

int cmd_drop(struct cli *cli, int argc, char **argv)
{
    char *pos[1];
    int np;
    int ex = parse_args("drop", argc, argv, NULL, pos, 1, 1, &np);
    if (ex)
        return ex;
    if (cli->json)
        return cli_raw(cli, request("model.drop", pos[0]));
    if ((ex = cli_connect(cli)))
        return ex;
    int rc = worth_model_drop(cli->c, pos[0]);
    if (rc)
        return cli_fail(cli, rc);
    printf("dropped model %s\n", pos[0]);
    return EXIT_OK;
}

int cmd_show(struct cli *cli, int argc, char **argv)
{
    char *pos[1];
    int np;
    int ex = parse_args("show", argc, argv, NULL, pos, 1, 1, &np);
    if (ex)
        return ex;
    if (cli->json)
        return cli_raw(cli, request("model.get", pos[0]));
    size_t dims;
    cJSON *r = NULL;
    if ((ex = cli_model(cli, pos[0], &dims, &r)))
        return ex;
    const cJSON *spec = get(r, "spec");
    struct table *t = table_new(2);
    if (!t) {
        cJSON_Delete(r);
        return cli_error(EXIT_USAGE, "out of memory");
    }
    table_left(t);
    char v[1024];
    const cJSON *e;
    /* The reply's own scalars (model, features, counters), then the spec's. */
    const cJSON *objs[2] = {r, spec};
    for (int k = 0; k < 2; k++)
        for (e = objs[k] ? objs[k]->child : NULL; e; e = e->next) {
            if (strcmp(e->string, "ok") == 0 || strcmp(e->string, "id") == 0 || cJSON_IsObject(e) ||
                cJSON_IsArray(e) || (k == 1 && strcmp(e->string, "model") == 0))
                continue;
            fmt_json(v, sizeof v, e);
            table_rowv(t, e->string, v);
        }
    /* Ranges as [lo, hi] pairs, bases as "basis k=v". */
    size_t n = 0;
    v[0] = 0;
    cJSON_ArrayForEach(e, get(spec, "ranges"))
    {
        char lo[32], hi[32];
        fmt_json(lo, sizeof lo, cJSON_GetArrayItem(e, 0));
        fmt_json(hi, sizeof hi, cJSON_GetArrayItem(e, 1));
        int w = snprintf(v + n, sizeof v - n, "%s[%s, %s]", n ? " " : "", lo, hi);
        if (w < 0 || (size_t)w >= sizeof v - n)
            break;
        n += (size_t)w;
    }
    table_rowv(t, "ranges", v);
    static const char *const skip_basis[] = {"basis", NULL};
    cJSON_ArrayForEach(e, get(spec, "features"))
    {
        char p[512], b[600];
        fmt_params(p, sizeof p, e, skip_basis);
        char name[64];
        fmt_json(name, sizeof name, get(e, "basis"));
        snprintf(b, sizeof b, "%s%s%s", name, p[0] ? " " : "", p);
        table_rowv(t, "basis", b);
    }
    table_print(t, stdout);
    table_free(t);
    t = table_new(3);
    if (t) {
        static const char *const skip_est[] = {"name", "kind", NULL};
        table_rowv(t, "ESTIMATOR", "KIND", "PARAMETERS");
        cJSON_ArrayForEach(e, get(spec, "estimators"))
        {
            char name[64], kind[64], p[900];
            fmt_json(name, sizeof name, get(e, "name"));
            fmt_json(kind, sizeof kind, get(e, "kind"));
            fmt_params(p, sizeof p, e, skip_est);
            table_rowv(t, name, kind, p);
        }
        printf("\n");
        table_print(t, stdout);
        table_free(t);
    }
    cJSON_Delete(r);
    return EXIT_OK;
}

/* Values of the states of a CSV file (header x0.. or positional columns). */
static int value_file(struct cli *cli, const char *model, const char *path, size_t dims,
                      const char *estimator)
{
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
                /* A header: x0.. or x_0.. columns, else the first D columns by position. */
                for (size_t d = 0; d < dims; d++) {
                    char a[32], b[32];
                    snprintf(a, sizeof a, "x%zu", d);
                    snprintf(b, sizeof b, "x_%zu", d);
                    col[d] = (size_t)-1;
                    for (long k = 0; k < nc; k++)
                        if (strcmp(cells[k], a) == 0 || strcmp(cells[k], b) == 0)
                            col[d] = (size_t)k;
                    if (col[d] == (size_t)-1) {
                        if (d == 0) {
                            for (size_t j = 0; j < dims; j++)
                                col[j] = j;
                            break;
                        }
                        ex = cli_error(EXIT_USAGE, "%s:%zu: no column %s (have x0..x%zu?)", path,
                                       lineno, a, dims - 1);
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
        char names[64][24];
        for (size_t d = 0; d < dims; d++) {
            snprintf(names[d], sizeof names[d], "x%zu", d);
            hdr[d] = names[d];
        }
        hdr[dims] = estimator ? estimator : "VALUE";
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
            cJSON *r = request("value", model);
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
        return cli_usage("value", "missing the state (X1 X2 ... or --file STATES.csv)");
    double x[64];
    for (int i = 1; i < np; i++)
        if (parse_double(pos[i], &x[i - 1]) != 0)
            return cli_usage("value", "X%d \"%s\" is not a finite number", i, pos[i]);
    size_t dims;
    if ((ex = cli_model(cli, model, &dims, NULL)))
        return ex;
    if (file)
        return value_file(cli, model, file, dims, estimator);
    if ((size_t)(np - 1) != dims)
        return cli_usage("value", "model %s has %zu dims, got %d values", model, dims, np - 1);
    if (cli->json) {
        cJSON *r = request("value", model);
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
    worth_value_t v;
    memset(&v, 0, sizeof v);
    int rc = worth_value(cli->c, model, x, dims, estimator, &v);
    if (rc)
        return cli_fail(cli, rc);
    struct table *t = table_new(3);
    if (!t)
        return cli_error(EXIT_USAGE, "out of memory");
    char a[32], b[32];
    table_rowv(t, "ESTIMATOR", "VALUE", "SD");
    fmt_num(a, sizeof a, v.value);
    fmt_num(b, sizeof b, v.sd);
    table_rowv(t, estimator ? estimator : "(primary)", a, b);
    for (size_t i = 0; i < v.n && i < WORTH_MAX_ESTIMATORS; i++) {
        fmt_num(a, sizeof a, v.values[i]);
        char name[64];
        snprintf(name, sizeof name, "%.63s", v.names[i]);
        table_rowv(t, name, a, "");
    }
    table_print(t, stdout);
    table_free(t);
    printf("(seq %llu)\n", (unsigned long long)v.seq);
    return EXIT_OK;
}

int cmd_checkpoint(struct cli *cli, int argc, char **argv)
{
    char *pos[1];
    int np;
    const char *label = NULL;
    const struct opt opts[] = {{"--label", &label, NULL}, {0}};
    int ex = parse_args("checkpoint", argc, argv, opts, pos, 1, 1, &np);
    if (ex)
        return ex;
    if (label && (!*label || strlen(label) > 63))
        return cli_usage("checkpoint", "--label must be 1..63 bytes");
    if (cli->json) {
        cJSON *r = request("checkpoint", pos[0]);
        if (r && label && !cJSON_AddStringToObject(r, "label", label)) {
            cJSON_Delete(r);
            r = NULL;
        }
        return cli_raw(cli, r);
    }
    if ((ex = cli_connect(cli)))
        return ex;
    int64_t id = 0;
    uint64_t seq = 0;
    int rc = worth_checkpoint(cli->c, pos[0], label, &id, &seq);
    if (rc)
        return cli_fail(cli, rc);
    printf("checkpoint %lld of %s at seq %llu%s%s\n", (long long)id, pos[0],
           (unsigned long long)seq, label ? ", label " : "", label ? label : "");
    return EXIT_OK;
}

/*
 * The start of a command that shows one model's reply (CMD MODEL): parses the
 * arguments, prints worthd's reply unchanged with --json (*r stays NULL), or
 * fetches it and parses it into *r (owned by the caller).  Returns the exit code.
 */
static int query_model(struct cli *cli, const char *cmd, int argc, char **argv,
                       int (*fetch)(worth_client *, const char *, const char **), cJSON **r)
{
    char *pos[1];
    int np;
    int ex = parse_args(cmd, argc, argv, NULL, pos, 1, 1, &np);
    if (ex)
        return ex;
    if (cli->json)
        return cli_raw(cli, request(cmd, pos[0]));
    if ((ex = cli_connect(cli)))
        return ex;
    const char *json;
    int rc = fetch(cli->c, pos[0], &json);
    if (rc)
        return cli_fail(cli, rc);
    *r = parse_reply(json);
    return *r ? EXIT_OK : EXIT_SERVER;
}

int cmd_checkpoints(struct cli *cli, int argc, char **argv)
{
    cJSON *r = NULL;
    int ex = query_model(cli, "checkpoints", argc, argv, worth_checkpoints, &r);
    if (!r)
        return ex;
    const cJSON *list = get(r, "checkpoints"), *e;
    if (!cJSON_GetArraySize(list)) {
        printf("no checkpoints\n");
        cJSON_Delete(r);
        return EXIT_OK;
    }
    struct table *t = table_new(5);
    if (!t) {
        cJSON_Delete(r);
        return cli_error(EXIT_USAGE, "out of memory");
    }
    table_rowv(t, "CHECKPOINT", "SEQ", "CREATED", "SIZE", "LABEL");
    cJSON_ArrayForEach(e, list)
    {
        char id[32], seq[32], created[64] = "-", size[32], label[128];
        fmt_json(id, sizeof id, get(e, "checkpoint"));
        fmt_json(seq, sizeof seq, get(e, "seq"));
        fmt_json(size, sizeof size, get(e, "size"));
        const cJSON *l = get(e, "label");
        snprintf(label, sizeof label, "%s", cJSON_IsString(l) ? l->valuestring : "");
        const cJSON *c = get(e, "created_at");
        if (cJSON_IsNumber(c)) {
            time_t s = (time_t)c->valuedouble;
            struct tm tm;
            if (localtime_r(&s, &tm))
                strftime(created, sizeof created, "%Y-%m-%d %H:%M:%S", &tm);
        }
        table_rowv(t, id, seq, created, size, label);
    }
    table_print(t, stdout);
    table_free(t);
    cJSON_Delete(r);
    return EXIT_OK;
}

/* "A:B" into two finite numbers with A <= B. */
static int parse_window(const char *s, double *lo, double *hi)
{
    const char *colon = strchr(s, ':');
    if (!colon || colon - s > 63)
        return -1;
    char a[64];
    memcpy(a, s, (size_t)(colon - s));
    a[colon - s] = 0;
    if (parse_double(a, lo) != 0 || parse_double(colon + 1, hi) != 0 || *lo > *hi)
        return -1;
    return 0;
}

int cmd_rollback(struct cli *cli, int argc, char **argv)
{
    char *pos[2];
    int np, replay = 0;
    const char *xseq = NULL, *xtime = NULL;
    const struct opt opts[] = {{"--replay", NULL, &replay},
                               {"--exclude-seq", &xseq, NULL},
                               {"--exclude-time", &xtime, NULL},
                               {0}};
    int ex = parse_args("rollback", argc, argv, opts, pos, 2, 2, &np);
    if (ex)
        return ex;
    long long id;
    if (parse_int(pos[1], 1, LLONG_MAX, &id) != 0)
        return cli_usage("rollback", "checkpoint ID must be a positive integer, not \"%s\"",
                         pos[1]);
    if (xseq && xtime)
        return cli_usage("rollback", "give --exclude-seq or --exclude-time, not both");
    double lo = 0, hi = 0;
    char exclude = 0;
    if (xseq) {
        if (parse_window(xseq, &lo, &hi) != 0 || lo != floor(lo) || hi != floor(hi) || lo < 0)
            return cli_usage("rollback",
                             "--exclude-seq wants A:B, integers with A <= B, not \"%s\"", xseq);
        exclude = 's';
    }
    if (xtime) {
        if (parse_window(xtime, &lo, &hi) != 0)
            return cli_usage("rollback", "--exclude-time wants T0:T1 with T0 <= T1, not \"%s\"",
                             xtime);
        exclude = 't';
    }
    if (exclude)
        replay = 1;
    if (cli->json) {
        cJSON *r = request("rollback", pos[0]);
        int ok = r && cJSON_AddNumberToObject(r, "checkpoint", (double)id);
        if (ok && replay)
            ok = cJSON_AddTrueToObject(r, "replay") != NULL;
        if (ok && exclude) {
            cJSON *x = cJSON_AddObjectToObject(r, "exclude");
            double w[2] = {lo, hi};
            cJSON *a = cJSON_CreateDoubleArray(w, 2);
            ok = x && a && cJSON_AddItemToObject(x, exclude == 's' ? "seq" : "t", a);
            if (!ok)
                cJSON_Delete(a);
        }
        if (!ok) {
            cJSON_Delete(r);
            r = NULL;
        }
        return cli_raw(cli, r);
    }
    if ((ex = cli_connect(cli)))
        return ex;
    uint64_t undone = 0, replayed = 0;
    int rc =
        worth_rollback(cli->c, pos[0], (int64_t)id, replay, exclude, lo, hi, &undone, &replayed);
    if (rc)
        return cli_fail(cli, rc);
    printf("rolled back %s to checkpoint %lld: %llu undone, %llu replayed\n", pos[0], id,
           (unsigned long long)undone, (unsigned long long)replayed);
    return EXIT_OK;
}

int cmd_backup(struct cli *cli, int argc, char **argv)
{
    char *pos[1] = {NULL};
    int np;
    int ex = parse_args("backup", argc, argv, NULL, pos, 1, 0, &np);
    if (ex)
        return ex;
    /* worthd writes into its own --backup-dir; NAME is a file name there, never a path. */
    const char *name = np ? pos[0] : NULL;
    if (cli->json) {
        cJSON *r = request("backup", NULL);
        if (r && name && !cJSON_AddStringToObject(r, "name", name)) {
            cJSON_Delete(r);
            r = NULL;
        }
        return cli_raw(cli, r);
    }
    if ((ex = cli_connect(cli)))
        return ex;
    uint64_t bytes = 0;
    char path[4400];
    int rc = worth_backup(cli->c, name, path, sizeof path, &bytes);
    if (rc)
        return cli_fail(cli, rc);
    printf("backup written to %s (%llu bytes)\n", path, (unsigned long long)bytes);
    return EXIT_OK;
}

struct train_ctx {
    int tty;
    int quiet; /* --json: only the final reply */
};

static void train_progress(void *ctx, unsigned pass, unsigned of, double change)
{
    const struct train_ctx *tc = ctx;
    if (tc->quiet)
        return;
    if (tc->tty) {
        enum { W = 30 };
        unsigned fill = of ? (unsigned)((double)pass / of * W) : W;
        char bar[W + 1];
        for (unsigned i = 0; i < W; i++)
            bar[i] = i < fill ? '#' : ' ';
        bar[W] = 0;
        fprintf(stderr, "\rpass %u/%u [%s] change %.3g\033[K", pass, of, bar, change);
        fflush(stderr);
    } else {
        printf("pass %u/%u: change %.6g\n", pass, of, change);
        fflush(stdout);
    }
}

int cmd_train(struct cli *cli, int argc, char **argv)
{
    char *pos[1];
    int np;
    const char *est = NULL, *passes_s = NULL;
    const struct opt opts[] = {{"--estimator", &est, NULL}, {"--passes", &passes_s, NULL}, {0}};
    int ex = parse_args("train", argc, argv, opts, pos, 1, 1, &np);
    if (ex)
        return ex;
    long long passes = 10;
    if (passes_s && parse_int(passes_s, 1, 100000, &passes) != 0)
        return cli_usage("train", "--passes must be an integer 1..100000, not \"%s\"", passes_s);
    char name[64];
    if (!est) {
        /* The model's first replay or lstd estimator. */
        size_t dims;
        cJSON *r = NULL;
        if ((ex = cli_model(cli, pos[0], &dims, &r)))
            return ex;
        const cJSON *e;
        name[0] = 0;
        cJSON_ArrayForEach(e, get(get(r, "spec"), "estimators"))
        {
            const cJSON *k = get(e, "kind"), *n = get(e, "name");
            if (cJSON_IsString(k) && cJSON_IsString(n) &&
                (strcmp(k->valuestring, "replay") == 0 || strcmp(k->valuestring, "lstd") == 0)) {
                snprintf(name, sizeof name, "%s", n->valuestring);
                break;
            }
        }
        cJSON_Delete(r);
        if (!name[0])
            return cli_usage("train", "model %s has no replay or lstd estimator to train", pos[0]);
        est = name;
    }
    if ((ex = cli_connect(cli)))
        return ex;
    /*
     * XXX: --json cannot go through worth_request here: train answers with
     * progress lines before its reply, and worth_request returns the first
     * line (a progress line, read as an error) and leaves the rest unread.  So
     * the reply is rebuilt from worth_train's answer, with the same fields.
     */
    struct train_ctx tc = {cli->json ? 0 : cli_tty(), cli->json};
    worth_train_t out;
    memset(&out, 0, sizeof out);
    int rc = worth_train(cli->c, pos[0], est, (unsigned)passes, train_progress, &tc, &out);
    if (tc.tty)
        fputs("\r\033[K", stderr);
    if (rc)
        return cli_fail(cli, rc);
    if (cli->json) {
        printf("{\"ok\":true,\"passes\":%u,\"change\":%.17g,\"converged\":%s}\n", out.passes,
               out.change, out.converged ? "true" : "false");
        return EXIT_OK;
    }
    printf("%s %s after %u pass%s (change %.6g)\n", est,
           out.converged ? "converged" : "did not converge", out.passes,
           out.passes == 1 ? "" : "es", out.change);
    return EXIT_OK;
}

int cmd_stats(struct cli *cli, int argc, char **argv)
{
    cJSON *r = NULL;
    int ex = query_model(cli, "stats", argc, argv, worth_stats, &r);
    if (!r)
        return ex;
    struct table *t = table_new(2);
    if (t)
        table_left(t);
    const cJSON *e;
    char v[128];
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
        table_rowv(t, e->string, v);
    }
    if (t)
        table_print(t, stdout);
    table_free(t);
    /* Per-estimator figures: the union of their keys, in order of first appearance. */
    const cJSON *ests = get(r, "estimators");
    const char *keys[32];
    size_t nk = 0;
    cJSON_ArrayForEach(e, ests)
    {
        const cJSON *f;
        cJSON_ArrayForEach(f, e)
        {
            if (cJSON_IsObject(f))
                continue; /* realised: its own table below */
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
            for (; keys[k][j] && j < 63; j++)
                cellbuf[k][j] =
                    (char)(keys[k][j] >= 'a' && keys[k][j] <= 'z' ? keys[k][j] - 32 : keys[k][j]);
            cellbuf[k][j] = 0;
            row[k + 1] = cellbuf[k];
        }
        table_row(t, row);
        cJSON_ArrayForEach(e, ests)
        {
            row[0] = e->string;
            for (size_t k = 0; k < nk; k++) {
                const cJSON *f = get(e, keys[k]);
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
    /* Realised returns: how each estimator's predictions compared with what happened. */
    t = cJSON_GetArraySize(ests) ? table_new(6) : NULL;
    if (t) {
        table_rowv(t, "REALISED", "N", "BIAS", "RMS", "BIAS_WINDOW", "RMS_WINDOW");
        cJSON_ArrayForEach(e, ests)
        {
            const cJSON *re = get(e, "realised");
            char c[5][64];
            static const char *const k5[5] = {"n", "bias", "rms", "bias_window", "rms_window"};
            for (int k = 0; k < 5; k++)
                fmt_json(c[k], sizeof c[k], get(re, k5[k]));
            table_rowv(t, e->string, c[0], c[1], c[2], c[3], c[4]);
        }
        printf("\n");
        table_print(t, stdout);
        table_free(t);
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
    if (since && parse_double(since, &sv))
        return cli_usage("events", "--since must be a time in seconds since 1970");
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
    cJSON *r = parse_reply(json);
    if (!r)
        return EXIT_SERVER;
    struct table *t = table_new(4);
    if (t) {
        table_left(t);
        table_rowv(t, "EVENT", "TIME", "KIND", "DETAIL");
        const cJSON *e;
        cJSON_ArrayForEach(e, get(r, "events"))
        {
            char id[32], when[64], detail[256];
            fmt_json(id, sizeof id, get(e, "event"));
            time_t at = (time_t)get(e, "at")->valuedouble;
            struct tm tm;
            if (localtime_r(&at, &tm))
                strftime(when, sizeof when, "%Y-%m-%d %H:%M:%S", &tm);
            else
                snprintf(when, sizeof when, "-");
            fmt_json(detail, sizeof detail, get(e, "detail"));
            table_rowv(t, id, when, get(e, "kind")->valuestring, detail);
        }
        table_print(t, stdout);
        table_free(t);
    }
    cJSON_Delete(r);
    return EXIT_OK;
}
