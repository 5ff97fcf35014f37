/*
 * worth.c - main of the `worth` command-line client: the global options,
 * then the command found in the one table (commands.c), run with the rest of
 * the arguments.
 *
 * `worth --help`, and no command at all (on stderr, exit 2), print the global
 * usage; `worth CMD --help` prints the command's page.  The connection is
 * opened only when a command needs it (cli.c), so help and usage errors work
 * without a daemon; main closes it and frees the token when the command
 * returns.  Runs on the CLI's only thread.
 */
#include <stdlib.h>
#include <string.h>

#include "cli.h"

int main(int argc, char **argv)
{
    struct cli cli = {0};
    cli.socket_path = getenv("WORTH_SOCKET");
    if (!cli.socket_path || !*cli.socket_path)
        cli.socket_path = "./worthd.sock";
    int i = 1;
    for (; i < argc && argv[i][0] == '-' && argv[i][1]; i++) {
        const char *a = argv[i];
        if (strcmp(a, "--help") == 0 || strcmp(a, "-h") == 0) {
            help_global(stdout);
            return EXIT_OK;
        } else if (strcmp(a, "--json") == 0) {
            cli.json = 1;
        } else if (strcmp(a, "--socket") == 0 || strcmp(a, "--connect") == 0 ||
                   strcmp(a, "--token-file") == 0 || strcmp(a, "--timeout") == 0) {
            if (i + 1 >= argc)
                return cli_usage(NULL, "%s needs a value", a);
            const char *v = argv[++i];
            if (strcmp(a, "--socket") == 0) {
                cli.socket_path = v;
                cli.host_port = NULL;
            } else if (strcmp(a, "--connect") == 0) {
                const char *colon = strrchr(v, ':');
                long long port;
                if (!colon || colon == v || parse_int(colon + 1, 1, 65535, &port) != 0)
                    return cli_usage(NULL, "--connect wants HOST:PORT, not \"%s\"", v);
                cli.host_port = v;
            } else if (strcmp(a, "--token-file") == 0) {
                cli.token_file = v;
            } else {
                long long s;
                if (parse_int(v, 0, 86400, &s) != 0)
                    return cli_usage(NULL, "--timeout wants seconds 0..86400, not \"%s\"", v);
                cli.timeout_ms = (int)(s * 1000);
            }
        } else if (strcmp(a, "--print-man") == 0) {
            help_man(stdout);
            return EXIT_OK;
        } else if (strcmp(a, "--print-completion") == 0) {
            help_completion(stdout);
            return EXIT_OK;
        } else if (strcmp(a, "--version") == 0) {
            printf("worth %s\n", WORTH_VERSION);
            return EXIT_OK;
        } else {
            return cli_usage(NULL, "unknown option %s", a);
        }
    }
    if (i >= argc) {
        help_global(stderr);
        return EXIT_USAGE;
    }
    const struct cmd *cmd = cmd_find(argv[i]);
    if (!cmd)
        return cli_usage(NULL, "unknown command \"%s\"", argv[i]);
    /* "worth CMD --help" is the same as "worth help CMD"; --json may follow the command. */
    int n = 0;
    char **av = argv + i;
    int ac = argc - i;
    for (int k = 0; k < ac; k++) {
        if (k > 0 && (strcmp(av[k], "--help") == 0 || strcmp(av[k], "-h") == 0)) {
            help_command(stdout, cmd);
            return EXIT_OK;
        }
        if (k > 0 && strcmp(av[k], "--json") == 0) {
            cli.json = 1;
            continue;
        }
        if (k > 0 && strcmp(av[k], "--") == 0) {
            /* Everything after "--" is positional; the command sees the "--" too. */
            for (; k < ac; k++)
                av[n++] = av[k];
            break;
        }
        av[n++] = av[k];
    }
    av[n] = NULL;
    int ex = cmd->run(&cli, n, av);
    fflush(stdout);
    worth_close(cli.c);
    free(cli.token);
    return ex;
}
