/*
 * recover.c - start-up recovery of every model from the database.
 *
 * Main thread, before the loop serves anyone.  For each live model: parse
 * its stored spec, build the model, restore the newest checkpoint that loads
 * (db_restore_newest skips a damaged one), replay the log after it
 * (db_replay), and start its learner with the log's last seq, so new
 * transitions continue the numbering.  Progress is logged per model.  It
 * must never serve a model it could not rebuild: any failure stops start-up.
 */
#include "recover.h"

#include <cjson/cJSON.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

#include "arena.h"
#include "db.h"
#include "mem.h"
#include "say.h"
#include "spec.h"
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

static int recover_one(sqlite3 *db, int64_t id, const char *name, const char *spec_text,
                       struct proto *p, struct writer *w, learner_post_fn post,
                       learner_wake_fn wake, void *ctx, char *err, size_t errlen)
{
    double t0 = mono_s();
    cJSON *root = cJSON_Parse(spec_text);
    spec_t *s = NULL;
    char why[512];
    int rc = root ? spec_parse(root, &s, why, sizeof why) : -1;
    cJSON_Delete(root);
    arena_reset();
    if (rc) {
        snprintf(err, errlen, "model %s: its stored spec does not parse: %s", name,
                 root ? why : "not JSON");
        return -1;
    }
    struct model *m = NULL;
    if (model_new(&s->m, &m, why, sizeof why) != 0) {
        snprintf(err, errlen, "model %s: cannot rebuild it: %s", name, why);
        spec_free(s);
        return -1;
    }
    db_start_t start;
    uint64_t replayed = 0, training = 0, last_seq = 0, cp_seq = 0, last_training = 0;
    /*
     * The next seq continues after the log's last row and after every checkpoint:
     * transitions refused for a failed commit use up seqs that only a checkpoint
     * taken afterwards remembers, and a new transition must never sort below it.
     */
    if (db_restore_newest(db, id, name, m, &start, why, sizeof why) != 0 ||
        db_replay(db, id, m, &start, UINT64_MAX, &replayed, &training, why, sizeof why) != 0 ||
        max_of(db, "SELECT COALESCE(MAX(seq), 0) FROM transitions WHERE model = ?", id,
               &last_seq) != 0 ||
        max_of(db, "SELECT COALESCE(MAX(seq), 0) FROM checkpoints WHERE model = ?", id, &cp_seq) !=
            0 ||
        max_of(db, "SELECT COALESCE(MAX(ordinal), 0) FROM trainings WHERE model = ?", id,
               &last_training) != 0) {
        int code = db_error_code(db);
        snprintf(err, errlen, "%smodel %s: recovery failed: %s",
                 code == WORTH_E_BAD_DATABASE ? "bad_database: " : "", name, why);
        model_free(m);
        spec_free(s);
        return -1;
    }
    if (cp_seq > last_seq)
        last_seq = cp_seq;
    learner_opts_t lo;
    proto_learner_opts(p, &lo);
    lo.seq = last_seq;
    lo.training = last_training;
    lo.model_training = training;
    char *canonical = s->canonical;
    s->canonical = NULL;
    struct learner *l = learner_new(name, canonical, m, &lo, post, wake, ctx);
    proto_add_recovered(p, l);
    writer_add_model(w, l, id);
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
    writer_event(w, l, "recovered", detail);
    spec_free(s);
    return 0;
}

int recover_models(sqlite3 *db, struct proto *p, struct writer *w, learner_post_fn post,
                   learner_wake_fn wake, void *ctx, char *err, size_t errlen)
{
    sqlite3_stmt *st = NULL;
    if (sqlite3_prepare_v2(db,
                           "SELECT id, name, spec FROM models WHERE dropped_at IS NULL"
                           " ORDER BY id",
                           -1, &st, NULL) != SQLITE_OK) {
        snprintf(err, errlen, "%s", sqlite3_errmsg(db));
        return -1;
    }
    int rc, out = 0;
    while ((rc = sqlite3_step(st)) == SQLITE_ROW && out == 0)
        out = recover_one(db, sqlite3_column_int64(st, 0), (const char *)sqlite3_column_text(st, 1),
                          (const char *)sqlite3_column_text(st, 2), p, w, post, wake, ctx, err,
                          errlen);
    if (out == 0 && rc != SQLITE_DONE) {
        snprintf(err, errlen, "%s", sqlite3_errmsg(db));
        out = -1;
    }
    sqlite3_finalize(st);
    return out;
}
