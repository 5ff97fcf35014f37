/*
 * inproc.c - the in-process learning rate of one model: the ceiling that
 * durable ingest into worthd is measured against (a benchmark, not a test).
 *
 * Reads a model.create request (the very object sent to worthd) and an
 * observe.bulk payload (schema/protocol.md, "observe.bulk": records of 2D + 2
 * little-endian doubles x[0..D-1], r, x_next[0..D-1], terminal), all into
 * memory before any timing.  Then, ROUNDS times, builds a fresh model from the
 * spec and times model_observe over every record on this thread, with
 * OpenBLAS on one thread as in worthd.  The figure is the fastest round (load
 * only adds time).  Every round must end with bit-identical values.
 *
 * Prints one JSON line:
 *   {"transitions":N,"seconds":S,"rate":R,"rounds":[...],"features":F,
 *    "estimators":["td",...],"probe":[0.3,...],"values":[...]}
 * where values are model_value at x = [0.3]*D, one per estimator in the
 * spec's order (null for a diverged estimator), printed with as many digits
 * as read back to the same double, so that the caller can compare them with
 * worthd's bit for bit.
 *
 * Usage: inproc SPEC.json RECORDS.bin DIMS
 */
#include <cjson/cJSON.h>
#include <errno.h>
#include <math.h>
#include <stdarg.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "core/spec.h"
#include "learn/model.h"

void openblas_set_num_threads(int n);

#define ROUNDS 3
#define PROBE  0.3

__attribute__((format(printf, 1, 2), noreturn)) static void die(const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    fprintf(stderr, "inproc: ");
    vfprintf(stderr, fmt, ap);
    fputc('\n', stderr);
    va_end(ap);
    exit(1);
}

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

/* Reads the whole of path into a new buffer (NUL-terminated); *len gets its size. */
static unsigned char *slurp(const char *path, size_t *len)
{
    FILE *f = fopen(path, "rb");
    if (!f)
        die("cannot open %s: %s", path, strerror(errno));
    size_t cap = 1 << 20, n = 0;
    unsigned char *buf = malloc(cap + 1);
    if (!buf)
        die("out of memory reading %s", path);
    for (;;) {
        if (n == cap) {
            cap *= 2;
            unsigned char *nb = realloc(buf, cap + 1);
            if (!nb)
                die("out of memory reading %s", path);
            buf = nb;
        }
        size_t got = fread(buf + n, 1, cap - n, f);
        n += got;
        if (got == 0) {
            if (ferror(f))
                die("cannot read %s: %s", path, strerror(errno));
            break;
        }
    }
    fclose(f);
    buf[n] = 0;
    *len = n;
    return buf;
}

/* The little-endian IEEE-754 double at p, whatever the host's byte order. */
static double le_double(const unsigned char *p)
{
    uint64_t u = 0;
    for (int i = 7; i >= 0; i--)
        u = u << 8 | p[i];
    double v;
    memcpy(&v, &u, sizeof v);
    return v;
}

/* Prints v with the fewest digits that read back as the same double (null when not finite). */
static void print_double(double v)
{
    if (!isfinite(v)) {
        printf("null");
        return;
    }
    char buf[40];
    for (int prec = 15; prec <= 17; prec++) {
        snprintf(buf, sizeof buf, "%.*g", prec, v);
        if (strtod(buf, NULL) == v)
            break;
    }
    printf("%s", buf);
}

int main(int argc, char **argv)
{
    if (argc != 4) {
        fprintf(stderr, "usage: inproc SPEC.json RECORDS.bin DIMS\n");
        return 2;
    }
    char *end = NULL;
    errno = 0;
    long dims_arg = strtol(argv[3], &end, 10);
    if (errno || end == argv[3] || *end || dims_arg < 1 || dims_arg > FEAT_MAX_DIMS)
        die("DIMS must be an integer in 1..%d, not \"%s\"", FEAT_MAX_DIMS, argv[3]);
    size_t d = (size_t)dims_arg;

    /* The spec, parsed as worthd parses a model.create request. */
    size_t spec_len = 0;
    unsigned char *spec_text = slurp(argv[1], &spec_len);
    cJSON *root = cJSON_ParseWithLength((const char *)spec_text, spec_len);
    if (!root || !cJSON_IsObject(root))
        die("%s is not a JSON object", argv[1]);
    spec_t *s = NULL;
    char err[512];
    if (spec_parse(root, &s, err, sizeof err) != 0)
        die("bad spec in %s: %s", argv[1], err);
    cJSON_Delete(root);
    free(spec_text);
    if (s->m.feat.dims != d)
        die("the spec has %zu dimensions, DIMS is %zu", s->m.feat.dims, d);

    /* The records, decoded once; nothing of this is timed. */
    size_t raw_len = 0;
    unsigned char *raw = slurp(argv[2], &raw_len);
    size_t rec_doubles = 2 * d + 2, rec_bytes = rec_doubles * 8;
    if (raw_len == 0 || raw_len % rec_bytes != 0)
        die("%s holds %zu bytes, not a positive multiple of the record size %zu (2 * %zu + 2 "
            "doubles)",
            argv[2], raw_len, rec_bytes, d);
    size_t n = raw_len / rec_bytes;
    double *rec = malloc(raw_len);
    if (!rec)
        die("out of memory for %s", argv[2]);
    for (size_t i = 0; i < n * rec_doubles; i++)
        rec[i] = le_double(raw + i * 8);
    free(raw);
    for (size_t i = 0; i < n; i++) {
        double term = rec[i * rec_doubles + 2 * d + 1];
        if (term != 0.0 && term != 1.0)
            die("record %zu: terminal must be 0 or 1, not %g", i, term);
    }

    openblas_set_num_threads(1);

    size_t n_est = s->m.n_est;
    double best = INFINITY, secs[ROUNDS];
    double *values = calloc(n_est, sizeof *values);
    double *first = calloc(n_est, sizeof *first);
    double *probe = malloc(d * sizeof *probe);
    if (!values || !first || !probe)
        die("out of memory");
    for (size_t j = 0; j < d; j++)
        probe[j] = PROBE;
    size_t features = 0;
    for (int round = 0; round < ROUNDS; round++) {
        struct model *m = NULL;
        if (model_new(&s->m, &m, err, sizeof err) != 0)
            die("model_new: %s", err);
        double t0 = now_s();
        for (size_t i = 0; i < n; i++) {
            const double *q = rec + i * rec_doubles;
            int term = q[2 * d + 1] == 1.0;
            model_obs_t o = {
                .x = q,
                .x_len = d,
                .r = q[d],
                .x_next = term ? NULL : q + d + 1,
                .x_next_len = d,
                .terminal = term,
                .source = NULL,
                .dt_s = NAN,
            };
            if (model_observe(m, &o, err, sizeof err) != 0)
                die("record %zu refused: %s", i, err);
        }
        secs[round] = now_s() - t0;
        best = secs[round] < best ? secs[round] : best;

        features = model_features(m);
        double *work = malloc((model_work_size(m) + 1) * sizeof *work);
        if (!work)
            die("out of memory");
        if (model_value(m, probe, d, values, NULL, work) != 0)
            die("model_value failed at the probe state");
        free(work);
        if (round == 0)
            memcpy(first, values, n_est * sizeof *first);
        else if (memcmp(first, values, n_est * sizeof *first) != 0)
            die("round %d ended with other values than round 1", round + 1);
        if (round == ROUNDS - 1) {
            printf("{\"transitions\":%zu,\"seconds\":%.9f,\"rate\":%.1f,\"rounds\":[", n, best,
                   (double)n / best);
            for (int k = 0; k <= round; k++)
                printf("%s%.9f", k ? "," : "", secs[k]);
            printf("],\"features\":%zu,\"estimators\":[", features);
            for (size_t e = 0; e < n_est; e++) {
                /* Names are [A-Za-z0-9._-] (spec_name_ok): no escaping needed. */
                printf("%s\"%s\"", e ? "," : "", model_est_name(m, e));
            }
            printf("],\"probe\":[");
            for (size_t j = 0; j < d; j++) {
                printf("%s", j ? "," : "");
                print_double(probe[j]);
            }
            printf("],\"values\":[");
            for (size_t e = 0; e < n_est; e++) {
                printf("%s", e ? "," : "");
                print_double(values[e]);
            }
            printf("]}\n");
        }
        model_free(m);
    }
    if (fflush(stdout) != 0)
        die("cannot write the result");
    free(values);
    free(first);
    free(probe);
    free(rec);
    spec_free(s);
    return 0;
}
