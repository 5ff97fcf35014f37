/*
 * spec_diag.c - the "diagnostics" object of a model.create spec: the
 * realised-return window, the drift alarm (its stated false-alarm rate and
 * CUSUM settings) and the direct input checks (schema/protocol.md,
 * "diagnostics").
 *
 * Loop thread (and recovery, re-reading a stored spec).  It must print back
 * exactly what it parses.  Specs stored before the CUSUM carry drift_delta
 * and drift_lambda (Page-Hinkley): they are accepted and ignored, and the
 * canonical text no longer holds them.
 */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "common/fail.h"
#include "core/spec.h"
#include "core/spec_impl.h"
#include "worth/errors.h"

/* Plant days between false alarms when the model has a control period and states none. */
#define DEFAULT_FALSE_ALARM_DAYS 90.0

/* An integral number in [lo, hi] (spec_get_int), as an unsigned. */
static int get_uint(const cJSON *f, const char *path, double lo, double hi, unsigned *out,
                    char *err, size_t errlen)
{
    uint64_t v = 0;
    int rc = spec_get_int(f, path, lo, hi, &v, err, errlen);
    if (rc == 0)
        *out = (unsigned)v;
    return rc;
}

/* A finite number > 0 (and <= hi), else bad_number or bad_param. */
static int get_pos(const cJSON *f, const char *path, double hi, double *out, char *err,
                   size_t errlen)
{
    int rc = spec_get_double(f, path, out, err, errlen);
    if (rc)
        return rc;
    if (!(*out > 0 && *out <= hi))
        return err_fail(err, errlen, WORTH_E_BAD_PARAM, "%s must be > 0 and at most %g", path, hi);
    return 0;
}

int spec_parse_diag(const cJSON *o, spec_t *s, char *err, size_t errlen)
{
    diag_params_default(s->m.gamma, &s->diag);
    inputs_params_default(&s->meta.inputs);
    drift_params_t *dp = &s->diag.drift;
    inputs_params_t *ip = &s->meta.inputs;
    if (o && !cJSON_IsObject(o))
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST, "diagnostics must be an object");
    int rc = 0;
    for (const cJSON *f = o ? o->child : NULL; f && !rc; f = f->next) {
        for (const cJSON *g = f->next; g; g = g->next)
            if (strcmp(f->string, g->string) == 0)
                return err_fail(err, errlen, WORTH_E_BAD_REQUEST,
                                "diagnostics: \"%s\" appears twice", g->string);
        char path[64];
        const char *k = f->string;
        double v = 0;
        snprintf(path, sizeof path, "diagnostics.%.40s", k);
        if (strcmp(k, "horizon") == 0)
            rc = get_uint(f, path, 0, 4294967295.0, &s->diag.horizon, err, errlen);
        else if (strcmp(k, "window") == 0)
            rc = get_uint(f, path, 0, 4294967295.0, &s->diag.window, err, errlen);
        else if (strcmp(k, "drift_burn_in") == 0)
            rc = get_uint(f, path, 0, 4294967295.0, &dp->burn_in, err, errlen);
        else if (strcmp(k, "drift_batch") == 0)
            rc = get_uint(f, path, 1, 10000, &dp->batch, err, errlen);
        else if (strcmp(k, "drift_k") == 0)
            rc = get_pos(f, path, 3.0, &dp->k, err, errlen);
        else if (strcmp(k, "false_alarm_days") == 0)
            rc = get_pos(f, path, 1e9, &dp->false_alarm_days, err, errlen);
        else if (strcmp(k, "false_alarm_transitions") == 0)
            rc = get_pos(f, path, 1e15, &dp->false_alarm_transitions, err, errlen);
        else if (strcmp(k, "frozen_periods") == 0)
            rc = get_pos(f, path, 1e9, &ip->frozen_periods, err, errlen);
        else if (strcmp(k, "frozen_tolerance") == 0) {
            if ((rc = spec_get_double(f, path, &ip->frozen_tol, err, errlen)))
                return rc;
            if (!(ip->frozen_tol >= 0 && ip->frozen_tol < 1))
                return err_fail(err, errlen, WORTH_E_BAD_PARAM, "%s must be in [0, 1)", path);
        } else if (strcmp(k, "out_of_range_periods") == 0)
            rc = get_pos(f, path, 1e9, &ip->range_periods, err, errlen);
        else if (strcmp(k, "silent_periods") == 0)
            rc = get_pos(f, path, 1e9, &ip->silent_periods, err, errlen);
        else if (strcmp(k, "drift_delta") == 0 || strcmp(k, "drift_lambda") == 0)
            rc = spec_get_double(f, path, &v, err, errlen); /* Page-Hinkley's: ignored */
        else if (strcmp(k, "on_drift") == 0) {
            if (!cJSON_IsString(f) ||
                (strcmp(f->valuestring, "none") != 0 && strcmp(f->valuestring, "checkpoint") != 0))
                return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                                "diagnostics.on_drift must be \"none\" or \"checkpoint\"");
            dp->on_drift = strcmp(f->valuestring, "checkpoint") == 0;
        } else
            return err_fail(err, errlen, WORTH_E_BAD_REQUEST,
                            "diagnostics: unknown field \"%.32s\"", k);
    }
    if (rc)
        return rc;
    /* The stated false-alarm rate, in plant time when the model has a control period. */
    if (dp->false_alarm_days > 0 && dp->false_alarm_transitions > 0)
        return err_fail(err, errlen, WORTH_E_BAD_REQUEST,
                        "give diagnostics.false_alarm_days or false_alarm_transitions, not both");
    if (dp->false_alarm_days > 0 && !(s->meta.period_s > 0))
        return err_fail(err, errlen, WORTH_E_BAD_PARAM,
                        "diagnostics.false_alarm_days needs period_s (else give "
                        "false_alarm_transitions)");
    if (dp->false_alarm_days == 0 && dp->false_alarm_transitions == 0 && s->meta.period_s > 0)
        dp->false_alarm_days = DEFAULT_FALSE_ALARM_DAYS;
    if (dp->false_alarm_days > 0)
        dp->arl0 = dp->false_alarm_days * 86400.0 / s->meta.period_s;
    else if (dp->false_alarm_transitions > 0)
        dp->arl0 = dp->false_alarm_transitions;
    else
        dp->false_alarm_transitions = dp->arl0; /* no period: the default, in transitions */
    ip->period_s = s->meta.period_s;
    if ((rc = drift_check(dp, err, errlen)))
        return rc;
    return 0;
}

int spec_print_diag(cJSON *root, const spec_t *s)
{
    const diag_params_t *p = &s->diag;
    cJSON *dg = cJSON_AddObjectToObject(root, "diagnostics");
    if (!dg)
        return -1;
    int bad = 0;
    bad |= spec_add_u64(dg, "horizon", p->horizon);
    bad |= spec_add_u64(dg, "window", p->window);
    if (p->drift.false_alarm_days > 0)
        bad |= spec_add_double(dg, "false_alarm_days", p->drift.false_alarm_days);
    else if (p->drift.false_alarm_transitions > 0)
        bad |= spec_add_double(dg, "false_alarm_transitions", p->drift.false_alarm_transitions);
    bad |= spec_add_double(dg, "drift_k", p->drift.k);
    bad |= spec_add_u64(dg, "drift_batch", p->drift.batch);
    bad |= spec_add_u64(dg, "drift_burn_in", p->drift.burn_in);
    bad |=
        cJSON_AddStringToObject(dg, "on_drift", p->drift.on_drift ? "checkpoint" : "none") ? 0 : -1;
    bad |= spec_add_double(dg, "frozen_periods", s->meta.inputs.frozen_periods);
    bad |= spec_add_double(dg, "frozen_tolerance", s->meta.inputs.frozen_tol);
    bad |= spec_add_double(dg, "out_of_range_periods", s->meta.inputs.range_periods);
    bad |= spec_add_double(dg, "silent_periods", s->meta.inputs.silent_periods);
    return bad;
}
