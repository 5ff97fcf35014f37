/*
 * text.h - what GET /metrics answers: the Prometheus text exposition
 * format, version 0.0.4 (schema/protocol.md lists every metric).
 */
#ifndef WORTH_METRICS_TEXT_H
#define WORTH_METRICS_TEXT_H

#include <stddef.h>

struct proto;
struct writer;
struct conns;

/*
 * Returns the text of every model of p's registry, of w's commit latencies,
 * of the requests and errors by op and code, of the connections of conns and
 * of the database file at db_path (all borrowed) (malloc'd: the caller frees
 * it with free()); *len gets its length.  Loop thread.
 */
char *metrics_text(const struct proto *p, struct writer *w, const struct conns *conns,
                   const char *db_path, size_t *len);

#endif /* WORTH_METRICS_TEXT_H */
