/*
 * cli.h - what the modules of the `worth` command-line client share.
 *
 * The CLI is one client of libworth-client (include/worth/client.h): worth.c
 * parses the global options, connects and dispatches; cmds.c holds the short
 * commands, feed.c the CSV/JSON-lines ingest, table.c the aligned tables,
 * csv.c the CSV cell splitter and help.c every help text.  Internal to the CLI.
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

/* One command: name, handler (argv[0] is the command name), help text. */
struct cmd {
    const char *name;
    int (*run)(struct cli *cli, int argc, char **argv);
    const char *summary;
    const char *help;
};

/* worth.c */
const struct cmd *cmd_find(const char *name);
extern const struct cmd cmds[];
extern const size_t ncmds;
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
/* A finite double filling the whole of s; 0 or -1. */
int parse_double(const char *s, double *out);
/* A decimal integer lo..hi filling the whole of s; 0 or -1. */
int parse_int(const char *s, long long lo, long long hi, long long *out);
/*
 * model.get of model: *dims and, when spec is not NULL, a parsed copy of the
 * reply (*spec owned by the caller, cJSON_Delete).  Returns an exit code.
 */
int cli_model(struct cli *cli, const char *model, size_t *dims, cJSON **reply);
/* A command option: "--name" with a value (*value set) or a flag (*flag set to 1). */
struct opt {
    const char *name;
    const char **value;
    int *flag;
};
/*
 * Parses argv[1..] of cmd: options from opts (terminated by a zero entry),
 * positional arguments into pos (at most maxpos, at least minpos; "--" ends
 * the options).  Returns EXIT_OK or EXIT_USAGE (message printed).
 */
int parse_args(const char *cmd, int argc, char **argv, const struct opt *opts, char **pos,
               int maxpos, int minpos, int *npos);
/* A cell as shown in a message: non-printable bytes as '?', cut to len - 4 bytes with "...". */
const char *show_cell(const char *s, char *buf, size_t len);
/* Whether stderr is a terminal (progress bars go there). */
int cli_tty(void);
/* Formats a double for a table cell (%.6g; "-" for NAN). */
void fmt_num(char *buf, size_t len, double v);

/* help.c */
int cmd_help(struct cli *cli, int argc, char **argv);
void help_global(FILE *f);
/* Prints the help of one command (to f); 0, or -1 when there is no such command. */
int help_command(FILE *f, const char *name);

/* cmds.c */
int cmd_models(struct cli *cli, int argc, char **argv);
int cmd_create(struct cli *cli, int argc, char **argv);
int cmd_drop(struct cli *cli, int argc, char **argv);
int cmd_show(struct cli *cli, int argc, char **argv);
int cmd_value(struct cli *cli, int argc, char **argv);
int cmd_checkpoint(struct cli *cli, int argc, char **argv);
int cmd_checkpoints(struct cli *cli, int argc, char **argv);
int cmd_rollback(struct cli *cli, int argc, char **argv);
int cmd_backup(struct cli *cli, int argc, char **argv);
int cmd_train(struct cli *cli, int argc, char **argv);
int cmd_stats(struct cli *cli, int argc, char **argv);
int cmd_events(struct cli *cli, int argc, char **argv);

/* plot.c, watch.c */
int cmd_plot(struct cli *cli, int argc, char **argv);
int cmd_watch(struct cli *cli, int argc, char **argv);

/* feed.c */
int cmd_feed(struct cli *cli, int argc, char **argv);

/* csv.c */
/*
 * Splits line (modified in place; a trailing "\r\n" is removed) at commas,
 * honouring double quotes ("" inside quotes is one quote) and trimming blanks
 * around unquoted cells.  *cells (grown with realloc, *cap entries) gets
 * pointers into line.  Returns the cell count, or -1 for an unterminated
 * quote, -2 when out of memory.
 */
long csv_split(char *line, char ***cells, size_t *cap);

/* table.c: an aligned text table; numbers right-aligned, text left-aligned. */
struct table;
struct table *table_new(size_t ncols); /* NULL when out of memory */
/* Adds a row of ncols cells (copied); NULL cells print as empty.  0 or -1. */
int table_row(struct table *t, const char *const *cells);
/* Convenience: a row given as ncols variadic const char * arguments. */
int table_rowv(struct table *t, ...);
/* Aligns every column left (key/value listings). */
void table_left(struct table *t);
void table_print(const struct table *t, FILE *f);
void table_free(struct table *t);

#endif /* WORTH_CLI_H */
