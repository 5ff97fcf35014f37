/*
 * plot_history.c - `worth plot MODEL --history`: the learning history from
 * worthd's `history` (kept in plant time, across restarts), as an SVG.
 *
 * Two panels on one time axis, so that errors of different scale are never
 * read against one another: above, each estimator's running RMS TD error;
 * below, its realised-return RMS error, both in the reward's unit.  The axis
 * is the plant's time (UTC dates) when the rows carry it, else the
 * transition number.  Checkpoints, drift alarms, rollbacks and the other
 * events of the model are marked as vertical lines across both panels,
 * placed by their plant time (or seq).  --since and --until (ISO-8601 with a
 * zone, or seconds since 1970) pick a window of plant time.  Every series
 * and mark carries its numbers as data- attributes.
 */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "cli.h"
#include "plot.h"

#define W       760
#define H       660
#define PL      90
#define PW      520
#define TOPY    70
#define PH      220
#define GAP     70
#define MAXMARK 2000

static const char *const PALETTE[] = {"#1b6ca8", "#d1495b", "#2e933c", "#edae49",
                                      "#6a4c93", "#00798c", "#8f2d56", "#444444"};

/* A vertical mark: a checkpoint or an event, at x (plant t or seq). */
struct mark {
    double x;
    char kind[32];
    long long id;
};

struct hplot {
    const cJSON *names, *hist;
    int ne, timed;
    double lo, hi; /* the window asked for (-inf, inf: none) */
    double x0, x1, y1[2];
    struct mark marks[MAXMARK];
    size_t nm;
};

static double row_x(const struct hplot *hp, const cJSON *h)
{
    const cJSON *v = cJSON_GetObjectItemCaseSensitive(h, hp->timed ? "plant_t" : "seq");
    return cJSON_IsNumber(v) ? v->valuedouble : NAN;
}

static void add_mark(struct hplot *hp, double x, const char *kind, long long id)
{
    if (hp->nm == MAXMARK || !isfinite(x) || x < hp->lo || x > hp->hi)
        return;
    struct mark *m = &hp->marks[hp->nm++];
    m->x = x;
    snprintf(m->kind, sizeof m->kind, "%s", kind);
    m->id = id;
}

/* The model's checkpoints and events, as marks in the window (what cannot be read is left out). */
static void read_marks(struct cli *cli, const char *model, struct hplot *hp)
{
    char req[300];
    const char *json;
    snprintf(req, sizeof req, "{\"op\":\"checkpoints\",\"model\":\"%s\"}", model);
    if (worth_request(cli->c, req, &json) == 0) {
        cJSON *r = cJSON_Parse(json);
        const cJSON *c;
        cJSON_ArrayForEach(c, cJSON_GetObjectItemCaseSensitive(r, "checkpoints"))
        {
            const cJSON *x = cJSON_GetObjectItemCaseSensitive(c, hp->timed ? "plant_t" : "seq");
            const cJSON *id = cJSON_GetObjectItemCaseSensitive(c, "checkpoint");
            if (cJSON_IsNumber(x))
                add_mark(hp, x->valuedouble, "checkpoint",
                         cJSON_IsNumber(id) ? (long long)id->valuedouble : 0);
        }
        cJSON_Delete(r);
    }
    snprintf(req, sizeof req, "{\"op\":\"events\",\"model\":\"%s\",\"limit\":100000}", model);
    if (worth_request(cli->c, req, &json) == 0) {
        cJSON *r = cJSON_Parse(json);
        const cJSON *e;
        cJSON_ArrayForEach(e, cJSON_GetObjectItemCaseSensitive(r, "events"))
        {
            const cJSON *kind = cJSON_GetObjectItemCaseSensitive(e, "kind");
            const cJSON *d = cJSON_GetObjectItemCaseSensitive(e, "detail");
            const cJSON *x = cJSON_GetObjectItemCaseSensitive(d, hp->timed ? "t" : "seq");
            const cJSON *id = cJSON_GetObjectItemCaseSensitive(e, "event");
            /* checkpoints are drawn from their own list */
            if (!cJSON_IsString(kind) || strcmp(kind->valuestring, "checkpoint") == 0 ||
                !cJSON_IsNumber(x))
                continue;
            add_mark(hp, x->valuedouble, kind->valuestring,
                     cJSON_IsNumber(id) ? (long long)id->valuedouble : 0);
        }
        cJSON_Delete(r);
    }
}

static const char *mark_colour(const char *kind)
{
    if (strcmp(kind, "checkpoint") == 0)
        return "#8a8a8a";
    if (strcmp(kind, "rollback") == 0)
        return "#1b6ca8";
    if (strncmp(kind, "drift", 5) == 0 || strcmp(kind, "diverged") == 0)
        return "#d1495b";
    return "#edae49";
}

/* One panel: its axes and a series per estimator of field ("td_rms" or "realised_rms"). */
static void draw_panel(FILE *f, const struct hplot *hp, int which, const char *yt, const char *cls,
                       int last)
{
    struct panel p = {PL, TOPY + which * (PH + GAP), PW, PH};
    const char *field = which ? "realised_rms" : "td_rms";
    double y1 = hp->y1[which];
    svg_axes(f, &p, hp->timed ? AXIS_TIME : AXIS_NUMBER, hp->x0, hp->x1, 0, y1,
             last ? (hp->timed ? "plant time (UTC)" : "transition (seq)") : NULL, yt);
    for (int k = 0; k < hp->ne; k++) {
        const char *name = cJSON_GetArrayItem(hp->names, k)->valuestring;
        fprintf(f, "<polyline class=\"%s\" data-estimator=\"", cls);
        svg_xml(f, name);
        fprintf(f, "\" fill=\"none\" stroke=\"%s\" stroke-width=\"2\" points=\"", PALETTE[k % 8]);
        const cJSON *h;
        cJSON_ArrayForEach(h, hp->hist)
        {
            double x = row_x(hp, h);
            const cJSON *y = cJSON_GetArrayItem(cJSON_GetObjectItemCaseSensitive(h, field), k);
            if (!isfinite(x) || !cJSON_IsNumber(y))
                continue;
            fprintf(f, "%.2f,%.2f ", p.x + (x - hp->x0) / (hp->x1 - hp->x0) * p.w,
                    p.y + p.h - y->valuedouble / y1 * p.h);
        }
        fputs("\"/>\n", f);
    }
}

static void draw(FILE *f, const char *model, const struct hplot *hp, const struct mspec *ms)
{
    char yt[2][160];
    mspec_vlabel(ms, "RMS TD error", yt[0], sizeof yt[0]);
    mspec_vlabel(ms, "realised-return RMS error", yt[1], sizeof yt[1]);
    svg_begin(f, W, H);
    fprintf(f, "<text x=\"%d\" y=\"26\" font-size=\"16\" text-anchor=\"middle\">Learning of ",
            W / 2);
    svg_xml(f, model);
    fprintf(f,
            "</text>\n<text class=\"axis-kind\" data-timed=\"%d\" x=\"%d\" y=\"46\" "
            "font-size=\"12\" text-anchor=\"middle\">",
            hp->timed, W / 2);
    fprintf(f, "%s", hp->timed ? "against the plant's time" : "against the transition number");
    fputs("; marks: checkpoints (grey), rollbacks (blue), alarms (red), other events</text>\n", f);
    draw_panel(f, hp, 0, yt[0], "series", 0);
    draw_panel(f, hp, 1, yt[1], "series-realised", 1);
    for (size_t i = 0; i < hp->nm; i++) {
        const struct mark *m = &hp->marks[i];
        double px = PL + (m->x - hp->x0) / (hp->x1 - hp->x0) * PW;
        fprintf(f,
                "<line class=\"mark mark-%s\" data-kind=\"%s\" data-x=\"%.17g\" data-id=\"%lld\" "
                "x1=\"%.2f\" y1=\"%d\" x2=\"%.2f\" y2=\"%d\" stroke=\"%s\" stroke-width=\"1\" "
                "stroke-dasharray=\"3 3\"/>\n",
                m->kind, m->kind, m->x, m->id, px, TOPY, px, TOPY + 2 * PH + GAP,
                mark_colour(m->kind));
    }
    for (int k = 0; k < hp->ne; k++) {
        fprintf(f,
                "<rect x=\"%d\" y=\"%d\" width=\"14\" height=\"4\" fill=\"%s\"/>"
                "<text x=\"%d\" y=\"%d\" font-size=\"12\">",
                PL + PW + 16, TOPY + 10 + 20 * k, PALETTE[k % 8], PL + PW + 36, TOPY + 16 + 20 * k);
        svg_xml(f, cJSON_GetArrayItem(hp->names, k)->valuestring);
        fputs("</text>\n", f);
    }
    fputs("</svg>\n", f);
}

int plot_history(struct cli *cli, const char *model, const char *out, const char *since,
                 const char *until)
{
    double lo = -INFINITY, hi = INFINITY;
    char why[200];
    if (since && parse_time(since, &lo, why, sizeof why))
        return cli_usage("plot", "--since: %s", why);
    if (until && parse_time(until, &hi, why, sizeof why))
        return cli_usage("plot", "--until: %s", why);
    if (lo > hi)
        return cli_usage("plot", "--since is after --until");
    struct mspec ms;
    int ex = cli_spec(cli, model, &ms, NULL);
    if (ex)
        return ex;
    char req[400];
    int n = snprintf(req, sizeof req, "{\"op\":\"history\",\"model\":\"%s\",\"max\":2000", model);
    if (since)
        n += snprintf(req + n, sizeof req - (size_t)n, ",\"since\":%.17g", lo);
    if (until)
        n += snprintf(req + n, sizeof req - (size_t)n, ",\"until\":%.17g", hi);
    snprintf(req + n, sizeof req - (size_t)n, "}");
    const char *json;
    int rc = worth_request(cli->c, req, &json);
    if (rc)
        return cli_fail(cli, rc);
    cJSON *r = cJSON_Parse(json);
    struct hplot *hp = calloc(1, sizeof *hp);
    if (!r || !hp) {
        cJSON_Delete(r);
        free(hp);
        return cli_error(EXIT_SERVER, "worthd's history answer could not be read");
    }
    hp->names = cJSON_GetObjectItemCaseSensitive(r, "estimators");
    hp->hist = cJSON_GetObjectItemCaseSensitive(r, "history");
    hp->ne = cJSON_GetArraySize(hp->names);
    int nh = cJSON_GetArraySize(hp->hist);
    const cJSON *h, *v;
    hp->timed = nh > 0;
    cJSON_ArrayForEach(h, hp->hist) hp->timed &=
        cJSON_IsNumber(cJSON_GetObjectItemCaseSensitive(h, "plant_t"));
    hp->timed |= since || until;
    hp->x0 = INFINITY;
    hp->x1 = -INFINITY;
    cJSON_ArrayForEach(h, hp->hist)
    {
        double x = row_x(hp, h);
        if (isfinite(x)) {
            hp->x0 = fmin(hp->x0, x);
            hp->x1 = fmax(hp->x1, x);
        }
        for (int which = 0; which < 2; which++)
            cJSON_ArrayForEach(
                v, cJSON_GetObjectItemCaseSensitive(h, which ? "realised_rms" : "td_rms"))
            {
                if (cJSON_IsNumber(v))
                    hp->y1[which] = fmax(hp->y1[which], v->valuedouble);
            }
    }
    hp->lo = hp->timed ? lo : -INFINITY;
    hp->hi = hp->timed ? hi : INFINITY;
    read_marks(cli, model, hp);
    for (size_t i = 0; i < hp->nm; i++) { /* a mark after the last row still shows */
        hp->x0 = fmin(hp->x0, hp->marks[i].x);
        hp->x1 = fmax(hp->x1, hp->marks[i].x);
    }
    if (since)
        hp->x0 = lo;
    if (until)
        hp->x1 = hi;
    if (!isfinite(hp->x0) || !isfinite(hp->x1)) {
        hp->x0 = 0;
        hp->x1 = 1;
    }
    if (!(hp->x1 > hp->x0))
        hp->x1 = hp->x0 + 1;
    for (int which = 0; which < 2; which++)
        hp->y1[which] = hp->y1[which] > 0 ? hp->y1[which] * 1.05 : 1;
    char tmp[4200];
    FILE *f = svg_open(out, tmp, sizeof tmp);
    if (!f) {
        cJSON_Delete(r);
        free(hp);
        return cli_error(EXIT_USAGE, "cannot write %s: %s", out, strerror(errno));
    }
    draw(f, model, hp, &ms);
    ex = svg_close(f, tmp, out);
    if (ex == EXIT_OK)
        printf("wrote %s: the learning of %d estimators over %d rows (%s), %zu marks\n", out,
               hp->ne, nh, hp->timed ? "plant time" : "by seq", hp->nm);
    cJSON_Delete(r);
    free(hp);
    return ex;
}
