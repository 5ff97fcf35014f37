/*
 * options_impl.h - what options.c (the table, parsing, reading, reloading)
 * and options_help.c (defaults, --help, the man page, the sample config)
 * share.  Internal to worthd's options.
 */
#ifndef WORTH_OPTIONS_IMPL_H
#define WORTH_OPTIONS_IMPL_H

#include <stddef.h>
#include <stdint.h>
#include <stdio.h>

#include "options.h"

/* Column at which --help starts an option's text, and the width it wraps at. */
#define HELP_COL   28
#define HELP_WIDTH 100

enum kind {
    K_STR,   /* const char *: a path or address */
    K_FLAG,  /* int 0/1; in the file: true, false, yes, no, 1, 0 */
    K_SIZE,  /* size_t within [lo, hi], times scale */
    K_U64,   /* uint64_t within [lo, hi] */
    K_UINT,  /* unsigned within [lo, hi] */
    K_DAYS,  /* double within [lo, hi] */
    K_SYNC,  /* int sync_full: full or normal */
    K_LEVEL, /* int log_level: error, warn, info, debug */
    K_MODE,  /* unsigned file_mode: 0600 or 0640 */
    K_ROLE,  /* int role: read, write, admin */
    K_CMD,   /* command line only: no field */
};

/* Command-line-only options (K_CMD), by their index in `table`. */
enum { C_CONFIG = 1, C_CHECK, C_PRINT_CONFIG, C_PRINT_MAN, C_HELP, C_VERSION };

typedef struct opt_def {
    const char *name; /* --NAME and the config key NAME */
    const char *arg;  /* its argument's name, NULL for a flag */
    enum kind kind;
    size_t off;       /* offsetof(config_t, ...) */
    uint64_t lo, hi;  /* bounds of a number (K_DAYS: whole days) */
    uint64_t scale;   /* stored = given x scale (0: 1) */
    int live;         /* a reload applies it */
    int cmd;          /* K_CMD: which (C_...) */
    const char *def;  /* the default in words, when it is not simply the value */
    const char *help; /* sentences, without the default and the bounds */
} opt_def_t;

/* The table (options.c) and its length. */
extern const opt_def_t opt_table[];
extern const size_t opt_count;

struct options {
    int argc;
    char **argv;         /* borrowed: main's */
    const char *file;    /* the config file read, or NULL */
    int file_given;      /* --config named it (then it must exist) */
    config_t *live;      /* the configuration running (options_load's cfg) */
    struct roles *roles; /* live->roles */
    char **pool;         /* every string live points to */
    size_t n_pool, cap_pool;
};

/* options.c: a copy of s[0..len-1] in o's pool (freed with the options). */
char *opt_pool_dup(struct options *o, const char *s, size_t len);
/* options.c: the value of d in c as the config file writes it. */
void opt_show_value(const config_t *c, const opt_def_t *d, char *buf, size_t len);
/* options_help.c: config_t's defaults (before the file and the command line). */
void opt_defaults(struct options *o, config_t *c);
void opt_print_help(struct options *o, FILE *f);
void opt_print_man(struct options *o, FILE *f);
void opt_print_sample(struct options *o, FILE *f);

#endif /* WORTH_OPTIONS_IMPL_H */
