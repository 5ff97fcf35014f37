/*
 * main.c - worthd: options, signals, start-up checks, then the loop.
 *
 * Runs on the main thread, which becomes the loop thread.  Reads the token
 * file (never logging the token), ignores SIGPIPE (a client that goes away
 * must not kill the daemon), raises the soft open-file limit to the hard one
 * (every connection holds a descriptor), and pins OpenBLAS to one thread per
 * learner.  Sets the umask from --file-mode before anything is created.
 */
#include <errno.h>
#include <getopt.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/resource.h>
#include <sys/socket.h>
#include <sys/stat.h>

#include "common/mem.h"
#include "common/say.h"
#include "net/server.h"
#include "worthd.h"

#ifndef WORTH_VERSION
#define WORTH_VERSION "0.0.0"
#endif

/* Descriptors worthd needs besides its clients: database, WAL, listeners, loop, threads. */
#define NOFILE_SPARE 64

/* From OpenBLAS; declared here to keep cblas.h out of the daemon shell. */
void openblas_set_num_threads(int n);

static const char usage[] =
    "usage: worthd [options]\n"
    "\n"
    "Learns the value of a running policy from the transitions a plant gateway\n"
    "sends, and answers value queries (see schema/protocol.md).\n"
    "\n"
    "options:\n"
    "  --socket PATH       Unix socket to listen on (default ./worthd.sock, mode 0660)\n"
    "  --db PATH           SQLite database: log, models, checkpoints (default ./worthd.db)\n"
    "  --backup-dir DIR    where backup requests write their copies (default\n"
    "                      $STATE_DIRECTORY/backups when set, else backups beside --db);\n"
    "                      created if missing (0700; 0750 with --file-mode 0640); must be\n"
    "                      worthd's or root's, not a symlink, not writable by all\n"
    "  --file-mode MODE    0600 (default) or 0640 (group may read): database, -wal, -shm,\n"
    "                      backups; an existing database with looser bits is tightened\n"
    "  --sync MODE         full (default): an acknowledged transition survives power loss;\n"
    "                      normal: it survives a crash of worthd, not of the machine\n"
    "  --checkpoint-every N  automatic checkpoint every N transitions (default 100000; 0: off)\n"
    "  --keep N            unlabelled checkpoints kept per model (default 10)\n"
    "  --db-max-mb N       cap the database at N MiB (default 0: no cap); when full, ingest\n"
    "                      is refused with storage_full and queries go on\n"
    "  --listen HOST:PORT  also listen on TCP; needs --token-file (clients then send\n"
    "                      {\"op\":\"auth\",\"token\":...} first), even on loopback: without\n"
    "                      one, every user of the machine could use the whole protocol\n"
    "  --allow-tcp-without-token  accept that risk on a loopback --listen (logged loudly)\n"
    "  --metrics HOST:PORT serve GET /metrics (Prometheus text format) over HTTP;\n"
    "                      a non-loopback address needs --token-file (sent as a bearer token)\n"
    "  --token-file FILE   the token TCP clients must send first\n"
    "  --auth-timeout S    close a TCP client that has not authenticated S seconds after\n"
    "                      connecting, however much it trickles (auth_timeout; default 10)\n"
    "  --max-unauthenticated N  TCP connections waiting to authenticate at once (default 64);\n"
    "                      one more is refused (too_many_connections)\n"
    "  --unix-slots N      of --max-conns, slots TCP cannot take, kept for the Unix socket\n"
    "                      (default 32, at most a quarter of --max-conns)\n"
    "  --log-level LEVEL   error, warn, info (default) or debug; logs go to stderr\n"
    "  --max-line BYTES    longest request line (default 1048576)\n"
    "  --max-batch N       most transitions in one batch or bulk (default 65536)\n"
    "  --queue N           records each model's queue holds (default 262144, >= max-batch)\n"
    "  --max-models N      most models one daemon holds (default 256)\n"
    "  --max-features N    most features one model may have (default 65536; a model's own\n"
    "                      max_features defaults to 4096)\n"
    "  --max-model-mb N    most memory one model may come to hold, in MiB: matrices, replay\n"
    "                      and per-source buffers at full size, its queue (default 2048)\n"
    "  --max-conns N       client connections open at once (default 1024); one more gets\n"
    "                      too_many_connections and is closed\n"
    "  --idle-timeout S    close a connection that sent nothing for S seconds while nothing\n"
    "                      was owed to it, after an idle_timeout line (default 0: never)\n"
    "  --send-timeout S    cut off a client whose unread replies stay over 4 MiB for S\n"
    "                      seconds (slow_reader, logged; default 30)\n"
    "  --max-buffer-mb N   every connection's buffers together (partial lines, bulk payloads,\n"
    "                      unsent replies) in MiB (default 256; 0: no cap); input beyond it\n"
    "                      is refused with over_budget\n"
    "  --max-query-work N  most work one value request may ask: states x (features + the\n"
    "                      features^2 of each rls_td sd), in millions (default 64); more is\n"
    "                      too_large, so one request cannot stall every connection\n"
    "  --help              this text\n"
    "  --version           print the version\n"
    "\n"
    "Estimates are advisory: never use them in a safety function.\n";

/* Long options without a short letter. */
enum { OPT_BACKUP_DIR = 1000, OPT_FILE_MODE };

/* Parses a positive integer option; exits with status 2 on a bad value. */
static size_t parse_size(const char *name, const char *v, size_t lo, size_t hi)
{
    char *end;
    errno = 0;
    unsigned long long n = strtoull(v, &end, 10);
    if (errno || *end || !*v || v[0] == '-' || n < lo || n > hi) {
        fprintf(stderr, "worthd: --%s must be an integer %zu..%zu, not \"%s\"\n", name, lo, hi, v);
        exit(2);
    }
    return (size_t)n;
}

/* Reads the token from path (trailing whitespace removed); exits with status 2 on failure. */
static char *read_token(const char *path)
{
    FILE *f = fopen(path, "r");
    if (!f) {
        fprintf(stderr, "worthd: cannot read --token-file %s: %s\n", path, strerror(errno));
        exit(2);
    }
    char buf[1024];
    size_t n = fread(buf, 1, sizeof buf - 1, f);
    int big = !feof(f);
    fclose(f);
    buf[n] = 0;
    while (n > 0 &&
           (buf[n - 1] == '\n' || buf[n - 1] == '\r' || buf[n - 1] == ' ' || buf[n - 1] == '\t'))
        buf[--n] = 0;
    if (big || n < 8) {
        fprintf(stderr, "worthd: --token-file %s must hold a token of 8..1000 bytes\n", path);
        exit(2);
    }
    struct stat st;
    if (stat(path, &st) == 0 && (st.st_mode & 0077))
        fprintf(stderr, "worthd: warning: --token-file %s is readable by group or others\n", path);
    return mem_strdup(buf);
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
    config_t o = {
        .socket_path = "./worthd.sock",
        .listen = NULL,
        .token = NULL,
        .max_line = 1u << 20,
        .max_batch = 65536,
        .queue = 262144,
        .max_models = 256,
        .db_path = "./worthd.db",
        .sync_full = 1,
        .checkpoint_every = 100000,
        .keep = 10,
        .db_max_mb = 0,
        .max_conns = 1024,
        .idle_timeout_s = 0,
        .send_timeout_s = 30,
        .max_features = 65536,
        .max_model_mb = 2048,
        .max_buffer_mb = 256,
        .auth_timeout_s = 10,
        .max_unauthed = 64,
        .unix_slots = 32,
        .tcp_without_token = 0,
        .max_query_work = 64000000,
        .backup_dir = NULL,
        .file_mode = 0600,
    };
    int queue_set = 0, slots_set = 0;
    static const struct option longopts[] = {
        {"socket", required_argument, NULL, 's'},
        {"listen", required_argument, NULL, 'l'},
        {"token-file", required_argument, NULL, 't'},
        {"log-level", required_argument, NULL, 'v'},
        {"max-line", required_argument, NULL, 'L'},
        {"max-batch", required_argument, NULL, 'b'},
        {"queue", required_argument, NULL, 'q'},
        {"max-models", required_argument, NULL, 'm'},
        {"db", required_argument, NULL, 'd'},
        {"sync", required_argument, NULL, 'y'},
        {"checkpoint-every", required_argument, NULL, 'c'},
        {"keep", required_argument, NULL, 'k'},
        {"db-max-mb", required_argument, NULL, 'M'},
        {"metrics", required_argument, NULL, 'P'},
        {"max-conns", required_argument, NULL, 'C'},
        {"idle-timeout", required_argument, NULL, 'I'},
        {"send-timeout", required_argument, NULL, 'S'},
        {"max-features", required_argument, NULL, 'F'},
        {"max-model-mb", required_argument, NULL, 'B'},
        {"max-buffer-mb", required_argument, NULL, 'U'},
        {"auth-timeout", required_argument, NULL, 'A'},
        {"max-unauthenticated", required_argument, NULL, 'N'},
        {"unix-slots", required_argument, NULL, 'X'},
        {"allow-tcp-without-token", no_argument, NULL, 'O'},
        {"max-query-work", required_argument, NULL, 'W'},
        {"backup-dir", required_argument, NULL, OPT_BACKUP_DIR},
        {"file-mode", required_argument, NULL, OPT_FILE_MODE},
        {"help", no_argument, NULL, 'h'},
        {"version", no_argument, NULL, 'V'},
        {NULL, 0, NULL, 0},
    };
    char *token = NULL;
    int c;
    while ((c = getopt_long(argc, argv, "", longopts, NULL)) != -1) {
        switch (c) {
        case 's':
            o.socket_path = optarg;
            break;
        case 'l':
            o.listen = optarg;
            break;
        case 't':
            token = read_token(optarg);
            o.token = token;
            break;
        case 'v': {
            int lv = say_parse_level(optarg);
            if (lv < 0) {
                fprintf(stderr, "worthd: --log-level must be error, warn, info or debug\n");
                return 2;
            }
            say_set_level((enum say_level)lv);
            break;
        }
        case 'L':
            o.max_line = parse_size("max-line", optarg, 256, 1u << 30);
            break;
        case 'b':
            o.max_batch = parse_size("max-batch", optarg, 1, 1u << 24);
            break;
        case 'q':
            o.queue = parse_size("queue", optarg, 1, 1u << 26);
            queue_set = 1;
            break;
        case 'm':
            o.max_models = parse_size("max-models", optarg, 1, 65536);
            break;
        case 'd':
            o.db_path = optarg;
            break;
        case 'y':
            if (strcmp(optarg, "full") == 0)
                o.sync_full = 1;
            else if (strcmp(optarg, "normal") == 0)
                o.sync_full = 0;
            else {
                fprintf(stderr, "worthd: --sync must be full or normal\n");
                return 2;
            }
            break;
        case 'c':
            o.checkpoint_every = parse_size("checkpoint-every", optarg, 0, 1ull << 40);
            break;
        case 'k':
            o.keep = (unsigned)parse_size("keep", optarg, 1, 1000000);
            break;
        case 'P':
            o.metrics = optarg;
            break;
        case 'M':
            o.db_max_mb = parse_size("db-max-mb", optarg, 0, 1ull << 30);
            break;
        case 'C':
            o.max_conns = parse_size("max-conns", optarg, 1, 1000000);
            break;
        case 'I':
            o.idle_timeout_s = (unsigned)parse_size("idle-timeout", optarg, 0, 86400 * 365);
            break;
        case 'S':
            o.send_timeout_s = (unsigned)parse_size("send-timeout", optarg, 1, 86400);
            break;
        case 'F':
            o.max_features = parse_size("max-features", optarg, 1, 1u << 20);
            break;
        case 'B':
            o.max_model_mb = parse_size("max-model-mb", optarg, 1, 1ull << 30);
            break;
        case 'U':
            o.max_buffer_mb = parse_size("max-buffer-mb", optarg, 0, 1ull << 30);
            break;
        case 'A':
            o.auth_timeout_s = (unsigned)parse_size("auth-timeout", optarg, 1, 3600);
            break;
        case 'N':
            o.max_unauthed = parse_size("max-unauthenticated", optarg, 1, 1000000);
            break;
        case 'X':
            o.unix_slots = parse_size("unix-slots", optarg, 0, 1000000);
            slots_set = 1;
            break;
        case 'O':
            o.tcp_without_token = 1;
            break;
        case 'W':
            o.max_query_work = parse_size("max-query-work", optarg, 1, 1000000) * 1000000u;
            break;
        case OPT_BACKUP_DIR:
            o.backup_dir = optarg;
            break;
        case OPT_FILE_MODE:
            if (strcmp(optarg, "0600") == 0 || strcmp(optarg, "600") == 0)
                o.file_mode = 0600;
            else if (strcmp(optarg, "0640") == 0 || strcmp(optarg, "640") == 0)
                o.file_mode = 0640;
            else {
                fprintf(stderr, "worthd: --file-mode must be 0600 or 0640, not \"%s\"\n", optarg);
                return 2;
            }
            break;
        case 'h':
            fputs(usage, stdout);
            return 0;
        case 'V':
            printf("worthd %s\n", WORTH_VERSION);
            return 0;
        default:
            fputs(usage, stderr);
            return 2;
        }
    }
    if (optind < argc) {
        fprintf(stderr, "worthd: unexpected argument \"%s\"\n%s", argv[optind], usage);
        return 2;
    }
    if (o.queue < o.max_batch) {
        if (queue_set) {
            fprintf(stderr, "worthd: --queue (%zu) must be at least --max-batch (%zu)\n", o.queue,
                    o.max_batch);
            return 2;
        }
        o.queue = o.max_batch;
    }
    /* Refuse a bad listening address before touching the database. */
    const char *addrs[2] = {o.listen, o.metrics};
    const char *names[2] = {"--listen", "--metrics"};
    for (int i = 0; i < 2; i++) {
        struct sockaddr_storage ss;
        int loopback = 0;
        if (!addrs[i])
            continue;
        if (server_parse_hostport(addrs[i], &ss, &loopback) != 0) {
            fprintf(stderr, "worthd: %s %s: expected HOST:PORT with a numeric address\n", names[i],
                    addrs[i]);
            return 2;
        }
        if (!loopback && !o.token) {
            fprintf(stderr,
                    "worthd: refusing %s %s, a non-loopback address, without --token-file\n",
                    names[i], addrs[i]);
            return 1;
        }
    }
    if (o.listen && !o.token && !o.tcp_without_token) {
        fprintf(stderr,
                "worthd: refusing --listen %s without --token-file: on TCP every local user "
                "could use the whole protocol, the Unix socket's 0660 mode notwithstanding; "
                "give --token-file, or --allow-tcp-without-token to accept that\n",
                o.listen);
        return 1;
    }
    if (!slots_set && o.unix_slots > o.max_conns / 4)
        o.unix_slots = o.max_conns / 4; /* the default never takes more than a quarter */
    if (o.unix_slots >= o.max_conns) {
        fprintf(stderr, "worthd: --unix-slots (%zu) must be less than --max-conns (%zu)\n",
                o.unix_slots, o.max_conns);
        return 2;
    }
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
    say_info("worthd %s starting", WORTH_VERSION);
    raise_nofile(o.max_conns);
    int status = worthd_run(&o);
    mem_free(token);
    return status;
}
