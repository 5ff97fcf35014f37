/*
 * fleet_feed.c - `worth fleet feed MODEL FILE|- [--id NAME]`: one JSON
 * transition (or {"batch":[...]}) a line into the stream, each message with a
 * Nats-Msg-Id of NAME-LINE.
 *
 * It publishes asynchronously, a window at a time, waits for every
 * acknowledgement, and publishes what failed or went unanswered again, in
 * order, until acknowledged or --timeout passes: the message id keeps a retry
 * after a lost acknowledgement or a leader change from being stored twice
 * (the stream's duplicate window is 2 minutes), and reordering stays within a
 * window.  It exits 0 only when every line was acknowledged.
 */
#include <inttypes.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "cli.h"
#include "fleet_impl.h"

#define FEED_WINDOW    2000
#define LINE_MAX_BYTES (1 << 20)

struct feed {
    pthread_mutex_t mu;
    uint64_t acked;
    uint64_t published; /* taken by js_PublishMsgAsync */
    uint64_t answered;  /* of those, handed back: on_ack, or the pending list */
    natsMsg **retry;
    size_t n_retry, cap_retry;
};

static void on_ack(jsCtx *js, natsMsg *msg, jsPubAck *pa, jsPubAckErr *pae, void *closure)
{
    (void)js;
    (void)pae;
    struct feed *fd = closure;
    pthread_mutex_lock(&fd->mu);
    fd->answered++;
    if (pa) {
        fd->acked++;
        natsMsg_Destroy(msg);
    } else if (fd->n_retry < fd->cap_retry) {
        fd->retry[fd->n_retry++] = msg; /* kept, with its Nats-Msg-Id, for a publish again */
    } else {
        natsMsg_Destroy(msg);
    }
    pthread_mutex_unlock(&fd->mu);
}

/* Publishes m until acknowledged or deadline (monotonic ms); 0 or -1. */
static int publish_sync(struct fleet *f, natsMsg *m, int64_t deadline)
{
    for (;;) {
        jsPubAck *pa = NULL;
        jsErrCode jerr = 0;
        natsStatus st = js_PublishMsg(&pa, f->js, m, NULL, &jerr);
        jsPubAck_Destroy(pa);
        if (st == NATS_OK)
            return 0;
        if (fleet_mono_ms() > deadline)
            return -1;
        usleep(100 * 1000);
    }
}

/* Waits for a window's acknowledgements and publishes again what failed; returns the number
 * still unacknowledged at the deadline. */
static size_t settle(struct fleet *f, struct feed *fd, uint64_t *retried)
{
    jsPubOptions po;
    jsPubOptions_Init(&po);
    /* Acknowledgements come in milliseconds; none for 3 s means the stream is electing a
     * leader (a server went): what is still pending is published again, one by one. */
    po.MaxWait = f->timeout_ms < 3000 ? f->timeout_ms : 3000;
    if (js_PublishAsyncComplete(f->js, &po) != NATS_OK) {
        natsMsgList pend = {0};
        if (js_PublishAsyncGetPendingList(&pend, f->js) == NATS_OK) {
            pthread_mutex_lock(&fd->mu);
            for (int i = 0; i < pend.Count; i++) {
                fd->answered++;
                if (fd->n_retry < fd->cap_retry) {
                    fd->retry[fd->n_retry++] = pend.Msgs[i];
                    pend.Msgs[i] = NULL;
                }
            }
            pthread_mutex_unlock(&fd->mu);
            natsMsgList_Destroy(&pend);
        }
    }
    /* Complete returns once nothing is pending, which can be before the last on_ack has
     * run: wait (1 s at most) until every message has come back, so none is left in the
     * library's queue when the connection closes. */
    for (int64_t end = fleet_mono_ms() + 1000;;) {
        pthread_mutex_lock(&fd->mu);
        int all = fd->answered >= fd->published;
        pthread_mutex_unlock(&fd->mu);
        if (all || fleet_mono_ms() > end)
            break;
        usleep(1000);
    }
    pthread_mutex_lock(&fd->mu);
    size_t n = fd->n_retry;
    fd->n_retry = 0;
    pthread_mutex_unlock(&fd->mu);
    size_t lost = 0;
    int64_t deadline = fleet_mono_ms() + f->timeout_ms;
    /* Retried in the order they were published: the message id keeps each once. */
    for (size_t i = 0; i < n; i++) {
        if (lost == 0 && publish_sync(f, fd->retry[i], deadline) == 0) {
            fd->acked++;
            (*retried)++;
        } else {
            lost++;
        }
        natsMsg_Destroy(fd->retry[i]);
    }
    return lost;
}

int fleet_feed(struct fleet *f, int argc, char **argv)
{
    const char *model = argc > 1 ? argv[1] : NULL, *path = argc > 2 ? argv[2] : NULL;
    const char *id = NULL;
    int ex = model_arg("feed", model);
    if (ex)
        return ex;
    if (!path)
        return cli_usage("fleet", "feed: missing FILE (or - for stdin)");
    for (int i = 3; i < argc; i++) {
        if (strcmp(argv[i], "--id") == 0 && i + 1 < argc)
            id = argv[++i];
        else
            return cli_usage("fleet", "feed: unknown argument \"%s\"", argv[i]);
    }
    char idbuf[128];
    if (!id) {
        char host[64] = "host";
        gethostname(host, sizeof host - 1);
        snprintf(idbuf, sizeof idbuf, "%s-%ld-%ld", host, (long)getpid(), (long)time(NULL));
        id = idbuf;
    }
    FILE *in = open_in(path);
    if (!in)
        return cli_error(EXIT_USAGE, "fleet feed: cannot read %s", path);
    if ((ex = fleet_connect(f)) != EXIT_OK)
        return ex;
    /* An unknown model is refused here; without an owner to ask (a takeover), the stream
     * still takes the lines: it is the durable log, and the owner-to-be learns them. */
    cJSON *ans = NULL;
    int timeout = f->timeout_ms;
    f->timeout_ms = timeout < 2000 ? timeout : 2000; /* the check only: the stream decides */
    if ((ex = ask_quiet(f, model, "{\"op\":\"stats\"}", &ans)) == EXIT_OK)
        ex = answer_ok(ans);
    else if (ex == EXIT_NO_OWNER) {
        fprintf(stderr,
                "worth: fleet feed: no node answers for %s now (a takeover?); the stream "
                "takes the lines and the shard's owner learns them\n",
                model);
        ex = EXIT_OK;
    }
    f->timeout_ms = timeout;
    cJSON_Delete(ans);
    if (ex != EXIT_OK) {
        fleet_close(f);
        return ex;
    }
    struct feed fd = {.cap_retry = FEED_WINDOW};
    pthread_mutex_init(&fd.mu, NULL);
    fd.retry = calloc(FEED_WINDOW, sizeof *fd.retry);
    /* A context of its own, whose acknowledgements come to on_ack. */
    jsCtx *js = NULL;
    jsOptions jo;
    jsOptions_Init(&jo);
    jo.Wait = f->timeout_ms;
    jo.PublishAsync.AckHandler = on_ack;
    jo.PublishAsync.AckHandlerClosure = &fd;
    jo.PublishAsync.MaxPending = FEED_WINDOW;
    if (!fd.retry || natsConnection_JetStream(&js, f->nc, &jo) != NATS_OK) {
        fleet_close(f);
        return cli_error(EXIT_CONNECT, "no JetStream context");
    }
    jsCtx *plain = f->js;
    f->js = js;
    char subj[128], msgid[200];
    snprintf(subj, sizeof subj, "worth.in.%s", model);
    char *line = malloc(LINE_MAX_BYTES);
    uint64_t lineno = 0, sent = 0, retried = 0;
    size_t in_window = 0, lost = 0;
    ex = EXIT_OK;
    while (line && fgets(line, LINE_MAX_BYTES, in)) {
        lineno++;
        size_t n = strlen(line);
        while (n && (line[n - 1] == '\n' || line[n - 1] == '\r'))
            line[--n] = 0;
        if (n == 0 || line[0] == '#')
            continue;
        cJSON *o = cJSON_ParseWithLength(line, n);
        int obj = cJSON_IsObject(o);
        cJSON_Delete(o);
        if (!obj) {
            ex = cli_error(EXIT_USAGE, "fleet feed: %s line %" PRIu64 ": not a JSON object", path,
                           lineno);
            break;
        }
        natsMsg *m = NULL;
        snprintf(msgid, sizeof msgid, "%s-%" PRIu64, id, lineno);
        pthread_mutex_lock(&fd.mu); /* counted first: on_ack may run before the call returns */
        fd.published++;
        pthread_mutex_unlock(&fd.mu);
        if (natsMsg_Create(&m, subj, NULL, line, (int)n) != NATS_OK ||
            natsMsgHeader_Set(m, "Nats-Msg-Id", msgid) != NATS_OK ||
            js_PublishMsgAsync(js, &m, NULL) != NATS_OK) {
            pthread_mutex_lock(&fd.mu);
            fd.answered++; /* not taken: no on_ack will come */
            if (m)         /* publish it in the settling pass */
                fd.retry[fd.n_retry++] = m;
            pthread_mutex_unlock(&fd.mu);
        }
        sent++;
        if (++in_window == FEED_WINDOW) {
            lost += settle(f, &fd, &retried);
            in_window = 0;
            if (lost)
                break;
        }
    }
    if (!lost)
        lost += settle(f, &fd, &retried);
    free(line);
    if (in != stdin)
        fclose(in);
    if (lost && ex == EXIT_OK)
        ex = cli_error(EXIT_CONNECT,
                       "fleet feed: %zu message%s of %s not acknowledged within "
                       "the timeout; %" PRIu64 " were",
                       lost, lost == 1 ? "" : "s", model, fd.acked);
    fprintf(stderr,
            "worth: fleet feed: %s: %" PRIu64 " message%s acknowledged by the stream "
            "(%" PRIu64 " published again)\n",
            model, fd.acked, fd.acked == 1 ? "" : "s", retried);
    (void)sent;
    f->js = plain;
    jsCtx_Destroy(js);
    fleet_close(f);
    free(fd.retry);
    pthread_mutex_destroy(&fd.mu);
    return ex;
}
