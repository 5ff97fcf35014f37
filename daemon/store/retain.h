/*
 * retain.h - the writer's operations jobs: retention of the log, purging a
 * dropped model's rows, and the database's side of a status request.
 *
 * Each is a job of the writer thread (writer.h), queued in order behind every
 * job posted before it, and answered (when conn_id is not 0) as an EV_REPLY
 * event.  Retention and purging delete rows in short transactions between
 * which the log goes on being written, then give the space back to the file
 * system (incremental vacuum).
 */
#ifndef WORTH_RETAIN_H
#define WORTH_RETAIN_H

#include <sqlite3.h>
#include <stddef.h>
#include <stdint.h>

struct writer;
struct queue;

/* How a retention request changes one bound of a model's policy. */
enum retain_change { RETAIN_KEEP = 0, RETAIN_SET = 1, RETAIN_INHERIT = 2 };

/* Plain data: a retention job. */
typedef struct retain_req_t {
    struct queue *q;              /* the model (borrowed); NULL: every model */
    int change_days;              /* enum retain_change */
    double days;                  /* RETAIN_SET: keep this many days (0: forever) */
    int change_transitions;       /* enum retain_change */
    uint64_t transitions;         /* RETAIN_SET: keep at least the newest N (0: all) */
    int run;                      /* apply the policy now */
    double default_days;          /* the daemon's --retain-days, for models without their own */
    uint64_t default_transitions; /* the daemon's --retain-transitions */
} retain_req_t;

/* Plain data: one model as a status request sees it from the loop. */
typedef struct status_model_t {
    struct queue *q; /* a served model's queue (borrowed: the writer reads its database id) */
    int64_t db_id;   /* else its row in models (a quarantined model) */
    char *json;      /* its members as the loop knows them, ",\"model\":..." (owned by the job) */
} status_model_t;

/* Setup (main thread, before the writer starts) */

/*
 * Makes a new database give back the space deleted rows free (auto_vacuum =
 * INCREMENTAL): worthd's own fresh file, with no transition yet, is converted
 * at once (a VACUUM of an empty file); an older file is converted by the first
 * retention run or purge that frees anything.  Returns 0, or -1 (logged).
 */
int retain_setup(sqlite3 *db);

/* Jobs; any thread */

/*
 * Changes and/or applies the retention policy of r->q (or of every model):
 * replies to conn_id with the policy and, when it ran, what was deleted and
 * the bytes freed.  r is copied.
 */
void writer_retain(struct writer *w, const retain_req_t *r, uint64_t conn_id);
/*
 * Deletes every row of every dropped model named name (copied) but its row in
 * models and its events (kept for audit), records a purge event naming who
 * (copied), and frees the space.  Replies to conn_id with the counts, or
 * no_such_model when no dropped model has that name.
 */
void writer_purge(struct writer *w, const char *name, const char *who, uint64_t conn_id);
/*
 * Answers a status request: head (copied: the reply's members the loop knows,
 * ",\"version\":...") then "database" (size, free space against db_max_mb)
 * and "models": each of models (n, their json transferred), with its last
 * logged transition's seq and plant time and its retention policy.
 */
void writer_status(struct writer *w, const char *head, status_model_t *models, size_t n,
                   uint64_t db_max_mb, uint64_t conn_id);

#endif /* WORTH_RETAIN_H */
