/*
 * cli.c - what every command of `worth` shares: messages and exit codes,
 * the connection (opened lazily, with the token of --token-file), the --json
 * path that prints worthd's reply line unchanged, argument parsing, and the
 * formatting of numbers and reply fields for tables.
 *
 * The CLI is a thin shell around libworth-client (include/worth/client.h),
 * like cmark's CLI around libcmark: it never speaks the protocol itself,
 * except that --json sends the request through worth_request so that the
 * server's reply line can be printed unchanged.  Exit codes are fixed and
 * documented in `worth help`: 0 ok, 1 worthd answered with an error, 2 usage
 * or bad input, 3 cannot connect.  Nothing here may crash on bad input: every
 * argument and reply field is checked and reported with a one-line message.
 * Runs on the CLI's only thread; owns the connection and the token (freed by
 * worth.c).  It knows no command: the handlers call it, never the reverse.
 */
#include <errno.h>
#include <math.h>
#include <stdarg.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "cli.h"
#include "isotime.h"

int cli_error(int code, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    fputs("worth: ", stderr);
    vfprintf(stderr, fmt, ap);
    fputc('\n', stderr);
    va_end(ap);
    return code;
}

int cli_usage(const char *cmd, const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    fprintf(stderr, "worth: %s%s", cmd ? cmd : "", cmd ? ": " : "");
    vfprintf(stderr, fmt, ap);
    fprintf(stderr, " (see 'worth help%s%s')\n", cmd ? " " : "", cmd ? cmd : "");
    va_end(ap);
    return EXIT_USAGE;
}

int cli_fail(struct cli *cli, int rc)
{
    const char *name = cli->c ? worth_error_name(cli->c) : NULL;
    const char *msg = cli->c ? worth_error_message(cli->c) : NULL;
    if (!name || !*name)
        name = worth_err_name(rc);
    if (!msg || !*msg)
        msg = worth_strerror(rc);
    fprintf(stderr, "worth: %s: %s\n", name, msg);
    return rc == WORTH_E_IO ? EXIT_CONNECT : EXIT_SERVER;
}

/* Reads the token: the file's first line, without its newline. */
static int read_token(struct cli *cli)
{
    FILE *f = fopen(cli->token_file, "r");
    if (!f)
        return cli_error(EXIT_USAGE, "cannot read --token-file %s: %s", cli->token_file,
                         strerror(errno));
    char buf[1100];
    size_t n = fread(buf, 1, sizeof buf - 1, f);
    fclose(f);
    buf[n] = 0;
    buf[strcspn(buf, "\r\n")] = 0;
    if (!buf[0])
        return cli_error(EXIT_USAGE, "--token-file %s holds no token", cli->token_file);
    cli->token = strdup(buf);
    if (!cli->token)
        return cli_error(EXIT_USAGE, "out of memory");
    return EXIT_OK;
}

int cli_connect(struct cli *cli)
{
    if (cli->c)
        return EXIT_OK;
    if (cli->token_file && !cli->token) {
        int rc = read_token(cli);
        if (rc)
            return rc;
    }
    worth_opts o = {0};
    o.socket_path = cli->host_port ? NULL : cli->socket_path;
    o.host_port = cli->host_port;
    o.token = cli->token;
    o.timeout_ms = cli->timeout_ms;
    char err[512] = "";
    int rc = worth_connect(&o, &cli->c, err, sizeof err);
    if (rc != 0) {
        cli->c = NULL;
        const char *where = cli->host_port ? cli->host_port : cli->socket_path;
        if (rc == WORTH_E_IO)
            return err[0] ? cli_error(EXIT_CONNECT, "%s (is worthd running?)", err)
                          : cli_error(EXIT_CONNECT, "cannot connect to worthd at %s", where);
        /* A worthd of another protocol version: nothing it says can be trusted to parse. */
        if (rc == WORTH_E_UNSUPPORTED)
            return cli_error(EXIT_CONNECT, "%s: %s", worth_err_name(rc), err);
        /* Connected but refused, e.g. a wrong token: err reads "CODE: message". */
        if (rc == WORTH_E_UNAUTHORIZED || strchr(err, ':'))
            return cli_error(EXIT_SERVER, "%s", err[0] ? err : worth_err_name(rc));
        return cli_error(EXIT_SERVER, "%s: %s", worth_err_name(rc),
                         err[0] ? err : worth_strerror(rc));
    }
    return EXIT_OK;
}

int cli_raw(struct cli *cli, cJSON *req)
{
    if (!req)
        return cli_error(EXIT_USAGE, "out of memory");
    int ex = cli_connect(cli);
    if (ex) {
        cJSON_Delete(req);
        return ex;
    }
    char *line = cJSON_PrintUnformatted(req);
    cJSON_Delete(req);
    if (!line)
        return cli_error(EXIT_USAGE, "out of memory");
    const char *reply = NULL;
    int rc = worth_request(cli->c, line, &reply);
    cJSON_free(line);
    /* XXX: after a local failure (WORTH_E_IO) the library may leave an earlier reply here. */
    if (reply && *reply && rc != WORTH_E_IO) {
        size_t n = strcspn(reply, "\n");
        fwrite(reply, 1, n, stdout);
        fputc('\n', stdout);
        fflush(stdout);
    }
    if (rc != 0)
        return cli_fail(cli, rc);
    return EXIT_OK;
}

cJSON *cli_request(const char *op, const char *model)
{
    return cli_request_opt(op, model, NULL, NULL);
}

cJSON *cli_request_opt(const char *op, const char *model, const char *key, const char *value)
{
    cJSON *r = cJSON_CreateObject();
    if (r && (!cJSON_AddStringToObject(r, "op", op) ||
              (model && !cJSON_AddStringToObject(r, "model", model)) ||
              (value && !cJSON_AddStringToObject(r, key, value)))) {
        cJSON_Delete(r);
        return NULL;
    }
    return r;
}

/* Formats a JSON scalar (or a short array) for a table cell. */
void fmt_json(char *buf, size_t len, const cJSON *v)
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

const cJSON *json_get(const cJSON *o, const char *k)
{
    return cJSON_GetObjectItemCaseSensitive(o, k);
}

/* Parses a reply owned by the library; prints a message and returns NULL when it is not JSON. */
cJSON *cli_reply(const char *json)
{
    cJSON *r = json ? cJSON_Parse(json) : NULL;
    if (!r)
        cli_error(EXIT_SERVER, "internal: worthd's reply is not JSON");
    return r;
}

int parse_double(const char *s, double *out)
{
    char *end;
    if (!*s)
        return -1;
    errno = 0;
    double v = strtod(s, &end);
    if (*end || end == s || (errno == ERANGE && fabs(v) > 1) || !isfinite(v))
        return -1;
    *out = v;
    return 0;
}

int parse_time(const char *s, double *t_s, char *err, size_t errlen)
{
    if (parse_double(s, t_s) == 0)
        return 0;
    return isotime_parse(s, t_s, err, errlen);
}

int parse_time_window(const char *s, double *lo, double *hi, char *err, size_t errlen)
{
    char a[128];
    const char *sep = strchr(s, '/');
    if (!sep) {
        /* "A:B" holds numbers only: an ISO time has colons of its own. */
        sep = strchr(s, ':');
        if (!sep || strchr(sep + 1, ':')) {
            snprintf(err, errlen, "expected T0/T1 (or A:B in seconds since 1970)");
            return -1;
        }
        snprintf(a, sizeof a, "%.*s", (int)(sep - s), s);
        if (parse_double(a, lo) != 0 || parse_double(sep + 1, hi) != 0) {
            snprintf(err, errlen, "A:B takes two numbers; write ISO-8601 times as T0/T1");
            return -1;
        }
    } else {
        if ((size_t)(sep - s) >= sizeof a) {
            snprintf(err, errlen, "the window's start is too long");
            return -1;
        }
        snprintf(a, sizeof a, "%.*s", (int)(sep - s), s);
        char e[200];
        if (parse_time(a, lo, e, sizeof e) != 0) {
            snprintf(err, errlen, "start \"%s\": %s", a, e);
            return -1;
        }
        if (parse_time(sep + 1, hi, e, sizeof e) != 0) {
            snprintf(err, errlen, "end \"%s\": %s", sep + 1, e);
            return -1;
        }
    }
    if (*lo > *hi) {
        snprintf(err, errlen, "the start is after the end");
        return -1;
    }
    return 0;
}

int parse_int(const char *s, long long lo, long long hi, long long *out)
{
    char *end;
    if (!*s)
        return -1;
    errno = 0;
    long long v = strtoll(s, &end, 10);
    if (*end || errno || v < lo || v > hi)
        return -1;
    *out = v;
    return 0;
}

int mspec_read(const cJSON *reply, struct mspec *ms)
{
    memset(ms, 0, sizeof *ms);
    ms->period_s = NAN;
    const cJSON *spec = cJSON_GetObjectItemCaseSensitive(reply, "spec");
    const cJSON *d = cJSON_GetObjectItemCaseSensitive(spec, "dims");
    if (!d)
        d = cJSON_GetObjectItemCaseSensitive(reply, "dims");
    if (cJSON_IsArray(d)) {
        /* The named form: [{"name":"level","unit":"m","range":[0,12]}, ...]. */
        int n = cJSON_GetArraySize(d);
        if (n < 1 || n > MAXDIMS)
            return -1;
        ms->dims = (size_t)n;
        ms->named = 1;
        size_t i = 0;
        const cJSON *e;
        cJSON_ArrayForEach(e, d)
        {
            const cJSON *nm = cJSON_GetObjectItemCaseSensitive(e, "name");
            const cJSON *un = cJSON_GetObjectItemCaseSensitive(e, "unit");
            const cJSON *rg = cJSON_GetObjectItemCaseSensitive(e, "range");
            if (cJSON_IsString(nm) && nm->valuestring[0])
                snprintf(ms->name[i], sizeof ms->name[i], "%s", nm->valuestring);
            else
                snprintf(ms->name[i], sizeof ms->name[i], "x%zu", i);
            if (cJSON_IsString(un))
                snprintf(ms->unit[i], sizeof ms->unit[i], "%s", un->valuestring);
            if (cJSON_GetArraySize(rg) == 2 && cJSON_IsNumber(cJSON_GetArrayItem(rg, 0)) &&
                cJSON_IsNumber(cJSON_GetArrayItem(rg, 1))) {
                ms->lo[i] = cJSON_GetArrayItem(rg, 0)->valuedouble;
                ms->hi[i] = cJSON_GetArrayItem(rg, 1)->valuedouble;
            } else {
                ms->lo[i] = ms->hi[i] = NAN;
            }
            i++;
        }
    } else if (cJSON_IsNumber(d) && d->valuedouble >= 1 && d->valuedouble <= MAXDIMS) {
        ms->dims = (size_t)d->valuedouble;
        for (size_t i = 0; i < ms->dims; i++) {
            snprintf(ms->name[i], sizeof ms->name[i], "x%zu", i);
            ms->lo[i] = ms->hi[i] = NAN;
        }
    } else {
        return -1;
    }
    /* Ranges in the numeric form (and in the named form too, if the spec lists them). */
    const cJSON *ranges = cJSON_GetObjectItemCaseSensitive(spec, "ranges");
    if (cJSON_GetArraySize(ranges) == (int)ms->dims) {
        size_t i = 0;
        const cJSON *r;
        cJSON_ArrayForEach(r, ranges)
        {
            if (cJSON_GetArraySize(r) == 2 && cJSON_IsNumber(cJSON_GetArrayItem(r, 0)) &&
                cJSON_IsNumber(cJSON_GetArrayItem(r, 1))) {
                ms->lo[i] = cJSON_GetArrayItem(r, 0)->valuedouble;
                ms->hi[i] = cJSON_GetArrayItem(r, 1)->valuedouble;
            }
            i++;
        }
    }
    const cJSON *ru = cJSON_GetObjectItemCaseSensitive(spec, "reward_unit");
    if (cJSON_IsString(ru))
        snprintf(ms->reward_unit, sizeof ms->reward_unit, "%s", ru->valuestring);
    const cJSON *ps = cJSON_GetObjectItemCaseSensitive(spec, "period_s");
    if (cJSON_IsNumber(ps))
        ms->period_s = ps->valuedouble;
    return 0;
}

int cli_spec(struct cli *cli, const char *model, struct mspec *ms, cJSON **reply)
{
    int ex = cli_connect(cli);
    if (ex)
        return ex;
    const char *json = NULL;
    int rc = worth_model_info(cli->c, model, &json);
    if (rc != 0)
        return cli_fail(cli, rc);
    cJSON *root = json ? cJSON_Parse(json) : NULL;
    if (mspec_read(root, ms) != 0) {
        cJSON_Delete(root);
        return cli_error(EXIT_SERVER, "internal: model.get reply for %s has no dims", model);
    }
    if (reply)
        *reply = root;
    else
        cJSON_Delete(root);
    return EXIT_OK;
}

int cli_model(struct cli *cli, const char *model, size_t *dims, cJSON **reply)
{
    struct mspec ms;
    int ex = cli_spec(cli, model, &ms, reply);
    if (ex == EXIT_OK)
        *dims = ms.dims;
    return ex;
}

void mspec_label(const struct mspec *ms, size_t d, char *buf, size_t len)
{
    if (!ms->named)
        snprintf(buf, len, "x[%zu]", d);
    else if (ms->unit[d][0])
        snprintf(buf, len, "%s [%s]", ms->name[d], ms->unit[d]);
    else
        snprintf(buf, len, "%s", ms->name[d]);
}

void mspec_vlabel(const struct mspec *ms, const char *what, char *buf, size_t len)
{
    if (ms && ms->reward_unit[0])
        snprintf(buf, len, "%s [%s]", what, ms->reward_unit);
    else
        snprintf(buf, len, "%s", what);
}

long mspec_dim(const struct mspec *ms, const char *word)
{
    for (size_t d = 0; d < ms->dims; d++)
        if (strcmp(ms->name[d], word) == 0)
            return (long)d;
    long long i;
    if (parse_int(word, 0, (long long)ms->dims - 1, &i) == 0)
        return (long)i;
    return -1;
}

void mspec_names(const struct mspec *ms, char *buf, size_t len)
{
    size_t n = 0;
    buf[0] = 0;
    for (size_t d = 0; d < ms->dims && n + 1 < len; d++) {
        int w = snprintf(buf + n, len - n, "%s%s", d ? ", " : "", ms->name[d]);
        if (w < 0 || (size_t)w >= len - n) {
            if (len > 4)
                memcpy(buf + len - 4, "...", 4);
            break;
        }
        n += (size_t)w;
    }
}

int parse_args(const char *cmd, int argc, char **argv, const struct opt *opts, char **pos,
               int maxpos, int minpos, int *npos)
{
    int n = 0, posonly = 0;
    for (int k = 1; k < argc; k++) {
        const char *a = argv[k];
        if (!posonly && strcmp(a, "--") == 0) {
            posonly = 1;
            continue;
        }
        if (!posonly && a[0] == '-' && a[1] == '-') {
            const struct opt *o = opts;
            for (; o && o->name; o++)
                if (strcmp(o->name, a) == 0)
                    break;
            if (!o || !o->name)
                return cli_usage(cmd, "unknown option %s", a);
            if (o->flag) {
                *o->flag = 1;
            } else {
                if (k + 1 >= argc)
                    return cli_usage(cmd, "%s needs a value", a);
                *o->value = argv[++k];
            }
            continue;
        }
        if (n >= maxpos)
            return cli_usage(cmd, "unexpected argument \"%s\"", a);
        pos[n++] = argv[k];
    }
    if (n < minpos)
        return cli_usage(cmd, "missing arguments");
    *npos = n;
    return EXIT_OK;
}

const char *show_cell(const char *s, char *buf, size_t len)
{
    size_t i = 0;
    for (; s[i] && i + 4 < len; i++)
        buf[i] = s[i] >= 0x20 && s[i] < 0x7f ? s[i] : '?';
    if (s[i] && i >= 3)
        memcpy(buf + i - 3, "...", 3);
    buf[i] = 0;
    return buf;
}

int cli_tty(void)
{
    return isatty(STDERR_FILENO);
}

int cli_confirm(const char *cmd, int yes, const char *fmt, ...)
{
    if (yes || !isatty(STDIN_FILENO) || !isatty(STDERR_FILENO))
        return 1; /* --yes, or a script: nobody to ask */
    va_list ap;
    va_start(ap, fmt);
    vfprintf(stderr, fmt, ap);
    va_end(ap);
    fputs(" [y/N] ", stderr);
    fflush(stderr);
    char line[32];
    int ok = fgets(line, sizeof line, stdin) && (strcmp(line, "y\n") == 0 ||
                                                 strcmp(line, "yes\n") == 0 ||
                                                 strcmp(line, "Y\n") == 0);
    if (!ok)
        fprintf(stderr, "worth: %s: not confirmed; nothing done\n", cmd);
    return ok;
}

void fmt_num(char *buf, size_t len, double v)
{
    if (isnan(v))
        snprintf(buf, len, "-");
    else
        snprintf(buf, len, "%.6g", v);
}

int cli_model_arg(struct cli *cli, const char *cmd, const char *op, int argc, char **argv,
                  const char **model)
{
    char *pos[1];
    int np;
    *model = NULL;
    int ex = parse_args(cmd, argc, argv, NULL, pos, 1, 1, &np);
    if (ex)
        return ex;
    if (cli->json)
        return cli_raw(cli, cli_request(op, pos[0]));
    *model = pos[0];
    return EXIT_OK;
}

int cli_fetch(struct cli *cli, const char *model,
              int (*fetch)(worth_client *, const char *, const char **), cJSON **r)
{
    int ex = cli_connect(cli);
    if (ex)
        return ex;
    const char *json;
    int rc = fetch(cli->c, model, &json);
    if (rc)
        return cli_fail(cli, rc);
    *r = cli_reply(json);
    return *r ? EXIT_OK : EXIT_SERVER;
}

int cli_query(struct cli *cli, const char *cmd, int argc, char **argv,
              int (*fetch)(worth_client *, const char *, const char **), cJSON **r)
{
    const char *model;
    int ex = cli_model_arg(cli, cmd, cmd, argc, argv, &model);
    if (!model)
        return ex;
    return cli_fetch(cli, model, fetch, r);
}
