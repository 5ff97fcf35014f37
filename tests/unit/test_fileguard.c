/*
 * test_fileguard.c - daemon/store/fileguard: the verdicts on a database file
 * that is removed, replaced or made read-only under an open descriptor.
 *
 * Works in a fresh directory under $TMPDIR (or /tmp).  The read-only verdict
 * depends on who runs the test: root may write a 0444 file, so as root the
 * test checks that the verdict stays FILEGUARD_OK (the integration test runs
 * worthd as nobody for the other side).  Like SQLite, the tests keep the
 * files open while they remove them: otherwise the file system may give a new
 * file the freed inode number, and a replacement would look like the same file.
 */
#include <errno.h>
#include <fcntl.h>
#include <stdlib.h>
#include <sys/stat.h>
#include <unistd.h>

#include "store/fileguard.h"
#include "testutil.h"

struct dir {
    char path[256], db[300], wal[310];
};

static void touch(const char *path)
{
    int fd = open(path, O_WRONLY | O_CREAT | O_TRUNC, 0644);
    assert_true(fd >= 0);
    assert_int_equal(write(fd, "x", 1), 1);
    close(fd);
}

static int setup(void **state)
{
    struct dir *d = calloc(1, sizeof *d);
    const char *tmp = getenv("TMPDIR");
    snprintf(d->path, sizeof d->path, "%s/worth-fileguard-XXXXXX", tmp && *tmp ? tmp : "/tmp");
    if (!mkdtemp(d->path))
        return -1;
    snprintf(d->db, sizeof d->db, "%s/w.db", d->path);
    snprintf(d->wal, sizeof d->wal, "%s/w.db-wal", d->path);
    *state = d;
    return 0;
}

static int teardown(void **state)
{
    struct dir *d = *state;
    char other[320];
    snprintf(other, sizeof other, "%s/moved.db", d->path);
    unlink(d->db);
    unlink(d->wal);
    unlink(other);
    rmdir(d->path);
    free(d);
    return 0;
}

static int check(fileguard_t *g, char *why)
{
    why[0] = 0;
    return fileguard_check(g, FILEGUARD_ALL, why, 256);
}

static void test_same_file_is_ok(void **state)
{
    struct dir *d = *state;
    fileguard_t g;
    char why[256];
    touch(d->db);
    assert_int_equal(fileguard_init(&g, d->db), 0);
    assert_int_equal(g.have_wal, 0);
    assert_int_equal(check(&g, why), FILEGUARD_OK);
    /* the -wal appears later (SQLite creates it lazily): learnt, still OK */
    touch(d->wal);
    assert_int_equal(check(&g, why), FILEGUARD_OK);
    assert_int_equal(g.have_wal, 1);
    /* rewriting the file in place keeps its identity */
    int fd = open(d->db, O_WRONLY | O_APPEND);
    assert_true(fd >= 0);
    assert_int_equal(write(fd, "y", 1), 1);
    close(fd);
    assert_int_equal(check(&g, why), FILEGUARD_OK);
}

static void test_removed_file(void **state)
{
    struct dir *d = *state;
    fileguard_t g;
    char why[256];
    touch(d->db);
    int fd = open(d->db, O_RDWR);
    assert_true(fd >= 0);
    assert_int_equal(fileguard_init(&g, d->db), 0);
    assert_int_equal(unlink(d->db), 0);
    assert_int_equal(check(&g, why), FILEGUARD_REMOVED);
    assert_non_null(strstr(why, "is gone"));
    /* the mode check alone sees it too */
    assert_int_equal(fileguard_check(&g, FILEGUARD_WRITE, why, sizeof why), FILEGUARD_REMOVED);
    /* a new file at the path is not ours */
    touch(d->db);
    assert_int_equal(check(&g, why), FILEGUARD_REPLACED);
    assert_non_null(strstr(why, "replaced"));
    close(fd);
}

static void test_removed_or_replaced_wal(void **state)
{
    struct dir *d = *state;
    fileguard_t g;
    char why[256];
    touch(d->db);
    touch(d->wal);
    int fd = open(d->wal, O_RDWR);
    assert_true(fd >= 0);
    assert_int_equal(fileguard_init(&g, d->db), 0);
    assert_int_equal(g.have_wal, 1);
    assert_int_equal(unlink(d->wal), 0);
    assert_int_equal(check(&g, why), FILEGUARD_REMOVED);
    assert_non_null(strstr(why, "-wal was removed"));
    touch(d->wal); /* another -wal: the committed frames are in the one that went */
    assert_int_equal(check(&g, why), FILEGUARD_REMOVED);
    assert_non_null(strstr(why, "replaced"));
    close(fd);
}

static void test_moved_away(void **state)
{
    struct dir *d = *state;
    fileguard_t g;
    char why[256], other[320];
    snprintf(other, sizeof other, "%s/moved.db", d->path);
    touch(d->db);
    assert_int_equal(fileguard_init(&g, d->db), 0);
    assert_int_equal(rename(d->db, other), 0);
    assert_int_equal(check(&g, why), FILEGUARD_REMOVED);
    /* and back again: the same file, OK */
    assert_int_equal(rename(other, d->db), 0);
    assert_int_equal(check(&g, why), FILEGUARD_OK);
}

static void test_read_only(void **state)
{
    struct dir *d = *state;
    fileguard_t g;
    char why[256];
    touch(d->db);
    assert_int_equal(fileguard_init(&g, d->db), 0);
    assert_int_equal(chmod(d->db, 0444), 0);
    /* the name check alone does not look at the mode */
    assert_int_equal(fileguard_check(&g, FILEGUARD_NAME, why, sizeof why), FILEGUARD_OK);
    int want = geteuid() == 0 ? FILEGUARD_OK : FILEGUARD_READONLY;
    int got = check(&g, why);
    if (got != want)
        print_error("euid %d: verdict %d (%s), expected %d\n", (int)geteuid(), got, why, want);
    assert_int_equal(got, want);
    if (want == FILEGUARD_READONLY)
        assert_non_null(strstr(why, "not writable"));
    assert_int_equal(chmod(d->db, 0644), 0);
    assert_int_equal(check(&g, why), FILEGUARD_OK);
}

static void test_init_needs_the_file(void **state)
{
    struct dir *d = *state;
    fileguard_t g;
    errno = 0;
    assert_int_equal(fileguard_init(&g, d->db), -1);
    assert_int_equal(errno, ENOENT);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test_setup_teardown(test_same_file_is_ok, setup, teardown),
        cmocka_unit_test_setup_teardown(test_removed_file, setup, teardown),
        cmocka_unit_test_setup_teardown(test_removed_or_replaced_wal, setup, teardown),
        cmocka_unit_test_setup_teardown(test_moved_away, setup, teardown),
        cmocka_unit_test_setup_teardown(test_read_only, setup, teardown),
        cmocka_unit_test_setup_teardown(test_init_needs_the_file, setup, teardown),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
