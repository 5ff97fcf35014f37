/*
 * options.c - the one table of worthd's options, and everything made from it
 * (options.h): the command-line parser, the config file's keys, --help,
 * --check-config, the sample config (--print-config) and the man page's
 * OPTIONS section (--print-man-options); the defaults and those texts are in
 * options_help.c.
 *
 * Main thread at start-up; options_reload on the loop thread (SIGHUP).  Each
 * row names its option (the config key is the same name), its argument, its
 * kind, where it goes in config_t, its bounds, whether a reload applies it,
 * and its help; the default shown is the one config_t gets before the file and
 * the command line are read (or, where it depends on the environment, a
 * sentence saying how).  Precedence: defaults < config file < command line.
 *
 * Every string the configuration points to is owned here (a pool freed with
 * the options), so a reload can swap them while the old ones stay valid until
 * it is done.  It never logs a token: the token file's name is logged, its
 * contents never.
 */
#include "options.h"

#include <errno.h>
#include <getopt.h>
#include <math.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <sys/stat.h>
#include <unistd.h>

#include "common/mem.h"
#include "common/say.h"
#include "net/server.h"
#include "roles.h"

#ifndef WORTH_VERSION
#define WORTH_VERSION "0.0.0"
#endif
/* Where the default config file lives (meson: sysconfdir). */
#ifndef WORTH_SYSCONFDIR
#define WORTH_SYSCONFDIR "/etc"
#endif
#define DEFAULT_CONFIG WORTH_SYSCONFDIR "/worthd/worthd.conf"

/* Longest line of the config file. */
#define LINE_MAX_BYTES 4096

#include "options_impl.h"

#define F(field) offsetof(config_t, field)

/* clang-format off */
const opt_def_t opt_table[] = {
    /* where things are */
    {"socket", "PATH", K_STR, F(socket_path), 0, 0, 0, 0, 0,
     "$RUNTIME_DIRECTORY/worthd.sock when set, else ./worthd.sock",
     "Unix socket to listen on (mode 0660)."},
    {"db", "PATH", K_STR, F(db_path), 0, 0, 0, 0, 0,
     "$STATE_DIRECTORY/worthd.db when set, else ./worthd.db",
     "SQLite database: the log, models, checkpoints."},
    {"backup-dir", "DIR", K_STR, F(backup_dir), 0, 0, 0, 0, 0,
     "$STATE_DIRECTORY/backups when set, else backups beside --db",
     "Where backup requests write their copies; created if missing (0700; 0750 with --file-mode "
     "0640); must be worthd's or root's, not a symlink, not writable by all."},
    {"file-mode", "MODE", K_MODE, F(file_mode), 0, 0, 0, 0, 0, NULL,
     "0600, or 0640 (the group may read): the database, -wal, -shm, backups; an existing "
     "database with looser bits is tightened."},
    /* durability */
    {"sync", "MODE", K_SYNC, F(sync_full), 0, 0, 0, 0, 0, NULL,
     "full: an acknowledged transition survives power loss; normal: it survives a crash of "
     "worthd, not of the machine."},
    {"checkpoint-every", "N", K_U64, F(checkpoint_every), 0, 1ull << 40, 0, 0, 0, NULL,
     "Automatic checkpoint every N transitions (0: off)."},
    {"keep", "N", K_UINT, F(keep), 1, 1000000, 0, 0, 0, NULL,
     "Unlabelled checkpoints kept per model."},
    {"db-max-mb", "N", K_U64, F(db_max_mb), 0, 1ull << 30, 0, 0, 0, NULL,
     "Cap the database at N MiB (0: no cap); when full, ingest is refused with storage_full and "
     "queries go on."},
    /* retention */
    {"retain-days", "D", K_DAYS, F(retain_days), 0, 36500, 0, 1, 0, NULL,
     "Keep the log of every model for D days (0: forever), always back to its oldest kept "
     "checkpoint; older transitions and checkpoints are deleted and the space freed.  A model's "
     "own policy (the retention request) overrides it."},
    {"retain-transitions", "N", K_U64, F(retain_transitions), 0, 1ull << 50, 0, 1, 0, NULL,
     "Keep at least the newest N transitions of every model (0: all); with --retain-days a "
     "transition goes only when both allow it."},
    {"retain-every", "S", K_UINT, F(retain_every_s), 0, 86400 * 30, 0, 0, 0, NULL,
     "Apply the retention policies every S seconds (0: only when a retention request asks)."},
    /* listeners and who may use them */
    {"listen", "HOST:PORT", K_STR, F(listen), 0, 0, 0, 0, 0, "none",
     "Also listen on TCP; needs --token-file (clients then send {\"op\":\"auth\",\"token\":...} "
     "first), even on loopback: without one, every user of the machine could use the whole "
     "protocol."},
    {"allow-tcp-without-token", NULL, K_FLAG, F(tcp_without_token), 0, 0, 0, 0, 0, "off",
     "Accept that risk on a loopback --listen (logged loudly)."},
    {"metrics", "HOST:PORT", K_STR, F(metrics), 0, 0, 0, 0, 0, "none",
     "Serve GET /metrics (Prometheus text format) over HTTP; a non-loopback address needs "
     "--token-file (any of its tokens, sent as a bearer token)."},
    {"token-file", "FILE", K_STR, F(token_file), 0, 0, 0, 1, 0,
     "$CREDENTIALS_DIRECTORY/token when that file exists, else none",
     "The tokens TCP clients authenticate with: one token alone (role admin), or lines "
     "\"ROLE TOKEN [NAME]\" with ROLE read, write or admin."},
    {"peer-role", "RULES", K_STR, F(peer_roles), 0, 0, 0, 1, 0, "none",
     "Roles of Unix socket peers by their credentials: comma-separated uid=N:ROLE, "
     "user=NAME:ROLE, gid=N:ROLE, group=NAME:ROLE (the first that matches decides; root and "
     "worthd's own user are admin)."},
    {"unix-role", "ROLE", K_ROLE, F(unix_role), 0, 0, 0, 1, 0, NULL,
     "Role of a Unix socket peer that no --peer-role rule names: read, write or admin."},
    {"auth-timeout", "S", K_UINT, F(auth_timeout_s), 1, 3600, 0, 1, 0, NULL,
     "Close a TCP client that has not authenticated S seconds after connecting, however much it "
     "trickles (auth_timeout)."},
    {"max-unauthenticated", "N", K_SIZE, F(max_unauthed), 1, 1000000, 0, 1, 0, NULL,
     "TCP connections waiting to authenticate at once; one more is refused "
     "(too_many_connections)."},
    {"unix-slots", "N", K_SIZE, F(unix_slots), 0, 1000000, 0, 0, 0,
     "32, at most a quarter of --max-conns",
     "Of --max-conns, slots TCP cannot take, kept for the Unix socket."},
    /* the event log */
    {"log-level", "LEVEL", K_LEVEL, F(log_level), 0, 0, 0, 1, 0, NULL,
     "error, warn, info or debug; logs go to stderr (with journald's priority prefixes when "
     "stderr is the journal)."},
    /* limits */
    {"max-line", "BYTES", K_SIZE, F(max_line), 256, 1u << 30, 0, 0, 0, NULL,
     "Longest request line."},
    {"max-batch", "N", K_SIZE, F(max_batch), 1, 1u << 24, 0, 0, 0, NULL,
     "Most transitions in one batch or bulk."},
    {"queue", "N", K_SIZE, F(queue), 1, 1u << 26, 0, 0, 0, "262144, at least --max-batch",
     "Records each model's queue holds (at least --max-batch)."},
    {"max-models", "N", K_SIZE, F(max_models), 1, 65536, 0, 0, 0, NULL,
     "Most models one daemon holds."},
    {"max-features", "N", K_SIZE, F(max_features), 1, 1u << 20, 0, 1, 0, NULL,
     "Most features one model may have (a model's own max_features defaults to 4096)."},
    {"max-model-mb", "N", K_U64, F(max_model_mb), 1, 1ull << 30, 0, 1, 0, NULL,
     "Most memory one model may come to hold, in MiB: matrices, replay and per-source buffers at "
     "full size, its queue."},
    {"max-conns", "N", K_SIZE, F(max_conns), 1, 1000000, 0, 0, 0, NULL,
     "Client connections open at once; one more gets too_many_connections and is closed."},
    {"idle-timeout", "S", K_UINT, F(idle_timeout_s), 0, 86400 * 365, 0, 1, 0, NULL,
     "Close a connection that sent nothing for S seconds while nothing was owed to it, after an "
     "idle_timeout line (0: never)."},
    {"send-timeout", "S", K_UINT, F(send_timeout_s), 1, 86400, 0, 1, 0, NULL,
     "Cut off a client whose unread replies stay over 4 MiB for S seconds (slow_reader, logged)."},
    {"max-buffer-mb", "N", K_U64, F(max_buffer_mb), 0, 1ull << 30, 0, 0, 0, NULL,
     "Every connection's buffers together (partial lines, bulk payloads, unsent replies) in MiB "
     "(0: no cap); input beyond it is refused with over_budget."},
    {"max-query-work", "N", K_SIZE, F(max_query_work), 1, 1000000, 1000000, 1, 0, NULL,
     "Most work one value request may ask: states x (features + the features^2 of each rls_td "
     "sd), in millions; more is too_large, so one request cannot stall every connection."},
    /* the command line only */
    {"config", "FILE", K_CMD, 0, 0, 0, 0, 0, C_CONFIG, DEFAULT_CONFIG " when it exists",
     "Read options from FILE: lines \"key = value\" with the long options' names as keys, '#' "
     "comments; unknown keys are refused; the command line overrides the file."},
    {"check-config", NULL, K_CMD, 0, 0, 0, 0, 0, C_CHECK, NULL,
     "Read the config file, the command line and the token file, print the configuration that "
     "would run, and exit: 0, or 78 with the offending line."},
    {"print-config", NULL, K_CMD, 0, 0, 0, 0, 0, C_PRINT_CONFIG, NULL,
     "Print a config file holding every key, commented out at its default, and exit."},
    {"print-man-options", NULL, K_CMD, 0, 0, 0, 0, 0, C_PRINT_MAN, NULL,
     "Print this list as the OPTIONS section of worthd(8), in roff, and exit."},
    {"help", NULL, K_CMD, 0, 0, 0, 0, 0, C_HELP, NULL, "This text."},
    {"version", NULL, K_CMD, 0, 0, 0, 0, 0, C_VERSION, NULL, "Print the version."},
};
/* clang-format on */
#define N_OPTS (sizeof opt_table / sizeof opt_table[0])
const size_t opt_count = N_OPTS;

/* ---- values ------------------------------------------------------------------------------ */

char *opt_pool_dup(struct options *o, const char *s, size_t len)
{
    if (o->n_pool == o->cap_pool) {
        o->cap_pool = o->cap_pool ? 2 * o->cap_pool : 32;
        o->pool = mem_realloc(o->pool, o->cap_pool * sizeof *o->pool);
    }
    char *c = mem_alloc(len + 1);
    memcpy(c, s, len);
    c[len] = 0;
    o->pool[o->n_pool++] = c;
    return c;
}

static void *at(config_t *c, const opt_def_t *d)
{
    return (char *)c + d->off;
}

static const void *cat(const config_t *c, const opt_def_t *d)
{
    return (const char *)c + d->off;
}

/*
 * Sets d's field of c from text v.  label names the option in a message
 * ("--max-line" on the command line, "max-line" in the file).  Returns 0, or
 * -1 with the message in err.  Strings are copied into o's pool.
 */
static int set_value(struct options *o, config_t *c, const opt_def_t *d, const char *label,
                     const char *v, char *err, size_t errlen)
{
    switch (d->kind) {
    case K_STR:
        *(const char **)at(c, d) = opt_pool_dup(o, v, strlen(v));
        return 0;
    case K_FLAG:
        if (!v || strcmp(v, "true") == 0 || strcmp(v, "yes") == 0 || strcmp(v, "1") == 0)
            *(int *)at(c, d) = 1;
        else if (strcmp(v, "false") == 0 || strcmp(v, "no") == 0 || strcmp(v, "0") == 0)
            *(int *)at(c, d) = 0;
        else {
            snprintf(err, errlen, "%s must be true or false, not \"%.64s\"", label, v);
            return -1;
        }
        return 0;
    case K_SIZE:
    case K_U64:
    case K_UINT: {
        char *end;
        errno = 0;
        unsigned long long n = strtoull(v, &end, 10);
        if (errno || *end || !*v || v[0] == '-' || n < d->lo || n > d->hi) {
            snprintf(err, errlen, "%s must be an integer %llu..%llu, not \"%.64s\"", label,
                     (unsigned long long)d->lo, (unsigned long long)d->hi, v);
            return -1;
        }
        n *= d->scale ? d->scale : 1;
        if (d->kind == K_SIZE)
            *(size_t *)at(c, d) = (size_t)n;
        else if (d->kind == K_U64)
            *(uint64_t *)at(c, d) = (uint64_t)n;
        else
            *(unsigned *)at(c, d) = (unsigned)n;
        return 0;
    }
    case K_DAYS: {
        char *end;
        errno = 0;
        double x = strtod(v, &end);
        if (errno || *end || !*v || !isfinite(x) || x < (double)d->lo || x > (double)d->hi) {
            snprintf(err, errlen, "%s must be a number of days %llu..%llu, not \"%.64s\"", label,
                     (unsigned long long)d->lo, (unsigned long long)d->hi, v);
            return -1;
        }
        *(double *)at(c, d) = x;
        return 0;
    }
    case K_SYNC:
        if (strcmp(v, "full") == 0 || strcmp(v, "normal") == 0) {
            *(int *)at(c, d) = v[0] == 'f';
            return 0;
        }
        snprintf(err, errlen, "%s must be full or normal", label);
        return -1;
    case K_LEVEL: {
        int lv = say_parse_level(v);
        if (lv < 0) {
            snprintf(err, errlen, "%s must be error, warn, info or debug", label);
            return -1;
        }
        *(int *)at(c, d) = lv;
        return 0;
    }
    case K_MODE:
        if (strcmp(v, "0600") == 0 || strcmp(v, "600") == 0)
            *(unsigned *)at(c, d) = 0600;
        else if (strcmp(v, "0640") == 0 || strcmp(v, "640") == 0)
            *(unsigned *)at(c, d) = 0640;
        else {
            snprintf(err, errlen, "%s must be 0600 or 0640, not \"%.64s\"", label, v);
            return -1;
        }
        return 0;
    case K_ROLE: {
        int r = role_parse(v);
        if (r < 0) {
            snprintf(err, errlen, "%s must be read, write or admin, not \"%.64s\"", label, v);
            return -1;
        }
        *(int *)at(c, d) = r;
        return 0;
    }
    case K_CMD:
        break;
    }
    return -1;
}

/* Writes d's value in c as text (as a config file would hold it) into buf. */
void opt_show_value(const config_t *c, const opt_def_t *d, char *buf, size_t len)
{
    switch (d->kind) {
    case K_STR: {
        const char *s = *(const char *const *)cat(c, d);
        snprintf(buf, len, "%s", s ? s : "");
        return;
    }
    case K_FLAG:
        snprintf(buf, len, "%s", *(const int *)cat(c, d) ? "true" : "false");
        return;
    case K_SIZE:
        snprintf(buf, len, "%zu", *(const size_t *)cat(c, d) / (d->scale ? d->scale : 1));
        return;
    case K_U64:
        snprintf(buf, len, "%llu", (unsigned long long)*(const uint64_t *)cat(c, d));
        return;
    case K_UINT:
        snprintf(buf, len, "%u", *(const unsigned *)cat(c, d));
        return;
    case K_DAYS:
        snprintf(buf, len, "%.17g", *(const double *)cat(c, d));
        return;
    case K_SYNC:
        snprintf(buf, len, "%s", *(const int *)cat(c, d) ? "full" : "normal");
        return;
    case K_LEVEL: {
        static const char *const lv[] = {"error", "warn", "info", "debug"};
        int v = *(const int *)cat(c, d);
        snprintf(buf, len, "%s", v >= 0 && v < 4 ? lv[v] : "?");
        return;
    }
    case K_MODE:
        snprintf(buf, len, "%04o", *(const unsigned *)cat(c, d));
        return;
    case K_ROLE:
        snprintf(buf, len, "%s", role_name(*(const int *)cat(c, d)));
        return;
    case K_CMD:
        buf[0] = 0;
        return;
    }
}

/* 1 when d's field holds the same in a and b. */
static int same_value(const config_t *a, const config_t *b, const opt_def_t *d)
{
    char x[4200], y[4200];
    opt_show_value(a, d, x, sizeof x);
    opt_show_value(b, d, y, sizeof y);
    return strcmp(x, y) == 0;
}

/* ---- reading ----------------------------------------------------------------------------- */

static const opt_def_t *find(const char *name)
{
    for (size_t i = 0; i < N_OPTS; i++)
        if (strcmp(opt_table[i].name, name) == 0)
            return &opt_table[i];
    return NULL;
}

/* What one reading found besides the values: which options were given, what was asked. */
struct reading {
    unsigned char given[N_OPTS];
    int cmd[C_VERSION + 1];
    const char *config;
    int status; /* OPTIONS_RUN, or the exit status */
    int code;   /* exit status of a failed check: 2 or 1 (command line), 78 (file) */
    char err[1200];
};

/* Trims blanks from both ends of s in place; returns s. */
static char *trim(char *s)
{
    while (*s == ' ' || *s == '\t')
        s++;
    size_t n = strlen(s);
    while (n && (s[n - 1] == ' ' || s[n - 1] == '\t' || s[n - 1] == '\r'))
        s[--n] = 0;
    return s;
}

/* Reads the config file into c.  Returns 0, or -1 with rd->err (with the file and line). */
static int read_file(struct options *o, config_t *c, const char *path, struct reading *rd)
{
    FILE *f = fopen(path, "r");
    if (!f) {
        snprintf(rd->err, sizeof rd->err, "cannot read the config file %s: %s", path,
                 strerror(errno));
        return -1;
    }
    char line[LINE_MAX_BYTES + 2];
    unsigned lineno = 0;
    unsigned char seen[N_OPTS] = {0};
    int rc = 0;
    while (fgets(line, sizeof line, f)) {
        lineno++;
        size_t n = strlen(line);
        if (n && line[n - 1] == '\n')
            line[--n] = 0;
        else if (!feof(f)) {
            snprintf(rd->err, sizeof rd->err, "%s:%u: a line is longer than %d bytes", path, lineno,
                     LINE_MAX_BYTES);
            rc = -1;
            break;
        }
        char *s = trim(line);
        if (!*s || *s == '#')
            continue;
        char *eq = strchr(s, '=');
        if (!eq) {
            snprintf(rd->err, sizeof rd->err, "%s:%u: expected \"key = value\", not \"%.80s\"",
                     path, lineno, s);
            rc = -1;
            break;
        }
        *eq = 0;
        char *key = trim(s), *val = trim(eq + 1);
        size_t vl = strlen(val);
        if (vl >= 2 && val[0] == '"' && val[vl - 1] == '"') {
            val[vl - 1] = 0;
            val++;
        }
        const opt_def_t *d = find(key);
        if (!d || d->kind == K_CMD) {
            snprintf(rd->err, sizeof rd->err, "%s:%u: unknown key \"%.64s\"%s", path, lineno, key,
                     d ? " (a command-line option only)" : "");
            rc = -1;
            break;
        }
        size_t i = (size_t)(d - opt_table);
        if (seen[i]) {
            snprintf(rd->err, sizeof rd->err, "%s:%u: \"%s\" is given twice", path, lineno, key);
            rc = -1;
            break;
        }
        seen[i] = 1;
        char msg[600];
        if (set_value(o, c, d, key, val, msg, sizeof msg) != 0) {
            snprintf(rd->err, sizeof rd->err, "%s:%u: %s", path, lineno, msg);
            rc = -1;
            break;
        }
        rd->given[i] = 1;
    }
    if (rc == 0 && ferror(f)) {
        snprintf(rd->err, sizeof rd->err, "cannot read the config file %s: %s", path,
                 strerror(errno));
        rc = -1;
    }
    fclose(f);
    return rc;
}

/* Builds getopt's table from ours (long options only; val = index + 1000). */
static void longopts(struct option *lo)
{
    for (size_t i = 0; i < N_OPTS; i++)
        lo[i] =
            (struct option){opt_table[i].name, opt_table[i].arg ? required_argument : no_argument,
                            NULL, (int)(1000 + i)};
    lo[N_OPTS] = (struct option){NULL, 0, NULL, 0};
}

/* The exit status of a fault of option name: code when the command line gave it, else the
 * config file's. */
static int code_for(const struct reading *rd, const char *name, int code)
{
    const opt_def_t *d = find(name);
    return d && rd->given[d - opt_table] == 1 ? OPTIONS_EX_CONFIG : code;
}

/*
 * The checks between options, then the token file and the peer rules.  Returns 0 with
 * c->roles and *roles set, or -1 with rd->err and rd->code.
 */
static int check_all(struct options *o, config_t *c, struct roles **roles, struct reading *rd)
{
    (void)o;
    const opt_def_t *slots = find("unix-slots"), *queue = find("queue");
    if (c->queue < c->max_batch) {
        if (rd->given[queue - opt_table]) {
            snprintf(rd->err, sizeof rd->err, "--queue (%zu) must be at least --max-batch (%zu)",
                     c->queue, c->max_batch);
            rd->code = code_for(rd, "queue", 2);
            return -1;
        }
        c->queue = c->max_batch;
    }
    const char *addrs[2] = {c->listen, c->metrics};
    const char *names[2] = {"--listen", "--metrics"};
    int loopback[2] = {1, 1};
    for (int i = 0; i < 2; i++) {
        struct sockaddr_storage ss;
        if (addrs[i] && server_parse_hostport(addrs[i], &ss, &loopback[i]) != 0) {
            snprintf(rd->err, sizeof rd->err, "%s %s: expected HOST:PORT with a numeric address",
                     names[i], addrs[i]);
            rd->code = code_for(rd, names[i] + 2, 2);
            return -1;
        }
    }
    if (!rd->given[slots - opt_table] && c->unix_slots > c->max_conns / 4)
        c->unix_slots = c->max_conns / 4; /* the default never takes more than a quarter */
    if (c->unix_slots >= c->max_conns) {
        snprintf(rd->err, sizeof rd->err, "--unix-slots (%zu) must be less than --max-conns (%zu)",
                 c->unix_slots, c->max_conns);
        rd->code = code_for(rd, "unix-slots", 2);
        return -1;
    }
    struct roles *r = NULL;
    if (c->token_file) {
        r = roles_read_tokens(c->token_file, rd->err, sizeof rd->err);
        if (!r) {
            rd->code = code_for(rd, "token-file", 2);
            return -1;
        }
        struct stat st;
        if (stat(c->token_file, &st) == 0 && (st.st_mode & 0077))
            say_warn("--token-file %s is readable by group or others", c->token_file);
    } else {
        r = roles_new();
    }
    if (c->peer_roles) {
        char msg[400];
        if (roles_add_peer_rules(r, c->peer_roles, msg, sizeof msg) != 0) {
            snprintf(rd->err, sizeof rd->err, "--peer-role: %s", msg);
            roles_free(r);
            rd->code = code_for(rd, "peer-role", 2);
            return -1;
        }
    }
    c->roles = r;
    c->token = roles_first_token(r);
    *roles = r;
    for (int i = 0; i < 2; i++)
        if (addrs[i] && !loopback[i] && !c->token) {
            snprintf(rd->err, sizeof rd->err,
                     "refusing %s %s, a non-loopback address, without --token-file", names[i],
                     addrs[i]);
            rd->code = code_for(rd, names[i] + 2, 1);
            return -1;
        }
    if (c->listen && !c->token && !c->tcp_without_token) {
        snprintf(rd->err, sizeof rd->err,
                 "refusing --listen %s without --token-file: on TCP every local user could use "
                 "the whole protocol, the Unix socket's 0660 mode notwithstanding; give "
                 "--token-file, or --allow-tcp-without-token to accept that",
                 c->listen);
        rd->code = code_for(rd, "listen", 1);
        return -1;
    }
    return 0;
}

/*
 * One reading of the configuration: defaults, the config file, the command
 * line, then the checks between options and the token file.  Fills *c and
 * *roles (owned by the caller) and *rd.  Returns 0, or -1 with rd->err and
 * rd->code (or rd->status set: help, version and the like were asked).
 */
static int read_all(struct options *o, config_t *c, struct roles **roles, struct reading *rd)
{
    struct option lo[N_OPTS + 1];
    longopts(lo);
    memset(rd, 0, sizeof *rd);
    rd->status = OPTIONS_RUN;
    *roles = NULL;
    /* Pass 1: what the command line asks of the file (and --help, --version). */
    optind = 0; /* glibc: 0 rescans from the start, its permutation state reset too */
    opterr = 0;
    int ch;
    while ((ch = getopt_long(o->argc, o->argv, "", lo, NULL)) != -1) {
        if (ch < 1000) {
            /* An unknown option or a missing argument: pass 2 says which. */
            continue;
        }
        const opt_def_t *d = &opt_table[ch - 1000];
        if (d->kind == K_CMD) {
            rd->cmd[d->cmd] = 1;
            if (d->cmd == C_CONFIG)
                rd->config = optarg;
        }
    }
    opt_defaults(o, c);
    const char *file = rd->config ? rd->config : DEFAULT_CONFIG;
    o->file_given = rd->config != NULL;
    o->file = NULL;
    if (!rd->cmd[C_HELP] && !rd->cmd[C_VERSION] && !rd->cmd[C_PRINT_CONFIG] &&
        !rd->cmd[C_PRINT_MAN] && (rd->config || access(file, F_OK) == 0)) {
        o->file = file;
        if (read_file(o, c, file, rd) != 0) {
            rd->code = OPTIONS_EX_CONFIG;
            return -1;
        }
    }
    /* Pass 2: the command line over the file. */
    optind = 0; /* glibc: 0 rescans from the start, its permutation state reset too */
    opterr = 0;
    while ((ch = getopt_long(o->argc, o->argv, "", lo, NULL)) != -1) {
        if (ch < 1000) {
            if (optopt >= 1000 && optopt < 1000 + (int)N_OPTS)
                snprintf(rd->err, sizeof rd->err, "--%s needs a value (worthd --help)",
                         opt_table[optopt - 1000].name);
            else
                snprintf(rd->err, sizeof rd->err, "unknown option \"%.64s\" (worthd --help)",
                         o->argv[optind - 1]);
            rd->code = 2;
            return -1;
        }
        const opt_def_t *d = &opt_table[ch - 1000];
        if (d->kind == K_CMD)
            continue;
        char label[80];
        snprintf(label, sizeof label, "--%s", d->name);
        if (set_value(o, c, d, label, optarg, rd->err, sizeof rd->err) != 0) {
            rd->code = 2;
            return -1;
        }
        rd->given[ch - 1000] = 2;
    }
    if (rd->cmd[C_HELP] || rd->cmd[C_VERSION] || rd->cmd[C_PRINT_CONFIG] || rd->cmd[C_PRINT_MAN])
        return 0;
    if (optind < o->argc) {
        snprintf(rd->err, sizeof rd->err, "unexpected argument \"%s\"", o->argv[optind]);
        rd->code = 2;
        return -1;
    }
    return check_all(o, c, roles, rd);
}

/* ---- the API ----------------------------------------------------------------------------- */

/* Prints the configuration c as a config file would hold it (--check-config). */
static void print_effective(const config_t *c, FILE *f)
{
    for (size_t i = 0; i < N_OPTS; i++) {
        const opt_def_t *d = &opt_table[i];
        if (d->kind == K_CMD)
            continue;
        char v[4200];
        opt_show_value(c, d, v, sizeof v);
        fprintf(f, "%s = %s\n", d->name, v);
    }
}

int options_load(int argc, char **argv, config_t *cfg, struct options **out)
{
    struct options *o = mem_calloc(1, sizeof *o);
    o->argc = argc;
    o->argv = argv;
    o->live = cfg;
    struct reading *rd = mem_calloc(1, sizeof *rd);
    int rc = read_all(o, cfg, &o->roles, rd);
    int status = OPTIONS_RUN;
    if (rd->cmd[C_HELP] && rc == 0) {
        opt_print_help(o, stdout);
        status = 0;
    } else if (rd->cmd[C_VERSION] && rc == 0) {
        printf("worthd %s\n", WORTH_VERSION);
        status = 0;
    } else if (rd->cmd[C_PRINT_CONFIG] && rc == 0) {
        opt_print_sample(o, stdout);
        status = 0;
    } else if (rd->cmd[C_PRINT_MAN] && rc == 0) {
        opt_print_man(o, stdout);
        status = 0;
    } else if (rc != 0) {
        fprintf(stderr, "worthd: %s\n", rd->err);
        status = rd->cmd[C_CHECK] ? OPTIONS_EX_CONFIG : rd->code;
    } else if (rd->cmd[C_CHECK]) {
        printf("# worthd %s: the configuration is valid%s%s\n", WORTH_VERSION,
               o->file ? "; read from " : " (no config file)", o->file ? o->file : "");
        print_effective(cfg, stdout);
        status = 0;
    }
    mem_free(rd);
    if (status == OPTIONS_RUN) {
        say_set_level((enum say_level)cfg->log_level);
        if (o->file)
            say_info("configuration read from %s", o->file);
        *out = o;
        return OPTIONS_RUN;
    }
    options_free(o);
    return status;
}

int options_reload(struct options *o)
{
    config_t fresh;
    struct roles *roles = NULL;
    struct reading *rd = mem_calloc(1, sizeof *rd);
    int rc = read_all(o, &fresh, &roles, rd);
    if (rc != 0) {
        say_error("SIGHUP: the configuration was not reloaded, nothing changed: %s", rd->err);
        mem_free(rd);
        roles_free(roles);
        return -1;
    }
    mem_free(rd);
    config_t *live = o->live;
    int applied = 0;
    for (size_t i = 0; i < N_OPTS; i++) {
        const opt_def_t *d = &opt_table[i];
        if (d->kind == K_CMD || same_value(live, &fresh, d))
            continue;
        char was[4200], now[4200];
        opt_show_value(live, d, was, sizeof was);
        opt_show_value(&fresh, d, now, sizeof now);
        if (!d->live) {
            say_warn("SIGHUP: %s changed (%s -> %s) but needs a restart; it stays %s until then",
                     d->name, was[0] ? was : "none", now[0] ? now : "none", was[0] ? was : "none");
            continue;
        }
        say_info("SIGHUP: %s %s -> %s", d->name, was[0] ? was : "none", now[0] ? now : "none");
        switch (d->kind) {
        case K_STR:
            *(const char **)at(live, d) = *(const char **)at(&fresh, d);
            break;
        case K_FLAG:
        case K_SYNC:
        case K_LEVEL:
        case K_ROLE:
            *(int *)at(live, d) = *(int *)at(&fresh, d);
            break;
        case K_SIZE:
            *(size_t *)at(live, d) = *(size_t *)at(&fresh, d);
            break;
        case K_U64:
            *(uint64_t *)at(live, d) = *(uint64_t *)at(&fresh, d);
            break;
        case K_UINT:
        case K_MODE:
            *(unsigned *)at(live, d) = *(unsigned *)at(&fresh, d);
            break;
        case K_DAYS:
            *(double *)at(live, d) = *(double *)at(&fresh, d);
            break;
        case K_CMD:
            break;
        }
        applied++;
    }
    /* The tokens are read again whatever changed: the file's contents may have. */
    live->roles = roles;
    live->token = roles_first_token(roles);
    roles_free(o->roles);
    o->roles = roles;
    say_set_level((enum say_level)live->log_level);
    say_info("SIGHUP: configuration reloaded%s%s (%d change%s applied); %zu token%s",
             o->file ? " from " : "", o->file ? o->file : "", applied, applied == 1 ? "" : "s",
             roles_n_tokens(roles), roles_n_tokens(roles) == 1 ? "" : "s");
    /* XXX: a reload's strings stay in the pool until the options are freed (a few bytes a
     * SIGHUP): the live configuration may point to any of them. */
    return applied;
}

void options_free(struct options *o)
{
    if (!o)
        return;
    for (size_t i = 0; i < o->n_pool; i++)
        mem_free(o->pool[i]);
    mem_free(o->pool);
    roles_free(o->roles);
    mem_free(o);
}
