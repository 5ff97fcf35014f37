/*
 * worthd.h - running the daemon (worthd.c, the composition root).
 */
#ifndef WORTH_WORTHD_H
#define WORTH_WORTHD_H

#include "config.h"

/*
 * Runs worthd with cfg (borrowed) until SIGINT, SIGTERM or SIGQUIT.  Returns
 * the process exit status: 0 after a clean stop (everything accepted has been
 * applied, also when a stop signal came during recovery), 1 when it could not
 * start (the reason is logged).
 */
int worthd_run(const config_t *cfg);

#endif /* WORTH_WORTHD_H */
