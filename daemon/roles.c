/*
 * roles.c - tokens with roles, and peer rules for the Unix socket (roles.h).
 *
 * Built by the options (main thread at start-up, the loop thread at a
 * reload), then read on the loop thread only.  Tokens are compared in
 * constant time, every token against the one offered (no early exit that
 * would tell which one came close), and never copied into a message or the
 * log: a token is named by its NAME, or by "token on line N" of its file.
 */
#include "roles.h"

#include <errno.h>
#include <grp.h>
#include <pwd.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "common/ct.h"
#include "common/mem.h"

struct token {
    char *secret;
    int role;
    char who[ROLES_WHO_MAX];
};

struct rule {
    int is_group;
    uint32_t id;
    int role;
};

struct roles {
    struct token *tokens;
    size_t n_tokens;
    struct rule *rules;
    size_t n_rules;
};

static const char *const names[] = {"none", "read", "write", "admin"};

const char *role_name(int role)
{
    return role >= 0 && role <= ROLE_ADMIN ? names[role] : "?";
}

int role_parse(const char *name)
{
    for (int i = ROLE_READ; i <= ROLE_ADMIN; i++)
        if (strcmp(name, names[i]) == 0)
            return i;
    return -1;
}

struct roles *roles_new(void)
{
    return mem_calloc(1, sizeof(struct roles));
}

void roles_free(struct roles *r)
{
    if (!r)
        return;
    for (size_t i = 0; i < r->n_tokens; i++) {
        /* The secret does not outlive the set in freed memory. */
        memset(r->tokens[i].secret, 0, strlen(r->tokens[i].secret));
        mem_free(r->tokens[i].secret);
    }
    mem_free(r->tokens);
    mem_free(r->rules);
    mem_free(r);
}

static void add_token(struct roles *r, const char *secret, size_t len, int role, const char *who)
{
    r->tokens = mem_realloc(r->tokens, (r->n_tokens + 1) * sizeof *r->tokens);
    struct token *t = &r->tokens[r->n_tokens++];
    t->secret = mem_alloc(len + 1);
    memcpy(t->secret, secret, len);
    t->secret[len] = 0;
    t->role = role;
    snprintf(t->who, sizeof t->who, "%s", who);
}

/* A token is 8..1000 bytes. */
static int token_ok(size_t len)
{
    return len >= ROLES_TOKEN_MIN && len <= ROLES_TOKEN_MAX;
}

/* Whether line (NUL-terminated) starts with a role word followed by white space. */
static int starts_with_role(const char *line)
{
    char word[16];
    size_t n = 0;
    while (line[n] && line[n] != ' ' && line[n] != '\t' && n < sizeof word - 1) {
        word[n] = line[n];
        n++;
    }
    word[n] = 0;
    return (line[n] == ' ' || line[n] == '\t') && role_parse(word) >= 0;
}

struct roles *roles_read_tokens(const char *path, char *err, size_t errlen)
{
    FILE *f = fopen(path, "r");
    if (!f) {
        snprintf(err, errlen, "cannot read --token-file %s: %s", path, strerror(errno));
        return NULL;
    }
    /* Room for a few hundred tokens; a larger file is refused, never cut. */
    enum { CAP = 256 * 1024 };
    char *buf = mem_alloc(CAP + 1);
    size_t n = fread(buf, 1, CAP, f);
    int big = !feof(f);
    fclose(f);
    buf[n] = 0;
    struct roles *r = roles_new();
    const char *first = buf;
    while (*first == '\n' || *first == '\r' || *first == ' ' || *first == '\t')
        first++;
    if (big) {
        snprintf(err, errlen, "--token-file %s is larger than %d bytes", path, CAP);
        goto fail;
    }
    if (!starts_with_role(first) && *first != '#') {
        /* One token alone, as before roles: the whole file, trailing white space removed. */
        while (n > 0 && (buf[n - 1] == '\n' || buf[n - 1] == '\r' || buf[n - 1] == ' ' ||
                         buf[n - 1] == '\t'))
            buf[--n] = 0;
        if (!token_ok(n)) {
            snprintf(err, errlen, "--token-file %s must hold a token of %d..%d bytes", path,
                     ROLES_TOKEN_MIN, ROLES_TOKEN_MAX);
            goto fail;
        }
        add_token(r, buf, n, ROLE_ADMIN, "the token");
        goto out;
    }
    unsigned lineno = 0;
    for (char *line = buf, *next; line && *line; line = next) {
        lineno++;
        next = strchr(line, '\n');
        if (next)
            *next++ = 0;
        char *w[4] = {NULL};
        int k = 0;
        for (char *save = NULL, *tok = strtok_r(line, " \t\r", &save); tok;
             tok = strtok_r(NULL, " \t\r", &save))
            if (k < 4)
                w[k++] = tok;
            else
                k = 5;
        if (k == 0 || w[0][0] == '#')
            continue;
        int role = role_parse(w[0]);
        if (role < 0 || k < 2 || k > 3) {
            snprintf(err, errlen,
                     "--token-file %s:%u: expected \"ROLE TOKEN [NAME]\" with ROLE read, write or "
                     "admin",
                     path, lineno);
            goto fail;
        }
        size_t tl = strlen(w[1]);
        if (!token_ok(tl)) {
            snprintf(err, errlen, "--token-file %s:%u: a token must be %d..%d bytes", path, lineno,
                     ROLES_TOKEN_MIN, ROLES_TOKEN_MAX);
            goto fail;
        }
        for (size_t i = 0; i < r->n_tokens; i++)
            if (strcmp(r->tokens[i].secret, w[1]) == 0) {
                snprintf(err, errlen, "--token-file %s:%u: the same token as %s", path, lineno,
                         r->tokens[i].who);
                goto fail;
            }
        char who[ROLES_WHO_MAX];
        if (k == 3) {
            if (strlen(w[2]) > 63) {
                snprintf(err, errlen, "--token-file %s:%u: a name is at most 63 bytes", path,
                         lineno);
                goto fail;
            }
            snprintf(who, sizeof who, "token \"%s\"", w[2]);
        } else {
            snprintf(who, sizeof who, "token on line %u", lineno);
        }
        add_token(r, w[1], tl, role, who);
    }
    if (r->n_tokens == 0) {
        snprintf(err, errlen, "--token-file %s holds no token", path);
        goto fail;
    }
out:
    memset(buf, 0, CAP + 1);
    mem_free(buf);
    return r;
fail:
    memset(buf, 0, CAP + 1);
    mem_free(buf);
    roles_free(r);
    return NULL;
}

/* A decimal id that fills s; 0 or -1. */
static int parse_id(const char *s, uint32_t *out)
{
    char *end;
    errno = 0;
    unsigned long v = strtoul(s, &end, 10);
    if (errno || !*s || *end || s[0] == '-' || v > 0xfffffffful)
        return -1;
    *out = (uint32_t)v;
    return 0;
}

int roles_add_peer_rules(struct roles *r, const char *spec, char *err, size_t errlen)
{
    size_t have = r->n_rules;
    char *copy = mem_strdup(spec);
    int rc = 0;
    for (char *save = NULL, *item = strtok_r(copy, ",", &save); item;
         item = strtok_r(NULL, ",", &save)) {
        while (*item == ' ')
            item++;
        char *eq = strchr(item, '='), *colon = strrchr(item, ':');
        if (!eq || !colon || colon < eq) {
            snprintf(err, errlen,
                     "\"%.64s\": expected uid=N:ROLE, user=NAME:ROLE, gid=N:ROLE or "
                     "group=NAME:ROLE",
                     item);
            rc = -1;
            break;
        }
        *eq = 0;
        *colon = 0;
        const char *kind = item, *who = eq + 1, *rname = colon + 1;
        int role = role_parse(rname);
        if (role < 0) {
            snprintf(err, errlen, "\"%.64s\": the role must be read, write or admin, not \"%.16s\"",
                     who, rname);
            rc = -1;
            break;
        }
        struct rule ru = {0, 0, role};
        if (strcmp(kind, "uid") == 0 || strcmp(kind, "gid") == 0) {
            ru.is_group = kind[0] == 'g';
            if (parse_id(who, &ru.id) != 0) {
                snprintf(err, errlen, "%s=%.32s: not a number", kind, who);
                rc = -1;
                break;
            }
        } else if (strcmp(kind, "user") == 0) {
            struct passwd *pw = getpwnam(who);
            if (!pw) {
                snprintf(err, errlen, "user=%.64s: no such user", who);
                rc = -1;
                break;
            }
            ru.id = (uint32_t)pw->pw_uid;
        } else if (strcmp(kind, "group") == 0) {
            struct group *gr = getgrnam(who);
            if (!gr) {
                snprintf(err, errlen, "group=%.64s: no such group", who);
                rc = -1;
                break;
            }
            ru.is_group = 1;
            ru.id = (uint32_t)gr->gr_gid;
        } else {
            snprintf(err, errlen, "\"%.16s\": expected uid, user, gid or group", kind);
            rc = -1;
            break;
        }
        r->rules = mem_realloc(r->rules, (r->n_rules + 1) * sizeof *r->rules);
        r->rules[r->n_rules++] = ru;
    }
    mem_free(copy);
    if (rc)
        r->n_rules = have;
    return rc;
}

size_t roles_n_tokens(const struct roles *r)
{
    return r ? r->n_tokens : 0;
}

const char *roles_first_token(const struct roles *r)
{
    return r && r->n_tokens ? r->tokens[0].secret : NULL;
}

int roles_of_token(const struct roles *r, const char *token, size_t len, const char **who)
{
    int role = ROLE_NONE;
    for (size_t i = 0; r && i < r->n_tokens; i++) {
        /* Every token is compared: the time does not tell which one matched. */
        int eq = ct_equal(token, len, r->tokens[i].secret, strlen(r->tokens[i].secret));
        if (eq && role == ROLE_NONE) {
            role = r->tokens[i].role;
            if (who)
                *who = r->tokens[i].who;
        }
    }
    return role;
}

int roles_of_peer(const struct roles *r, uint32_t uid, const uint32_t *groups, size_t n,
                  int fallback, int *rule)
{
    if (rule)
        *rule = 0;
    if (uid == 0 || uid == (uint32_t)geteuid())
        return ROLE_ADMIN;
    for (size_t i = 0; r && i < r->n_rules; i++) {
        const struct rule *ru = &r->rules[i];
        int hit = !ru->is_group && ru->id == uid;
        for (size_t k = 0; ru->is_group && k < n && !hit; k++)
            hit = groups[k] == ru->id;
        if (hit) {
            if (rule)
                *rule = 1;
            return ru->role;
        }
    }
    return fallback;
}
