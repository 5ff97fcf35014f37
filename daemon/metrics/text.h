/*
 * text.h - what GET /metrics answers: the Prometheus text exposition
 * format, version 0.0.4 (schema/protocol.md lists every metric).
 */
#ifndef WORTH_METRICS_TEXT_H
#define WORTH_METRICS_TEXT_H

#include <stddef.h>

struct proto;
struct writer;

/*
 * Returns the text of every model of p's registry and of w's commit
 * latencies (malloc'd: the caller frees it with free()); *len gets its length.
 * Loop thread.
 */
char *metrics_text(const struct proto *p, struct writer *w, size_t *len);

#endif /* WORTH_METRICS_TEXT_H */
