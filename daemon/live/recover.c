/*
 * recover.c - start-up recovery of every model from the database.
 *
 * Main thread, before the loop serves anyone.  For each live model: parse
 * its stored spec, build the model, restore the newest checkpoint that loads
 * (db_restore_newest skips a damaged one), replay the log after it
 * (db_replay), and start its learner with the log's last seq, so new
 * transitions continue the numbering.  Progress is logged per model.  It
 * must never serve a model it could not rebuild.
 *
 * A failure that is the model's own (its stored spec does not parse or build,
 * a row of its log or its trainings is damaged, SQLITE_CORRUPT while reading
 * its rows) quarantines that model alone: no learner is started, the protocol
 * registry answers every request naming it with `damaged` (sink->damaged),
 * a `quarantined` event is recorded and the log says what to do; every other
 * model starts normally.  A failure that is not the model's own (the models
 * table cannot be read, an I/O error) stops start-up.
 */
#include "live/recover.h"

#include <cjson/cJSON.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

#include "core/arena.h"
#include "store/db.h"
#include "store/logsql.h"
#include "common/mem.h"
#include "common/say.h"
#include "core/spec.h"
#include "worth/errors.h"

static double mono_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

static int max_of(sqlite3 *db, const char *sql, int64_t model, uint64_t *out)
{
    sqlite3_stmt *st = NULL;
    int rc = sqlite3_prepare_v2(db, sql, -1, &st, NULL);
    if (rc == SQLITE_OK) {
        sqlite3_bind_int64(st, 1, model);
        rc = sqlite3_step(st);
        *out = rc == SQLITE_ROW ? (uint64_t)sqlite3_column_int64(st, 0) : 0;
    }
    sqlite3_finalize(st);
    return rc == SQLITE_ROW ? 0 : -1;
}

/*
 * The progress of one model's replay, reported through sink->progress: the
 * stop_asked callback of the replay is wrapped, as db_replay calls it every
 * DB_ABANDON_EVERY transitions.
 */
struct watch {
    const recover_sink_t *sink;
    db_abandon_fn inner; /* the caller's stop_asked, may be NULL */
    void *inner_ctx;
    const char *name;
    size_t index, n;
    uint64_t done, total;
    double last_s;
};

static int watch_replay(void *ctx)
{
    struct watch *wt = ctx;
    wt->done += DB_ABANDON_EVERY;
    double now = mono_s();
    if (now - wt->last_s >= RECOVER_PROGRESS_S) {
        wt->last_s = now;
        wt->sink->progress(wt->sink->ctx, wt->name, wt->index, wt->n,
                           wt->done < wt->total ? wt->done : wt->total, wt->total);
    }
    return wt->inner && wt->inner(wt->inner_ctx);
}

/* Transitions of model id after seq that a replay learns (for its progress). */
static uint64_t replay_total(sqlite3 *db, int64_t id, uint64_t after)
{
    return logsql_count_live(db, id, after);
}

/* What became of one model (recover_one). */
enum { R_ABANDONED = -2, R_STOP = -1, R_SERVED, R_QUARANTINED, R_READ_DAMAGED, R_CORRUPT };

/*
 * Models whose pages SQLite reported corrupt.  That is a model's own damage only when it is
 * confined: they are quarantined once recovery has read some other model's rows without
 * error, and start-up stops (bad_database) when it read none, for then nothing shows the
 * damage is not the whole file's.
 */
struct suspect {
    int64_t id;
    char *name, *why; /* owned */
};

/* Remedies quarantine() names, by where the damage is. */
#define FIX_SPEC     "correct its spec in the models table"
#define FIX_TRAINING "correct or delete the damaged row of its trainings"
#define FIX_SOURCES                                                                                \
    "delete the damaged row of its sources (its next sample then starts a new chain)"
#define FIX_RETAINED "restore the database from a backup taken before the checkpoint was damaged"
#define FIX_PAGES                                                                                  \
    "restore the database from a backup (or salvage it with the sqlite3 shell's .recover)"

/*
 * Quarantines the model with database id `id` (name may be NULL when its row has none): it
 * is registered as damaged, the event recorded and an error logged that says what to do:
 * fix, or for seq (the offending transition; 0 when no single row is to blame) the row.
 */
static void quarantine(sqlite3 *db, int64_t id, const char *name, uint64_t seq, const char *why,
                       const char *fix, const recover_sink_t *sink, struct writer *w)
{
    const char *file = sqlite3_db_filename(db, "main");
    char row[320];
    if (seq)
        snprintf(row, sizeof row,
                 "correct or delete the damaged transition (model = %lld, seq = %llu: its row of "
                 "transitions, or its record in the log_blocks row whose first_seq..last_seq "
                 "hold it, schema/README.md)",
                 (long long)id, (unsigned long long)seq);
    if (name) {
        say_error(
            "model %s is quarantined and not served (requests naming it answer damaged): "
            "%s.  The other models are not affected.  To repair it, stop worthd, keep a copy of "
            "%s, %s, and start worthd again; or give it up: model.drop forgets it, and a "
            "new model of that name may then be created",
            name, why, file ? file : "the database", seq ? row : fix);
        sink->damaged(sink->ctx, id, name, seq, why);
    } else {
        say_error("the model with id %lld in %s has no name and is not served: %s.  Give its "
                  "row in the models table a name and start worthd again, or set its dropped_at",
                  (long long)id, file ? file : "the database", why);
    }
    cJSON *d = cJSON_CreateObject();
    char *detail = NULL;
    if (d && cJSON_AddNumberToObject(d, "seq", (double)seq) &&
        cJSON_AddStringToObject(d, "reason", why))
        detail = cJSON_PrintUnformatted(d);
    writer_model_event(w, id, "quarantined", detail ? detail : "{}");
    cJSON_free(detail);
    cJSON_Delete(d);
    arena_reset();
}

/*
 * Recovers one model.  Returns R_SERVED; R_QUARANTINED (a spec that does not build) or
 * R_READ_DAMAGED (a damaged row met after the rows before it were read); R_CORRUPT with the
 * reason in err (nothing done yet: a suspect); or R_STOP with err when start-up must stop.
 */
static int recover_one(sqlite3 *db, int64_t id, const char *name, const char *spec_text,
                       const recover_sink_t *sink, struct writer *w, event_post_fn post,
                       event_wake_fn wake, void *ctx, db_abandon_fn stop_asked, void *actx,
                       struct watch *wt, char *err, size_t errlen)
{
    double t0 = mono_s();
    char why[512];
    if (!name) {
        quarantine(db, id, NULL, 0, "its name is not text", NULL, sink, w);
        return R_QUARANTINED;
    }
    cJSON *root = spec_text ? cJSON_Parse(spec_text) : NULL;
    spec_t *s = NULL;
    int rc = root ? spec_parse(root, &s, why, sizeof why) : -1;
    cJSON_Delete(root);
    arena_reset();
    if (rc) {
        char what[600];
        snprintf(what, sizeof what, "its stored spec does not parse: %s",
                 !spec_text ? "it is not text"
                 : root     ? why
                            : "not JSON");
        quarantine(db, id, name, 0, what, FIX_SPEC, sink, w);
        return R_QUARANTINED;
    }
    if (strcmp(s->name, name) != 0) {
        snprintf(why, sizeof why, "its stored spec names another model (\"%s\")", s->name);
        spec_free(s);
        quarantine(db, id, name, 0, why, FIX_SPEC, sink, w);
        return R_QUARANTINED;
    }
    struct model *m = NULL;
    if (model_new(&s->m, &m, why, sizeof why) != 0) {
        char what[600];
        snprintf(what, sizeof what, "its stored spec does not build: %s", why);
        spec_free(s);
        quarantine(db, id, name, 0, what, FIX_SPEC, sink, w);
        return R_QUARANTINED;
    }
    db_start_t start;
    uint64_t replayed = 0, training = 0, last_seq = 0, cp_seq = 0, last_training = 0, bad = 0;
    /*
     * The next seq continues after the log's last row and after every checkpoint:
     * transitions refused for a failed commit use up seqs that only a checkpoint
     * taken afterwards remembers, and a new transition must never sort below it.
     * SQLITE_CORRUPT while reading the model's rows (bad_database) makes it a
     * suspect (struct suspect); a damaged row quarantines it; any other failure
     * is the database's.
     */
    rc = db_restore_newest(db, id, name, m, &start, why, sizeof why) ? db_error_code(db) : 0;
    uint64_t floor = 0;
    if (rc == 0 &&
        max_of(db, "SELECT COALESCE(MAX(log_floor), 0) FROM retention WHERE model = ?", id,
               &floor) == 0 &&
        start.seq < floor) {
        /* Retention deleted the rows a replay from here needs (store/retain.c, invariant 2). */
        snprintf(why, sizeof why,
                 "its newest loadable checkpoint covers seq %llu, but retention deleted the log "
                 "up to seq %llu: a replay from there would miss transitions",
                 (unsigned long long)start.seq, (unsigned long long)floor);
        model_free(m);
        spec_free(s);
        quarantine(db, id, name, 0, why, FIX_RETAINED, sink, w);
        return R_QUARANTINED;
    }
    if (rc == 0 && wt) {
        wt->name = name;
        wt->done = 0;
        wt->total = replay_total(db, id, start.seq);
        wt->last_s = mono_s();
        wt->sink->progress(wt->sink->ctx, name, wt->index, wt->n, 0, wt->total);
        stop_asked = watch_replay;
        actx = wt;
    }
    if (rc == 0)
        rc = db_replay(db, id, m, &start, UINT64_MAX, &replayed, &training, &bad, stop_asked, actx,
                       why, sizeof why);
    if (rc == 0 && wt)
        wt->sink->progress(wt->sink->ctx, name, wt->index, wt->n, wt->total, wt->total);
    uint64_t first_seq = 0;
    if (rc == 0 && (logsql_bounds(db, id, &first_seq, &last_seq) != 0 ||
                    max_of(db, "SELECT COALESCE(MAX(seq), 0) FROM checkpoints WHERE model = ?", id,
                           &cp_seq) != 0 ||
                    max_of(db, "SELECT COALESCE(MAX(ordinal), 0) FROM trainings WHERE model = ?",
                           id, &last_training) != 0)) {
        snprintf(why, sizeof why, "%s", sqlite3_errmsg(db));
        rc = db_error_code(db);
    }
    if (rc) {
        model_free(m);
        spec_free(s);
        if (rc == WORTH_E_CANCELLED) {
            snprintf(err, errlen, "model %s: %s", name, why);
            return R_ABANDONED;
        }
        if (rc == WORTH_E_DAMAGED) {
            quarantine(db, id, name, bad, why, FIX_TRAINING, sink, w);
            return R_READ_DAMAGED;
        }
        if (rc == WORTH_E_BAD_DATABASE) {
            snprintf(err, errlen, "%s", why);
            return R_CORRUPT;
        }
        snprintf(err, errlen, "model %s: recovery failed: %s", name, why);
        return R_STOP;
    }
    if (cp_seq > last_seq)
        last_seq = cp_seq;
    learner_opts_t lo;
    lo = *sink->opts;
    lo.seq = last_seq;
    lo.training = last_training;
    lo.model_training = training;
    lo.plant_t = start.plant_t;
    char *canonical = s->canonical;
    s->canonical = NULL;
    struct learner *l = learner_new(name, canonical, m, &lo, post, wake, ctx);
    rc = learner_set_meta(l, &s->meta, db, id, why, sizeof why);
    if (rc) {
        learner_free(l); /* and its model */
        spec_free(s);
        if (rc == WORTH_E_DAMAGED) {
            quarantine(db, id, name, 0, why, FIX_SOURCES, sink, w);
            return R_READ_DAMAGED;
        }
        snprintf(err, errlen, "model %s: recovery failed: %s", name, why);
        return rc == WORTH_E_BAD_DATABASE ? R_CORRUPT : R_STOP;
    }
    writer_add_model(w, learner_queue(l), id);
    sink->model(sink->ctx, l);
    double dt = mono_s() - t0;
    if (start.checkpoint)
        say_info("model %s: restored checkpoint %lld (seq %llu), replayed %llu transitions in "
                 "%.3f s (%.0f/s); last seq %llu",
                 name, (long long)start.checkpoint, (unsigned long long)start.seq,
                 (unsigned long long)replayed, dt, dt > 0 ? replayed / dt : 0.0,
                 (unsigned long long)last_seq);
    else
        say_info("model %s: no checkpoint; replayed %llu transitions in %.3f s (%.0f/s); "
                 "last seq %llu",
                 name, (unsigned long long)replayed, dt, dt > 0 ? replayed / dt : 0.0,
                 (unsigned long long)last_seq);
    char detail[256];
    snprintf(detail, sizeof detail,
             "{\"checkpoint\":%lld,\"replayed\":%llu,\"seconds\":%.3f,\"seq\":%llu}",
             (long long)start.checkpoint, (unsigned long long)replayed, dt,
             (unsigned long long)last_seq);
    writer_event(w, learner_queue(l), "recovered", detail);
    spec_free(s);
    return R_SERVED;
}

int recover_models(sqlite3 *db, const recover_sink_t *sink, struct writer *w, event_post_fn post,
                   event_wake_fn wake, void *ctx, db_abandon_fn stop_asked, void *actx, char *err,
                   size_t errlen)
{
    sqlite3_stmt *st = NULL;
    if (sqlite3_prepare_v2(db,
                           "SELECT id, name, spec FROM models WHERE dropped_at IS NULL"
                           " ORDER BY id",
                           -1, &st, NULL) != SQLITE_OK) {
        snprintf(err, errlen, "%s", sqlite3_errmsg(db));
        return -1;
    }
    struct suspect *sus = NULL;
    size_t n_sus = 0, read = 0; /* read: models whose rows were read without SQLITE_CORRUPT */
    struct watch wt = {sink, stop_asked, actx, NULL, 0, 0, 0, 0, 0};
    if (sink->progress) {
        sqlite3_stmt *cn = NULL;
        if (sqlite3_prepare_v2(db, "SELECT count(*) FROM models WHERE dropped_at IS NULL", -1, &cn,
                               NULL) == SQLITE_OK &&
            sqlite3_step(cn) == SQLITE_ROW)
            wt.n = (size_t)sqlite3_column_int64(cn, 0);
        sqlite3_finalize(cn);
    }
    int rc, out = R_SERVED;
    while ((rc = sqlite3_step(st)) == SQLITE_ROW) {
        /* A name or spec that is not text is damage of that model's row, never a NULL here. */
        int named = sqlite3_column_type(st, 1) == SQLITE_TEXT;
        int specd = sqlite3_column_type(st, 2) == SQLITE_TEXT;
        int64_t id = sqlite3_column_int64(st, 0);
        const char *name = named ? (const char *)sqlite3_column_text(st, 1) : NULL;
        if (stop_asked && stop_asked(actx)) {
            snprintf(err, errlen, "a stop signal came before model %s was recovered",
                     name ? name : "?");
            out = R_ABANDONED;
            break;
        }
        out = recover_one(db, id, name, specd ? (const char *)sqlite3_column_text(st, 2) : NULL,
                          sink, w, post, wake, ctx, stop_asked, actx, sink->progress ? &wt : NULL,
                          err, errlen);
        wt.index++;
        if (out == R_STOP || out == R_ABANDONED)
            break;
        read += out == R_SERVED || out == R_READ_DAMAGED;
        if (out == R_CORRUPT) {
            sus = mem_realloc(sus, (n_sus + 1) * sizeof *sus);
            sus[n_sus++] = (struct suspect){id, mem_strdup(name), mem_strdup(err)};
        }
    }
    if (out != R_STOP && out != R_ABANDONED && rc != SQLITE_DONE) {
        snprintf(err, errlen, "%s", sqlite3_errmsg(db));
        out = R_STOP;
    }
    sqlite3_finalize(st);
    if (out != R_STOP && out != R_ABANDONED && n_sus && !read) {
        snprintf(err, errlen,
                 "bad_database: model %s: %s; no model's rows could be read, so the damage is "
                 "not one model's own: restore the database from a backup",
                 sus[0].name, sus[0].why);
        out = R_STOP;
    }
    for (size_t i = 0; i < n_sus; i++) {
        if (out != R_STOP && out != R_ABANDONED)
            quarantine(db, sus[i].id, sus[i].name, 0, sus[i].why, FIX_PAGES, sink, w);
        mem_free(sus[i].name);
        mem_free(sus[i].why);
    }
    mem_free(sus);
    return out == R_ABANDONED ? -2 : out == R_STOP ? -1 : 0;
}
