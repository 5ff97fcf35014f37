/*
 * say.c - the event log on stderr.
 *
 * Any thread may call say(); each event is formatted into a local buffer and
 * written with one fwrite so lines from different threads do not interleave.
 * The level is set once at start-up, before threads exist.
 */
#include "common/say.h"

#include <stdarg.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

static enum say_level max_level = SAY_INFO;
static const char *const names[] = {"error", "warn", "info", "debug"};

void say_set_level(enum say_level level)
{
    max_level = level;
}

int say_parse_level(const char *name)
{
    for (int i = 0; i < 4; i++)
        if (strcmp(name, names[i]) == 0)
            return i;
    return -1;
}

int say_enabled(enum say_level level)
{
    return level <= max_level;
}

void say(enum say_level level, const char *fmt, ...)
{
    if (level > max_level)
        return;
    char line[2048];
    struct timespec ts;
    struct tm tm;
    clock_gettime(CLOCK_REALTIME, &ts);
    gmtime_r(&ts.tv_sec, &tm);
    int n = snprintf(line, sizeof line, "%04d-%02d-%02dT%02d:%02d:%02d.%03ldZ %-5s ",
                     tm.tm_year + 1900, tm.tm_mon + 1, tm.tm_mday, tm.tm_hour, tm.tm_min, tm.tm_sec,
                     ts.tv_nsec / 1000000, names[level]);
    va_list ap;
    va_start(ap, fmt);
    int m = vsnprintf(line + n, sizeof line - (size_t)n - 1, fmt, ap);
    va_end(ap);
    size_t len = (size_t)n + (m < 0 ? 0 : (size_t)m);
    if (len > sizeof line - 2)
        len = sizeof line - 2;
    /* Keep the event on one line whatever the message held. */
    for (size_t i = (size_t)n; i < len; i++)
        if (line[i] == '\n' || line[i] == '\r')
            line[i] = ' ';
    line[len++] = '\n';
    fwrite(line, 1, len, stderr);
}
