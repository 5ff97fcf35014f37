/*
 * options_help.c - what options.c's table makes for people: the defaults
 * config_t starts from (they depend on the environment: $STATE_DIRECTORY,
 * $RUNTIME_DIRECTORY, $CREDENTIALS_DIRECTORY), --help, the man page's
 * OPTIONS section and the sample config file.  Main thread at start-up.
 */
#include "options.h"

#include <errno.h>
#include <getopt.h>
#include <math.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <sys/stat.h>
#include <unistd.h>
#include "common/mem.h"
#include "common/say.h"
#include "net/server.h"
#include "roles.h"

#include "options_impl.h"

/* ---- defaults ---------------------------------------------------------------------------- */

/* The first directory of a systemd directory variable ("a:b" lists several), or NULL. */
static const char *first_dir(const char *var, char *buf, size_t len)
{
    const char *v = getenv(var);
    if (!v || !*v)
        return NULL;
    size_t n = strcspn(v, ":");
    if (n == 0 || n >= len)
        return NULL;
    memcpy(buf, v, n);
    buf[n] = 0;
    return buf;
}

void opt_defaults(struct options *o, config_t *c)
{
    *c = (config_t){
        .socket_path = "./worthd.sock",
        .max_line = 1u << 20,
        .max_batch = 65536,
        .queue = 262144,
        .max_models = 256,
        .db_path = "./worthd.db",
        .sync_full = 1,
        .checkpoint_every = 100000,
        .keep = 10,
        .max_conns = 1024,
        .send_timeout_s = 30,
        .max_features = 65536,
        .max_model_mb = 2048,
        .max_buffer_mb = 256,
        .auth_timeout_s = 10,
        .max_unauthed = 64,
        .unix_slots = 32,
        .max_query_work = 64000000,
        .file_mode = 0600,
        .unix_role = ROLE_ADMIN,
        .log_level = SAY_INFO,
        .retain_every_s = 3600,
    };
    char dir[4096], path[4200];
    if (first_dir("RUNTIME_DIRECTORY", dir, sizeof dir)) {
        snprintf(path, sizeof path, "%s/worthd.sock", dir);
        c->socket_path = opt_pool_dup(o, path, strlen(path));
    }
    if (first_dir("STATE_DIRECTORY", dir, sizeof dir)) {
        snprintf(path, sizeof path, "%s/worthd.db", dir);
        c->db_path = opt_pool_dup(o, path, strlen(path));
    }
    /* systemd's LoadCredential=token:...: the token file, when no other is given. */
    if (first_dir("CREDENTIALS_DIRECTORY", dir, sizeof dir)) {
        snprintf(path, sizeof path, "%s/token", dir);
        if (access(path, R_OK) == 0)
            c->token_file = opt_pool_dup(o, path, strlen(path));
    }
}

/* ---- help -------------------------------------------------------------------------------- */

/* The default of d in words: its own text, or the value in the defaults. */
static void default_text(struct options *o, const opt_def_t *d, char *buf, size_t len)
{
    if (d->def) {
        snprintf(buf, len, "%s", d->def);
        return;
    }
    config_t c;
    opt_defaults(o, &c);
    opt_show_value(&c, d, buf, len);
}

/* Bounds of a number in words ("256..1073741824"), or "". */
static void bounds_text(const opt_def_t *d, char *buf, size_t len)
{
    buf[0] = 0;
    if (d->kind == K_SIZE || d->kind == K_U64 || d->kind == K_UINT || d->kind == K_DAYS)
        snprintf(buf, len, "%llu..%llu", (unsigned long long)d->lo, (unsigned long long)d->hi);
}

/* The whole text of an option: help, then "(BOUNDS; default DEF)". */
static void full_help(struct options *o, const opt_def_t *d, char *buf, size_t len)
{
    char def[512], b[64];
    bounds_text(d, b, sizeof b);
    if (d->kind == K_CMD && !d->def) {
        snprintf(buf, len, "%s", d->help);
        return;
    }
    default_text(o, d, def, sizeof def);
    snprintf(buf, len, "%s (%s%sdefault %s)%s", d->help, b, b[0] ? "; " : "", def,
             d->live ? " [reloaded by SIGHUP]" : "");
}

/* Prints text wrapped at HELP_WIDTH, its lines after the first indented by HELP_COL. */
static void wrap(FILE *f, const char *text, size_t col)
{
    size_t x = col;
    for (const char *p = text; *p;) {
        while (*p == ' ')
            p++;
        size_t w = strcspn(p, " ");
        if (x > HELP_COL && x + 1 + w > HELP_WIDTH) {
            fprintf(f, "\n%*s", HELP_COL, "");
            x = HELP_COL;
        } else if (x > col || (x == col && p != text && x > HELP_COL)) {
            fputc(' ', f);
            x++;
        }
        fwrite(p, 1, w, f);
        x += w;
        p += w;
    }
    fputc('\n', f);
}

void opt_print_help(struct options *o, FILE *f)
{
    fputs("usage: worthd [options]\n"
          "\n"
          "Learns the value of a running policy from the transitions a plant gateway\n"
          "sends, and answers value queries (see schema/protocol.md, and worthd(8)).\n"
          "Every option may also be a key of the config file (but those of the command line\n"
          "only, from --config on); the command line overrides the file.\n"
          "\n"
          "options:\n",
          f);
    for (size_t i = 0; i < opt_count; i++) {
        const opt_def_t *d = &opt_table[i];
        char head[80], text[2048];
        snprintf(head, sizeof head, "  --%s%s%s", d->name, d->arg ? " " : "", d->arg ? d->arg : "");
        full_help(o, d, text, sizeof text);
        fputs(head, f);
        size_t x = strlen(head);
        if (x + 2 > HELP_COL) {
            fprintf(f, "\n%*s", HELP_COL, "");
            x = HELP_COL;
        } else {
            fprintf(f, "%*s", (int)(HELP_COL - x), "");
            x = HELP_COL;
        }
        wrap(f, text, x);
    }
    fputs("\nSignals: TERM, INT and QUIT stop cleanly; HUP reloads what can change live (marked\n"
          "above) and logs what needs a restart; USR1 logs a status line.\n"
          "Exit status: 0 after a clean stop, 1 when worthd could not start, 2 for a bad\n"
          "command line, 78 for a bad config file.\n"
          "\n"
          "Estimates are advisory: never use them in a safety function.\n",
          f);
}

/* Writes s for roff: backslashes doubled, a leading dot or quote protected. */
static void roff(FILE *f, const char *s)
{
    if (*s == '.' || *s == '\'')
        fputs("\\&", f);
    for (; *s; s++) {
        if (*s == '\\')
            fputs("\\e", f);
        else if (*s == '-')
            fputs("\\-", f);
        else
            fputc(*s, f);
    }
}

void opt_print_man(struct options *o, FILE *f)
{
    for (size_t i = 0; i < opt_count; i++) {
        const opt_def_t *d = &opt_table[i];
        char text[2048];
        full_help(o, d, text, sizeof text);
        fputs(".TP\n\\fB", f);
        roff(f, "--");
        roff(f, d->name);
        fputs("\\fR", f);
        if (d->arg) {
            fputs(" \\fI", f);
            roff(f, d->arg);
            fputs("\\fR", f);
        }
        fputs("\n", f);
        roff(f, text);
        fputs("\n", f);
    }
}

void opt_print_sample(struct options *o, FILE *f)
{
    fputs("# worthd.conf - worthd's configuration (worthd(8)).\n"
          "#\n"
          "# Lines \"key = value\"; the keys are worthd's long options.  Every key is shown\n"
          "# here commented out, at its default.  Options on the command line override this\n"
          "# file; `worthd --check-config` checks it; SIGHUP (systemctl reload worthd)\n"
          "# applies the keys marked [reloaded by SIGHUP].\n",
          f);
    for (size_t i = 0; i < opt_count; i++) {
        const opt_def_t *d = &opt_table[i];
        if (d->kind == K_CMD)
            continue;
        char text[2048], def[512];
        full_help(o, d, text, sizeof text);
        fputs("\n# ", f);
        /* The comment wrapped like the help, every line a comment. */
        size_t x = 2;
        for (const char *p = text; *p;) {
            while (*p == ' ')
                p++;
            size_t w = strcspn(p, " ");
            if (x > 2 && x + 1 + w > 92) {
                fputs("\n# ", f);
                x = 2;
            } else if (x > 2) {
                fputc(' ', f);
                x++;
            }
            fwrite(p, 1, w, f);
            x += w;
            p += w;
        }
        if (d->def)
            fprintf(f, "\n#%s =\n", d->name);
        else {
            default_text(o, d, def, sizeof def);
            fprintf(f, "\n#%s = %s\n", d->name, def);
        }
    }
}
