/*
 * worthd.h - running the daemon (worthd.c, the composition root).
 */
#ifndef WORTH_WORTHD_H
#define WORTH_WORTHD_H

#include "config.h"

/*
 * Reloads the configuration at SIGHUP (options.h's options_reload, with its
 * ctx): changes what may change in the config_t worthd_run was given.
 * Returns the changes applied, or -1 when nothing changed.  Loop thread.
 */
typedef int (*worthd_reload_fn)(void *ctx);

/*
 * Runs worthd with cfg (borrowed) until SIGINT, SIGTERM or SIGQUIT; at SIGHUP
 * calls reload (with ctx; may be NULL).  Returns the process exit status: 0
 * after a clean stop (everything accepted has been applied, also when a stop
 * signal came during recovery), 1 when it could not start (the reason is
 * logged).  Under systemd (Type=notify) it says READY=1 once it listens.
 */
int worthd_run(const config_t *cfg, worthd_reload_fn reload, void *ctx);

#endif /* WORTH_WORTHD_H */
