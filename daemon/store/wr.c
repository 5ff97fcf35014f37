/*
 * wr.c - what every part of the writer thread uses: replies to the loop,
 * plain SQL, jobs, and the log's prepared statements.
 *
 * Writer thread (wr_job on any thread: it only allocates).  The bottom of
 * store/'s writer files: it calls none of them.
 */
#include "store/wr.h"

#include <stdarg.h>
#include <stdio.h>
#include <string.h>

#include "common/mem.h"
#include "store/logsql.h"
void wr_reply(struct writer *w, struct queue *q, uint64_t conn_id, int rc, const char *fmt, ...)
{
    if (!conn_id)
        return;
    char buf[1024];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(buf, sizeof buf, fmt, ap);
    va_end(ap);
    event_t ev = {.kind = EV_REPLY, .q = q, .conn_id = conn_id, .rc = rc};
    ev.text = mem_strdup(buf);
    w->post(w->ctx, &ev);
}

int wr_exec(struct writer *w, const char *sql)
{
    return sqlite3_exec(w->db, sql, NULL, NULL, NULL) == SQLITE_OK ? 0 : -1;
}

struct job *wr_job(enum job_kind kind, struct queue *q, uint64_t conn_id)
{
    struct job *j = mem_calloc(1, sizeof *j);
    j->kind = kind;
    j->q = q;
    j->conn_id = conn_id;
    return j;
}

int wr_prepare(struct writer *w)
{
    static const char *const sql[3] = {
        LOGSQL_INSERT_BLOCK,
        "INSERT INTO trainings(model, ordinal, after_seq, estimator, passes) VALUES(?,?,?,?,?)",
        "INSERT INTO sources(model, source, t, x, r, terminal, pseq) VALUES(?,?,?,?,?,?,?)"
        " ON CONFLICT(model, source) DO UPDATE SET t = excluded.t, x = excluded.x,"
        " r = excluded.r, terminal = excluded.terminal, pseq = excluded.pseq"};
    sqlite3_stmt **out[3] = {&w->ins_blk, &w->ins_tr, &w->ins_src};
    for (int i = 0; i < 3; i++)
        if (sqlite3_prepare_v3(w->db, sql[i], -1, SQLITE_PREPARE_PERSISTENT, out[i], NULL) !=
            SQLITE_OK) {
            wr_finalize(w);
            return -1;
        }
    return 0;
}

void wr_finalize(struct writer *w)
{
    sqlite3_finalize(w->ins_blk);
    sqlite3_finalize(w->ins_tr);
    sqlite3_finalize(w->ins_src);
    w->ins_blk = w->ins_tr = w->ins_src = NULL;
}
