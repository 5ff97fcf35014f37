/*
 * cli.h - what the modules of the `worth` command-line client share.
 *
 * The CLI is one client of libworth-client (include/worth/client.h), in layers
 * that only call downwards: worth.c (main) finds a command in the one table of
 * commands.c and runs its handler; the handlers live in models.c, feed.c
 * (ingest), query.c, admin.c, watch.c and plot.c; they build on table.c
 * (aligned tables) and csv.c (the CSV cell splitter), and all of these on
 * cli.c (the connection, messages, argument parsing, formatting), which calls
 * nothing of the CLI.  Internal to the CLI.
 */
#ifndef WORTH_CLI_H
#define WORTH_CLI_H

#include <stddef.h>
#include <stdint.h>
#include <stdio.h>

#include <cjson/cJSON.h>

#include "worth/client.h"

/* Exit codes (documented in `worth help`). */
#define EXIT_OK      0 /* success */
#define EXIT_SERVER  1 /* worthd answered with an error */
#define EXIT_USAGE   2 /* bad arguments, unreadable file, malformed input */
#define EXIT_CONNECT 3 /* cannot connect to worthd, or the connection was lost */

/* The most dimensions a model has (protocol v1). */
#define MAXDIMS 64

/*
 * A model's dimensions as a person reads them, from model.get's spec: names
 * and units of the named form ("dims":[{"name","unit","range"}, ...]), or
 * x0, x1, ... for the numeric form; the declared ranges; the reward's unit
 * and the control period.  Plain data.
 */
struct mspec {
    size_t dims;
    int named;                       /* the spec names its dimensions */
    char name[MAXDIMS][64];          /* "level"; "x0", "x1", ... when not named */
    char unit[MAXDIMS][32];          /* "m"; "" when none */
    double lo[MAXDIMS], hi[MAXDIMS]; /* declared range */
    char reward_unit[32];            /* "EUR"; "" when none */
    double period_s;                 /* the control period; NAN when not declared */
};

/* Global options and the connection (opened lazily by cli_connect). */
struct cli {
    const char *socket_path; /* Unix socket (default $WORTH_SOCKET or ./worthd.sock) */
    const char *host_port;   /* --connect HOST:PORT, or NULL */
    const char *token_file;  /* --token-file, or NULL */
    char *token;             /* read from token_file (owned) */
    int json;                /* --json: print worthd's replies unchanged */
    int timeout_ms;          /* --timeout, 0 for the library's default */
    worth_client *c;         /* NULL until cli_connect */
};

/* One command of the table in commands.c. */
struct cmd {
    const char *name;
    int (*run)(struct cli *cli, int argc, char **argv); /* argv[0] is the command name */
    const char *args;    /* its arguments in the global list, e.g. "MODEL X1 X2 ..." */
    const char *summary; /* one line in the global list */
    const char *usage;   /* its page's usage lines, after "usage: " (no final newline) */
    const char *help;    /* the rest of its page, after a blank line */
};

/* A command option: "--name" with a value (*value set) or a flag (*flag set to 1). */
struct opt {
    const char *name;
    const char **value;
    int *flag;
};

/* commands.c: the table, and every help text printed from it */
/* The command of that name (static storage), or NULL. */
const struct cmd *cmd_find(const char *name);
/* The global usage: options, the commands with their summaries, exit codes. */
void help_global(FILE *f);
/* The page of cmd. */
void help_command(FILE *f, const struct cmd *cmd);

/* cli.c */
/* Opens the connection; returns EXIT_OK or EXIT_CONNECT (message printed). */
int cli_connect(struct cli *cli);
/* Prints the error of a failed library call; returns EXIT_SERVER or EXIT_CONNECT. */
int cli_fail(struct cli *cli, int rc);
/* Prints "worth: CMD: message" and a pointer to the help; returns EXIT_USAGE. */
int cli_usage(const char *cmd, const char *fmt, ...) __attribute__((format(printf, 2, 3)));
/* Prints "worth: message"; returns code. */
int cli_error(int code, const char *fmt, ...) __attribute__((format(printf, 2, 3)));
/*
 * Sends req (transferred; freed here) with worth_request and prints the reply
 * line unchanged on stdout.  Returns EXIT_OK, EXIT_SERVER or EXIT_CONNECT.
 */
int cli_raw(struct cli *cli, cJSON *req);
/* A new request {"op":op,"model":model} (model may be NULL; owned by the caller), or NULL. */
cJSON *cli_request(const char *op, const char *model);
/* The same with a string member key:value after them when value is not NULL. */
cJSON *cli_request_opt(const char *op, const char *model, const char *key, const char *value);
/* Parses a reply owned by the library (owned by the caller); prints a message, NULL if not JSON. */
cJSON *cli_reply(const char *json);
/* o's member k, or NULL (o may be NULL). */
const cJSON *json_get(const cJSON *o, const char *k);
/* A finite double filling the whole of s; 0 or -1. */
int parse_double(const char *s, double *out);
/*
 * A time on the command line: seconds since 1970 (a number) or ISO-8601 with
 * a zone (isotime.h); 0, or -1 with the reason in err.
 */
int parse_time(const char *s, double *t_s, char *err, size_t errlen);
/*
 * A time window "T0/T1" (ISO-8601's interval form; either end a number or an
 * ISO time) or "A:B" (numbers only), with T0 <= T1; 0, or -1 with the reason.
 */
int parse_time_window(const char *s, double *lo, double *hi, char *err, size_t errlen);
/* A decimal integer lo..hi filling the whole of s; 0 or -1. */
int parse_int(const char *s, long long lo, long long hi, long long *out);
/*
 * model.get of model: *dims and, when reply is not NULL, a parsed copy of the
 * reply (*reply owned by the caller, cJSON_Delete).  Returns an exit code.
 */
int cli_model(struct cli *cli, const char *model, size_t *dims, cJSON **reply);
/*
 * model.get of model into *ms, and when reply is not NULL a parsed copy of the
 * reply (*reply owned by the caller).  Returns an exit code (message printed).
 */
int cli_spec(struct cli *cli, const char *model, struct mspec *ms, cJSON **reply);
/* Reads *ms from a model.get reply (borrowed); 0, or -1 when it has no usable dims. */
int mspec_read(const cJSON *reply, struct mspec *ms);
/* Dimension d as a person reads it: "level [m]", "level", or "x[0]" when not named. */
void mspec_label(const struct mspec *ms, size_t d, char *buf, size_t len);
/* A quantity in the reward's unit: "V [EUR]" for what "V", or what alone without a unit. */
void mspec_vlabel(const struct mspec *ms, const char *what, char *buf, size_t len);
/* The dimension a command-line word names: its name, or its 0-based index; -1 for none. */
long mspec_dim(const struct mspec *ms, const char *word);
/* "level, demand" (or "x0, x1, ...") into buf: the names a message lists. */
void mspec_names(const struct mspec *ms, char *buf, size_t len);
/*
 * Parses argv[1..] of cmd: options from opts (terminated by a zero entry),
 * positional arguments into pos (at most maxpos, at least minpos; "--" ends
 * the options).  Returns EXIT_OK or EXIT_USAGE (message printed).
 */
int parse_args(const char *cmd, int argc, char **argv, const struct opt *opts, char **pos,
               int maxpos, int minpos, int *npos);
/*
 * The start of a command of one model and no options (CMD MODEL): parses
 * argv and, with --json, sends {"op":op,"model":MODEL} and prints worthd's
 * reply unchanged.  *model gets MODEL (borrowed from argv) when the command
 * goes on, NULL when it is done (a usage error, or --json).  Returns the exit code.
 */
int cli_model_arg(struct cli *cli, const char *cmd, const char *op, int argc, char **argv,
                  const char **model);
/*
 * Connects and calls fetch (worth_model_info, worth_stats, ...) for model
 * (may be NULL); its reply is parsed into *r (owned by the caller; stays NULL
 * on failure, the message printed).  Returns the exit code.
 */
int cli_fetch(struct cli *cli, const char *model,
              int (*fetch)(worth_client *, const char *, const char **), cJSON **r);
/*
 * A command that shows one model's reply (CMD MODEL, op CMD): cli_model_arg,
 * then cli_fetch (*r stays NULL when the command is done).  Returns the exit code.
 */
int cli_query(struct cli *cli, const char *cmd, int argc, char **argv,
              int (*fetch)(worth_client *, const char *, const char **), cJSON **r);
/* A cell as shown in a message: non-printable bytes as '?', cut to len - 4 bytes with "...". */
const char *show_cell(const char *s, char *buf, size_t len);
/* Whether stderr is a terminal (progress bars go there). */
int cli_tty(void);
/*
 * Asks the question (printf-style) on the terminal and returns 1 when the
 * answer is y or yes; 1 without asking with yes (--yes) or when stdin or
 * stderr is not a terminal (a script).  A refusal is said ("not confirmed").
 */
int cli_confirm(const char *cmd, int yes, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));
/* Exit code of a refused confirmation. */
#define EXIT_DECLINED EXIT_USAGE
/* Formats a double for a table cell (%.6g; "-" for NAN). */
void fmt_num(char *buf, size_t len, double v);
/* Formats a JSON scalar (or a short array) for a table cell; "-" for NULL or null. */
void fmt_json(char *buf, size_t len, const cJSON *v);

/* The command handlers (argv[0] is the command's name; each returns an exit code). */
/* models.c */
int cmd_models(struct cli *cli, int argc, char **argv);
int cmd_create(struct cli *cli, int argc, char **argv);
int cmd_drop(struct cli *cli, int argc, char **argv);
int cmd_show(struct cli *cli, int argc, char **argv);
/* feed.c */
int cmd_feed(struct cli *cli, int argc, char **argv);
/* fleet.c (built with libnats only) */
int cmd_fleet(struct cli *cli, int argc, char **argv);
/* query.c */
int cmd_value(struct cli *cli, int argc, char **argv);
int cmd_stats(struct cli *cli, int argc, char **argv);
int cmd_events(struct cli *cli, int argc, char **argv);
/* admin.c */
int cmd_checkpoint(struct cli *cli, int argc, char **argv);
int cmd_checkpoints(struct cli *cli, int argc, char **argv);
int cmd_rollback(struct cli *cli, int argc, char **argv);
int cmd_backup(struct cli *cli, int argc, char **argv);
int cmd_train(struct cli *cli, int argc, char **argv);
/* watch.c, plot.c */
int cmd_watch(struct cli *cli, int argc, char **argv);
int cmd_plot(struct cli *cli, int argc, char **argv);
/* commands.c: `worth help [CMD]` */
int cmd_help(struct cli *cli, int argc, char **argv);
/* ops.c */
int cmd_status(struct cli *cli, int argc, char **argv);
int cmd_retention(struct cli *cli, int argc, char **argv);
/* commands.c: the manual page (roff) and the bash completion, from the table */
void help_man(FILE *f);
void help_completion(FILE *f);

/* csv.c */
/*
 * Splits line (modified in place; a trailing "\r\n" is removed) at commas,
 * honouring double quotes ("" inside quotes is one quote) and trimming blanks
 * around unquoted cells.  *cells (grown with realloc, *cap entries) gets
 * pointers into line.  Returns the cell count, or -1 for an unterminated
 * quote, -2 when out of memory.
 */
long csv_split(char *line, char ***cells, size_t *cap);
/* The same with another separator than ',' (e.g. ';' or '\t'; not '"', not NUL). */
long csv_split_sep(char *line, char sep, char ***cells, size_t *cap);

/* table.c: an aligned text table; numbers right-aligned, text left-aligned. */
struct table;
struct table *table_new(size_t ncols); /* NULL when out of memory */
/* Adds a row of ncols cells (copied); NULL cells print as empty.  0 or -1. */
int table_row(struct table *t, const char *const *cells);
/* Convenience: a row given as ncols variadic const char * arguments. */
int table_rowv(struct table *t, ...);
/*
 * The table for the entries of a reply's list, with ncols columns; NULL when
 * there is none to fill: the list is empty (empty is printed on stdout,
 * *ex = EXIT_OK) or memory ran out (said, *ex = EXIT_USAGE).
 */
struct table *table_list(const cJSON *list, const char *empty, size_t ncols, int *ex);
/* Aligns every column left (key/value listings). */
void table_left(struct table *t);
void table_print(const struct table *t, FILE *f);
void table_free(struct table *t);

#endif /* WORTH_CLI_H */
