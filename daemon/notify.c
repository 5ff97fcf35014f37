/*
 * notify.c - the sd_notify(3) messages of worthd (notify.h), through Debian's
 * libsystemd.
 *
 * Main thread during start-up (STATUS while recovering), loop thread after.
 * sd_notify sends one datagram to $NOTIFY_SOCKET and returns at once; it does
 * nothing without that variable.  A failed send is logged once at debug level:
 * systemd then simply does not hear it (a watchdog would restart worthd).
 */
#include "notify.h"

#include <stdarg.h>
#include <stdio.h>
#include <systemd/sd-daemon.h>

#include "common/say.h"

static int failed_once;

static void tell(const char *msg)
{
    int rc = sd_notify(0, msg);
    if (rc < 0 && !failed_once) {
        failed_once = 1;
        say_debug("sd_notify failed (%d); systemd does not hear worthd's state", rc);
    }
}

void notify_status(const char *fmt, ...)
{
    char msg[512] = "STATUS=";
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(msg + 7, sizeof msg - 7, fmt, ap);
    va_end(ap);
    tell(msg);
}

/* How far one progress report extends systemd's start timeout. */
#define EXTEND_USEC 30000000

void notify_recovering(const char *fmt, ...)
{
    char msg[512];
    int n = snprintf(msg, sizeof msg, "WATCHDOG=1\nEXTEND_TIMEOUT_USEC=%d\nSTATUS=", EXTEND_USEC);
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(msg + n, sizeof msg - (size_t)n, fmt, ap);
    va_end(ap);
    tell(msg);
}

void notify_ready(const char *fmt, ...)
{
    char msg[512] = "READY=1\nSTATUS=";
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(msg + 15, sizeof msg - 15, fmt, ap);
    va_end(ap);
    tell(msg);
}

void notify_reloading(void)
{
    tell("RELOADING=1\nSTATUS=reloading the configuration");
}

void notify_stopping(const char *why)
{
    char msg[512];
    snprintf(msg, sizeof msg, "STOPPING=1\nSTATUS=stopping (%s): applying everything accepted",
             why);
    tell(msg);
}

void notify_watchdog(void)
{
    tell("WATCHDOG=1");
}

uint64_t notify_watchdog_usec(void)
{
    uint64_t usec = 0;
    return sd_watchdog_enabled(0, &usec) > 0 ? usec : 0;
}
