/*
 * ops.c - the commands of `worth` for operations staff: status (worthd's
 * version, uptime, database against its limit, each model's last
 * transition) and retention (a model's log retention policy, and running it).
 *
 * Each checks its arguments before it connects, calls libworth-client
 * (worth_status, or worth_request for retention) and prints a short report,
 * or with --json worthd's reply line unchanged.  Replies are read
 * defensively: a missing field prints "-".  Runs on the CLI's only thread.
 */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "cli.h"

/* A duration in words: "42 s", "3 min", "5.2 h", "12 d"; "-" when not a number. */
static void fmt_age(char *buf, size_t len, const cJSON *v)
{
    if (!cJSON_IsNumber(v) || !isfinite(v->valuedouble)) {
        snprintf(buf, len, "-");
        return;
    }
    double s = v->valuedouble;
    if (fabs(s) < 120)
        snprintf(buf, len, "%.0f s", s);
    else if (fabs(s) < 7200)
        snprintf(buf, len, "%.0f min", s / 60);
    else if (fabs(s) < 172800)
        snprintf(buf, len, "%.1f h", s / 3600);
    else
        snprintf(buf, len, "%.0f d", s / 86400);
}

/* Bytes in words: "512 B", "3.4 MiB". */
static void fmt_bytes(char *buf, size_t len, const cJSON *v)
{
    if (!cJSON_IsNumber(v)) {
        snprintf(buf, len, "-");
        return;
    }
    static const char *const unit[] = {"B", "KiB", "MiB", "GiB", "TiB"};
    double b = v->valuedouble;
    int u = 0;
    while (b >= 1024 && u < 4) {
        b /= 1024;
        u++;
    }
    snprintf(buf, len, u ? "%.1f %s" : "%.0f %s", b, unit[u]);
}

int cmd_status(struct cli *cli, int argc, char **argv)
{
    char *pos[1];
    int np;
    int ex = parse_args("status", argc, argv, NULL, pos, 0, 0, &np);
    if (ex)
        return ex;
    if (cli->json)
        return cli_raw(cli, cli_request("status", NULL));
    if ((ex = cli_connect(cli)))
        return ex;
    const char *json = NULL;
    int rc = worth_status(cli->c, &json);
    if (rc)
        return cli_fail(cli, rc);
    cJSON *r = cli_reply(json);
    if (!r)
        return EXIT_SERVER;
    char v[64], up[32], a[32], b[32], c[32];
    fmt_json(v, sizeof v, json_get(r, "version"));
    fmt_age(up, sizeof up, json_get(r, "uptime_s"));
    const cJSON *conns = json_get(r, "connections");
    fmt_json(a, sizeof a, json_get(conns, "open"));
    fmt_json(b, sizeof b, json_get(conns, "tcp"));
    printf("worthd %s, up %s, %s connection(s) (%s tcp)\n", v, up, a, b);
    const cJSON *db = json_get(r, "database");
    char path[512];
    fmt_json(path, sizeof path, json_get(db, "path"));
    fmt_bytes(a, sizeof a, json_get(db, "bytes"));
    fmt_bytes(b, sizeof b, json_get(db, "disk_free_bytes"));
    const cJSON *limit = json_get(db, "limit_bytes"), *used = json_get(db, "used");
    if (cJSON_IsNumber(limit) && cJSON_IsNumber(used)) {
        fmt_bytes(c, sizeof c, limit);
        printf("database %s: %s of its limit %s (%.0f%%), %s free on its disk\n", path, a, c,
               100 * used->valuedouble, b);
    } else {
        printf("database %s: %s (no limit), %s free on its disk\n", path, a, b);
    }
    const cJSON *ret = json_get(r, "retention");
    fmt_json(a, sizeof a, json_get(ret, "days"));
    fmt_json(b, sizeof b, json_get(ret, "transitions"));
    printf("retention (worthd's default): %s days, %s transitions (0: keep all)\n", a, b);
    const cJSON *models = json_get(r, "models"), *m;
    struct table *t = table_list(models, "no models", 8, &ex);
    if (!t) {
        cJSON_Delete(r);
        return ex;
    }
    table_rowv(t, "MODEL", "STATE", "RECEIVED", "QUEUE", "HEALTHY", "LAST (WALL)", "LAST (PLANT)",
               "CHECKPOINTS");
    cJSON_ArrayForEach(m, models)
    {
        char name[128], state[32], rec[32], queue[32], healthy[32] = "-", wall[32], plant[32],
                                                       cps[32];
        fmt_json(name, sizeof name, json_get(m, "model"));
        fmt_json(state, sizeof state, json_get(m, "state"));
        fmt_json(rec, sizeof rec, json_get(m, "received"));
        fmt_json(queue, sizeof queue, json_get(m, "queue"));
        const cJSON *h = json_get(m, "healthy"), *n = json_get(m, "estimators");
        if (cJSON_IsNumber(h) && cJSON_IsNumber(n))
            snprintf(healthy, sizeof healthy, "%.0f/%.0f", h->valuedouble, n->valuedouble);
        fmt_age(wall, sizeof wall, json_get(m, "wall_age_s"));
        fmt_age(plant, sizeof plant, json_get(json_get(m, "last_logged"), "plant_age_s"));
        fmt_json(cps, sizeof cps, json_get(m, "checkpoints"));
        table_rowv(t, name, state, rec, queue, healthy, wall, plant, cps);
    }
    printf("\n");
    table_print(t, stdout);
    table_free(t);
    cJSON_Delete(r);
    return EXIT_OK;
}

int cmd_retention(struct cli *cli, int argc, char **argv)
{
    char *pos[1] = {NULL};
    int np, run = 0, inherit = 0;
    const char *days = NULL, *keep = NULL;
    const struct opt opts[] = {{"--days", &days, NULL},
                               {"--transitions", &keep, NULL},
                               {"--inherit", NULL, &inherit},
                               {"--run", NULL, &run},
                               {0}};
    int ex = parse_args("retention", argc, argv, opts, pos, 1, 0, &np);
    if (ex)
        return ex;
    double d = 0;
    long long n = 0;
    if (days && (parse_double(days, &d) != 0 || d < 0 || d > 36500))
        return cli_usage("retention", "--days wants a number 0..36500, not \"%s\"", days);
    if (keep && parse_int(keep, 0, 9007199254740992LL, &n) != 0)
        return cli_usage("retention", "--transitions wants an integer >= 0, not \"%s\"", keep);
    if ((days || keep || inherit) && !np)
        return cli_usage("retention", "a policy is set per model: give MODEL");
    if (inherit && (days || keep))
        return cli_usage("retention", "--inherit, or --days/--transitions, not both");
    cJSON *req = cli_request("retention", np ? pos[0] : NULL);
    int ok = req != NULL;
    if (ok && days)
        ok = cJSON_AddNumberToObject(req, "days", d) != NULL;
    if (ok && keep)
        ok = cJSON_AddNumberToObject(req, "transitions", (double)n) != NULL;
    if (ok && inherit)
        ok = cJSON_AddNullToObject(req, "days") && cJSON_AddNullToObject(req, "transitions");
    if (ok && run)
        ok = cJSON_AddTrueToObject(req, "run") != NULL;
    if (!ok) {
        cJSON_Delete(req);
        return cli_error(EXIT_USAGE, "out of memory");
    }
    if (cli->json)
        return cli_raw(cli, req);
    char *line = cJSON_PrintUnformatted(req);
    cJSON_Delete(req);
    if (!line)
        return cli_error(EXIT_USAGE, "out of memory");
    if ((ex = cli_connect(cli))) {
        cJSON_free(line);
        return ex;
    }
    const char *json = NULL;
    int rc = worth_request(cli->c, line, &json);
    cJSON_free(line);
    if (rc)
        return cli_fail(cli, rc);
    cJSON *r = cli_reply(json);
    if (!r)
        return EXIT_SERVER;
    const cJSON *models = json_get(r, "models"), *m;
    struct table *t = table_list(models, "no models", 6, &ex);
    if (!t) {
        cJSON_Delete(r);
        return ex;
    }
    table_rowv(t, "MODEL", "DAYS", "TRANSITIONS", "LOG FROM SEQ", "DELETED", "");
    cJSON_ArrayForEach(m, models)
    {
        char name[128], dd[32], tt[32], fl[48], del[96] = "-";
        fmt_json(name, sizeof name, json_get(m, "model"));
        fmt_json(dd, sizeof dd, json_get(m, "days"));
        fmt_json(tt, sizeof tt, json_get(m, "transitions"));
        const cJSON *f = json_get(m, "log_floor"), *own = json_get(m, "own");
        snprintf(fl, sizeof fl, "%.0f", cJSON_IsNumber(f) ? f->valuedouble + 1 : 1);
        const cJSON *x = json_get(m, "deleted");
        if (x) {
            char a[32], b[32];
            fmt_json(a, sizeof a, json_get(x, "transitions"));
            fmt_json(b, sizeof b, json_get(x, "checkpoints"));
            snprintf(del, sizeof del, "%s transitions, %s checkpoints", a, b);
        }
        int mine =
            cJSON_IsTrue(json_get(own, "days")) || cJSON_IsTrue(json_get(own, "transitions"));
        table_rowv(t, name, dd, tt, fl, del, mine ? "(own policy)" : "(worthd's)");
    }
    table_print(t, stdout);
    table_free(t);
    if (run) {
        char freed[32];
        fmt_bytes(freed, sizeof freed, json_get(r, "bytes_freed"));
        printf("%s freed\n", freed);
    }
    cJSON_Delete(r);
    return EXIT_OK;
}
