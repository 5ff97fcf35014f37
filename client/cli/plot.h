/*
 * plot.h - what the pictures of `worth plot` share (plot_svg.c): SVG output
 * written under a temporary name and renamed into place, the colour ramp,
 * "nice" ticks in numbers (10,000, never 1e+04) or in dates (UTC), and axes
 * on a panel.  Internal to the CLI.
 */
#ifndef WORTH_CLI_PLOT_H
#define WORTH_CLI_PLOT_H

#include <stddef.h>
#include <stdio.h>

/* A rectangle of the canvas, in SVG user units. */
struct panel {
    double x, y, w, h;
};

/* How an axis's ticks read. */
enum axis_kind { AXIS_NUMBER, AXIS_TIME };

/* The colour of f in 0..1 on the ramp, "#rrggbb" (grey for a non-finite f). */
void svg_colour(double f, char out[8]);
/* About n nice ticks covering [lo, hi] into out (at most max); returns how many, and the step. */
size_t svg_ticks(double lo, double hi, size_t n, double *out, size_t max, double *step);
/* Ticks at whole minutes, hours or days of UTC covering [lo, hi] (seconds since 1970). */
size_t svg_time_ticks(double lo, double hi, size_t n, double *out, size_t max, double *step);
/* v as a person reads it, to the precision of step: "10,000", "0.25", "-3.5". */
void svg_number(char *buf, size_t len, double v, double step);
/* t (seconds since 1970) as "2026-12-02" for steps of a day or more, else "12-02 06:00". */
void svg_time(char *buf, size_t len, double t, double step);
/* Writes s escaped for XML. */
void svg_xml(FILE *f, const char *s);
/* Opens the header of an SVG of width x height (and a white background). */
void svg_begin(FILE *f, int width, int height);
/*
 * The frame of panel p with ticks: x over x0..x1 (numbers or UTC times),
 * y over y0..y1; xt under the x axis (NULL: none), yt along the y axis.
 */
void svg_axes(FILE *f, const struct panel *p, enum axis_kind xk, double x0, double x1, double y0,
              double y1, const char *xt, const char *yt);
/* Opens path's temporary sibling for writing (its name in tmp). */
FILE *svg_open(const char *path, char *tmp, size_t len);
/* Closes f and renames tmp to path; the exit code. */
int svg_close(FILE *f, const char *tmp, const char *path);

/* The history picture (plot_history.c). */
int plot_history(struct cli *cli, const char *model, const char *out, const char *since,
                 const char *until);

#endif /* WORTH_CLI_PLOT_H */
