/*
 * fleet_impl.h - what fleet.c (`worth fleet` and its questions) and fleet_feed.c
 * (`worth fleet feed`) share: the connection to NATS and the asking (fleet_nats.c).
 * Internal to the CLI; built only with libnats.  fleet.c -> fleet_feed.c ->
 * fleet_nats.c, and fleet.c -> fleet_nats.c.
 */
#ifndef WORTH_CLI_FLEET_IMPL_H
#define WORTH_CLI_FLEET_IMPL_H

#include <stdint.h>
#include <stdio.h>

#include <cjson/cJSON.h>
#include <nats/nats.h>

/* fleet_ask's return when nobody answers and it was asked to keep quiet about it. */
#define EXIT_NO_OWNER (-1)

struct fleet {
    const char *urls;
    const char *via; /* ask through this node, or NULL */
    int timeout_ms;
    int json;
    natsConnection *nc;
    jsCtx *js;
    jsOptions jo;
};

/* Connects f (nc, js); returns an exit code (message printed). */
int fleet_connect(struct fleet *f);
void fleet_close(struct fleet *f);
/* Sends req (a JSON text) about model; *out gets the parsed answer (owned).  Returns an exit
 * code; the error is printed unless it is the answer's own. */
int fleet_ask(struct fleet *f, const char *model, const char *req, cJSON **out);
/* fleet_ask, but EXIT_NO_OWNER, unprinted, when no node answers (now, or in f's timeout). */
int ask_quiet(struct fleet *f, const char *model, const char *req, cJSON **out);
/* EXIT_OK when ans says ok, else prints "worth: CODE: message" and returns EXIT_SERVER. */
int answer_ok(const cJSON *ans);
/* EXIT_OK when m is a fleet model name, else a usage error about subcommand sub. */
int model_arg(const char *sub, const char *m);
/* path, or stdin for "-"; NULL when it cannot be opened. */
FILE *open_in(const char *path);
int64_t fleet_mono_ms(void);

/* fleet_feed.c: `worth fleet feed MODEL FILE|- [--id NAME]` (argv[0] is "feed"). */
int fleet_feed(struct fleet *f, int argc, char **argv);

#endif /* WORTH_CLI_FLEET_IMPL_H */
