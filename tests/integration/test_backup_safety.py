"""Backups land only in worthd's backup directory, never over a file worthd did not write;
a stop removes only worthd's own socket.

The contract is schema/protocol.md ("backup", the socket paragraph at the top) and
worthd --help (--backup-dir).  A backup's bytes are chosen by clients, so the
attacks here are the ones a client could try: a target name that is a symbolic link out of the
directory, a file that is not worthd's, a path, a name of worthd's own database or socket.
Every refused target must be left byte for byte as it was.  Ownership checks need root (the
tests run as root here): a file chowned to nobody (65534) stands for another user's.  Each test
starts its own worthd (conftest.daemon) in tmp_path; every wait is bounded in time and count.
"""
import os
import re
import sqlite3
import stat

import pytest

NOBODY = 65534
APP_ID = 1465013320  # "WRTH", schema/002_health.sql
TMP_RE = re.compile(r"^\.worthd-backup-")
AUTO_RE = re.compile(r"^worthd-\d{8}T\d{6}Z(-\d+)?\.db$")
SPEC = {"op": "model.create", "model": "m", "dims": 1, "gamma": 0.9, "ranges": [[0, 1]],
        "features": [{"basis": "bias"}, {"basis": "raw"}],
        "estimators": [{"name": "td", "kind": "td", "alpha": 0.1}]}


def fill(c, n=20, first=1):
    """Creates model m when first == 1, then n acknowledged transitions; returns the last seq."""
    if first == 1:
        c.ok(SPEC)
    batch = [{"x": [((first + i) % 10) / 10], "r": 1.0, "x_next": [0.5]} for i in range(n)]
    rep = c.ok({"op": "observe", "model": "m", "batch": batch})
    assert rep["seq"] == first + n - 1 and rep["durable"] is True, rep
    return rep["seq"]


def rows(path, alone=True):
    """Transitions in a database file: read alone, as a copy is, or (alone=False) with its
    -wal, as worthd's own database."""
    extra = "&immutable=1" if alone else ""
    db = sqlite3.connect(f"file:{path}?mode=ro{extra}", uri=True, timeout=10)
    try:
        assert db.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
        assert db.execute("PRAGMA application_id").fetchone()[0] == APP_ID
        return db.execute("SELECT count(*) FROM transitions").fetchone()[0]
    finally:
        db.close()


def snapshot(path):
    """What a refused target must keep: lstat kind, and the bytes (or the link's target)."""
    st = os.lstat(path)
    if stat.S_ISLNK(st.st_mode):
        return ("link", os.readlink(path))
    with open(path, "rb") as f:
        return ("file", st.st_ino, st.st_uid, stat.S_IMODE(st.st_mode), f.read())


def no_temp(d):
    left = [n for n in os.listdir(d) if TMP_RE.match(n)]
    assert not left, f"temporary files left in {d}: {left}"


def mode(path):
    return stat.S_IMODE(os.lstat(path).st_mode)


def need_root():
    if os.geteuid() != 0:
        pytest.skip("needs root to give a file to another user")


def refused_at_start(daemon, *args, needle):
    d = daemon(*args, ready=False, expect_rc=None)
    rc = d.wait_exit(10)
    assert rc == 1, f"worthd {args}: exit {rc}, expected 1\n{d.tail()}"
    assert needle in d.stderr, d.tail()
    return d


@pytest.fixture
def bk(tmp_path):
    d = tmp_path / "bk"
    d.mkdir(mode=0o700)
    return d


# the socket at stop ---------------------------------------------------------------------------

def test_stop_leaves_a_file_that_replaced_the_socket(daemon):
    d = daemon()
    d.client().assert_open()
    d.close_clients()
    os.unlink(d.sock)
    with open(d.sock, "w") as f:
        f.write("someone else's file\n")
    err = d.shutdown()
    assert os.path.isfile(d.sock), "worthd removed a file that was not its socket"
    with open(d.sock) as f:
        assert f.read() == "someone else's file\n"
    assert "no longer worthd's socket" in err, err[-2000:]
    os.unlink(d.sock)
    # its own socket it does remove
    d = daemon()
    d.shutdown()
    assert not os.path.lexists(d.sock)

