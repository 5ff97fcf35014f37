/*
 * config.h - worthd's configuration: what the options and the config file
 * say, in one plain struct.
 *
 * Filled by options.c (the one option table) before anything starts, then
 * read by every part for the daemon's life.  A reload (SIGHUP) changes the
 * fields options.c marks live, on the loop thread, so only the loop thread
 * may read those.  Units are in the names.
 */
#ifndef WORTH_CONFIG_H
#define WORTH_CONFIG_H

#include <stddef.h>
#include <stdint.h>

/* Plain data: the daemon's configuration (strings borrowed for the daemon's life). */
typedef struct config_t {
    const char *socket_path;   /* Unix socket path */
    const char *listen;        /* "HOST:PORT" for TCP, or NULL */
    const char *token;         /* required by TCP clients when set; never logged */
    size_t max_line;           /* bytes of one request line */
    size_t max_batch;          /* transitions in one batch or bulk */
    size_t queue;              /* records in each model's queue (>= max_batch) */
    size_t max_models;         /* models one daemon holds */
    const char *db_path;       /* SQLite database */
    int sync_full;             /* synchronous=FULL (else NORMAL) */
    uint64_t checkpoint_every; /* automatic checkpoint period in transitions; 0 = off */
    unsigned keep;             /* unlabelled checkpoints kept per model */
    uint64_t db_max_mb;        /* database size cap in MiB; 0 = none */
    const char *metrics;       /* "HOST:PORT" of the HTTP metrics listener, or NULL */
    size_t max_conns;          /* client connections open at once (Unix and TCP together) */
    unsigned idle_timeout_s;   /* close a connection silent this long; 0 = never */
    unsigned send_timeout_s;   /* cut off a client whose unread replies stay over the cap */
    size_t max_features;       /* features one model may have */
    uint64_t max_model_mb;     /* memory one model may come to hold, in MiB */
    uint64_t max_buffer_mb;    /* every connection's buffers together, in MiB; 0 = no cap */
    unsigned auth_timeout_s;   /* a TCP client must authenticate this soon after connecting */
    size_t max_unauthed;       /* TCP connections not yet authenticated, at once */
    size_t unix_slots;         /* of max_conns, kept for the Unix socket (TCP gets the rest) */
    int tcp_without_token;     /* the operator's explicit opt-out: TCP needs no token */
    size_t max_query_work;     /* one value request's work: states x (features + sd terms) */
    const char *backup_dir;    /* where backups go; NULL: the default (store/backup.h) */
    unsigned file_mode;        /* of the database, its companions and backups: 0600 or 0640 */
    const char *token_file;    /* the token file read, or NULL */
    const struct roles *roles; /* its tokens with their roles, the peer rules (roles.h) */
    const char *peer_roles;    /* --peer-role: the rules' text, or NULL */
    int unix_role;             /* role of a Unix peer no rule names (enum role) */
    int log_level;             /* enum say_level */
    double retain_days;        /* keep the log this long (plant checkpoints' age); 0 = forever */
    uint64_t retain_transitions; /* keep at least this many of the newest transitions; 0 = all */
    unsigned retain_every_s;   /* period of the retention run; 0 = only when asked */
} config_t;

#endif /* WORTH_CONFIG_H */
