/*
 * fleet.c - `worth fleet`: the client of a fleet of worthd nodes on NATS
 * JetStream (doc/fleet.md).  Speaks NATS directly (libnats), not worthd's
 * socket: transitions go into the stream, questions to a shard's owner.
 *
 *   status                  shards, owners, lag per shard; the nodes
 *   create MODEL SPEC|-     checks the spec with the owner, then puts it in the stream
 *   feed MODEL FILE|-       one JSON transition (or {"batch":[...]}) a line, into the stream
 *   value MODEL X1 X2 ...   the values of a state
 *   ask MODEL JSON          any question (value, stats, state, check, checkpoint), answer as is
 *   dump [MODEL]            the model's (or every) message in stream order, a JSON line each
 *   rollback MODEL WINDOWS  re-learn the model from the stream without those windows
 *   metrics NODE            the node's figures (Prometheus text; --json: JSON)
 *
 * feed is in fleet_feed.c.
 */
#include <inttypes.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include <nats/nats.h>

#include "cli.h"
#include "fleet_impl.h"
#include "worth/errors.h"

/* --- create, value, ask --- */

static char *slurp(FILE *in)
{
    size_t cap = 4096, n = 0;
    char *buf = malloc(cap);
    for (size_t got; buf && (got = fread(buf + n, 1, cap - n - 1, in)) > 0;) {
        n += got;
        if (n + 1 == cap) {
            char *g = realloc(buf, cap *= 2);
            if (!g) {
                free(buf);
                return NULL;
            }
            buf = g;
        }
    }
    if (buf)
        buf[n] = 0;
    return buf;
}

static int fleet_create(struct fleet *f, int argc, char **argv)
{
    const char *model = argc > 1 ? argv[1] : NULL, *path = argc > 2 ? argv[2] : NULL;
    int ex = model_arg("create", model);
    if (ex)
        return ex;
    if (!path || argc > 3)
        return cli_usage("fleet", "create: give MODEL and a SPEC file (JSON, as model.create) "
                                  "or -");
    FILE *in = open_in(path);
    char *text = in ? slurp(in) : NULL;
    if (in && in != stdin)
        fclose(in);
    cJSON *spec = text ? cJSON_Parse(text) : NULL;
    free(text);
    if (!cJSON_IsObject(spec)) {
        cJSON_Delete(spec);
        return cli_error(EXIT_USAGE, "fleet create: %s is not a JSON object", path);
    }
    cJSON_DeleteItemFromObjectCaseSensitive(spec, "op");
    cJSON_DeleteItemFromObjectCaseSensitive(spec, "model");
    cJSON_AddStringToObject(spec, "op", "model.create");
    cJSON_AddStringToObject(spec, "model", model);
    cJSON *check = cJSON_CreateObject();
    cJSON_AddStringToObject(check, "op", "check");
    cJSON_AddItemReferenceToObject(check, "spec", spec);
    char *req = cJSON_PrintUnformatted(check), *body = cJSON_PrintUnformatted(spec);
    cJSON_Delete(check);
    cJSON_Delete(spec);
    cJSON *ans = NULL;
    if ((ex = fleet_connect(f)) == EXIT_OK && (ex = fleet_ask(f, model, req, &ans)) == EXIT_OK &&
        (ex = answer_ok(ans)) == EXIT_OK && cJSON_IsTrue(json_get(ans, "exists")))
        ex = cli_error(EXIT_SERVER, "%s: model %s exists in the fleet",
                       worth_err_name(WORTH_E_MODEL_EXISTS), model);
    cJSON_Delete(ans);
    ans = NULL;
    if (ex == EXIT_OK) {
        char subj[128], msgid[160];
        snprintf(subj, sizeof subj, "worth.in.%s", model);
        snprintf(msgid, sizeof msgid, "create-%s-%ld", model, (long)time(NULL));
        jsPubOptions po;
        jsPubOptions_Init(&po);
        po.MsgId = msgid;
        jsPubAck *pa = NULL;
        natsStatus st = js_Publish(&pa, f->js, subj, body, (int)strlen(body), &po, NULL);
        jsPubAck_Destroy(pa);
        if (st != NATS_OK)
            ex = cli_error(EXIT_CONNECT, "fleet create: the stream did not take %s's spec: %s",
                           model, natsStatus_GetText(st));
    }
    /* The owner builds the model when it reaches the message: wait for it to answer. */
    for (int64_t end = fleet_mono_ms() + f->timeout_ms; ex == EXIT_OK;) {
        cJSON *st = NULL;
        if (fleet_ask(f, model, "{\"op\":\"stats\"}", &st) == EXIT_OK &&
            cJSON_IsTrue(json_get(st, "ok"))) {
            cJSON_Delete(st);
            if (!f->json)
                printf("created %s\n", model);
            break;
        }
        cJSON_Delete(st);
        if (fleet_mono_ms() > end) {
            ex = cli_error(EXIT_SERVER,
                           "fleet create: %s is in the stream but no owner built it "
                           "within the timeout; see the nodes' logs",
                           model);
            break;
        }
        usleep(50 * 1000);
    }
    free(req);
    free(body);
    if (f->nc)
        fleet_close(f);
    return ex;
}

static int fleet_value(struct fleet *f, int argc, char **argv)
{
    const char *model = argc > 1 ? argv[1] : NULL;
    int ex = model_arg("value", model);
    if (ex)
        return ex;
    if (argc < 3)
        return cli_usage("fleet", "value: missing the state X1 X2 ...");
    cJSON *req = cJSON_CreateObject();
    cJSON_AddStringToObject(req, "op", "value");
    cJSON *x = cJSON_AddArrayToObject(req, "x");
    for (int i = 2; i < argc; i++) {
        double v;
        if (parse_double(argv[i], &v) != 0) {
            cJSON_Delete(req);
            return cli_usage("fleet", "value: \"%s\" is not a finite number", argv[i]);
        }
        cJSON_AddItemToArray(x, cJSON_CreateNumber(v));
    }
    char *text = cJSON_PrintUnformatted(req);
    cJSON_Delete(req);
    cJSON *ans = NULL;
    if ((ex = fleet_connect(f)) == EXIT_OK && (ex = fleet_ask(f, model, text, &ans)) == EXIT_OK &&
        (ex = answer_ok(ans)) == EXIT_OK) {
        if (f->json) {
            char *s = cJSON_PrintUnformatted(ans);
            puts(s);
            free(s);
        } else {
            const cJSON *v = json_get(ans, "value"), *e = json_get(ans, "estimator");
            const cJSON *node = json_get(ans, "node");
            if (cJSON_IsNumber(v))
                printf("%.6g", v->valuedouble);
            else
                printf("null");
            printf("  (%s, %.0f transitions, answered by %s)\n",
                   cJSON_IsString(e) ? e->valuestring : "?",
                   cJSON_GetNumberValue(json_get(ans, "applied")),
                   cJSON_IsString(node) ? node->valuestring : "?");
        }
    }
    cJSON_Delete(ans);
    free(text);
    if (f->nc)
        fleet_close(f);
    return ex;
}

static int fleet_raw(struct fleet *f, int argc, char **argv)
{
    const char *model = argc > 1 ? argv[1] : NULL;
    int ex = model_arg("ask", model);
    if (ex)
        return ex;
    if (argc != 3)
        return cli_usage("fleet", "ask: give MODEL and one JSON request");
    cJSON *req = cJSON_Parse(argv[2]);
    int obj = cJSON_IsObject(req);
    cJSON_Delete(req);
    if (!obj)
        return cli_usage("fleet", "ask: the request is not a JSON object");
    cJSON *ans = NULL;
    if ((ex = fleet_connect(f)) == EXIT_OK &&
        (ex = fleet_ask(f, model, argv[2], &ans)) == EXIT_OK) {
        char *s = cJSON_PrintUnformatted(ans);
        puts(s);
        free(s);
        ex = cJSON_IsTrue(json_get(ans, "ok")) ? EXIT_OK : EXIT_SERVER;
    }
    cJSON_Delete(ans);
    if (f->nc)
        fleet_close(f);
    return ex;
}

static int fleet_rollback(struct fleet *f, int argc, char **argv)
{
    const char *model = argc > 1 ? argv[1] : NULL;
    int ex = model_arg("rollback", model);
    if (ex)
        return ex;
    cJSON *req = cJSON_CreateObject();
    cJSON_AddStringToObject(req, "op", "rollback");
    cJSON *wins = cJSON_AddArrayToObject(req, "exclude");
    for (int i = 2; i < argc; i++) {
        int by_seq = strcmp(argv[i], "--exclude-seq") == 0;
        if ((!by_seq && strcmp(argv[i], "--exclude-t") != 0) || i + 1 == argc) {
            cJSON_Delete(req);
            return cli_usage("fleet",
                             "rollback: give --exclude-seq LO:HI or --exclude-t T0/T1, "
                             "not \"%s\"",
                             argv[i]);
        }
        double lh[2];
        char err[200];
        if (parse_time_window(argv[++i], &lh[0], &lh[1], err, sizeof err) != 0) {
            cJSON_Delete(req);
            return cli_usage("fleet", "rollback: %s: %s", argv[i], err);
        }
        cJSON *w = cJSON_CreateObject();
        cJSON_AddItemToObject(w, by_seq ? "seq" : "t", cJSON_CreateDoubleArray(lh, 2));
        cJSON_AddItemToArray(wins, w);
    }
    if (cJSON_GetArraySize(wins) == 0) {
        cJSON_Delete(req);
        return cli_usage("fleet", "rollback: give at least one window to leave out");
    }
    char *text = cJSON_PrintUnformatted(req);
    cJSON_Delete(req);
    cJSON *ans = NULL;
    if ((ex = fleet_connect(f)) == EXIT_OK && (ex = fleet_ask(f, model, text, &ans)) == EXIT_OK)
        ex = answer_ok(ans);
    free(text);
    double seq = cJSON_GetNumberValue(json_get(ans, "seq"));
    double before = cJSON_GetNumberValue(json_get(ans, "rollbacks"));
    cJSON_Delete(ans);
    /* The owner re-learns when it reaches the rollback in the stream: wait for it. */
    for (int64_t end = fleet_mono_ms() + f->timeout_ms; ex == EXIT_OK;) {
        cJSON *st = NULL;
        if (fleet_ask(f, model, "{\"op\":\"stats\"}", &st) == EXIT_OK &&
            cJSON_GetNumberValue(json_get(st, "rollbacks")) > before &&
            cJSON_GetNumberValue(json_get(st, "seq")) >= seq) {
            printf("rolled back %s: %.0f transitions re-learnt, %.0f left out\n", model,
                   cJSON_GetNumberValue(json_get(st, "applied")),
                   cJSON_GetNumberValue(json_get(st, "excluded")));
            cJSON_Delete(st);
            break;
        }
        cJSON_Delete(st);
        if (fleet_mono_ms() > end) {
            ex = cli_error(EXIT_SERVER,
                           "fleet rollback: %s's rollback is in the stream (seq "
                           "%.0f) but not applied within the timeout; see the "
                           "owner's log",
                           model, seq);
            break;
        }
        usleep(50 * 1000);
    }
    if (f->nc)
        fleet_close(f);
    return ex;
}

/* `worth fleet metrics NODE`: the node's figures in Prometheus's text format. */
static int fleet_metrics(struct fleet *f, int argc, char **argv)
{
    if (argc != 2)
        return cli_usage("fleet", "metrics: give one NODE");
    int ex = fleet_connect(f);
    if (ex)
        return ex;
    char subj[128];
    snprintf(subj, sizeof subj, "worth.node.%s", argv[1]);
    natsMsg *ans = NULL;
    natsStatus st = natsConnection_RequestString(
        &ans, f->nc, subj, f->json ? "{\"op\":\"status\"}" : "{\"op\":\"metrics\"}", f->timeout_ms);
    if (st == NATS_OK)
        printf("%.*s%s", natsMsg_GetDataLength(ans), natsMsg_GetData(ans), f->json ? "\n" : "");
    else
        ex = cli_error(st == NATS_NO_RESPONDERS ? EXIT_SERVER : EXIT_CONNECT,
                       "no node %s answers: %s", argv[1], natsStatus_GetText(st));
    natsMsg_Destroy(ans);
    fleet_close(f);
    return ex;
}

/* --- dump, status --- */

static int fleet_dump(struct fleet *f, int argc, char **argv)
{
    const char *model = argc > 1 ? argv[1] : NULL;
    int ex = argc > 2 ? cli_usage("fleet", "dump: one MODEL, or none for every model")
             : model  ? model_arg("dump", model)
                      : EXIT_OK;
    if (ex || (ex = fleet_connect(f)) != EXIT_OK)
        return ex;
    char filter[128], name[96];
    snprintf(filter, sizeof filter, model ? "worth.t.*.%s" : "worth.t.>", model);
    /* A durable consumer replicated like the stream, deleted at the end (and by the server
     * 30 s after this process, were it killed): an ephemeral one has a single replica, which
     * cannot be created while the server it is placed on is down. */
    snprintf(name, sizeof name, "dump_%ld_%ld", (long)getpid(), (long)time(NULL));
    jsConsumerConfig cc;
    jsConsumerConfig_Init(&cc);
    cc.Durable = name;
    cc.FilterSubject = filter;
    cc.AckPolicy = js_AckNone;
    cc.DeliverPolicy = js_DeliverAll;
    cc.InactiveThreshold = 30LL * 1000 * 1000 * 1000;
    jsConsumerInfo *ci = NULL;
    jsErrCode jerr = 0;
    /* Right after a server of the cluster is lost, creating a replicated consumer can take
     * some seconds while the groups elect: tried again until the timeout. */
    natsStatus st;
    for (int64_t end = fleet_mono_ms() + f->timeout_ms;;) {
        st = js_AddConsumer(&ci, f->js, "WORTH", &cc, &f->jo, &jerr);
        jsConsumerInfo_Destroy(ci);
        ci = NULL;
        if (st == NATS_OK || fleet_mono_ms() > end)
            break;
        js_DeleteConsumer(f->js, "WORTH", name, &f->jo, NULL);
        usleep(200 * 1000);
    }
    jsSubOptions so;
    jsSubOptions_Init(&so);
    so.Stream = "WORTH";
    so.Consumer = name;
    natsSubscription *sub = NULL;
    if (st == NATS_OK)
        st = js_PullSubscribe(&sub, f->js, filter, name, &f->jo, &so, &jerr);
    if (st != NATS_OK) {
        js_DeleteConsumer(f->js, "WORTH", name, &f->jo, NULL);
        fleet_close(f);
        return cli_error(EXIT_CONNECT, "fleet dump: no consumer on the stream: %s (%d)",
                         natsStatus_GetText(st), (int)jerr);
    }
    uint64_t n = 0;
    for (int done = 0; !done;) {
        natsMsgList list = {0};
        st = natsSubscription_Fetch(&list, sub, 1000, 1000, NULL);
        if (st != NATS_OK) {
            natsMsgList_Destroy(&list);
            break; /* nothing more within a second */
        }
        for (int i = 0; i < list.Count; i++) {
            jsMsgMetaData *meta = NULL;
            if (natsMsg_GetMetaData(&meta, list.Msgs[i]) != NATS_OK)
                continue;
            const char *subj = natsMsg_GetSubject(list.Msgs[i]);
            const char *mname = strrchr(subj, '.');
            const char *data = natsMsg_GetData(list.Msgs[i]);
            int len = natsMsg_GetDataLength(list.Msgs[i]);
            cJSON *body = cJSON_ParseWithLength(data, (size_t)len);
            if (body) { /* as it is stored */
                printf("{\"seq\":%" PRIu64 ",\"model\":\"%s\",\"msg\":%.*s}\n",
                       meta->Sequence.Stream, mname ? mname + 1 : subj, len, data);
            } else { /* not JSON (the owner counted it rejected): as a string */
                char *raw = strndup(data, (size_t)len);
                cJSON *str = cJSON_CreateString(raw ? raw : "");
                char *q = cJSON_PrintUnformatted(str);
                printf("{\"seq\":%" PRIu64 ",\"model\":\"%s\",\"raw\":%s}\n", meta->Sequence.Stream,
                       mname ? mname + 1 : subj, q ? q : "\"\"");
                free(q);
                cJSON_Delete(str);
                free(raw);
            }
            cJSON_Delete(body);
            done = meta->NumPending == 0;
            jsMsgMetaData_Destroy(meta);
            n++;
        }
        natsMsgList_Destroy(&list);
    }
    natsSubscription_Unsubscribe(sub);
    natsSubscription_Destroy(sub);
    js_DeleteConsumer(f->js, "WORTH", name, &f->jo, NULL);
    fleet_close(f);
    fprintf(stderr, "worth: fleet dump: %s: %" PRIu64 " message%s\n", model ? model : "every model",
            n, n == 1 ? "" : "s");
    return EXIT_OK;
}

static int fleet_status(struct fleet *f)
{
    int ex = fleet_connect(f);
    if (ex)
        return ex;
    kvStore *kv = NULL;
    if (js_KeyValue(&kv, f->js, "worth_lease") != NATS_OK) {
        fleet_close(f);
        return cli_error(EXIT_SERVER, "no fleet here: the bucket worth_lease does not exist (no "
                                      "node has started)");
    }
    kvKeysList keys = {0};
    kvStore_Keys(&keys, kv, NULL);
    cJSON *out = cJSON_CreateObject();
    cJSON *shards = cJSON_AddArrayToObject(out, "shards"),
          *nodes = cJSON_AddArrayToObject(out, "nodes");
    for (int pass = 0; pass < 2; pass++)
        for (int i = 0; i < keys.Count; i++) {
            const char *k = keys.Keys[i];
            int is_node = strncmp(k, "n.", 2) == 0;
            if (is_node != pass)
                continue;
            kvEntry *e = NULL;
            if (kvStore_Get(&e, kv, k) != NATS_OK)
                continue;
            cJSON *v = cJSON_ParseWithLength(kvEntry_Value(e), (size_t)kvEntry_ValueLen(e));
            kvEntry_Destroy(e);
            if (!v)
                continue;
            if (is_node) {
                cJSON_AddItemToArray(nodes, v);
                continue;
            }
            const cJSON *owner = json_get(v, "node");
            cJSON_AddNumberToObject(v, "shard", atof(k + 1));
            if (cJSON_IsString(owner)) {
                char cons[128];
                snprintf(cons, sizeof cons, "w_%s_s%s", owner->valuestring, k + 1);
                jsConsumerInfo *ci = NULL;
                if (js_GetConsumerInfo(&ci, f->js, "WORTH", cons, &f->jo, NULL) == NATS_OK) {
                    cJSON_AddNumberToObject(v, "lag", (double)ci->NumPending);
                    cJSON_AddNumberToObject(v, "taken", (double)ci->Delivered.Consumer);
                    jsConsumerInfo_Destroy(ci);
                }
            }
            cJSON_AddItemToArray(shards, v);
        }
    kvKeysList_Destroy(&keys);
    kvStore_Destroy(kv);
    if (f->json) {
        char *s = cJSON_PrintUnformatted(out);
        puts(s);
        free(s);
    } else {
        printf("%-6s %-20s %10s %10s\n", "shard", "owner", "taken", "lag");
        for (const cJSON *s = shards->child; s; s = s->next) {
            const cJSON *o = json_get(s, "node"), *l = json_get(s, "lag");
            const cJSON *q = json_get(s, "taken");
            char lag[24] = "?";
            if (cJSON_IsNumber(l))
                snprintf(lag, sizeof lag, "%.0f", l->valuedouble);
            printf("%-6.0f %-20s %10.0f %10s\n", cJSON_GetNumberValue(json_get(s, "shard")),
                   cJSON_IsString(o) ? o->valuestring : "-",
                   cJSON_IsNumber(q) ? q->valuedouble : 0.0, lag);
        }
        printf("\n%-20s %s\n", "node", "shards");
        for (const cJSON *n = nodes->child; n; n = n->next)
            printf("%-20s %.0f\n",
                   cJSON_IsString(json_get(n, "node")) ? json_get(n, "node")->valuestring : "?",
                   cJSON_GetNumberValue(json_get(n, "shards")));
    }
    cJSON_Delete(out);
    fleet_close(f);
    return EXIT_OK;
}

int cmd_fleet(struct cli *cli, int argc, char **argv)
{
    struct fleet f = {.urls = getenv("WORTH_NATS"),
                      .timeout_ms = cli->timeout_ms ? cli->timeout_ms : 10000,
                      .json = cli->json};
    int i = 1;
    for (; i < argc && argv[i][0] == '-' && argv[i][1]; i++) {
        if (strcmp(argv[i], "--nats") == 0 && i + 1 < argc)
            f.urls = argv[++i];
        else if (strcmp(argv[i], "--via") == 0 && i + 1 < argc)
            f.via = argv[++i];
        else if (strcmp(argv[i], "--json") == 0)
            f.json = 1;
        else
            return cli_usage("fleet", "unknown option \"%s\"", argv[i]);
    }
    if (!f.urls || !*f.urls)
        return cli_usage("fleet", "give the NATS servers (--nats URLS or $WORTH_NATS)");
    if (i == argc)
        return cli_usage("fleet", "missing the subcommand (status, create, feed, value, ask, "
                                  "dump, rollback, metrics)");
    const char *sub = argv[i];
    argc -= i;
    argv += i;
    if (strcmp(sub, "status") == 0)
        return fleet_status(&f);
    if (strcmp(sub, "create") == 0)
        return fleet_create(&f, argc, argv);
    if (strcmp(sub, "feed") == 0)
        return fleet_feed(&f, argc, argv);
    if (strcmp(sub, "value") == 0)
        return fleet_value(&f, argc, argv);
    if (strcmp(sub, "ask") == 0)
        return fleet_raw(&f, argc, argv);
    if (strcmp(sub, "dump") == 0)
        return fleet_dump(&f, argc, argv);
    if (strcmp(sub, "rollback") == 0)
        return fleet_rollback(&f, argc, argv);
    if (strcmp(sub, "metrics") == 0)
        return fleet_metrics(&f, argc, argv);
    return cli_usage("fleet", "unknown subcommand \"%s\"", sub);
}
