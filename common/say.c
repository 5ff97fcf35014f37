/*
 * say.c - the event log on stderr.
 *
 * Any thread may call say(); each event is formatted into a local buffer and
 * written with one fwrite so lines from different threads do not interleave.
 * The level is set at start-up and may change at a reload (SIGHUP, the loop
 * thread) while other threads log: it is atomic.
 *
 * When stderr is the journal (systemd sets $JOURNAL_STREAM to the device and
 * inode of the stream it gave as stderr), each line starts with its syslog
 * priority in angle brackets instead of the time and the level name, as
 * sd-daemon(3) documents ("<3>" error, "<4>" warning, "<6>" info, "<7>"
 * debug): journald stamps the time itself and keeps the priority.
 */
#include "common/say.h"

#include <stdarg.h>
#include <stdatomic.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <time.h>

static _Atomic int max_level = SAY_INFO;
static int journal; /* set once, at start-up, before threads exist */
static const char *const names[] = {"error", "warn", "info", "debug"};
/* syslog priorities (sd-daemon.h's SD_ERR, SD_WARNING, SD_INFO, SD_DEBUG) */
static const char *const prefixes[] = {"<3>", "<4>", "<6>", "<7>"};

void say_set_level(enum say_level level)
{
    atomic_store(&max_level, (int)level);
}

int say_detect_journal(void)
{
    const char *js = getenv("JOURNAL_STREAM");
    unsigned long long dev, ino;
    struct stat st;
    journal = js && sscanf(js, "%llu:%llu", &dev, &ino) == 2 && fstat(2, &st) == 0 &&
              (unsigned long long)st.st_dev == dev && (unsigned long long)st.st_ino == ino;
    return journal;
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
    return (int)level <= atomic_load(&max_level);
}

void say(enum say_level level, const char *fmt, ...)
{
    if ((int)level > atomic_load(&max_level))
        return;
    char line[2048];
    struct timespec ts;
    struct tm tm;
    int n;
    if (journal) {
        n = snprintf(line, sizeof line, "%s", prefixes[level]);
    } else {
        clock_gettime(CLOCK_REALTIME, &ts);
        gmtime_r(&ts.tv_sec, &tm);
        n = snprintf(line, sizeof line, "%04d-%02d-%02dT%02d:%02d:%02d.%03ldZ %-5s ",
                     tm.tm_year + 1900, tm.tm_mon + 1, tm.tm_mday, tm.tm_hour, tm.tm_min,
                     tm.tm_sec, ts.tv_nsec / 1000000, names[level]);
    }
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
