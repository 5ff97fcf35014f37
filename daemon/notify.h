/*
 * notify.h - telling systemd how worthd is doing (sd_notify(3), libsystemd):
 * READY=1 once it serves, STATUS= lines while it recovers, RELOADING=1 at
 * SIGHUP, STOPPING=1 at a stop, WATCHDOG=1 from the loop.
 *
 * Every call does nothing when $NOTIFY_SOCKET is not set (not run by systemd
 * with Type=notify), so worthd started by hand behaves as before.  Main or
 * loop thread (one datagram per call; never blocks).
 */
#ifndef WORTH_NOTIFY_H
#define WORTH_NOTIFY_H

#include <stdint.h>

/* STATUS=text (printf-style). */
void notify_status(const char *fmt, ...) __attribute__((format(printf, 1, 2)));
/* STATUS=text (printf-style) during recovery, with WATCHDOG=1 and EXTEND_TIMEOUT_USEC so that
 * neither the watchdog nor the start timeout ends a long replay that makes progress. */
void notify_recovering(const char *fmt, ...) __attribute__((format(printf, 1, 2)));
/* READY=1 with STATUS=text. */
void notify_ready(const char *fmt, ...) __attribute__((format(printf, 1, 2)));
/* RELOADING=1 (a reload begins; notify_ready ends it). */
void notify_reloading(void);
/* STOPPING=1 with STATUS=text. */
void notify_stopping(const char *why);
/* WATCHDOG=1. */
void notify_watchdog(void);
/* The watchdog period systemd asked for ($WATCHDOG_USEC, for this process), 0 for none. */
uint64_t notify_watchdog_usec(void);

#endif /* WORTH_NOTIFY_H */
