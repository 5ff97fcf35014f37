/*
 * reply.c - the frame of every reply line: {"ok":...,"id":... and the error form.
 *
 * Loop thread.  Replies are written into the protocol's one JSON writer
 * (common/jw.h, reused for every request) and handed to the connection's
 * acknowledgement queue (acks.c), which sends them in request order.
 */

#include <cjson/cJSON.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "common/ct.h"
#include "common/jw.h"
#include "common/mem.h"
#include "core/queue.h"
#include "proto/arena.h"
#include "proto/internal.h"
#include "proto/spec.h"
#include "say.h"
#include "store/backup.h"
#include "worth/errors.h"

/* Starts a reply object, with the request's id when it had one. */
void reply_begin(jw_t *o, int ok, const char *id)
{
    o->len = 0;
    jw_lit(o, ok ? "{\"ok\":true" : "{\"ok\":false");
    if (id) {
        jw_lit(o, ",\"id\":");
        jw_lit(o, id);
    }
}

void reply_end(jw_t *o, struct conn *c)
{
    jw_raw(o, "}\n", 2);
    ack_send(c, o->b, o->len);
}

/* Formats an error reply line into p->out. */
void reply_format_error(struct proto *p, const char *id, int code, long index, const char *msg)
{
    jw_t *o = &p->out;
    reply_begin(o, 0, id);
    jw_lit(o, ",\"error\":{\"code\":");
    jw_str(o, worth_err_name(code));
    jw_lit(o, ",\"message\":");
    jw_str(o, msg);
    if (index >= 0)
        jw_fmt(o, ",\"index\":%ld", index);
    jw_lit(o, "}}\n");
}

void reply_error(struct proto *p, struct conn *c, const char *id, int code, long index,
                 const char *fmt, ...) __attribute__((format(printf, 6, 7)));
void reply_error(struct proto *p, struct conn *c, const char *id, int code, long index,
                 const char *fmt, ...)
{
    char msg[600];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(msg, sizeof msg, fmt, ap);
    va_end(ap);
    reply_format_error(p, id, code, index, msg);
    ack_send(c, p->out.b, p->out.len);
}
