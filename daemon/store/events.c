/*
 * events.c - the events table: recording one, listing a model's or the
 * daemon's (writer thread).  Details are JSON objects that worthd writes
 * itself, so they are listed as they are stored.
 */

#include <errno.h>
#include <fcntl.h>
#include <math.h>
#include <pthread.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "common/jw.h"
#include "common/mem.h"
#include "core/event.h"
#include "core/queue.h"
#include "common/say.h"
#include "store/backup.h"
#include "store/db.h"
#include "store/fileguard.h"
#include "store/wr.h"
#include "worth/errors.h"

/* Records an event of the model with database id model (0: a daemon-wide event). */
int64_t events_insert_id(struct writer *w, int64_t model, const char *kind, const char *detail)
{
    sqlite3_stmt *st = NULL;
    int64_t id = 0;
    if (sqlite3_prepare_v2(w->db, "INSERT INTO events(model, at, kind, detail) VALUES(?,?,?,?)", -1,
                           &st, NULL) == SQLITE_OK) {
        if (model)
            sqlite3_bind_int64(st, 1, model);
        else
            sqlite3_bind_null(st, 1);
        sqlite3_bind_double(st, 2, db_now());
        sqlite3_bind_text(st, 3, kind, -1, SQLITE_TRANSIENT);
        sqlite3_bind_text(st, 4, detail, -1, SQLITE_TRANSIENT);
        if (sqlite3_step(st) == SQLITE_DONE)
            id = sqlite3_last_insert_rowid(w->db);
    }
    sqlite3_finalize(st);
    return id;
}

int64_t events_insert(struct writer *w, struct queue *q, const char *kind, const char *detail)
{
    return events_insert_id(w, q ? queue_db_id(q) : 0, kind, detail);
}

void events_job_list(struct writer *w, struct job *j)
{
    sqlite3_stmt *st = NULL;
    jw_t jb;
    jw_init(&jb);
    jw_fmt(&jb, ",\"events\":[");
    int rc = SQLITE_ERROR, first = 1;
    /* A quarantined model has no learner: its id and name came with the job. */
    int64_t model = j->q ? queue_db_id(j->q) : j->id;
    const char *name = j->q ? queue_name(j->q) : j->s1;
    int scoped = j->q || j->id; /* else the daemon-wide events */
    const char *sql = scoped
                          ? "SELECT id, at, kind, detail FROM events WHERE model = ?1 AND at >= ?2"
                            " ORDER BY id LIMIT ?3"
                          : "SELECT id, at, kind, detail FROM events WHERE model IS NULL AND"
                            " at >= ?2 ORDER BY id LIMIT ?3";
    if (sqlite3_prepare_v2(w->db, sql, -1, &st, NULL) == SQLITE_OK) {
        if (scoped)
            sqlite3_bind_int64(st, 1, model);
        sqlite3_bind_double(st, 2, j->since);
        sqlite3_bind_int64(st, 3, (sqlite3_int64)j->len);
        while ((rc = sqlite3_step(st)) == SQLITE_ROW) {
            jw_fmt(&jb, "%s{\"event\":%lld,\"at\":%.17g,\"kind\":", first ? "" : ",",
                   (long long)sqlite3_column_int64(st, 0), sqlite3_column_double(st, 1));
            jw_str(&jb, (const char *)sqlite3_column_text(st, 2));
            if (scoped) {
                jw_fmt(&jb, ",\"model\":");
                jw_str(&jb, name);
            }
            /* detail is JSON written by worthd itself */
            jw_fmt(&jb, ",\"detail\":%s}", (const char *)sqlite3_column_text(st, 3));
            first = 0;
        }
    }
    sqlite3_finalize(st);
    jw_fmt(&jb, "]");
    if (rc != SQLITE_DONE) {
        wr_reply(w, j->q, j->conn_id, db_error_code(w->db), "cannot list events: %s",
                 sqlite3_errmsg(w->db));
        jw_close(&jb);
        return;
    }
    event_t ev = {.kind = EV_REPLY, .q = j->q, .conn_id = j->conn_id, .rc = 0};
    ev.text = jw_take(&jb);
    w->post(w->ctx, &ev);
}
