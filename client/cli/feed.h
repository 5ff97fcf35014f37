/*
 * feed.h - what the three parts of `worth feed` share: feed.c (the command,
 * its options, the summary), feed_rows.c (the transition CSV and JSON lines) and samples.c
 * (historian exports: wide and long sample files).  Internal to the CLI.
 */
#ifndef WORTH_CLI_FEED_H
#define WORTH_CLI_FEED_H

#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <sys/types.h>

#include "cli.h"

/* The forms of input feed reads. */
enum feed_form {
    FORM_AUTO = 0,
    FORM_TRANSITIONS, /* CSV: x0.., r, xn0.. (the original form) */
    FORM_JSONL,       /* JSON lines of transitions */
    FORM_WIDE,        /* CSV: one sample a row, a time column and one column per tag */
    FORM_LONG,        /* CSV: time, tag, value rows, pivoted per (source, time) */
};

/* How a time column is read (--time-format). */
enum feed_tfmt { TFMT_AUTO = 0, TFMT_ISO, TFMT_S, TFMT_MS };

/* Every option of feed (borrowed from argv; NULL when not given). */
struct feed_opts {
    const char *x, *xn, *r, *terminal;                /* transition columns */
    const char *time, *source, *quality, *good, *bad; /* sample columns and quality values */
    const char *map;                                  /* COL=DIM,... (wide) or TAG=DIM,... */
    const char *tag_col, *value_col, *ignore_tags;    /* long files */
    enum feed_tfmt tfmt;
};

/* The state of one feed; plain data shared by feed.c and samples.c. */
struct feed {
    struct cli *cli;
    const char *model, *path, *name; /* name: path as shown in messages */
    struct mspec ms;                 /* the model's dimensions */
    size_t dims;
    int skip;      /* --on-error skip */
    int resume;    /* send pseq with transitions (not --no-resume) */
    size_t frame;  /* rows per bulk frame */
    char sep;      /* the CSV separator */
    int dec_comma; /* --decimal-comma */
    enum feed_form form;
    /* Counters for the summary. */
    uint64_t rows;        /* data rows read */
    uint64_t fed;         /* rows (transitions or samples) acknowledged by worthd */
    uint64_t skipped;     /* malformed rows skipped under --on-error skip */
    uint64_t logged;      /* rows worthd skipped as already logged (a resend) */
    uint64_t paired;      /* transitions worthd paired from samples */
    uint64_t gaps;        /* chains broken by a gap */
    uint64_t bad_quality; /* rows skipped for their quality flag */
    uint64_t bad_samples; /* long files: samples left out for a reading flagged bad */
    uint64_t no_t;        /* transition rows without t */
    int has_t;            /* the transition file has a t column, or some rows carry t */
    uint64_t backwards;   /* transition rows whose t is before their source's previous */
    size_t backwards_line;
    uint64_t logged_lo, logged_hi; /* file lines worthd skipped as logged (transitions) */
    uint64_t seq;
    char ignored[1024]; /* header columns not read, comma-separated */
    /* The error that stopped the feed: its stable code, line and message (for --json). */
    char err_code[32];
    size_t err_line;
    char err_msg[720];
    /* Progress. */
    int tty;
    size_t bytes, size; /* size 0: unknown (a pipe) */
    double t0, last_draw;
    int drawn;
    uint64_t pending; /* rows read and not yet acknowledged */
};

/* Erases the progress bar before a message goes to stderr. */
void feed_bar_clear(struct feed *fd);
/* Redraws the progress bar (at most every 0.1 s unless force). */
void feed_bar_draw(struct feed *fd, int force);
/*
 * A malformed or refused row: prints "NAME:LINE: CODE: text" (or "NAME:LINE:
 * text" when code is NULL) and, under stop, records it as the feed's error.
 */
void feed_row_error(struct feed *fd, size_t line, const char *code, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));
/*
 * Reads f's next line that is not blank into *line (counting lines and
 * bytes): its length, -1 at the end (errno set on a read error), or -2 when
 * it holds a NUL byte (said: FILE:LINE).
 */
ssize_t feed_line(struct feed *fd, FILE *f, char **line, size_t *cap, size_t *lineno);
/* A number cell (',' as its decimal point with --decimal-comma); 0 or -1. */
int feed_number(const struct feed *fd, const char *cell, double *out);
/* Adds name to the ignored columns of the summary. */
void feed_ignore(struct feed *fd, const char *name);
/* Sleeps until the model has learnt up to fd->seq (bounded by the connection's timeout). */
void feed_settle(struct feed *fd);

/*
 * feed_rows.c: reads the rest of f after its first line as a transition file
 * (a CSV whose header cells are hdr[0..nh-1], or JSON lines whose first row
 * is first[0..first_len-1]) and sends its rows.  Returns the exit code; the
 * summary is printed by the caller.
 */
int transitions_run(struct feed *fd, FILE *f, char **hdr, long nh, const char *first,
                    size_t first_len, const struct feed_opts *fo, size_t lineno);

/*
 * samples.c: reads the rest of f (the header, hdr[0..nh-1], was line
 * *lineno) as a wide or long sample file (fd->form) and sends its samples.
 * Returns the exit code; the summary is printed by the caller.
 */
int samples_run(struct feed *fd, FILE *f, char **hdr, long nh, const struct feed_opts *fo,
                size_t lineno);
/* Which of time/tag/value/... header cell names a long or wide file (the detection of the form). */
int samples_has_column(char **hdr, long nh, const char *given, const char *const *names);
/* The default column names (case-insensitive). */
extern const char *const SAMPLE_TIME_NAMES[], *const SAMPLE_TAG_NAMES[],
                                                  *const SAMPLE_VALUE_NAMES[];

#endif /* WORTH_CLI_FEED_H */
