/*
 * plot.c - `worth plot`: pictures of a model as SVG files.
 *
 * Two pictures.  The value map (here): V over a grid of two state dimensions,
 * the others held fixed (and named, with their values, under the title),
 * asked of worthd in batches of `value` with "xs", drawn as coloured cells
 * with axes, ticks and labels in the declared ranges and a colour bar whose
 * ends are labelled; the title names the estimator.  The history
 * (plot_history.c).  The file is written under a temporary name and renamed
 * into place, so a reader never sees half a file.  Every cell and point
 * carries its numbers as data- attributes, so tests and other tools can read
 * the picture back.
 */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "cli.h"
#include "plot.h"

/* Canvas and plot area, in SVG user units. */
#define W  760
#define H  540
#define PL 90  /* plot left */
#define PT 60  /* plot top */
#define PW 540 /* plot width */
#define PH 410 /* plot height */

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

/*
 * Who answers the map: the estimator asked for, else the one worthd's
 * headline names in a value answer at the held state (the primary), else
 * "the headline estimator".
 */
static void answering(struct cli *cli, const char *model, const double *x, size_t dims,
                      const char *est, char *buf, size_t len)
{
    snprintf(buf, len, "%s", est ? est : "the headline estimator");
    if (est)
        return;
    char req[4096];
    int n = snprintf(req, sizeof req, "{\"op\":\"value\",\"model\":\"%s\",\"x\":[", model);
    for (size_t i = 0; i < dims && n > 0 && (size_t)n < sizeof req - 40; i++)
        n += snprintf(req + n, sizeof req - (size_t)n, "%s%.17g", i ? "," : "", x[i]);
    if (n <= 0 || (size_t)n >= sizeof req - 40)
        return;
    snprintf(req + n, sizeof req - (size_t)n, "]}");
    const char *json;
    if (worth_request(cli->c, req, &json) != 0)
        return;
    cJSON *r = cJSON_Parse(json);
    const cJSON *p = cJSON_GetObjectItemCaseSensitive(r, "primary");
    if (cJSON_IsObject(p))
        p = cJSON_GetObjectItemCaseSensitive(p, "name");
    if (!cJSON_IsString(p))
        p = cJSON_GetObjectItemCaseSensitive(r, "answered_by");
    if (cJSON_IsString(p))
        snprintf(buf, len, "%s", p->valuestring);
    cJSON_Delete(r);
}

/* Under the title: the dimensions held fixed and their values ("demand = 180 m3/h"). */
static void held(FILE *f, const struct mspec *ms, const double *base, long dx, long dy, long hc)
{
    int any = 0;
    fprintf(f, "<text class=\"held\" x=\"%d\" y=\"46\" font-size=\"12\" text-anchor=\"middle\">",
            W / 2);
    for (size_t d = 0; d < ms->dims; d++) {
        if ((long)d == dx || (long)d == dy || (long)d == hc)
            continue;
        char v[64];
        snprintf(v, sizeof v, "%.6g", base[d]);
        fputs(any ? ", " : "held: ", f);
        svg_xml(f, ms->name[d]);
        fprintf(f, " = %s", v);
        if (ms->unit[d][0]) {
            fputc(' ', f);
            svg_xml(f, ms->unit[d]);
        }
        any = 1;
    }
    fputs("</text>\n", f);
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
    char who[96];
    answering(cli, model, base, dims, est, who, sizeof who);
    char tmp[4200];
    FILE *f = svg_open(out, tmp, sizeof tmp);
    if (!f) {
        free(states);
        free(vals);
        return cli_error(EXIT_USAGE, "cannot write %s: %s", out, strerror(errno));
    }
    svg_begin(f, W, H);
    fprintf(f, "<text x=\"%d\" y=\"26\" font-size=\"16\" text-anchor=\"middle\">V(x) of ", W / 2);
    svg_xml(f, model);
    fputs(" by <tspan class=\"estimator\">", f);
    svg_xml(f, who);
    fprintf(f, "</tspan> after seq %llu</text>\n", (unsigned long long)seq);
    held(f, &ms, base, dx, dy, hc);
    fprintf(f,
            "<g class=\"cells\" shape-rendering=\"crispEdges\" "
            "data-x-dim=\"%ld\" "
            "data-y-dim=\"%ld\" data-x-lo=\"%.17g\" data-x-hi=\"%.17g\" data-y-lo=\"%.17g\" "
            "data-y-hi=\"%.17g\">\n",
            dx, dy, lo[dx], hi[dx], lo[dy], hi[dy]);
    double cw = (double)PW / (double)grid, ch = (double)PH / (double)grid;
    for (size_t row = 0; row < (size_t)grid; row++)
        for (size_t col = 0; col < (size_t)grid; col++) {
            size_t k = row * (size_t)grid + col;
            char c[8];
            svg_colour((vals[k] - vmin) / (vmax - vmin), c);
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
    struct panel pn = {PL, PT, PW, PH};
    svg_axes(f, &pn, AXIS_NUMBER, lo[dx], hi[dx], hour ? 0 : lo[dy], hour ? 24 : hi[dy], xt, yt);
    /* The colour bar, with ticks in value units. */
    int bx = PL + PW + 40, bw = 22;
    fprintf(f,
            "<g class=\"colourbar\" shape-rendering=\"crispEdges\" data-v-lo=\"%.17g\" "
            "data-v-hi=\"%.17g\">\n",
            vmin, vmax);
    for (int k = 0; k < 100; k++) {
        char c[8];
        svg_colour((k + 0.5) / 100.0, c);
        fprintf(f, "<rect x=\"%d\" y=\"%.2f\" width=\"%d\" height=\"%.2f\" fill=\"%s\"/>\n", bx,
                PT + PH - (k + 1) * PH / 100.0, bw, PH / 100.0 + 0.05, c);
    }
    double tv[40], step;
    size_t nt = svg_ticks(vmin, vmax, 6, tv, 40, &step);
    for (size_t k = 0; k < nt; k++) {
        char b[64];
        double py = PT + PH - (tv[k] - vmin) / (vmax - vmin) * PH;
        svg_number(b, sizeof b, tv[k], step);
        fprintf(f,
                "<line x1=\"%d\" y1=\"%.2f\" x2=\"%d\" y2=\"%.2f\" stroke=\"#333\"/>\n"
                "<text x=\"%d\" y=\"%.2f\" font-size=\"12\">%s</text>\n",
                bx + bw, py, bx + bw + 5, py, bx + bw + 8, py + 4, b);
    }
    fprintf(f,
            "<text class=\"colourbar-title\" x=\"%d\" y=\"%d\" font-size=\"14\" "
            "text-anchor=\"middle\">",
            bx + bw / 2, PT - 24);
    svg_xml(f, vt);
    fputs("</text>\n", f);
    /* Both ends say their value, whether or not a tick falls there. */
    for (int end = 0; end < 2; end++) {
        char b[64];
        svg_number(b, sizeof b, end ? vmax : vmin, step / 10);
        fprintf(f,
                "<text class=\"colourbar-end\" data-v=\"%.17g\" x=\"%d\" y=\"%d\" "
                "font-size=\"12\" text-anchor=\"middle\">%s %s</text>\n",
                end ? vmax : vmin, bx + bw / 2, end ? PT - 7 : PT + PH + 16, end ? "max" : "min",
                b);
    }
    fputs("</g>\n</svg>\n", f);
    free(states);
    free(vals);
    ex = svg_close(f, tmp, out);
    if (ex == EXIT_OK)
        printf("wrote %s: %s by %s over %s x %s, %lld x %lld cells, values %.4g .. %.4g\n", out, vt,
               who, xt, yt, grid, grid, vmin, vmax);
    return ex;
}

int cmd_plot(struct cli *cli, int argc, char **argv)
{
    const char *x = NULL, *y = NULL, *at = NULL, *est = NULL, *out = NULL, *grid = NULL,
               *hour = NULL, *since = NULL, *until = NULL;
    int hist = 0;
    struct opt opts[] = {
        {"--x", &x, NULL},           {"--y", &y, NULL},       {"--at", &at, NULL},
        {"--estimator", &est, NULL}, {"--out", &out, NULL},   {"--grid", &grid, NULL},
        {"--history", NULL, &hist},  {"--hour", &hour, NULL}, {"--since", &since, NULL},
        {"--until", &until, NULL},   {NULL, NULL, NULL}};
    char *pos[1];
    int np;
    int ex = parse_args("plot", argc, argv, opts, pos, 1, 1, &np);
    if (ex)
        return ex;
    if (!out)
        return cli_usage("plot", "--out FILE.svg is required");
    if (hist)
        return plot_history(cli, pos[0], out, since, until);
    if (since || until)
        return cli_usage("plot", "--since and --until pick a window of --history");
    if (!x || (!y && !hour))
        return cli_usage("plot", "give --x DIM and --y DIM (or --hour SIN,COS, or --history)");
    return value_map(cli, pos[0], x, y, at, est, grid, out, hour);
}
