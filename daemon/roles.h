/*
 * roles.h - who may do what: the tokens of the token file with a role each,
 * and the rules that give a Unix socket peer a role by its uid or group.
 *
 * Plain data read from the token file and --peer-role when the options are
 * read (options.c), then only looked up, on the loop thread, by the protocol
 * (auth, a Unix connection's peer credentials) and the metrics listener (its
 * bearer token).  A reload (SIGHUP) builds a new set and swaps it in on the
 * loop thread; nothing keeps a pointer into an old one.  No secret is ever
 * logged: a token is named by its name or its line.
 */
#ifndef WORTH_ROLES_H
#define WORTH_ROLES_H

#include <stddef.h>
#include <stdint.h>

struct roles;

/* The roles, each allowing what the one below allows and more (proto/ops.c lists the ops). */
enum role { ROLE_NONE = 0, ROLE_READ = 1, ROLE_WRITE = 2, ROLE_ADMIN = 3 };

/* Longest token, and the shortest. */
#define ROLES_TOKEN_MAX 1000
#define ROLES_TOKEN_MIN 8
/* Longest name of a token or a peer ("uid 1000 (gateway)"). */
#define ROLES_WHO_MAX 96

/* Lifecycle */

/*
 * Reads the token file at path: either one token alone (the whole file,
 * trailing white space removed: role admin, as before roles existed), or lines
 * "ROLE TOKEN [NAME]" with ROLE read, write or admin ('#' starts a comment
 * line).  Returns a new set (owned by the caller, roles_free), or NULL with a
 * message in err naming the file and the line.
 */
struct roles *roles_read_tokens(const char *path, char *err, size_t errlen);
/* An empty set: no tokens, no peer rules. */
struct roles *roles_new(void);
/*
 * Adds the peer rules of spec (borrowed): comma-separated "uid=N:ROLE",
 * "user=NAME:ROLE", "gid=N:ROLE" or "group=NAME:ROLE", names resolved now.
 * Returns 0, or -1 with a message in err (nothing added).
 */
int roles_add_peer_rules(struct roles *r, const char *spec, char *err, size_t errlen);
void roles_free(struct roles *r);

/* Query */

/* Returns the number of tokens, and the first (borrowed; NULL when there is none). */
size_t roles_n_tokens(const struct roles *r);
const char *roles_first_token(const struct roles *r);
/* Returns the role of token (len bytes; compared in constant time), ROLE_NONE when none
 * matches; *who (may be NULL) gets the token's name (borrowed). */
int roles_of_token(const struct roles *r, const char *token, size_t len, const char **who);
/*
 * Returns the role of a Unix peer with uid and groups (n of them; its primary
 * gid among them): the first peer rule that names the uid or one of the
 * groups, else fallback.  uid 0 and worthd's own uid are always admin (they
 * can read the database and the token file).  *rule (may be NULL) gets 1 when a
 * rule decided.
 */
int roles_of_peer(const struct roles *r, uint32_t uid, const uint32_t *groups, size_t n,
                  int fallback, int *rule);
/* The name of a role ("read", ...), and the role of a name, or -1. */
const char *role_name(int role);
int role_parse(const char *name);

#endif /* WORTH_ROLES_H */
