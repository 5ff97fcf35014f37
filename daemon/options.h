/*
 * options.h - worthd's options: one table (options.c) from which the command
 * line, the config file, --help, --check-config, the sample config and the
 * man page's OPTIONS section all come.
 *
 * Main thread at start-up; the loop thread at a reload (SIGHUP).  The
 * command line overrides the config file, which overrides the defaults
 * (some from systemd's $STATE_DIRECTORY, $RUNTIME_DIRECTORY and
 * $CREDENTIALS_DIRECTORY).  A bad command-line value exits 2 (1 for the
 * refusals of an unsafe listener), as before the config file existed; any
 * fault of the config file exits 78 (EX_CONFIG) with the file and line.
 */
#ifndef WORTH_OPTIONS_H
#define WORTH_OPTIONS_H

#include "config.h"

struct options;

/* options_load's result when worthd is to run (any other value is an exit status). */
#define OPTIONS_RUN (-1)
/* The exit status of a faulty config file (sysexits.h's EX_CONFIG). */
#define OPTIONS_EX_CONFIG 78

/* Lifecycle */

/*
 * Reads argv and the config file (--config FILE, else the default one when it
 * exists) into *cfg, reads the token file and sets the log level.  Returns
 * OPTIONS_RUN with *out (owned by the caller: options_free after the daemon
 * has stopped; it owns the strings cfg points to), or an exit status after
 * printing what was asked (--help, --version, --check-config, --print-...) or
 * why not.
 */
int options_load(int argc, char **argv, config_t *cfg, struct options **out);
/*
 * SIGHUP: reads the command line and the config file again.  Applies to the
 * live cfg (the one options_load filled) what can change while worthd runs,
 * logging each change, and logs each change that needs a restart (kept as it
 * was).  A faulty file changes nothing (logged).  Returns the number of
 * changes applied, or -1.  Loop thread.
 */
int options_reload(struct options *o);
void options_free(struct options *o);

#endif /* WORTH_OPTIONS_H */
