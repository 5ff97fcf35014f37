/*
 * models.c - the commands of `worth` about models themselves: models (the
 * list), create (from a model.create spec file), drop and show.
 *
 * Each one checks its arguments before it connects (a usage error never needs
 * a daemon), then calls one typed function of libworth-client and prints the
 * answer as an aligned table, or, with --json, sends the same request through
 * worth_request and prints worthd's reply line unchanged.  Replies are parsed
 * defensively: a field missing from a reply prints as "-", never crashes.
 * Runs on the CLI's only thread; owns nothing beyond one command's call.
 */
#include <errno.h>
#include <stdlib.h>
#include <string.h>

#include "cli.h"

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
        return cli_raw(cli, cli_request("model.list", NULL));
    cJSON *r = NULL;
    if ((ex = cli_fetch(cli, NULL, worth_model_info, &r)))
        return ex;
    const cJSON *models = json_get(r, "models");
    struct table *t = table_list(models, "no models", 5, &ex);
    if (!t) {
        cJSON_Delete(r);
        return ex;
    }
    table_rowv(t, "MODEL", "DIMS", "FEATURES", "APPLIED", "ESTIMATORS");
    const cJSON *m;
    cJSON_ArrayForEach(m, models)
    {
        char name[128], dims[32], feat[32], applied[32], ests[512] = "";
        fmt_json(name, sizeof name, json_get(m, "model"));
        const cJSON *dj = json_get(m, "dims");
        if (cJSON_IsArray(dj))
            snprintf(dims, sizeof dims, "%d", cJSON_GetArraySize(dj));
        else
            fmt_json(dims, sizeof dims, dj);
        fmt_json(feat, sizeof feat, json_get(m, "features"));
        fmt_json(applied, sizeof applied, json_get(m, "applied"));
        const cJSON *e;
        size_t n = 0;
        cJSON_ArrayForEach(e, json_get(m, "estimators"))
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
    const cJSON *name = json_get(spec, "model");
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
    int np, purge = 0, yes = 0;
    const struct opt opts[] = {{"--purge", NULL, &purge}, {"--yes", NULL, &yes}, {0}};
    int ex = parse_args("drop", argc, argv, opts, pos, 1, 1, &np);
    if (ex)
        return ex;
    const char *model = pos[0];
    if (!cli_confirm("drop", yes, "%s model %s%s?", purge ? "drop and purge" : "drop", model,
                     purge ? " (its log and checkpoints are deleted for good)" : ""))
        return EXIT_DECLINED;
    if (cli->json)
        return cli_raw(cli, cli_request(purge ? "model.purge" : "model.drop", model));
    if ((ex = cli_connect(cli)))
        return ex;
    if (purge) {
        const char *json = NULL;
        int rc = worth_model_purge(cli->c, model, &json);
        if (rc)
            return cli_fail(cli, rc);
        cJSON *r = cli_reply(json);
        const cJSON *rows = json_get(json_get(r, "purged"), "rows"), *e;
        double total = 0;
        cJSON_ArrayForEach(e, rows) total += cJSON_IsNumber(e) ? e->valuedouble : 0;
        char freed[32];
        fmt_json(freed, sizeof freed, json_get(r, "bytes_freed"));
        printf("dropped and purged model %s: %.0f rows deleted, %s bytes freed\n", model, total,
               freed);
        cJSON_Delete(r);
        return EXIT_OK;
    }
    int rc = worth_model_drop(cli->c, model);
    if (rc)
        return cli_fail(cli, rc);
    printf("dropped model %s\n", model);
    return EXIT_OK;
}

int cmd_show(struct cli *cli, int argc, char **argv)
{
    const char *model;
    int ex = cli_model_arg(cli, "show", "model.get", argc, argv, &model);
    if (!model)
        return ex;
    size_t dims;
    cJSON *r = NULL;
    if ((ex = cli_model(cli, model, &dims, &r)))
        return ex;
    const cJSON *spec = json_get(r, "spec");
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
            /* A spec field the reply already gave (model, dims, primary) is shown once. */
            const cJSON *dup = k == 1 ? json_get(r, e->string) : NULL;
            if (strcmp(e->string, "ok") == 0 || strcmp(e->string, "id") == 0 || cJSON_IsObject(e) ||
                cJSON_IsArray(e) || (dup && !cJSON_IsObject(dup) && !cJSON_IsArray(dup)))
                continue;
            fmt_json(v, sizeof v, e);
            table_rowv(t, e->string, v);
        }
    /* The dimensions (named: their count here, a table below), ranges as [lo, hi] pairs. */
    struct mspec ms;
    int have_ms = mspec_read(r, &ms) == 0;
    if (have_ms && ms.named && !cJSON_IsNumber(json_get(r, "dims"))) {
        char nd[32];
        snprintf(nd, sizeof nd, "%zu", ms.dims);
        table_rowv(t, "dims", nd);
    }
    size_t n = 0;
    v[0] = 0;
    for (size_t d = 0; have_ms && d < ms.dims; d++) {
        char lo[32], hi[32];
        fmt_num(lo, sizeof lo, ms.lo[d]);
        fmt_num(hi, sizeof hi, ms.hi[d]);
        int w = snprintf(v + n, sizeof v - n, "%s[%s, %s]", n ? " " : "", lo, hi);
        if (w < 0 || (size_t)w >= sizeof v - n)
            break;
        n += (size_t)w;
    }
    table_rowv(t, "ranges", v);
    /* How samples pair ("samples": {"reward": "next", "max_gap_periods": 3}). */
    static const char *const skip_none[] = {NULL};
    const cJSON *smp = json_get(spec, "samples");
    if (cJSON_IsObject(smp)) {
        fmt_params(v, sizeof v, smp, skip_none);
        table_rowv(t, "samples", v);
    }
    /* Bases as "basis k=v". */
    static const char *const skip_basis[] = {"basis", NULL};
    cJSON_ArrayForEach(e, json_get(spec, "features"))
    {
        char p[512], b[600];
        fmt_params(p, sizeof p, e, skip_basis);
        char name[64];
        fmt_json(name, sizeof name, json_get(e, "basis"));
        snprintf(b, sizeof b, "%s%s%s", name, p[0] ? " " : "", p);
        table_rowv(t, "basis", b);
    }
    table_print(t, stdout);
    table_free(t);
    if (have_ms && ms.named && (t = table_new(4))) {
        table_rowv(t, "DIM", "NAME", "UNIT", "RANGE");
        for (size_t d = 0; d < ms.dims; d++) {
            char idx[24], lo[32], hi[32], rg[80];
            snprintf(idx, sizeof idx, "%zu", d);
            fmt_num(lo, sizeof lo, ms.lo[d]);
            fmt_num(hi, sizeof hi, ms.hi[d]);
            snprintf(rg, sizeof rg, "[%s, %s]", lo, hi);
            table_rowv(t, idx, ms.name[d], ms.unit[d][0] ? ms.unit[d] : "-", rg);
        }
        printf("\n");
        table_print(t, stdout);
        table_free(t);
    }
    t = table_new(3);
    if (t) {
        static const char *const skip_est[] = {"name", "kind", NULL};
        table_rowv(t, "ESTIMATOR", "KIND", "PARAMETERS");
        cJSON_ArrayForEach(e, json_get(spec, "estimators"))
        {
            char name[64], kind[64], p[900];
            fmt_json(name, sizeof name, json_get(e, "name"));
            fmt_json(kind, sizeof kind, json_get(e, "kind"));
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
