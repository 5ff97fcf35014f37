/*
 * plot_svg.c - the SVG pieces the pictures of `worth plot` share: colours,
 * ticks a person reads (numbers with thousands separators, dates in UTC),
 * axes on a panel, and the write-then-rename of the file.
 */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "cli.h"
#include "plot.h"

/* The colour ramp: five anchors, dark blue (low) to light yellow (high). */
static const double RAMP[5][3] = {
    {0.16, 0.11, 0.42}, {0.13, 0.38, 0.60}, {0.13, 0.62, 0.54},
    {0.55, 0.80, 0.30}, {0.98, 0.92, 0.45},
};

void svg_colour(double f, char out[8])
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

/* Ticks lo..hi at multiples of step (at most max). */
static size_t at_steps(double lo, double hi, double step, double *out, size_t max)
{
    size_t k = 0;
    for (double v = ceil(lo / step - 1e-9) * step; v <= hi + step * 1e-9 && k < max; v += step)
        out[k++] = fabs(v) < step * 1e-9 ? 0.0 : v;
    return k;
}

size_t svg_ticks(double lo, double hi, size_t n, double *out, size_t max, double *step)
{
    if (!(hi > lo) || !isfinite(lo) || !isfinite(hi)) {
        out[0] = lo;
        *step = 1;
        return 1;
    }
    double raw = (hi - lo) / (double)n, mag = pow(10, floor(log10(raw))), s = mag;
    if (raw / mag > 5)
        s = 10 * mag;
    else if (raw / mag > 2)
        s = 5 * mag;
    else if (raw / mag > 1)
        s = 2 * mag;
    *step = s;
    return at_steps(lo, hi, s, out, max);
}

size_t svg_time_ticks(double lo, double hi, size_t n, double *out, size_t max, double *step)
{
    static const double STEPS[] = {1,      5,       15,      60,      300,     900,   1800,
                                   3600,   7200,    10800,   21600,   43200,   86400, 172800,
                                   604800, 1209600, 2592000, 7776000, 31536000};
    if (!(hi > lo) || !isfinite(lo) || !isfinite(hi)) {
        out[0] = lo;
        *step = 86400;
        return 1;
    }
    double raw = (hi - lo) / (double)n, s = STEPS[sizeof STEPS / sizeof STEPS[0] - 1];
    for (size_t i = 0; i < sizeof STEPS / sizeof STEPS[0]; i++)
        if (STEPS[i] >= raw) {
            s = STEPS[i];
            break;
        }
    *step = s;
    return at_steps(lo, hi, s, out, max); /* multiples of whole minutes, hours, days of UTC */
}

void svg_number(char *buf, size_t len, double v, double step)
{
    if (!isfinite(v)) {
        snprintf(buf, len, "%s", "-");
        return;
    }
    int dec = step > 0 && step < 1 ? (int)ceil(-log10(step) - 1e-9) : 0;
    if (dec > 9)
        dec = 9;
    if (dec > 0 || fabs(v) < 1e4) {
        snprintf(buf, len, "%.*f", dec, v);
        return;
    }
    /* Whole numbers of 10,000 and more: thousands separated by commas. */
    char digits[32];
    snprintf(digits, sizeof digits, "%.0f", fabs(v));
    size_t nd = strlen(digits), o = 0;
    char tmp[48];
    if (v < 0)
        tmp[o++] = '-';
    for (size_t i = 0; i < nd && o + 2 < sizeof tmp; i++) {
        if (i && (nd - i) % 3 == 0)
            tmp[o++] = ',';
        tmp[o++] = digits[i];
    }
    tmp[o] = 0;
    snprintf(buf, len, "%s", tmp);
}

void svg_time(char *buf, size_t len, double t, double step)
{
    time_t s = (time_t)floor(t);
    struct tm tm;
    if (!isfinite(t) || !gmtime_r(&s, &tm)) {
        snprintf(buf, len, "%s", "-");
        return;
    }
    strftime(buf, len, step >= 86400 ? "%Y-%m-%d" : step >= 60 ? "%m-%d %H:%M" : "%H:%M:%S", &tm);
}

void svg_xml(FILE *f, const char *s)
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

void svg_begin(FILE *f, int width, int height)
{
    fprintf(f,
            "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n"
            "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"%d\" height=\"%d\" "
            "viewBox=\"0 0 %d %d\" font-family=\"sans-serif\">\n"
            "<rect width=\"%d\" height=\"%d\" fill=\"white\"/>\n",
            width, height, width, height, width, height);
}

void svg_axes(FILE *f, const struct panel *p, enum axis_kind xk, double x0, double x1, double y0,
              double y1, const char *xt, const char *yt)
{
    double tv[40], step;
    char b[64];
    fprintf(f,
            "<rect x=\"%.2f\" y=\"%.2f\" width=\"%.2f\" height=\"%.2f\" fill=\"none\" "
            "stroke=\"#333\"/>\n",
            p->x, p->y, p->w, p->h);
    size_t n = xk == AXIS_TIME ? svg_time_ticks(x0, x1, 5, tv, 40, &step)
                               : svg_ticks(x0, x1, 6, tv, 40, &step);
    for (size_t i = 0; i < n; i++) {
        double px = p->x + (tv[i] - x0) / (x1 - x0) * p->w;
        if (xk == AXIS_TIME)
            svg_time(b, sizeof b, tv[i], step);
        else
            svg_number(b, sizeof b, tv[i], step);
        fprintf(f,
                "<line class=\"tick-x\" x1=\"%.2f\" y1=\"%.2f\" x2=\"%.2f\" y2=\"%.2f\" "
                "stroke=\"#333\"/>\n",
                px, p->y + p->h, px, p->y + p->h + 6);
        fprintf(f,
                "<text class=\"tick-x-label\" x=\"%.2f\" y=\"%.2f\" font-size=\"12\" "
                "text-anchor=\"middle\">%s</text>\n",
                px, p->y + p->h + 20, b);
    }
    n = svg_ticks(y0, y1, 5, tv, 40, &step);
    for (size_t i = 0; i < n; i++) {
        double py = p->y + p->h - (tv[i] - y0) / (y1 - y0) * p->h;
        svg_number(b, sizeof b, tv[i], step);
        fprintf(f,
                "<line class=\"tick-y\" x1=\"%.2f\" y1=\"%.2f\" x2=\"%.2f\" y2=\"%.2f\" "
                "stroke=\"#333\"/>\n",
                p->x - 6, py, p->x, py);
        fprintf(f,
                "<text class=\"tick-y-label\" x=\"%.2f\" y=\"%.2f\" font-size=\"12\" "
                "text-anchor=\"end\">%s</text>\n",
                p->x - 9, py + 4, b);
    }
    if (xt) {
        fprintf(f, "<text x=\"%.2f\" y=\"%.2f\" font-size=\"14\" text-anchor=\"middle\">",
                p->x + p->w / 2, p->y + p->h + 42);
        svg_xml(f, xt);
        fputs("</text>\n", f);
    }
    double cy = p->y + p->h / 2;
    fprintf(f,
            "<text x=\"24\" y=\"%.2f\" font-size=\"14\" text-anchor=\"middle\" "
            "transform=\"rotate(-90 24 %.2f)\">",
            cy, cy);
    svg_xml(f, yt);
    fputs("</text>\n", f);
}

FILE *svg_open(const char *path, char *tmp, size_t len)
{
    snprintf(tmp, len, "%s.tmp-%ld", path, (long)getpid());
    return fopen(tmp, "w");
}

int svg_close(FILE *f, const char *tmp, const char *path)
{
    int bad = ferror(f);
    if (fclose(f) != 0 || bad || rename(tmp, path) != 0) {
        int e = errno;
        unlink(tmp);
        return cli_error(EXIT_USAGE, "cannot write %s: %s", path, strerror(e ? e : EIO));
    }
    return EXIT_OK;
}
