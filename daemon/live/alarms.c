/*
 * alarms.c - the learner's alarms as log lines and events (see alarms.h).
 *
 * Event kinds (schema/protocol.md, "events"): drift, drift_cleared,
 * input_frozen, input_frozen_cleared, input_out_of_range,
 * input_out_of_range_cleared, source_silent, source_silent_cleared.  Their
 * names are stable: alarm rules outside worth key on them.
 */
#include "live/alarms.h"

#include <math.h>
#include <stdio.h>

#include "common/say.h"
#include "core/queue.h"
#include "store/writer.h"

void alarms_drift(struct writer *w, struct queue *q, const char *name, const diag_drift_t *dr,
                  uint64_t seq, int pre_drift, double plant_t)
{
    uint64_t back = dr->last_alarm - dr->last_onset;
    uint64_t onset_seq = seq > back ? seq - back : 0;
    say_warn("model %s: drift alarm at seq %llu (the TD error %s); the change began about seq "
             "%llu",
             name, (unsigned long long)seq, dr->side > 0 ? "rose" : "fell",
             (unsigned long long)onset_seq);
    writer_drift(w, q, seq, onset_seq, dr->last_alarm, dr->last_onset, dr->alarms, pre_drift,
                 plant_t);
}

void alarms_drift_cleared(struct writer *w, struct queue *q, const char *name,
                          const diag_drift_t *dr, uint64_t seq, double plant_t)
{
    say_info("model %s: the drift alarm cleared at seq %llu", name, (unsigned long long)seq);
    char detail[256];
    int n = snprintf(detail, sizeof detail,
                     "{\"seq\":%llu,\"step\":%llu,\"alarm_step\":%llu,\"alarms\":%llu,"
                     "\"clears\":%llu",
                     (unsigned long long)seq, (unsigned long long)dr->last_clear,
                     (unsigned long long)dr->last_alarm, (unsigned long long)dr->alarms,
                     (unsigned long long)dr->clears);
    if (!isnan(plant_t))
        n += snprintf(detail + n, sizeof detail - (size_t)n, ",\"t\":%.17g", plant_t);
    snprintf(detail + n, sizeof detail - (size_t)n, "}");
    writer_event(w, q, "drift_cleared", detail);
}

void alarms_input(struct writer *w, struct queue *q, const char *name, const spec_meta_t *meta,
                  const inputs_event_t *ev)
{
    char kind[48], dim[80] = "", detail[400];
    snprintf(kind, sizeof kind, "%s%s", inputs_kind_name(ev->kind), ev->raised ? "" : "_cleared");
    if (ev->dim >= 0) {
        if (meta->named)
            snprintf(dim, sizeof dim, ",\"dim\":\"%s\",\"dim_index\":%d", meta->names[ev->dim],
                     ev->dim);
        else
            snprintf(dim, sizeof dim, ",\"dim_index\":%d", ev->dim);
    }
    int n = snprintf(detail, sizeof detail, "{\"source\":\"%s\"%s,\"t\":%.17g,\"since_t\":%.17g",
                     ev->src, dim, ev->t, ev->since);
    if (!isnan(ev->value))
        n += snprintf(detail + n, sizeof detail - (size_t)n, ",\"value\":%.17g", ev->value);
    snprintf(detail + n, sizeof detail - (size_t)n, "}");
    if (ev->raised)
        say_warn("model %s: %s: source \"%s\"%s%s since t %.17g", name, kind, ev->src,
                 ev->dim >= 0 ? " dimension " : "",
                 ev->dim >= 0 && meta->named ? meta->names[ev->dim] : "", ev->since);
    else
        say_info("model %s: %s: source \"%s\"", name, kind, ev->src);
    writer_event(w, q, kind, detail);
}
