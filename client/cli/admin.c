/*
 * admin.c - the commands of `worth` that change or keep a model's state:
 * checkpoint, checkpoints (the list), rollback (optionally replaying the log
 * without a window), backup (of worthd's whole database) and train (a replay
 * or lstd estimator, with its progress).
 *
 * Arguments are checked before connecting (a rollback window, a label, a pass
 * count); each command calls one typed function of libworth-client and prints
 * a one-line answer or a table, or with --json worthd's reply line unchanged
 * (train rebuilds it: see the XXX there).  Runs on the CLI's only thread; owns
 * nothing beyond one command's call.
 */
#include <limits.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "cli.h"

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
    if (cli->json)
        return cli_raw(cli, cli_request_opt("checkpoint", pos[0], "label", label));
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

int cmd_checkpoints(struct cli *cli, int argc, char **argv)
{
    cJSON *r = NULL;
    int ex = cli_query(cli, "checkpoints", argc, argv, worth_checkpoints, &r);
    if (!r)
        return ex;
    const cJSON *list = json_get(r, "checkpoints"), *e;
    struct table *t = table_list(list, "no checkpoints", 5, &ex);
    if (!t) {
        cJSON_Delete(r);
        return ex;
    }
    table_rowv(t, "CHECKPOINT", "SEQ", "CREATED", "SIZE", "LABEL");
    cJSON_ArrayForEach(e, list)
    {
        char id[32], seq[32], created[64] = "-", size[32], label[128];
        fmt_json(id, sizeof id, json_get(e, "checkpoint"));
        fmt_json(seq, sizeof seq, json_get(e, "seq"));
        fmt_json(size, sizeof size, json_get(e, "size"));
        const cJSON *l = json_get(e, "label");
        snprintf(label, sizeof label, "%s", cJSON_IsString(l) ? l->valuestring : "");
        const cJSON *c = json_get(e, "created_at");
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
    int np, replay = 0, yes = 0;
    const char *xseq = NULL, *xtime = NULL;
    const struct opt opts[] = {{"--replay", NULL, &replay},
                               {"--exclude-seq", &xseq, NULL},
                               {"--exclude-time", &xtime, NULL},
                               {"--yes", NULL, &yes},
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
        char why[300];
        if (parse_time_window(xtime, &lo, &hi, why, sizeof why) != 0)
            return cli_usage("rollback",
                             "--exclude-time wants T0/T1 (ISO-8601 with a zone, or seconds since "
                             "1970; A:B for numbers) with T0 <= T1, not \"%s\": %s",
                             xtime, why);
        exclude = 't';
    }
    if (exclude)
        replay = 1;
    if (!cli_confirm("rollback", yes, "roll %s back to checkpoint %lld%s?", pos[0], id,
                     replay ? " and re-learn the log after it" : " (what it learnt since is undone)"))
        return EXIT_DECLINED;
    if (cli->json) {
        cJSON *r = cli_request("rollback", pos[0]);
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
    if (cli->json)
        return cli_raw(cli, cli_request_opt("backup", NULL, "name", name));
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
        cJSON_ArrayForEach(e, json_get(json_get(r, "spec"), "estimators"))
        {
            const cJSON *k = json_get(e, "kind"), *n = json_get(e, "name");
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
