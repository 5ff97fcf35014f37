/*
 * main.c - worthd: options, signals, start-up checks, then the loop.
 *
 * Runs on the main thread, which becomes the loop thread.  Reads the
 * options, the config file and the token file (options.c; never logging a
 * token), ignores SIGPIPE (a client that goes away
 * must not kill the daemon), raises the soft open-file limit to the hard one
 * (every connection holds a descriptor), and pins OpenBLAS to one thread per
 * learner.  Sets the umask from --file-mode before anything is created.
 */
#include <signal.h>
#include <stdlib.h>
#include <sys/resource.h>
#include <sys/stat.h>

#include <string.h>

#include "common/say.h"
#ifdef WORTH_FLEET
#include "fleet/fleet.h"
#endif
#include "learn/rlsk.h"
#include "options.h"
#include "worthd.h"

#ifndef WORTH_VERSION
#define WORTH_VERSION "0.0.0"
#endif

/* Descriptors worthd needs besides its clients: database, WAL, listeners, loop, threads. */
#define NOFILE_SPARE 64

/* From OpenBLAS; declared here to keep cblas.h out of the daemon shell. */
void openblas_set_num_threads(int n);

/* worthd_reload_fn: SIGHUP, on the loop thread. */
static int reload(void *ctx)
{
    return options_reload(ctx);
}

/*
 * Raises the soft limit on open files to the hard one: every connection holds
 * a descriptor.  Warns when the limit leaves too few for max_conns; beyond it
 * accept fails with EMFILE and connections are shed (closed unanswered).
 */
static void raise_nofile(size_t max_conns)
{
    struct rlimit rl;
    if (getrlimit(RLIMIT_NOFILE, &rl) != 0)
        return;
    if (rl.rlim_cur < rl.rlim_max) {
        rl.rlim_cur = rl.rlim_max;
        setrlimit(RLIMIT_NOFILE, &rl);
        getrlimit(RLIMIT_NOFILE, &rl);
    }
    if (rl.rlim_cur != RLIM_INFINITY && rl.rlim_cur < (rlim_t)max_conns + NOFILE_SPARE)
        say_warn("the open-file limit %llu leaves room for about %llu of --max-conns %zu; "
                 "connections beyond it are shed (EMFILE)",
                 (unsigned long long)rl.rlim_cur,
                 rl.rlim_cur > NOFILE_SPARE ? (unsigned long long)(rl.rlim_cur - NOFILE_SPARE)
                                            : 0ull,
                 max_conns);
    else
        say_debug("open-file limit %llu", (unsigned long long)rl.rlim_cur);
}

int main(int argc, char **argv)
{
    config_t o;
    struct options *opts = NULL;
    say_detect_journal(); /* journald's priority prefixes when stderr is the journal */
#ifdef WORTH_FLEET
    /* `worthd fleet ...`: a node of a fleet on NATS JetStream; the single node is untouched. */
    if (argc > 1 && strcmp(argv[1], "fleet") == 0) {
        openblas_set_num_threads(1);
        return fleet_main(argc - 1, argv + 1);
    }
#endif
    int rc = options_load(argc, argv, &o, &opts);
    if (rc != OPTIONS_RUN)
        return rc;
    /*
     * Every file worthd creates from here on (database, -wal, -shm, lock,
     * backups, a rescue copy) gets at most --file-mode, whatever umask it was
     * started with; the socket sets its own 0660 around bind.
     */
    umask(o.file_mode == 0640 ? 027 : 077);
    /* A signal worthd does not handle must not end it uncleanly: SIGPIPE (a client went
     * away), SIGALRM; HUP, USR1 and USR2 until the loop's own handlers take them. */
    signal(SIGPIPE, SIG_IGN);
    signal(SIGALRM, SIG_IGN);
    signal(SIGHUP, SIG_IGN);
    signal(SIGUSR1, SIG_IGN);
    signal(SIGUSR2, SIG_IGN);
    openblas_set_num_threads(1);
    /* A pinned RLS-TD kernel this CPU cannot run is refused, like a bad option (exit 2). */
    const char *pin = getenv("WORTH_RLS_KERNEL");
    if (pin && *pin && !rlsk_named(pin)) {
        say_error("WORTH_RLS_KERNEL=%s: not a kernel this build runs on this CPU (portable, "
                  "compat, avx512); unset it to let worthd choose",
                  pin);
        options_free(opts);
        return 2;
    }
    say_info("worthd %s starting (RLS-TD kernels: %s)", WORTH_VERSION, rlsk()->name);
    raise_nofile(o.max_conns);
    int status = worthd_run(&o, reload, opts);
    options_free(opts);
    return status;
}
