/*
 * fleet_nats.c - the connection of `worth fleet` to NATS and the asking of a
 * model's owner, shared by fleet.c (the subcommands) and fleet_feed.c.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include <nats/nats.h>

#include "cli.h"
#include "common/natsurls.h"
#include "fleet_impl.h"
#include "worth/errors.h"

int64_t fleet_mono_ms(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (int64_t)ts.tv_sec * 1000 + ts.tv_nsec / 1000000;
}

int fleet_connect(struct fleet *f)
{
    natsOptions *o = NULL;
    natsStatus st = natsOptions_Create(&o);
    if (st == NATS_OK)
        st = natsurls_set(o, f->urls);
    if (st == NATS_OK)
        st = natsOptions_SetMaxReconnect(o, -1);
    if (st == NATS_OK)
        st = natsOptions_SetReconnectWait(o, 100);
    if (st == NATS_OK)
        st = natsOptions_SetName(o, "worth fleet");
    if (st == NATS_OK)
        st = natsConnection_Connect(&f->nc, o);
    natsOptions_Destroy(o);
    if (st != NATS_OK)
        return cli_error(EXIT_CONNECT, "cannot connect to NATS at %s: %s", f->urls,
                         natsStatus_GetText(st));
    jsOptions_Init(&f->jo);
    f->jo.Wait = f->timeout_ms;
    if (natsConnection_JetStream(&f->js, f->nc, &f->jo) != NATS_OK)
        return cli_error(EXIT_CONNECT, "no JetStream context: %s", nats_GetLastError(NULL));
    return EXIT_OK;
}

void fleet_close(struct fleet *f)
{
    jsCtx_Destroy(f->js);
    natsConnection_Destroy(f->nc);
    nats_CloseAndWait(5000); /* the library's threads end before exit: no use after free */
}

/* Sends req (a JSON text) about model; *out gets the parsed answer (owned).  Returns an exit
 * code; the error is printed unless it is the answer's own, or (quiet) EXIT_NO_OWNER when no
 * node answers. */
static int ask_in(struct fleet *f, const char *model, const char *req, cJSON **out, int quiet)
{
    char subj[160];
    if (f->via)
        snprintf(subj, sizeof subj, "worth.via.%s.%s", f->via, model);
    else
        snprintf(subj, sizeof subj, "worth.ask.%s", model);
    /* No owner (nobody subscribed, or a node answering that it holds the shard no longer)
     * means the request reached no model: asked again until the timeout, as a shard changes
     * hands in a few seconds. */
    for (int64_t end = fleet_mono_ms() + f->timeout_ms;;) {
        natsMsg *ans = NULL;
        natsStatus st = natsConnection_RequestString(&ans, f->nc, subj, req, f->timeout_ms);
        if (st == NATS_OK) {
            *out = cJSON_ParseWithLength(natsMsg_GetData(ans), (size_t)natsMsg_GetDataLength(ans));
            natsMsg_Destroy(ans);
            if (!*out)
                return cli_error(EXIT_SERVER, "the answer about %s is not JSON", model);
            const cJSON *code = json_get(json_get(*out, "error"), "code");
            if (!cJSON_IsString(code) || strcmp(code->valuestring, "no_owner") != 0 || quiet ||
                fleet_mono_ms() > end)
                return EXIT_OK;
            cJSON_Delete(*out);
            *out = NULL;
        } else if (quiet) {
            return EXIT_NO_OWNER;
        } else if (st != NATS_NO_RESPONDERS) {
            return cli_error(EXIT_CONNECT, "no answer about %s: %s", model, natsStatus_GetText(st));
        } else if (fleet_mono_ms() > end) {
            return cli_error(EXIT_SERVER,
                             "%s: no node owns model %s's shard now (or no node runs); retry "
                             "later",
                             worth_err_name(WORTH_E_NO_OWNER), model);
        }
        usleep(100 * 1000);
    }
}

int fleet_ask(struct fleet *f, const char *model, const char *req, cJSON **out)
{
    return ask_in(f, model, req, out, 0);
}

int ask_quiet(struct fleet *f, const char *model, const char *req, cJSON **out)
{
    return ask_in(f, model, req, out, 1);
}

/* EXIT_OK when ans says ok, else prints "worth: CODE: message" and returns EXIT_SERVER. */
int answer_ok(const cJSON *ans)
{
    if (cJSON_IsTrue(json_get(ans, "ok")))
        return EXIT_OK;
    const cJSON *e = json_get(ans, "error");
    const cJSON *c = json_get(e, "code"), *m = json_get(e, "message");
    return cli_error(EXIT_SERVER, "%s: %s", cJSON_IsString(c) ? c->valuestring : "error",
                     cJSON_IsString(m) ? m->valuestring : "(no message)");
}

int model_arg(const char *sub, const char *m)
{
    if (!m)
        return cli_usage("fleet", "%s: missing MODEL", sub);
    for (const char *p = m; *p; p++)
        if (!((*p >= 'a' && *p <= 'z') || (*p >= 'A' && *p <= 'Z') || (*p >= '0' && *p <= '9') ||
              *p == '_' || *p == '-'))
            return cli_usage("fleet",
                             "%s: model \"%s\": in a fleet a name is 1..63 of "
                             "[A-Za-z0-9_-] (no '.': it is the subject's separator)",
                             sub, m);
    if (!*m || strlen(m) > 63)
        return cli_usage("fleet", "%s: model \"%s\": 1..63 characters", sub, m);
    return EXIT_OK;
}

FILE *open_in(const char *path)
{
    return strcmp(path, "-") == 0 ? stdin : fopen(path, "r");
}
