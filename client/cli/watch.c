/*
 * watch.c - `worth watch`: a refreshing view of a model's stats.
 *
 * Every interval it asks worthd for `stats` and redraws a table of the model's
 * counters and each estimator's figures, with the ingest rate since the last
 * refresh.  On a terminal it redraws in place and quits on q (the terminal is
 * put in non-canonical mode and restored on every exit path); elsewhere it
 * prints one block per refresh.  --count bounds the number of refreshes
 * (for scripts and tests).
 */
#include <math.h>
#include <poll.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <termios.h>
#include <time.h>
#include <unistd.h>

#include "cli.h"
#include "isotime.h"

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

static double getnum(const cJSON *o, const char *k)
{
    const cJSON *v = cJSON_GetObjectItemCaseSensitive(o, k);
    return cJSON_IsNumber(v) ? v->valuedouble : NAN;
}

/* Draws one refresh; returns EXIT_OK or the error exit. */
static int draw(struct cli *cli, const char *model, const struct mspec *ms, int tty, double *last_t,
                double *last_n)
{
    const char *json;
    int rc = worth_stats(cli->c, model, &json);
    if (rc)
        return cli_fail(cli, rc);
    cJSON *r = cJSON_Parse(json);
    if (!r)
        return cli_error(EXIT_SERVER, "worthd sent an unreadable stats reply");
    double t = now_s(), n = getnum(r, "received");
    double rate = *last_t > 0 && t > *last_t ? (n - *last_n) / (t - *last_t) : NAN;
    *last_t = t;
    *last_n = n;
    if (tty)
        fputs("\033[H\033[2J", stdout); /* home, clear */
    char a[64], b[64], c[64], d[64], e[64], f[64];
    printf("worth watch %s   (q quits)\n", model);
    if (ms->named) {
        fputs("dims:", stdout);
        for (size_t d = 0; d < ms->dims; d++) {
            char l[128];
            mspec_label(ms, d, l, sizeof l);
            printf("%s %s", d ? "," : "", l);
        }
        fputc('\n', stdout);
    }
    if (ms->reward_unit[0])
        printf("values, rewards and errors in %s\n", ms->reward_unit);
    fputc('\n', stdout);
    fmt_num(a, sizeof a, getnum(r, "received"));
    fmt_num(b, sizeof b, getnum(r, "applied"));
    fmt_num(c, sizeof c, getnum(r, "queue"));
    fmt_num(d, sizeof d, rate);
    printf("received %s   applied %s   queue %s   rate %s/s\n", a, b, c, d);
    const cJSON *dr = cJSON_GetObjectItemCaseSensitive(r, "drift");
    fmt_num(a, sizeof a, getnum(dr, "alarms"));
    fmt_num(b, sizeof b, getnum(dr, "statistic"));
    fmt_num(c, sizeof c, getnum(dr, "last_alarm_step"));
    fmt_num(d, sizeof d, getnum(r, "spread"));
    /* The banner says the state now: an alarm shows while it is active, and goes when it clears. */
    const cJSON *act = cJSON_GetObjectItemCaseSensitive(dr, "active");
    const cJSON *side = cJSON_GetObjectItemCaseSensitive(dr, "side");
    char th[32];
    fmt_num(th, sizeof th, getnum(dr, "threshold"));
    printf("drift alarms %s (last at step %s)   statistic %s of %s   spread %s%s%s\n", a, c, b, th,
           d, ms->reward_unit[0] ? " " : "", ms->reward_unit);
    if (cJSON_IsTrue(act))
        printf("<< DRIFT NOW (%s): the TD error moved; see 'worth events' for its onset and "
               "consider a rollback to the pre-drift checkpoint\n",
               cJSON_IsString(side) && side->valuestring[0] ? side->valuestring : "?");
    const cJSON *in, *chk;
    in = cJSON_GetObjectItemCaseSensitive(r, "inputs");
    cJSON_ArrayForEach(chk, cJSON_GetObjectItemCaseSensitive(in, "checks"))
    {
        const cJSON *k = cJSON_GetObjectItemCaseSensitive(chk, "kind");
        const cJSON *dim = cJSON_GetObjectItemCaseSensitive(chk, "dim");
        const cJSON *di = cJSON_GetObjectItemCaseSensitive(chk, "dim_index");
        const cJSON *src = cJSON_GetObjectItemCaseSensitive(chk, "source");
        char since[40] = "?";
        double st = getnum(chk, "since_t");
        if (isfinite(st))
            isotime_format(st, since, sizeof since);
        printf("<< INPUT %s: ", cJSON_IsString(k) ? k->valuestring : "?");
        if (cJSON_IsString(dim))
            printf("%s ", dim->valuestring);
        else if (cJSON_IsNumber(di))
            printf("x%d ", (int)di->valuedouble);
        printf("of source \"%s\" since %s\n", cJSON_IsString(src) ? src->valuestring : "", since);
    }
    fputc('\n', stdout);
    struct table *tb = table_new(10);
    if (tb) {
        char h[3][64];
        mspec_vlabel(ms, "td_rms", h[0], sizeof h[0]);
        mspec_vlabel(ms, "td_last", h[1], sizeof h[1]);
        mspec_vlabel(ms, "realised_rms", h[2], sizeof h[2]);
        table_rowv(tb, "estimator", "kind", "health", "updates", h[0], h[1], "guarded", h[2],
                   "in_95%", "drift");
        const cJSON *est, *pn = cJSON_GetObjectItemCaseSensitive(
                              cJSON_GetObjectItemCaseSensitive(r, "primary"), "name");
        cJSON_ArrayForEach(est, cJSON_GetObjectItemCaseSensitive(r, "estimators"))
        {
            const cJSON *kind = cJSON_GetObjectItemCaseSensitive(est, "kind");
            const cJSON *hl = cJSON_GetObjectItemCaseSensitive(est, "health");
            fmt_num(a, sizeof a, getnum(est, "updates"));
            fmt_num(b, sizeof b, getnum(est, "td_rms"));
            fmt_num(c, sizeof c, getnum(est, "td_last"));
            fmt_num(e, sizeof e, getnum(est, "guarded"));
            snprintf(f, sizeof f, "%s", cJSON_IsString(kind) ? kind->valuestring : "?");
            char g[64], cv[64], nm[72];
            fmt_num(g, sizeof g,
                    getnum(cJSON_GetObjectItemCaseSensitive(est, "realised"), "rms_window"));
            fmt_num(cv, sizeof cv,
                    getnum(cJSON_GetObjectItemCaseSensitive(est, "coverage"), "interval95"));
            /* Its own drift test: the statistic, "!" while it stands in alarm. */
            const cJSON *dv = cJSON_GetObjectItemCaseSensitive(est, "drift");
            char dr[72];
            fmt_num(dr, sizeof dr - 2, getnum(dv, "statistic"));
            if (cJSON_IsTrue(cJSON_GetObjectItemCaseSensitive(dv, "active")))
                strcat(dr, " !");
            /* The headline is marked *: the estimator whose value the model answers. */
            int head = cJSON_IsString(pn) && strcmp(pn->valuestring, est->string) == 0;
            snprintf(nm, sizeof nm, "%.63s%s", est->string, head ? " *" : "");
            table_rowv(tb, nm, f, cJSON_IsString(hl) ? hl->valuestring : "?", a, b, c, e, g, cv,
                       dr);
        }
        table_print(tb, stdout);
        table_free(tb);
    }
    fflush(stdout);
    cJSON_Delete(r);
    return EXIT_OK;
}

int cmd_watch(struct cli *cli, int argc, char **argv)
{
    const char *every_s = NULL, *count_s = NULL;
    struct opt opts[] = {
        {"--every", &every_s, NULL}, {"--count", &count_s, NULL}, {NULL, NULL, NULL}};
    char *pos[1];
    int np;
    int ex = parse_args("watch", argc, argv, opts, pos, 1, 1, &np);
    if (ex)
        return ex;
    double every = 1.0;
    long long count = -1;
    if (every_s && (parse_double(every_s, &every) || every < 0.05 || every > 3600))
        return cli_usage("watch", "--every must be 0.05..3600 seconds");
    if (count_s && parse_int(count_s, 1, 1000000000, &count))
        return cli_usage("watch", "--count must be a positive integer");
    struct mspec ms;
    if ((ex = cli_spec(cli, pos[0], &ms, NULL)))
        return ex;
    int tty = isatty(STDIN_FILENO) && isatty(STDOUT_FILENO);
    struct termios saved;
    int raw = tty && tcgetattr(STDIN_FILENO, &saved) == 0;
    if (raw) {
        struct termios t = saved;
        t.c_lflag &= ~(tcflag_t)(ICANON | ECHO);
        t.c_cc[VMIN] = 0;
        t.c_cc[VTIME] = 0;
        tcsetattr(STDIN_FILENO, TCSANOW, &t);
    }
    double last_t = 0, last_n = 0;
    for (long long k = 0; count < 0 || k < count; k++) {
        if ((ex = draw(cli, pos[0], &ms, tty, &last_t, &last_n)))
            break;
        if (count >= 0 && k + 1 >= count)
            break;
        struct pollfd pf = {STDIN_FILENO, POLLIN, 0};
        if (poll(&pf, raw ? 1 : 0, (int)(every * 1000)) > 0) {
            char ch = 0;
            if (read(STDIN_FILENO, &ch, 1) == 1 && (ch == 'q' || ch == 'Q'))
                break;
        }
    }
    if (raw)
        tcsetattr(STDIN_FILENO, TCSANOW, &saved);
    return ex;
}
