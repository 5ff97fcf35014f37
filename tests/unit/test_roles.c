/*
 * test_roles.c - daemon/roles: the token file's two forms, its faults (with their
 * lines), tokens compared whole, and the peer rules (first match, groups, root and
 * worthd's own user always admin).
 *
 * Works in a fresh directory under $TMPDIR (or /tmp).
 */
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "roles.h"
#include "testutil.h"

static char dir[256];

static const char *write_file(const char *name, const char *text)
{
    static char path[400];
    snprintf(path, sizeof path, "%s/%s", dir, name);
    FILE *f = fopen(path, "w");
    assert_non_null(f);
    fputs(text, f);
    fclose(f);
    return path;
}

static void legacy_token_is_admin(void **state)
{
    (void)state;
    char err[300];
    struct roles *r = roles_read_tokens(write_file("t1", "s3cret-token \n\n"), err, sizeof err);
    assert_non_null(r);
    assert_int_equal(roles_n_tokens(r), 1);
    assert_string_equal(roles_first_token(r), "s3cret-token");
    const char *who = NULL;
    assert_int_equal(roles_of_token(r, "s3cret-token", 12, &who), ROLE_ADMIN);
    assert_string_equal(who, "the token");
    /* compared whole: a prefix or a longer token is no token */
    assert_int_equal(roles_of_token(r, "s3cret-toke", 11, NULL), ROLE_NONE);
    assert_int_equal(roles_of_token(r, "s3cret-token!", 13, NULL), ROLE_NONE);
    roles_free(r);
}

static void role_lines(void **state)
{
    (void)state;
    char err[300];
    struct roles *r = roles_read_tokens(
        write_file("t2", "# comment\nread  rrrrrrrr1 dash\n\nwrite wwwwwwww2\nadmin aaaaaaaa3 ops\n"),
        err, sizeof err);
    assert_non_null(r);
    assert_int_equal(roles_n_tokens(r), 3);
    const char *who = NULL;
    assert_int_equal(roles_of_token(r, "rrrrrrrr1", 9, &who), ROLE_READ);
    assert_string_equal(who, "token \"dash\"");
    assert_int_equal(roles_of_token(r, "wwwwwwww2", 9, &who), ROLE_WRITE);
    assert_string_equal(who, "token on line 4");
    assert_int_equal(roles_of_token(r, "aaaaaaaa3", 9, &who), ROLE_ADMIN);
    roles_free(r);
}

static void token_file_faults(void **state)
{
    (void)state;
    static const struct {
        const char *text, *needle;
    } cases[] = {
        {"read short\n", ":1: a token must be 8..1000"},
        {"read abcdefgh1\nread abcdefgh1\n", ":2: the same token as token on line 1"},
        {"read abcdefgh1\nboss abcdefgh2\n", ":2: expected \"ROLE TOKEN [NAME]\""},
        {"write abcdefgh1 a b\n", ":1: expected"},
        {"# only a comment\n", "holds no token"},
        {"tiny\n", "must hold a token of 8..1000 bytes"},
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        char err[300] = "";
        assert_null(roles_read_tokens(write_file("bad", cases[i].text), err, sizeof err));
        if (!strstr(err, cases[i].needle))
            fail_msg("case %zu: \"%s\" lacks \"%s\"", i, err, cases[i].needle);
    }
    char err[300] = "";
    assert_null(roles_read_tokens("/nonexistent/tokens", err, sizeof err));
    assert_non_null(strstr(err, "cannot read --token-file"));
}

static void peer_rules(void **state)
{
    (void)state;
    char err[200];
    struct roles *r = roles_new();
    assert_int_equal(roles_add_peer_rules(r, "uid=1001:read, gid=2000:write,uid=1002:admin",
                                          err, sizeof err),
                     0);
    uint32_t g1[] = {100}, g2[] = {100, 2000};
    int rule = 0;
    assert_int_equal(roles_of_peer(r, 1001, g2, 2, ROLE_ADMIN, &rule), ROLE_READ); /* first */
    assert_true(rule);
    assert_int_equal(roles_of_peer(r, 1003, g2, 2, ROLE_ADMIN, &rule), ROLE_WRITE); /* a group */
    assert_int_equal(roles_of_peer(r, 1003, g1, 1, ROLE_READ, &rule), ROLE_READ);  /* fallback */
    assert_false(rule);
    assert_int_equal(roles_of_peer(r, 0, g1, 1, ROLE_READ, NULL), ROLE_ADMIN); /* root */
    assert_int_equal(roles_of_peer(r, (uint32_t)geteuid(), g1, 1, ROLE_READ, NULL), ROLE_ADMIN);
    /* a faulty spec adds nothing */
    assert_int_equal(roles_add_peer_rules(r, "uid=1003:read,uid=x:read", err, sizeof err), -1);
    assert_non_null(strstr(err, "not a number"));
    assert_int_equal(roles_of_peer(r, 1003, g1, 1, ROLE_WRITE, NULL), ROLE_WRITE);
    assert_int_equal(roles_add_peer_rules(r, "uid=5:boss", err, sizeof err), -1);
    assert_int_equal(roles_add_peer_rules(r, "user=no-such-user-here:read", err, sizeof err), -1);
    assert_int_equal(roles_add_peer_rules(r, "group=root:read", err, sizeof err), 0);
    assert_int_equal(roles_of_peer(r, 1003, (uint32_t[]){0}, 1, ROLE_WRITE, NULL), ROLE_READ);
    roles_free(r);
    assert_string_equal(role_name(ROLE_WRITE), "write");
    assert_int_equal(role_parse("admin"), ROLE_ADMIN);
    assert_int_equal(role_parse("none"), -1);
}

int main(void)
{
    const char *tmp = getenv("TMPDIR");
    snprintf(dir, sizeof dir, "%s/worth-roles-XXXXXX", tmp && *tmp ? tmp : "/tmp");
    if (!mkdtemp(dir))
        return 1;
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(legacy_token_is_admin),
        cmocka_unit_test(role_lines),
        cmocka_unit_test(token_file_faults),
        cmocka_unit_test(peer_rules),
    };
    int rc = cmocka_run_group_tests(tests, NULL, NULL);
    const char *names[] = {"t1", "t2", "bad"};
    for (size_t i = 0; i < 3; i++) {
        char p[400];
        snprintf(p, sizeof p, "%s/%s", dir, names[i]);
        unlink(p);
    }
    rmdir(dir);
    return rc;
}
