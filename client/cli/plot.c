/*
 * plot.c - `worth plot`: pictures of a model as SVG files.
 *
 * Two pictures.  The value map: V over a grid of two state dimensions, the
 * others held fixed, asked of worthd in batches of `value` with "xs", drawn
 * as coloured cells with axes, ticks and labels in the declared ranges and a
 * colour bar.  The history: each estimator's running RMS TD error against the
 * transition number, from worthd's `history`.  The file is written under a
 * temporary name and renamed into place, so a reader never sees half a file.
 * Every cell and point carries its numbers as data- attributes, so tests and
 * other tools can read the picture back.
 */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "cli.h"

/* Canvas and plot area, in SVG user units. */
#define W  760
#define H  540
#define PL 90  /* plot left */
#define PT 50  /* plot top */
#define PW 540 /* plot width */
#define PH 420 /* plot height */

/* The colour ramp: five anchors, dark blue (low) to light yellow (high). */
static const double RAMP[5][3] = {
    {0.16, 0.11, 0.42}, {0.13, 0.38, 0.60}, {0.13, 0.62, 0.54},
    {0.55, 0.80, 0.30}, {0.98, 0.92, 0.45},
};

static void colour(double f, char out[8])
{
    if (!isfinite(f)) {
        snprintf(out, 8, "#9a9a9a");
        return;
    }
    f = f < 0 ? 0 : f > 1 ? 1 : f;
    double pos = f * 4;
    int i = (int)pos;
    if (i > 3)
        i = 3;
    double u = pos - i;
    int rgb[3];
    for (int k = 0; k < 3; k++)
        rgb[k] = (int)lround(255 * (RAMP[i][k] * (1 - u) + RAMP[i + 1][k] * u));
    snprintf(out, 8, "#%02x%02x%02x", rgb[0], rgb[1], rgb[2]);
}

/* About n "nice" ticks (1, 2 or 5 times a power of ten) covering [lo, hi]. */
static size_t ticks(double lo, double hi, size_t n, double *out, size_t max)
{
    if (!(hi > lo) || !isfinite(lo) || !isfinite(hi)) {
        out[0] = lo;
        return 1;
    }
    double raw = (hi - lo) / (double)n, mag = pow(10, floor(log10(raw))), step = mag;
    if (raw / mag > 5)
        step = 10 * mag;
    else if (raw / mag > 2)
        step = 5 * mag;
    else if (raw / mag > 1)
        step = 2 * mag;
    size_t k = 0;
    for (double v = ceil(lo / step - 1e-9) * step; v <= hi + step * 1e-9 && k < max; v += step)
        out[k++] = fabs(v) < step * 1e-9 ? 0.0 : v;
    return k;
}

static void label(char *buf, size_t len, double v)
{
    snprintf(buf, len, "%.4g", v);
}

/* Writes text escaped for XML. */
static void xml(FILE *f, const char *s)
{
    for (; *s; s++) {
        if (*s == '<')
            fputs("&lt;", f);
        else if (*s == '>')
            fputs("&gt;", f);
        else if (*s == '&')
            fputs("&amp;", f);
        else if (*s == '"')
            fputs("&quot;", f);
        else
            fputc(*s, f);
    }
}

/* Axes with ticks: x from x0..x1 on the plot's width, y from y0..y1 on its height. */
static void axes(FILE *f, double x0, double x1, double y0, double y1, const char *xt,
                 const char *yt)
{
    double tv[32];
    char b[64];
    fprintf(f,
            "<rect x=\"%d\" y=\"%d\" width=\"%d\" height=\"%d\" fill=\"none\" "
            "stroke=\"#333\"/>\n",
            PL, PT, PW, PH);
    size_t n = ticks(x0, x1, 6, tv, 32);
    for (size_t i = 0; i < n; i++) {
        double px = PL + (tv[i] - x0) / (x1 - x0) * PW;
        label(b, sizeof b, tv[i]);
        fprintf(f,
                "<line class=\"tick-x\" x1=\"%.2f\" y1=\"%d\" x2=\"%.2f\" y2=\"%d\" "
                "stroke=\"#333\"/>\n",
                px, PT + PH, px, PT + PH + 6);
        fprintf(f, "<text x=\"%.2f\" y=\"%d\" font-size=\"12\" text-anchor=\"middle\">%s</text>\n",
                px, PT + PH + 20, b);
    }
    n = ticks(y0, y1, 6, tv, 32);
    for (size_t i = 0; i < n; i++) {
        double py = PT + PH - (tv[i] - y0) / (y1 - y0) * PH;
        label(b, sizeof b, tv[i]);
        fprintf(f,
                "<line class=\"tick-y\" x1=\"%d\" y1=\"%.2f\" x2=\"%d\" y2=\"%.2f\" "
                "stroke=\"#333\"/>\n",
                PL - 6, py, PL, py);
        fprintf(f, "<text x=\"%d\" y=\"%.2f\" font-size=\"12\" text-anchor=\"end\">%s</text>\n",
                PL - 9, py + 4, b);
    }
    fprintf(f, "<text x=\"%d\" y=\"%d\" font-size=\"14\" text-anchor=\"middle\">", PL + PW / 2,
            PT + PH + 42);
    xml(f, xt);
    fprintf(f,
            "</text>\n<text x=\"%d\" y=\"%d\" font-size=\"14\" text-anchor=\"middle\" "
            "transform=\"rotate(-90 %d %d)\">",
            24, PT + PH / 2, 24, PT + PH / 2);
    xml(f, yt);
    fputs("</text>\n", f);
}

/* Opens path.tmp for writing; on success *tmp holds its name. */
static FILE *open_tmp(const char *path, char *tmp, size_t len)
{
    snprintf(tmp, len, "%s.tmp-%ld", path, (long)getpid());
    return fopen(tmp, "w");
}

static int close_rename(FILE *f, const char *tmp, const char *path)
{
    int bad = ferror(f);
    if (fclose(f) != 0 || bad || rename(tmp, path) != 0) {
        int e = errno;
        unlink(tmp);
        return cli_error(EXIT_USAGE, "cannot write %s: %s", path, strerror(e ? e : EIO));
    }
    return EXIT_OK;
}

/* "NAME=V,..." or "V1,V2,..." of --at into base (the other dimensions keep the middle). */
static int parse_at(const struct mspec *ms, const char *at, double *base)
{
    char *copy = strdup(at), *save = NULL, *tok;
    if (!copy)
        return cli_error(EXIT_USAGE, "out of memory");
    size_t k = 0;
    int named = strchr(at, '=') != NULL, ex = EXIT_OK;
    for (tok = strtok_r(copy, ",", &save); tok && ex == EXIT_OK;
         tok = strtok_r(NULL, ",", &save), k++) {
        char *eq = strchr(tok, '=');
        if (named != (eq != NULL)) {
            ex = cli_usage("plot", "--at takes X1,X2,... or NAME=X,..., not both");
            break;
        }
        size_t d = k;
        if (eq) {
            *eq = 0;
            long i = mspec_dim(ms, tok);
            if (i < 0) {
                char names[512];
                mspec_names(ms, names, sizeof names);
                ex = cli_usage("plot", "--at: no dimension \"%s\" (the model's dims: %s)", tok,
                               names);
                break;
            }
            d = (size_t)i;
        } else if (k >= ms->dims) {
            break;
        }
        if (parse_double(eq ? eq + 1 : tok, &base[d]))
            ex = cli_usage("plot", "--at: \"%s\" is not a number", eq ? eq + 1 : tok);
    }
    if (ex == EXIT_OK && !named && (k != ms->dims || tok))
        ex =
            cli_usage("plot", "--at needs %zu values (one per dimension), or NAME=X,...", ms->dims);
    free(copy);
    return ex;
}

static int value_map(struct cli *cli, const char *model, const char *xs, const char *ys,
                     const char *at, const char *est, const char *grid_s, const char *out,
                     const char *hour)
{
    struct mspec ms;
    long hs = -1, hc = -1; /* --hour SIN,COS: the y axis is the hour of day */
    int ex = cli_spec(cli, model, &ms, NULL);
    if (ex)
        return ex;
    size_t dims = ms.dims;
    long dx, dy = -1;
    long long grid = 48;
    char names[512];
    mspec_names(&ms, names, sizeof names);
    if (hour) {
        char a[64], b[64];
        if (sscanf(hour, "%63[^,],%63s", a, b) != 2 || (hs = mspec_dim(&ms, a)) < 0 ||
            (hc = mspec_dim(&ms, b)) < 0 || hs == hc)
            return cli_usage("plot",
                             "--hour takes SIN_DIM,COS_DIM (two dimensions, by name or 0..%zu: "
                             "%s)",
                             dims - 1, names);
        dy = hs;
    }
    if ((dx = mspec_dim(&ms, xs)) < 0 || (!hour && (dy = mspec_dim(&ms, ys)) < 0) || dx == dy ||
        dx == hc)
        return cli_usage("plot",
                         "--x and --y must be two different dimensions, by name or 0..%zu (%s)",
                         dims - 1, names);
    if (grid_s && parse_int(grid_s, 2, 400, &grid))
        return cli_usage("plot", "--grid must be an integer 2..400");
    double lo[64], hi[64], base[64];
    for (size_t i = 0; i < dims; i++) {
        lo[i] = ms.lo[i];
        hi[i] = ms.hi[i];
        base[i] = (lo[i] + hi[i]) / 2;
        if (!(hi[i] > lo[i]))
            return cli_error(EXIT_SERVER, "model %s: its spec has no usable ranges", model);
    }
    if (at && (ex = parse_at(&ms, at, base)))
        return ex;
    if ((ex = cli_connect(cli)))
        return ex;
    size_t n = (size_t)(grid * grid);
    double *states = malloc(n * dims * sizeof *states), *vals = malloc(n * sizeof *vals);
    if (!states || !vals) {
        free(states);
        free(vals);
        return cli_error(EXIT_USAGE, "out of memory for a %lld x %lld grid", grid, grid);
    }
    for (size_t row = 0; row < (size_t)grid; row++)
        for (size_t col = 0; col < (size_t)grid; col++) {
            double *s = states + (row * (size_t)grid + col) * dims;
            memcpy(s, base, dims * sizeof *s);
            s[dx] = lo[dx] + (col + 0.5) * (hi[dx] - lo[dx]) / (double)grid;
            if (hour) { /* hour of day h on the circle: sin and cos dimensions */
                double h = (row + 0.5) * 24.0 / (double)grid;
                s[hs] = sin(2 * 3.14159265358979323846 * h / 24);
                s[hc] = cos(2 * 3.14159265358979323846 * h / 24);
            } else {
                s[dy] = lo[dy] + (row + 0.5) * (hi[dy] - lo[dy]) / (double)grid;
            }
        }
    uint64_t seq = 0;
    for (size_t k = 0; k < n; k += 4096) {
        size_t m = n - k < 4096 ? n - k : 4096;
        int rc = worth_values(cli->c, model, states + k * dims, m, dims, est, vals + k, &seq);
        if (rc) {
            free(states);
            free(vals);
            return cli_fail(cli, rc);
        }
    }
    double vmin = INFINITY, vmax = -INFINITY;
    for (size_t k = 0; k < n; k++)
        if (isfinite(vals[k])) {
            vmin = fmin(vmin, vals[k]);
            vmax = fmax(vmax, vals[k]);
        }
    if (!(vmax > vmin)) { /* flat or empty: a range of one so the scale still draws */
        vmin = isfinite(vmin) ? vmin - 0.5 : 0;
        vmax = vmin + 1;
    }
    char tmp[4200];
    FILE *f = open_tmp(out, tmp, sizeof tmp);
    if (!f) {
        free(states);
        free(vals);
        return cli_error(EXIT_USAGE, "cannot write %s: %s", out, strerror(errno));
    }
    fprintf(f,
            "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n"
            "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"%d\" height=\"%d\" "
            "viewBox=\"0 0 %d %d\" font-family=\"sans-serif\">\n"
            "<rect width=\"%d\" height=\"%d\" fill=\"white\"/>\n",
            W, H, W, H, W, H);
    fprintf(f, "<text x=\"%d\" y=\"28\" font-size=\"16\" text-anchor=\"middle\">V(x) of ", W / 2);
    xml(f, model);
    if (est) {
        fputs(" (", f);
        xml(f, est);
        fputs(")", f);
    }
    fprintf(f,
            " after seq %llu</text>\n<g class=\"cells\" shape-rendering=\"crispEdges\" "
            "data-x-dim=\"%ld\" "
            "data-y-dim=\"%ld\" data-x-lo=\"%.17g\" data-x-hi=\"%.17g\" data-y-lo=\"%.17g\" "
            "data-y-hi=\"%.17g\">\n",
            (unsigned long long)seq, dx, dy, lo[dx], hi[dx], lo[dy], hi[dy]);
    double cw = (double)PW / (double)grid, ch = (double)PH / (double)grid;
    for (size_t row = 0; row < (size_t)grid; row++)
        for (size_t col = 0; col < (size_t)grid; col++) {
            size_t k = row * (size_t)grid + col;
            char c[8];
            colour((vals[k] - vmin) / (vmax - vmin), c);
            const double *s = states + k * dims;
            fprintf(f,
                    "<rect class=\"cell\" x=\"%.3f\" y=\"%.3f\" width=\"%.3f\" height=\"%.3f\" "
                    "fill=\"%s\" data-x=\"%.17g\" data-y=\"%.17g\" data-v=\"%.17g\"/>\n",
                    PL + col * cw, PT + PH - (row + 1) * ch, cw + 0.02, ch + 0.02, c, s[dx], s[dy],
                    vals[k]);
        }
    fputs("</g>\n", f);
    char xt[128], yt[128], vt[64];
    mspec_label(&ms, (size_t)dx, xt, sizeof xt);
    if (hour)
        snprintf(yt, sizeof yt, "hour of day (from %s, %s)", ms.name[hs], ms.name[hc]);
    else
        mspec_label(&ms, (size_t)dy, yt, sizeof yt);
    mspec_vlabel(&ms, "V", vt, sizeof vt);
    axes(f, lo[dx], hi[dx], hour ? 0 : lo[dy], hour ? 24 : hi[dy], xt, yt);
    /* The colour bar, with ticks in value units. */
    int bx = PL + PW + 40, bw = 22;
    fprintf(f,
            "<g class=\"colourbar\" shape-rendering=\"crispEdges\" data-v-lo=\"%.17g\" "
            "data-v-hi=\"%.17g\">\n",
            vmin, vmax);
    for (int k = 0; k < 100; k++) {
        char c[8];
        colour((k + 0.5) / 100.0, c);
        fprintf(f, "<rect x=\"%d\" y=\"%.2f\" width=\"%d\" height=\"%.2f\" fill=\"%s\"/>\n", bx,
                PT + PH - (k + 1) * PH / 100.0, bw, PH / 100.0 + 0.05, c);
    }
    double tv[32];
    size_t nt = ticks(vmin, vmax, 6, tv, 32);
    for (size_t k = 0; k < nt; k++) {
        char b[64];
        double py = PT + PH - (tv[k] - vmin) / (vmax - vmin) * PH;
        label(b, sizeof b, tv[k]);
        fprintf(f,
                "<line x1=\"%d\" y1=\"%.2f\" x2=\"%d\" y2=\"%.2f\" stroke=\"#333\"/>\n"
                "<text x=\"%d\" y=\"%.2f\" font-size=\"12\">%s</text>\n",
                bx + bw, py, bx + bw + 5, py, bx + bw + 8, py + 4, b);
    }
    fprintf(f,
            "<text class=\"colourbar-title\" x=\"%d\" y=\"%d\" font-size=\"14\" "
            "text-anchor=\"middle\">",
            bx + bw / 2, PT - 8);
    xml(f, vt);
    fputs("</text>\n</g>\n</svg>\n", f);
    free(states);
    free(vals);
    ex = close_rename(f, tmp, out);
    if (ex == EXIT_OK)
        printf("wrote %s: %s over %s x %s, %lld x %lld cells, values %.4g .. %.4g\n", out, vt, xt,
               yt, grid, grid, vmin, vmax);
    return ex;
}

static const char *const PALETTE[] = {"#1b6ca8", "#d1495b", "#2e933c", "#edae49",
                                      "#6a4c93", "#00798c", "#8f2d56", "#444444"};

static int history(struct cli *cli, const char *model, const char *out)
{
    struct mspec ms;
    int ex = cli_spec(cli, model, &ms, NULL);
    if (ex)
        return ex;
    char yt[160];
    mspec_vlabel(&ms, "RMS error: TD (solid), realised return (dashed)", yt, sizeof yt);
    char req[200];
    snprintf(req, sizeof req, "{\"op\":\"history\",\"model\":\"%s\"}", model);
    const char *json;
    int rc = worth_request(cli->c, req, &json);
    if (rc)
        return cli_fail(cli, rc);
    cJSON *r = cJSON_Parse(json);
    const cJSON *names = cJSON_GetObjectItemCaseSensitive(r, "estimators");
    const cJSON *hist = cJSON_GetObjectItemCaseSensitive(r, "history");
    int ne = cJSON_GetArraySize(names), nh = cJSON_GetArraySize(hist);
    double s0 = INFINITY, s1 = -INFINITY, y1 = 0;
    const cJSON *h, *v;
    cJSON_ArrayForEach(h, hist)
    {
        double seq = cJSON_GetObjectItemCaseSensitive(h, "seq")->valuedouble;
        s0 = fmin(s0, seq);
        s1 = fmax(s1, seq);
        for (int pass = 0; pass < 2; pass++)
            cJSON_ArrayForEach(
                v, cJSON_GetObjectItemCaseSensitive(h, pass ? "realised_rms" : "td_rms"))
            {
                if (cJSON_IsNumber(v))
                    y1 = fmax(y1, v->valuedouble);
            }
    }
    if (nh == 0) {
        s0 = 0;
        s1 = 1;
    }
    if (!(s1 > s0))
        s1 = s0 + 1;
    if (!(y1 > 0))
        y1 = 1;
    char tmp[4200];
    FILE *f = open_tmp(out, tmp, sizeof tmp);
    if (!f) {
        cJSON_Delete(r);
        return cli_error(EXIT_USAGE, "cannot write %s: %s", out, strerror(errno));
    }
    fprintf(f,
            "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n"
            "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"%d\" height=\"%d\" "
            "viewBox=\"0 0 %d %d\" font-family=\"sans-serif\">\n"
            "<rect width=\"%d\" height=\"%d\" fill=\"white\"/>\n"
            "<text x=\"%d\" y=\"28\" font-size=\"16\" text-anchor=\"middle\">RMS TD error of ",
            W, H, W, H, W, H, W / 2);
    xml(f, model);
    fputs(" per estimator</text>\n", f);
    axes(f, s0, s1, 0, y1 * 1.05, "transition (seq)", yt);
    for (int k = 0; k < ne; k++) {
        const char *name = cJSON_GetArrayItem(names, k)->valuestring;
        const char *col = PALETTE[k % 8];
        fprintf(f, "<polyline class=\"series\" data-estimator=\"");
        xml(f, name);
        fprintf(f, "\" fill=\"none\" stroke=\"%s\" stroke-width=\"2\" points=\"", col);
        cJSON_ArrayForEach(h, hist)
        {
            double seq = cJSON_GetObjectItemCaseSensitive(h, "seq")->valuedouble;
            const cJSON *y = cJSON_GetArrayItem(cJSON_GetObjectItemCaseSensitive(h, "td_rms"), k);
            if (!cJSON_IsNumber(y))
                continue;
            fprintf(f, "%.2f,%.2f ", PL + (seq - s0) / (s1 - s0) * PW,
                    PT + PH - y->valuedouble / (y1 * 1.05) * PH);
        }
        fputs("\"/>\n", f);
        /* The realised-return RMS error of the same estimator, dashed. */
        fprintf(f, "<polyline class=\"series-realised\" data-estimator=\"");
        xml(f, name);
        fprintf(f,
                "\" fill=\"none\" stroke=\"%s\" stroke-width=\"2\" stroke-dasharray=\"6 4\" "
                "points=\"",
                col);
        cJSON_ArrayForEach(h, hist)
        {
            double seq = cJSON_GetObjectItemCaseSensitive(h, "seq")->valuedouble;
            const cJSON *y =
                cJSON_GetArrayItem(cJSON_GetObjectItemCaseSensitive(h, "realised_rms"), k);
            if (!cJSON_IsNumber(y))
                continue;
            fprintf(f, "%.2f,%.2f ", PL + (seq - s0) / (s1 - s0) * PW,
                    PT + PH - y->valuedouble / (y1 * 1.05) * PH);
        }
        fprintf(f,
                "\"/>\n<rect x=\"%d\" y=\"%d\" width=\"14\" height=\"4\" fill=\"%s\"/>"
                "<text x=\"%d\" y=\"%d\" font-size=\"12\">",
                PL + PW + 20, PT + 10 + 20 * k, col, PL + PW + 40, PT + 16 + 20 * k);
        xml(f, name);
        fputs("</text>\n", f);
    }
    fputs("</svg>\n", f);
    cJSON_Delete(r);
    ex = close_rename(f, tmp, out);
    if (ex == EXIT_OK)
        printf("wrote %s: RMS TD error of %d estimators over %d samples\n", out, ne, nh);
    return ex;
}

int cmd_plot(struct cli *cli, int argc, char **argv)
{
    const char *x = NULL, *y = NULL, *at = NULL, *est = NULL, *out = NULL, *grid = NULL,
               *hour = NULL;
    int hist = 0;
    struct opt opts[] = {
        {"--x", &x, NULL},           {"--y", &y, NULL},       {"--at", &at, NULL},
        {"--estimator", &est, NULL}, {"--out", &out, NULL},   {"--grid", &grid, NULL},
        {"--history", NULL, &hist},  {"--hour", &hour, NULL}, {NULL, NULL, NULL}};
    char *pos[1];
    int np;
    int ex = parse_args("plot", argc, argv, opts, pos, 1, 1, &np);
    if (ex)
        return ex;
    if (!out)
        return cli_usage("plot", "--out FILE.svg is required");
    if (hist)
        return history(cli, pos[0], out);
    if (!x || (!y && !hour))
        return cli_usage("plot", "give --x DIM and --y DIM (or --hour SIN,COS, or --history)");
    return value_map(cli, pos[0], x, y, at, est, grid, out, hour);
}
