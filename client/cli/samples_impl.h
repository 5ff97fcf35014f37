/*
 * samples_impl.h - what the parts of the historian-export reader share:
 * samples.c (names, the header, the run), samples_send.c (the pending frame,
 * reading a row, wide rows) and samples_long.c (long files, pivoted per
 * source and time).  Internal to the CLI; samples.c's header comment has the
 * rules.
 */
#ifndef WORTH_CLI_SAMPLES_IMPL_H
#define WORTH_CLI_SAMPLES_IMPL_H

#include <stddef.h>
#include <stdint.h>

#include "feed.h"
#include "isotime.h"

#define MAXSRC     4096 /* distinct sources one file may name (worthd allows at most 1024) */
#define HASH       8192 /* slots of the source table (a power of two, twice MAXSRC) */
#define JSON_MAX   1024 /* samples in one observe request (a frame of several sources) */
#define NONE       (-1L)
#define T_REWARD   (-10) /* tag targets besides a dimension index (-2: a unit mismatch) */
#define T_TERMINAL (-11)
#define T_IGNORE   (-12)
/*
 * What the row functions return: 0 (the row is sent or queued), SKIP (left
 * out and counted, not an error), BAD (a row error, said), or FATAL(ex) for
 * an exit code that ends the feed (a failed send).
 */
#define SKIP        1
#define BAD         (-1)
#define FATAL(ex)   (-100 - (ex))
#define EXIT_OF(rc) (-(rc)-100)

struct source {
    char name[64]; /* "" for the default source */
    double last_t; /* time of its last sample sent (or queued) */
    int has_last;
    size_t last_line;
    uint64_t cur; /* long files: its sample being assembled (a key's number) */
    int has_cur;
};

/* A long file's sample being assembled from its rows. */
struct key {
    double t, r, x[MAXDIMS];
    int terminal, bad, final;
    uint64_t have;         /* bit d: dimension d given */
    int have_r, have_term; /* the reward, terminal given */
    int src;
    size_t line; /* its first row */
};

/* A tag of a long file and what it feeds. */
struct tag {
    char *name;
    int target; /* a dimension, T_REWARD, T_TERMINAL or T_IGNORE */
};

struct smp {
    struct feed *fd;
    const struct feed_opts *fo;
    size_t dims, ncols;
    long c_time, c_reward, c_source, c_quality, c_terminal, c_tag, c_value;
    long col_dim[1024]; /* wide: the dimension each column feeds, NONE */
    /* Quality flags (case-insensitive). */
    char *good_buf, *bad_buf, *good[64], *bad[64];
    size_t ngood, nbad;
    int bad_any; /* --bad '*': every value not good is bad */
    /* Time: the file's kind (ISO, seconds or milliseconds). */
    int tkind; /* ISOTIME_* of the first time, 0 before it */
    int seen_s, seen_ms;
    /* Sources, by name. */
    struct source *src;
    size_t nsrc;
    int slot[HASH]; /* index + 1 into src, 0 free */
    /* Long files: the tags seen, and the samples being assembled (in first-appearance order). */
    struct tag *tags;
    size_t ntags, tcap;
    struct tag *maps; /* from --map: tag or column -> dimension */
    size_t nmaps;
    char *map_buf;
    struct key *keys;
    uint64_t kbase, khead, ktail; /* keys khead..ktail-1 live at keys[k - kbase] */
    size_t kcap;
    char *ignore_buf, *ignore[256];
    size_t nignore;
    int ignore_all;
    /* The pending frame: n samples of dims + 3 doubles (t, x, r, terminal), their source, line. */
    double *rec;
    int *rsrc;
    size_t *rline, n;
    worth_sample *js; /* JSON_MAX, for frames of several sources */
    uint64_t bad_samples;
};

/* Default column names (case-insensitive), in samples.c. */
extern const char *const REWARD_NAMES[];
extern const char *const SOURCE_NAMES[];
extern const char *const QUALITY_NAMES[];
extern const char *const TERMINAL_NAMES[];

/* samples.c */
int smp_in_names(const char *s, const char *const *names);
long smp_dim_of(struct smp *S, const char *cell, char *why, size_t whylen);
int smp_source_of(struct smp *S, const char *name);
const char *smp_source_shown(const struct smp *S, int src);
void smp_quality_lists(const struct smp *S, char *buf, size_t len);

/* samples_send.c */
int smp_flush_pending(struct smp *S);
int smp_push(struct smp *S, int src, double t, const double *x, double r, int terminal,
             size_t line);
int smp_row_time(struct smp *S, const char *cell, size_t line, double *t);
int smp_row_quality(struct smp *S, const char *cell, size_t line);
int smp_row_number(struct smp *S, const char *cell, const char *what, size_t line, double *v);
int smp_row_bool(struct smp *S, const char *cell, size_t line, int *out);
int smp_row_source(struct smp *S, char **cells, size_t line);
int smp_row_width(struct smp *S, long nc, size_t line);
int smp_wide_row(struct smp *S, char **cells, long nc, size_t line);

/* samples_long.c */
int smp_long_row(struct smp *S, char **cells, long nc, size_t line);
int smp_long_end(struct smp *S);

#endif /* WORTH_CLI_SAMPLES_IMPL_H */
