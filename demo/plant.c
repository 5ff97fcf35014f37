/*
 * plant.c - the demo plant: a river pumping station filling a hilltop reservoir.
 *
 * A scenario written for worth's demo; every number in it is invented for the
 * demo and describes no real site.  The policy under evaluation is a
 * level-band pump rule: the pump starts below a low band and stops above a
 * high band; at night, when energy is cheap, both bands are raised; when the
 * measured demand is high the low band is raised a little (to keep ahead of
 * the draw), and when it reads almost nothing the bands drop to save energy.  State: reservoir
 * level (m), measured outflow demand (m3/h), time of day as sin/cos, energy tariff (EUR/kWh).
 * Reward per minute: minus the energy cost of pumping, minus a penalty while the level is under the
 * safety reserve.  Demand is stochastic around a daily pattern.
 *
 * The program is the plant's gateway: every minute it logs a sample (time,
 * the measured state, the reward of the minute that ended) and sends it to
 * worthd through the C client library, which pairs consecutive samples into
 * transitions (schema/protocol.md, "Samples").  The model names its
 * dimensions with their units (level [m], demand [m3/h], ...) and its
 * reward's unit (EUR), so every table and picture says what it shows.  The
 * program creates the model, streams the simulated weeks as bulk frames of
 * samples, prints the values at three named situations, checkpoints,
 * streams FAULT_DAYS with the demand sensor stuck and AFTER_DAYS sound days
 * after them, reports the input check that saw the stuck sensor and the
 * drift alarm (when it fired, and when it dates the change), then rolls back
 * to the pre-drift checkpoint re-learning the log with the fault's time
 * window excluded, so the days after the fault are learnt again.  Given a
 * file, it then writes the next day as a historian's export (a wide CSV:
 * ISO-8601 times in CET, one column per tag, a quality flag) for `worth
 * feed`.  Exit status 0 when all of that happened as expected (the frozen
 * check within 10 minutes of the fault, the drift alarm's onset within 5% of
 * the fault's length, the days after it re-learnt), 1 otherwise.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include <worth/client.h>

#define DIMS 5
#define REC  (DIMS + 3) /* a sample: t, x[0..DIMS-1], r, terminal */
#define PI   3.14159265358979323846
#define T0   1794787200.0 /* 2026-11-16T00:00:00Z, the first sample's time */

/* Invented plant figures. */
#define AREA_M2     1500.0 /* reservoir surface */
#define PUMP_M3H    520.0  /* pump delivery */
#define PUMP_KW     110.0  /* pump power */
#define RESERVE_M   2.7    /* the fire-fighting reserve: the level it must not fall under */
#define PENALTY_EUR 2.0    /* per minute under the reserve */
#define LEVEL_MAX   8.0
#define FAULT_DAYS  3 /* days the demand sensor stays stuck (a long weekend) */
#define AFTER_DAYS  2 /* sound days after the fault */

struct plant {
    double level, demand_noise, minute, last_r;
    int pump;
    unsigned long long rng;
};

static double uniform(struct plant *p)
{
    p->rng = p->rng * 6364136223846793005ULL + 1442695040888963407ULL;
    return (double)(p->rng >> 11) * 0x1.0p-53;
}

static double gauss(struct plant *p)
{
    double u = uniform(p), v = uniform(p);
    return sqrt(-2 * log(1 - u)) * cos(2 * PI * v);
}

static double hour_of(double minute)
{
    return fmod(minute / 60.0, 24.0);
}

static double tariff(double hour)
{
    return hour >= 23 || hour < 6 ? 0.09 : 0.24;
}

/* The daily demand pattern (m3/h): night low, morning and evening peaks. */
static double demand_mean(double hour)
{
    return 150 + 230 * exp(-pow((hour - 7.5) / 1.5, 2)) + 180 * exp(-pow((hour - 19) / 2.0, 2)) +
           60 * (hour > 9 && hour < 17);
}

static void state(const struct plant *p, double measured_demand, double *x)
{
    double h = hour_of(p->minute);
    x[0] = p->level;
    x[1] = measured_demand;
    x[2] = sin(2 * PI * h / 24);
    x[3] = cos(2 * PI * h / 24);
    x[4] = tariff(h);
}

/*
 * One minute: the gateway logs the sample of now (the measured state and the
 * reward of the minute that ended here), then the policy decides from the
 * measured state, the plant moves and the minute's reward is paid.  stuck >=
 * 0 replaces the demand the sensor reports.
 */
static void step(struct plant *p, double stuck, double *rec)
{
    double h = hour_of(p->minute);
    p->demand_noise = 0.9 * p->demand_noise + 0.1 * 40 * gauss(p);
    double demand = fmax(0, demand_mean(h) + p->demand_noise);
    double measured = stuck >= 0 ? stuck : demand;
    rec[0] = T0 + 60 * p->minute;
    state(p, measured, rec + 1);
    rec[1 + DIMS] = p->last_r; /* "reward": "next": what the minute ending here earned */
    rec[2 + DIMS] = 0;         /* the plant never stops: not terminal */
    /* The policy: night bands raised; high measured demand raises the low band. */
    int night = h >= 23 || h < 6;
    double low = night ? 5.0 : 3.0, high = night ? 7.0 : 4.5;
    if (measured > 380)
        low += 1.0;
    if (measured < 80) { /* "nobody is drawing": save energy */
        low = 1.0;
        high = 2.5;
    }
    if (p->level < low)
        p->pump = 1;
    else if (p->level > high)
        p->pump = 0;
    double inflow = p->pump ? PUMP_M3H : 0;
    p->level += (inflow - demand) / 60.0 / AREA_M2;
    p->level = fmin(LEVEL_MAX, fmax(0, p->level));
    p->last_r =
        -(p->pump ? PUMP_KW / 60.0 * tariff(h) : 0) - (p->level < RESERVE_M ? PENALTY_EUR : 0);
    p->minute += 1;
}

static const char *const NAMES[5] = {"td", "td_lambda", "rls", "lstd", "replay"};

static const char SPEC[] =
    "{\"model\":\"reservoir\",\"gamma\":0.999,"
    "\"dims\":[{\"name\":\"level\",\"unit\":\"m\",\"range\":[0,8]},"
    "{\"name\":\"demand\",\"unit\":\"m3/h\",\"range\":[0,600]},"
    "{\"name\":\"hour_sin\",\"range\":[-1,1]},{\"name\":\"hour_cos\",\"range\":[-1,1]},"
    "{\"name\":\"tariff\",\"unit\":\"EUR/kWh\",\"range\":[0.05,0.3]}],"
    "\"reward_unit\":\"EUR\",\"period_s\":60,"
    "\"samples\":{\"reward\":\"next\",\"max_gap_periods\":3},"
    "\"features\":[{\"basis\":\"bias\"},{\"basis\":\"fourier\",\"order\":3,\"couple\":2}],"
    "\"estimators\":[{\"name\":\"td\",\"kind\":\"td\",\"alpha\":0.002},"
    "{\"name\":\"td_lambda\",\"kind\":\"td_lambda\",\"alpha\":0.001,\"lambda\":0.9},"
    "{\"name\":\"rls\",\"kind\":\"rls_td\",\"forget\":0.9995,\"delta\":10},"
    "{\"name\":\"lstd\",\"kind\":\"lstd\",\"ridge\":0.01,\"refit_every\":720},"
    "{\"name\":\"replay\",\"kind\":\"replay\",\"alpha\":0.002,\"capacity\":20000}],"
    "\"primary\":\"auto\","
    "\"diagnostics\":{\"drift_burn_in\":1440,\"drift_batch\":60,\"false_alarm_days\":90,"
    "\"on_drift\":\"checkpoint\"}}";

/* The three named situations: [level, demand, sin, cos, tariff] at an hour. */
static void situation(int k, double *x, const char **name)
{
    static const double lv[3] = {6.5, 4.0, 2.3}, dm[3] = {140, 420, 360}, hr[3] = {2, 7.5, 19};
    static const char *const nm[3] = {"night, full", "morning peak, half", "evening, near reserve"};
    x[0] = lv[k];
    x[1] = dm[k];
    x[2] = sin(2 * PI * hr[k] / 24);
    x[3] = cos(2 * PI * hr[k] / 24);
    x[4] = tariff(hr[k]);
    *name = nm[k];
}

static int fail(worth_client *c, const char *what)
{
    fprintf(stderr, "plant: %s: %s: %s\n", what, worth_error_name(c), worth_error_message(c));
    return 1;
}

/* Prints the values table; fills vals[3][5]. */
static int table(worth_client *c, double vals[3][5], const char *title)
{
    printf("\n%s\n%-24s", title, "situation");
    for (int e = 0; e < 5; e++)
        printf(" %11s", NAMES[e]);
    printf(" %9s %11s %9s\n", "headline", "value", "its sd");
    for (int k = 0; k < 3; k++) {
        double x[DIMS];
        const char *name;
        situation(k, x, &name);
        worth_value_t v;
        if (worth_value(c, "reservoir", x, DIMS, NULL, &v))
            return fail(c, "value");
        printf("%-24s", name);
        for (int e = 0; e < 5; e++) {
            vals[k][e] = v.values[e];
            printf(" %11.2f", v.values[e]);
        }
        /* The headline's value and its own sd (none for an estimator that has none). */
        char head[64] = "?";
        const char *json, *at;
        if (worth_stats(c, "reservoir", &json) == 0 &&
            (at = strstr(json, "\"primary\":{\"name\":\"")) != NULL)
            sscanf(at + 19, "%63[^\"]", head);
        char sd[32] = "-";
        if (!isnan(v.sd))
            snprintf(sd, sizeof sd, "%.2f", v.sd);
        printf(" %9s %11.2f %9s\n", head, v.value, sd);
    }
    return 0;
}

/* Streams days of samples in one-day bulk frames, with a progress bar on a terminal. */
static int stream(worth_client *c, struct plant *p, int days, double stuck, uint64_t *last)
{
    static double buf[1440 * REC];
    int tty = isatty(2);
    for (int d = 0; d < days; d++) {
        for (int m = 0; m < 1440; m++)
            step(p, stuck, buf + m * REC);
        worth_ingest_t in;
        if (worth_observe_samples_bulk(c, "reservoir", DIMS, "station", buf, 1440, 0, &in))
            return fail(c, "observe.bulk (samples)");
        *last = in.seq;
        if (tty) {
            int w = 40, done = (d + 1) * w / days;
            fprintf(stderr, "\r  [%.*s%*s] day %d/%d, %llu transitions", done,
                    "########################################", w - done, "", d + 1, days,
                    (unsigned long long)*last);
        }
    }
    if (tty)
        fputc('\n', stderr);
    return 0;
}

/*
 * Sound samples up to the moment the transmitter fails: the first minute from
 * 16:00 with the pump off and the level under LOW_AT_FAULT (the evening peak has
 * drawn the reservoir down to its low band, and the pump is about to start).
 */
#define LOW_AT_FAULT 3.05
static int lead_in(worth_client *c, struct plant *p, uint64_t *last)
{
    static double buf[1440 * REC];
    int m = 0;
    while (m < 1440 && !(hour_of(p->minute) >= 16 && p->level < LOW_AT_FAULT && !p->pump))
        step(p, -1, buf + m++ * REC);
    worth_ingest_t in;
    if (m && worth_observe_samples_bulk(c, "reservoir", DIMS, "station", buf, (size_t)m, 0, &in))
        return fail(c, "observe.bulk (samples)");
    if (m)
        *last = in.seq;
    return 0;
}

/* Waits until the model has learnt up to seq (bounded). */
static int settle(worth_client *c, uint64_t seq)
{
    char want[64];
    snprintf(want, sizeof want, "\"applied\":%llu", (unsigned long long)seq);
    for (int i = 0; i < 6000; i++) {
        const char *json;
        if (worth_stats(c, "reservoir", &json))
            return fail(c, "stats");
        if (strstr(json, want))
            return 0;
        usleep(10000);
    }
    fprintf(stderr, "plant: the model did not catch up\n");
    return 1;
}

/*
 * The next day as the plant's historian exports it: a wide CSV, one row a
 * minute, local time (CET, +01:00) in ISO-8601, a column per tag and a
 * quality flag (a few readings flagged bad, as a flaky transmitter leaves
 * them).  Every number is printed with 17 significant digits.
 */
static int write_historian(struct plant *p, const char *path)
{
    FILE *f = fopen(path, "w");
    if (!f) {
        perror(path);
        return 1;
    }
    fprintf(f, "time,source,level [m],demand [m3/h],hour_sin,hour_cos,tariff [EUR/kWh],"
               "cost_eur,r,quality\n");
    double rec[REC];
    for (int m = 0; m < 1440; m++) {
        step(p, -1, rec);
        time_t local = (time_t)rec[0] + 3600;
        struct tm tm;
        char when[40];
        gmtime_r(&local, &tm);
        strftime(when, sizeof when, "%Y-%m-%dT%H:%M:%S+01:00", &tm);
        fprintf(f, "%s,station", when);
        for (int d = 0; d < DIMS; d++)
            fprintf(f, ",%.17g", rec[1 + d]);
        fprintf(f, ",%.17g,%.17g,%s\n", -rec[1 + DIMS], rec[1 + DIMS],
                m % 240 == 137 ? "bad" : "good");
    }
    if (fclose(f) != 0) {
        perror(path);
        return 1;
    }
    printf("\n   the next day, as the historian exports it: %s\n", path);
    return 0;
}

static double field(const char *json, const char *key)
{
    const char *p = strstr(json, key);
    return p ? atof(p + strlen(key)) : NAN;
}

/* What the events say about the fault: the first input_frozen and drift from t0 on. */
struct alarms {
    double frozen_t, frozen_since, alarm_t, onset_t;
    int64_t pre_drift;
};

/* 1 when the event at e ("kind":...) is of kind k. */
static int is_kind(const char *e, const char *k)
{
    size_t n = strlen(k);
    return strncmp(e + 8, k, n) == 0 && e[8 + n] == '"';
}

static int read_alarms(worth_client *c, double t0, struct alarms *a)
{
    const char *json;
    a->frozen_t = a->frozen_since = a->alarm_t = a->onset_t = NAN;
    a->pre_drift = 0;
    if (worth_request(c, "{\"op\":\"events\",\"model\":\"reservoir\"}", &json))
        return fail(c, "events");
    for (const char *e = strstr(json, "\"kind\":"); e; e = strstr(e + 1, "\"kind\":")) {
        const char *end = strstr(e, "}}");
        double t = field(e, "\"t\":");
        /* A transition's t is its first sample's: the one into the fault starts a period early. */
        if (!end || !(t >= t0 - 60))
            continue;
        if (is_kind(e, "input_frozen") && isnan(a->frozen_t)) {
            a->frozen_t = t;
            a->frozen_since = field(e, "\"since_t\":");
        }
        if (is_kind(e, "drift") && isnan(a->alarm_t)) {
            a->alarm_t = t;
            a->onset_t = field(e, "\"onset_t\":");
            const char *pd = strstr(e, "\"pre_drift_checkpoint\":");
            if (pd && pd < end)
                a->pre_drift = (int64_t)field(e, "\"pre_drift_checkpoint\":");
        }
    }
    return 0;
}

/* The plant time of checkpoint id (its last transition's), NAN when not listed. */
static double checkpoint_t(worth_client *c, int64_t id)
{
    const char *json;
    char key[48];
    if (worth_request(c, "{\"op\":\"checkpoints\",\"model\":\"reservoir\"}", &json))
        return NAN;
    snprintf(key, sizeof key, "{\"checkpoint\":%lld,", (long long)id);
    const char *at = strstr(json, key), *end = at ? strchr(at, '}') : NULL;
    const char *t = at ? strstr(at, "\"plant_t\":") : NULL;
    return t && t < end ? atof(t + 10) : NAN;
}

int main(int argc, char **argv)
{
    const char *sock = argc > 1 ? argv[1] : "./worthd.sock";
    int days = argc > 2 ? atoi(argv[2]) : 14;
    const char *historian = argc > 3 ? argv[3] : NULL;
    if (days < 3 || days > 365) {
        fprintf(stderr, "usage: plant SOCKET [DAYS 3..365 [HISTORIAN.csv]]\n");
        return 2;
    }
    worth_opts o = {.socket_path = sock, .timeout_ms = 120000};
    worth_client *c = NULL;
    char err[256];
    if (worth_connect(&o, &c, err, sizeof err)) {
        fprintf(stderr, "plant: %s\n", err);
        return 1;
    }
    size_t features = 0;
    if (worth_model_create(c, SPEC, &features))
        return fail(c, "model.create");
    printf("1. model \"reservoir\": state level [m], demand [m3/h], hour of day (sin, cos), tariff "
           "[EUR/kWh]; reward in EUR; %zu Fourier features; estimators td, td_lambda, rls_td, "
           "lstd, replay; the headline is chosen (auto: the healthy one with the lowest "
           "realised-return error)\n",
           features);

    struct plant p = {.level = 5.0, .rng = 20261201};
    uint64_t seq = 0;
    printf("2. streaming %d simulated days of one-minute samples (%d samples; worthd pairs them "
           "into transitions)\n",
           days, days * 1440);
    if (stream(c, &p, days, -1, &seq) || settle(c, seq))
        return 1;
    double before[3][5], fault[3][5], after[3][5];
    (void)before;
    if (table(c, before, "3. value (EUR, discounted future reward) at three situations:"))
        return 1;
    const char *json;
    if (worth_stats(c, "reservoir", &json))
        return fail(c, "stats");
    printf("\n   realised-return error (value predicted minus the return that followed), "
           "sliding window:\n   %-10s %9s %9s  %s\n",
           "estimator", "bias", "rms", "health");
    for (int e = 0; e < 5; e++) {
        char key[64];
        snprintf(key, sizeof key, "\"%s\":{\"kind\"", NAMES[e]);
        const char *at = strstr(json, key);
        char health[16] = "?";
        const char *h = at ? strstr(at, "\"health\":\"") : NULL;
        if (h)
            sscanf(h + 10, "%15[^\"]", health);
        printf("   %-10s %9.2f %9.2f  %s\n", NAMES[e], at ? field(at, "\"bias_window\":") : NAN,
               at ? field(at, "\"rms_window\":") : NAN, health);
    }
    int64_t ck = 0;
    uint64_t ck_seq = 0;
    if (worth_checkpoint(c, "reservoir", "commissioned", &ck, &ck_seq))
        return fail(c, "checkpoint");
    printf("\n4. checkpoint %lld \"commissioned\" at seq %llu\n", (long long)ck,
           (unsigned long long)ck_seq);

    if (lead_in(c, &p, &seq) || settle(c, seq))
        return 1;
    if (worth_stats(c, "reservoir", &json))
        return fail(c, "stats");
    double alarms_before = field(json, "\"alarms\":");
    printf(
        "5. at %02d:%02d on day %d, with the level at %.2f m, the demand transmitter sticks at 0 "
        "m3/h for %d days:\n"
        "   the controller thinks nobody draws water, lowers its bands, and the level sags under "
        "the reserve;\n   then %d sound days\n",
        (int)hour_of(p.minute), (int)fmod(p.minute, 60), (int)(p.minute / 1440) + 1, p.level,
        FAULT_DAYS, AFTER_DAYS);
    double fault_t0 = T0 + 60 * p.minute;
    uint64_t fault_seq0 = seq + 1;
    if (stream(c, &p, FAULT_DAYS, 0.0, &seq) || settle(c, seq))
        return 1;
    double fault_t1 = T0 + 60 * p.minute; /* the first sound sample */
    if (table(c, fault, "   values after the fault:"))
        return 1;
    /* The last transition into a stuck sample: the next one leaves the fault, and is in its
     * window too (its first sample is stuck). */
    uint64_t fault_seq1 = seq + 1;
    if (stream(c, &p, AFTER_DAYS, -1, &seq) || settle(c, seq))
        return 1;
    if (worth_stats(c, "reservoir", &json))
        return fail(c, "stats");
    double alarms = field(json, "\"alarms\":");
    printf("   drift alarms before the fault: %.0f in %d sound days (stated: one false alarm in 90 "
           "days); since it began: %.0f\n",
           alarms_before, days, alarms - alarms_before);
    struct alarms a;
    if (read_alarms(c, fault_t0, &a))
        return 1;
    double len_s = fault_t1 - fault_t0;
    int frozen_ok = !isnan(a.frozen_t) && a.frozen_t - fault_t0 <= 10 * 60;
    int onset_ok = !isnan(a.onset_t) && fabs(a.onset_t - fault_t0) <= 0.05 * len_s;
    printf("   the frozen-input check on demand fired %.0f min after the fault began\n"
           "   the drift alarm fired %.0f min into it and dates the change %+.0f min from its "
           "start (%.1f%% of the fault's %.0f h)\n",
           (a.frozen_t - fault_t0) / 60, (a.alarm_t + 60 - fault_t0) / 60,
           (a.onset_t - fault_t0) / 60, 100 * fabs(a.onset_t - fault_t0) / len_s, len_s / 3600);

    /*
     * Back to the pre-drift checkpoint (the newest from before the onset the alarm dates)
     * when it holds nothing of the fault, that is when its plant time is no later than the
     * moment the frozen check says the sensor stuck; else to "commissioned".  The fault's
     * window, from the transition into the first stuck sample to the last one out of it, is
     * excluded from the re-learning.
     */
    double pre_t = a.pre_drift > 0 ? checkpoint_t(c, a.pre_drift) : NAN;
    int use_pre = pre_t < a.frozen_since;
    int64_t back = use_pre ? a.pre_drift : ck;
    uint64_t undone = 0, replayed = 0;
    if (worth_rollback(c, "reservoir", back, 1, 't', fault_t0 - 60, fault_t1 - 1, &undone,
                       &replayed))
        return fail(c, "rollback");
    printf("\n6. rolled back to checkpoint %lld (%s, %.0f min before the sensor stuck), "
           "re-learning the log\n   after it with the fault's time window excluded: %llu undone, "
           "%llu replayed\n",
           (long long)back, use_pre ? "pre-drift" : "commissioned",
           ((use_pre ? pre_t : T0 + 60.0 * (double)(ck_seq + 1)) - a.frozen_since) / -60.0,
           (unsigned long long)undone, (unsigned long long)replayed);
    if (table(c, after, "   values after the rollback:"))
        return 1;
    /* Everything after the fault (seq fault_seq1 + 1 .. seq) is learnt again. */
    int relearnt = replayed >= seq - fault_seq1 && undone >= fault_seq1 - fault_seq0 + 1;
    printf("   the %llu transitions after the fault were learnt again: %s\n",
           (unsigned long long)(seq - fault_seq1), relearnt ? "yes" : "NO");
    int ok = relearnt && frozen_ok && onset_ok;
    worth_close(c);
    if (historian && write_historian(&p, historian) != 0)
        return 1;
    return ok ? 0 : 1;
}
