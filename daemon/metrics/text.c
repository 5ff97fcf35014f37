/*
 * text.c - the Prometheus text exposition of worthd's figures (text.h).
 *
 * Loop thread, once per scrape: every served model's counters, its
 * estimators' errors and health, the quarantined models, and the writer's
 * commit latencies, read from the learners' snapshots and the registry.  It
 * must never block a learner for longer than copying its snapshot's figures.
 */
#include "metrics/text.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include <sys/stat.h>

#include "common/jw.h"
#include "common/mem.h"
#include "live/learner.h"
#include "net/conn.h"
#include "proto/proto.h"
#include "store/writer.h"
#include "worth/errors.h"
#include "worth/protocol.h"

#ifndef WORTH_VERSION
#define WORTH_VERSION "0.0.0"
#endif

/* A label value, escaped as the exposition format asks (backslash, quote, newline). */
static void out_label(jw_t *o, const char *s)
{
    jw_raw(o, "\"", 1);
    for (; *s; s++) {
        if (*s == '\\' || *s == '"') {
            char e[2] = {'\\', *s};
            jw_raw(o, e, 2);
        } else if (*s == '\n') {
            jw_raw(o, "\\n", 2);
        } else {
            jw_raw(o, s, 1);
        }
    }
    jw_raw(o, "\"", 1);
}

/* A sample value in the exposition format (Go float syntax: NaN, +Inf, -Inf). */
static void out_val(jw_t *o, double v)
{
    if (isnan(v))
        jw_lit(o, "NaN");
    else if (isinf(v))
        jw_lit(o, v > 0 ? "+Inf" : "-Inf");
    else
        jw_fmt(o, "%.17g", v);
}

static void metric_head(jw_t *o, const char *name, const char *type, const char *help)
{
    jw_fmt(o, "# HELP %s %s\n# TYPE %s %s\n", name, help, name, type);
}

/*
 * The daemon's own figures: build, start time, requests and errors by op and code,
 * connections, the database file's bytes.  The file's size is read with stat() (metadata,
 * no data read) at each scrape.
 */
static void daemon_text(jw_t *o, const struct proto *p, const struct conns *conns,
                        const char *db_path)
{
    metric_head(o, "worth_build_info", "gauge", "Always 1; the labels say which worthd runs.");
    jw_fmt(o, "worth_build_info{version=\"%s\",protocol=\"%d\"} 1\n", WORTH_VERSION,
           WORTH_PROTOCOL_VERSION);
    metric_head(o, "process_start_time_seconds", "gauge",
                "Start time of the process since unix epoch in seconds.");
    jw_lit(o, "process_start_time_seconds ");
    out_val(o, proto_started_at(p));
    jw_lit(o, "\n");
    size_t n_ops = proto_op_count();
    metric_head(o, "worth_requests_total", "counter", "Requests received, by op.");
    for (size_t i = 0; i <= n_ops; i++) {
        uint64_t v = proto_requests(p, i);
        if (i == n_ops && !v)
            continue;
        jw_lit(o, "worth_requests_total{op=");
        out_label(o, proto_op(i));
        jw_fmt(o, "} %llu\n", (unsigned long long)v);
    }
    metric_head(o, "worth_errors_total", "counter",
                "Error replies, by op (none: before the op was known) and code.");
    for (size_t i = 0; i <= n_ops; i++)
        for (int code = -1; code > -64; code--) {
            uint64_t v = proto_errors(p, i, code);
            if (!v)
                continue;
            jw_lit(o, "worth_errors_total{op=");
            out_label(o, proto_op(i));
            jw_lit(o, ",code=");
            out_label(o, worth_err_name(code));
            jw_fmt(o, "} %llu\n", (unsigned long long)v);
        }
    size_t n = 0, tcp = 0, unauthed = 0;
    if (conns)
        conns_count(conns, &n, &tcp, &unauthed);
    metric_head(o, "worth_connections", "gauge", "Client connections open, by transport.");
    jw_fmt(o,
           "worth_connections{transport=\"unix\"} %zu\nworth_connections{transport=\"tcp\"} "
           "%zu\n",
           n - tcp, tcp);
    metric_head(o, "worth_connections_unauthenticated", "gauge",
                "TCP connections that have not authenticated yet.");
    jw_fmt(o, "worth_connections_unauthenticated %zu\n", unauthed);
    struct stat sb;
    char wal[4200];
    snprintf(wal, sizeof wal, "%s-wal", db_path ? db_path : "");
    metric_head(o, "worth_database_bytes", "gauge", "Size of the database file and its WAL.");
    jw_fmt(o, "worth_database_bytes{file=\"db\"} %llu\n",
           db_path && stat(db_path, &sb) == 0 ? (unsigned long long)sb.st_size : 0ull);
    jw_fmt(o, "worth_database_bytes{file=\"wal\"} %llu\n",
           db_path && stat(wal, &sb) == 0 ? (unsigned long long)sb.st_size : 0ull);
}

char *metrics_text(const struct proto *p, struct writer *w, const struct conns *conns,
                   const char *db_path, size_t *len)
{
    jw_t o;
    jw_init(&o);
    size_t n = proto_n_models(p), n_damaged = proto_n_damaged(p);
    learner_stats_t *st = mem_calloc(n ? n : 1, sizeof *st);
    for (size_t i = 0; i < n; i++)
        learner_stats(proto_model(p, i), &st[i]);
    static const struct {
        const char *name, *type, *help;
    } per_model[] = {
        {"worth_transitions_received_total", "counter", "Transitions accepted."},
        {"worth_transitions_applied_total", "counter", "Transitions learnt."},
        {"worth_queue_depth", "gauge", "Transitions accepted and not yet learnt."},
        {"worth_drift_alarms_total", "counter", "Drift alarms raised."},
        {"worth_checkpoints", "gauge", "Valid checkpoints stored."},
        {"worth_checkpoint_age_seconds", "gauge", "Age of the newest checkpoint."},
        {"worth_last_transition_timestamp_seconds", "gauge",
         "Wall clock of the last transition learnt, since unix epoch in seconds."},
        {"worth_inputs_clipped_total", "counter",
         "State components outside their declared range, clipped."},
    };
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    double now = (double)ts.tv_sec + ts.tv_nsec * 1e-9;
    for (size_t k = 0; k < sizeof per_model / sizeof per_model[0]; k++) {
        metric_head(&o, per_model[k].name, per_model[k].type, per_model[k].help);
        for (size_t i = 0; i < n; i++) {
            double v = 0;
            switch (k) {
            case 0:
                v = (double)st[i].received;
                break;
            case 1:
                v = (double)st[i].applied;
                break;
            case 2:
                v = (double)(st[i].received - st[i].applied);
                break;
            case 3:
                v = (double)st[i].drift.alarms;
                break;
            case 4:
                v = (double)st[i].checkpoints;
                break;
            case 5:
                if (!st[i].checkpoints)
                    continue; /* no checkpoint: no age */
                v = now - st[i].newest_checkpoint_at;
                break;
            case 6:
                if (st[i].last_update <= 0)
                    continue; /* nothing learnt yet */
                v = st[i].last_update;
                break;
            case 7:
                v = (double)st[i].counts.clipped;
                break;
            }
            jw_lit(&o, per_model[k].name);
            jw_lit(&o, "{model=");
            out_label(&o, learner_name(proto_model(p, i)));
            jw_lit(&o, "} ");
            out_val(&o, v);
            jw_lit(&o, "\n");
        }
    }
    static const char *const est_metric[5][2] = {
        {"worth_td_error_rms", "Running RMS TD error."},
        {"worth_realised_return_rms", "Realised-return RMS error over the sliding window."},
        {"worth_estimator_diverged",
         "1 when the estimator has diverged and answers no values, else 0."},
        {"worth_estimator_ok", "1 when the estimator's health is ok, else 0 (warming, "
                               "unhealthy or diverged: see stats)."},
        {"worth_headline", "1 for the estimator that answers the model's value, else 0."},
    };
    for (int k = 0; k < 5; k++) {
        const char *name = est_metric[k][0];
        metric_head(&o, name, "gauge", est_metric[k][1]);
        for (size_t i = 0; i < n; i++) {
            const struct model *m = learner_model(proto_model(p, i));
            for (size_t e = 0; e < model_n_est(m); e++) {
                jw_lit(&o, name);
                jw_lit(&o, "{model=");
                out_label(&o, learner_name(proto_model(p, i)));
                jw_lit(&o, ",estimator=");
                out_label(&o, model_est_name(m, e));
                jw_lit(&o, "} ");
                double v = k == 0   ? st[i].est[e].td_rms
                           : k == 1 ? st[i].realised[e].rms_window
                           : k == 2 ? (st[i].est[e].health == EST_HEALTH_DIVERGED ? 1.0 : 0.0)
                           : k == 3 ? (st[i].health[e].state == HEALTH_OK ? 1.0 : 0.0)
                                    : (st[i].head.index == e ? 1.0 : 0.0);
                out_val(&o, v);
                jw_lit(&o, "\n");
            }
        }
    }
    metric_head(&o, "worth_model_damaged", "gauge",
                "1 for a model quarantined at start-up (not served), 0 for one served.");
    for (size_t i = 0; i < n + n_damaged; i++) {
        jw_lit(&o, "worth_model_damaged{model=");
        out_label(&o, i < n ? learner_name(proto_model(p, i)) : proto_damaged_name(p, i - n));
        jw_lit(&o, i < n ? "} 0\n" : "} 1\n");
    }
    uint64_t counts[WRITER_HIST_N], count = 0;
    double sum = 0;
    writer_commit_hist(w, counts, &sum, &count);
    metric_head(&o, "worth_commit_seconds", "histogram", "Duration of the log's commits.");
    for (int b = 0; b < WRITER_HIST_N; b++) {
        jw_lit(&o, "worth_commit_seconds_bucket{le=\"");
        if (isinf(writer_hist_le[b]))
            jw_lit(&o, "+Inf");
        else
            jw_fmt(&o, "%g", writer_hist_le[b]);
        jw_fmt(&o, "\"} %llu\n", (unsigned long long)counts[b]);
    }
    jw_lit(&o, "worth_commit_seconds_sum ");
    out_val(&o, sum);
    jw_fmt(&o, "\nworth_commit_seconds_count %llu\n", (unsigned long long)count);
    daemon_text(&o, p, conns, db_path);
    mem_free(st);
    /* The caller frees with free(): hand over a malloc'd copy. */
    char *text = malloc(o.len + 1);
    if (text) {
        memcpy(text, o.b, o.len);
        text[o.len] = 0;
    }
    *len = text ? o.len : 0;
    mem_free(o.b);
    return text;
}