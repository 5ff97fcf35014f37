"""Backups land only in worthd's backup directory, never over a file worthd did not write;
worthd's files get mode 0600 (or 0640); a stop removes only worthd's own socket.

The contract is schema/protocol.md ("backup", "File modes", the socket paragraph at the top)
and worthd --help (--backup-dir, --file-mode).  A backup's bytes are chosen by clients, so the
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
import logdb

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
        return logdb.count(db)
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


# the request ----------------------------------------------------------------------------------

def test_named_and_automatic_backups(daemon, bk):
    d = daemon("--backup-dir", bk)
    c = d.client()
    fill(c)
    real = os.path.realpath(bk)
    rep = c.call({"op": "backup", "name": "nightly.db", "id": 9}, timeout=30)
    path = os.path.join(real, "nightly.db")
    assert rep == {"ok": True, "id": 9, "name": "nightly.db", "path": path,
                   "bytes": os.path.getsize(path)}, rep
    assert rows(path) == 20
    # worthd's own names: unique, never replacing one another, even within one second
    names = set()
    for _ in range(3):
        rep = c.ok({"op": "backup"}, timeout=30)
        assert AUTO_RE.match(rep["name"]), rep
        assert rep["path"] == os.path.join(real, rep["name"]), rep
        assert rep["bytes"] == os.path.getsize(rep["path"]), rep
        names.add(rep["name"])
    assert len(names) == 3, names
    assert sorted(os.listdir(bk)) == sorted(names | {"nightly.db"})
    no_temp(bk)


def test_previous_worthd_backup_is_replaced(daemon, bk):
    d = daemon("--backup-dir", bk)
    c = d.client()
    fill(c)
    p = bk / "n.db"
    c.ok({"op": "backup", "name": "n.db"}, timeout=30)
    ino = os.stat(p).st_ino
    assert rows(p) == 20
    fill(c, 5, first=21)
    c.ok({"op": "backup", "name": "n.db"}, timeout=30)
    assert rows(p) == 25 and os.stat(p).st_ino != ino  # a new file renamed over the old
    assert os.listdir(bk) == ["n.db"]


def test_symlink_target_refused(daemon, bk, tmp_path):
    d = daemon("--backup-dir", bk)
    c = d.client()
    fill(c)
    outside = tmp_path / "authorized_keys"
    outside.write_bytes(b"ssh-ed25519 AAAA... admin\n")
    os.chmod(outside, 0o600)
    os.symlink(outside, bk / "evil.db")
    os.symlink(tmp_path / "not-there", bk / "dangling.db")
    before = snapshot(outside)
    for name in ("evil.db", "dangling.db"):
        err = c.err({"op": "backup", "name": name}, "bad_param", timeout=30)
        assert "not a backup worthd wrote" in err["message"], err
        assert "symbolic link" in err["message"], err
    assert snapshot(outside) == before, "the file behind the link changed"
    assert os.readlink(bk / "evil.db") == str(outside)
    assert not os.path.lexists(tmp_path / "not-there"), "a backup went through the link"
    no_temp(bk)
    c.assert_open()


def test_foreign_files_refused(daemon, bk):
    d = daemon("--backup-dir", bk)
    c = d.client()
    fill(c)
    (bk / "notes.db").write_bytes(b"not a database at all\n" * 10)
    other = sqlite3.connect(bk / "other.db")  # another program's SQLite file: no WRTH
    other.execute("CREATE TABLE t(x)")
    other.commit()
    other.close()
    (bk / "dir.db").mkdir()
    # a real worthd backup, but with a second name: replacing one would change the other
    c.ok({"op": "backup", "name": "linked.db"}, timeout=30)
    os.link(bk / "linked.db", bk / "alias.db")
    cases = {"notes.db": "not a worthd database", "other.db": "not a worthd database",
             "dir.db": "not a regular file", "linked.db": "2 links"}
    if os.geteuid() == 0:  # a worthd backup of another user's
        c.ok({"op": "backup", "name": "theirs.db"}, timeout=30)
        os.chown(bk / "theirs.db", NOBODY, NOBODY)
        cases["theirs.db"] = f"belongs to user {NOBODY}"
    before = {n: snapshot(bk / n) for n in cases if n != "dir.db"}
    for name, why in cases.items():
        err = c.err({"op": "backup", "name": name}, "bad_param", timeout=30)
        msg = err["message"]
        assert "exists and is not a backup worthd wrote" in msg and "refusing" in msg, err
        assert why in msg, err
    assert {n: snapshot(bk / n) for n in before} == before, "a refused file changed"
    assert os.listdir(bk / "dir.db") == []
    no_temp(bk)


def test_bad_names_and_fields(daemon, bk, tmp_path):
    d = daemon("--backup-dir", bk)
    c = d.client()
    fill(c)
    for name in ("a/b.db", "../x.db", "..", ".", ".hidden.db", "x" * 129, "", "sp ace.db",
                 "caf\u00e9.db", "/etc/passwd", "a\\b"):
        c.err({"op": "backup", "name": name}, "bad_param", timeout=30)
    c.err({"op": "backup", "name": 5}, "bad_request")
    c.err({"op": "backup", "name": None}, "bad_request")
    err = c.err({"op": "backup", "path": str(tmp_path / "x.db")}, "bad_param")
    assert "--backup-dir" in err["message"] and "name" in err["message"], err
    c.err({"op": "backup", "path": str(tmp_path / "x.db"), "name": "x.db"}, "bad_param")
    err = c.err({"op": "backup", "nmae": "x.db"}, "bad_request")
    assert "nmae" in err["message"], err
    assert not os.path.exists(tmp_path / "x.db")
    assert os.listdir(bk) == []
    rep = c.ok({"op": "backup", "name": "A-z_0.9" + "x" * 121}, timeout=30)  # 128 bytes
    assert len(rep["name"]) == 128
    assert os.listdir(bk) == [rep["name"]]


def test_own_files_refused(daemon, tmp_path, sockdir):
    # the backup directory is the database's own: its names must not be written
    d = daemon("--backup-dir", tmp_path)
    c = d.client()
    fill(c)
    c.ok({"op": "checkpoint", "model": "m"})
    base = os.path.basename(d.db)
    names = [base + s for s in ("", "-wal", "-shm", "-journal", ".lock")]
    before = {n: snapshot(tmp_path / n) for n in names if os.path.exists(tmp_path / n)}
    assert base in before and base + ".lock" in before, before
    for name in names:
        err = c.err({"op": "backup", "name": name}, "bad_param", timeout=30)
        assert "worthd's own" in err["message"], err
    assert {n: snapshot(tmp_path / n)[0] for n in before} == {n: "file" for n in before}
    assert not os.path.exists(tmp_path / (base + "-journal"))
    # a hard link to the database under another name: the same file (and two links)
    os.link(d.db, tmp_path / "alias.db")
    c.err({"op": "backup", "name": "alias.db"}, "bad_param", timeout=30)
    os.unlink(tmp_path / "alias.db")
    no_temp(tmp_path)
    fill(c, 5, first=21)
    d.kill9()
    assert rows(d.db, alone=False) == 25, "the database lost acknowledged transitions"
    # the socket's directory as backup directory: the socket's name is refused
    d2 = daemon("--backup-dir", sockdir, db=tmp_path / "two.db")
    c2 = d2.client()
    err = c2.err({"op": "backup", "name": os.path.basename(d2.sock)}, "bad_param", timeout=30)
    assert "socket" in err["message"], err
    assert stat.S_ISSOCK(os.lstat(d2.sock).st_mode)
    c2.assert_open()


# the directory --------------------------------------------------------------------------------

def test_default_backup_dir(daemon, tmp_path):
    home = tmp_path / "home"
    home.mkdir()
    d = daemon(db=home / "w.db")
    c = d.client()
    fill(c)
    bdir = home / "backups"
    assert bdir.is_dir() and mode(bdir) == 0o700, oct(mode(bdir))
    rep = c.ok({"op": "backup"}, timeout=30)
    assert rep["path"] == os.path.join(os.path.realpath(bdir), rep["name"]), rep
    assert rows(rep["path"]) == 20


def test_state_directory(daemon, tmp_path, monkeypatch):
    state = tmp_path / "state"
    state.mkdir()
    other = tmp_path / "state2"
    other.mkdir()
    monkeypatch.setenv("STATE_DIRECTORY", f"{state}:{other}")  # several: the first
    d = daemon()
    c = d.client()
    fill(c)
    rep = c.ok({"op": "backup", "name": "s.db"}, timeout=30)
    assert rep["path"] == os.path.join(os.path.realpath(state), "backups", "s.db"), rep
    assert mode(state / "backups") == 0o700
    assert not os.path.exists(tmp_path / "backups") and os.listdir(other) == []
    # --backup-dir wins over it
    d.shutdown()
    bk = tmp_path / "mine"
    d = daemon("--backup-dir", bk)
    assert d.client().ok({"op": "backup", "name": "s.db"}, timeout=30)["path"] == \
        os.path.join(os.path.realpath(bk), "s.db")


def test_unsafe_backup_dirs_refused_at_start(daemon, tmp_path):
    real = tmp_path / "real"
    real.mkdir()
    os.symlink(real, tmp_path / "link")
    refused_at_start(daemon, "--backup-dir", tmp_path / "link", needle="symbolic link")
    (tmp_path / "file").write_text("x")
    refused_at_start(daemon, "--backup-dir", tmp_path / "file", needle="not a directory")
    refused_at_start(daemon, "--backup-dir", tmp_path / "no" / "such",
                     needle="parent must exist")
    open_dir = tmp_path / "open"
    open_dir.mkdir()
    os.chmod(open_dir, 0o777)
    refused_at_start(daemon, "--backup-dir", open_dir, needle="sticky")
    if os.geteuid() == 0:
        theirs = tmp_path / "theirs"
        theirs.mkdir()
        os.chown(theirs, NOBODY, NOBODY)
        refused_at_start(daemon, "--backup-dir", theirs, needle=f"belongs to user {NOBODY}")
        assert os.listdir(theirs) == []
    assert not os.path.exists(tmp_path / "worthd.db"), "the database was opened regardless"
    # with the sticky bit (like /tmp) it is accepted
    os.chmod(open_dir, 0o1777)
    d = daemon("--backup-dir", open_dir)
    fill(d.client())
    assert d.client().ok({"op": "backup", "name": "ok.db"}, timeout=30)["bytes"] > 0


def test_leftover_temp_files_removed_at_start(daemon, bk, tmp_path):
    dead = 2 ** 22 + 7  # above Linux's largest pid_max: no process has it
    leftovers = [f".worthd-backup-{dead}-1.tmp", f".worthd-backup-{dead}-1.tmp-journal",
                 f".worthd-backup-{dead}-2.tmp"]
    for n in leftovers:
        (bk / n).write_bytes(b"half a backup")
    keep = {"x.db.rescue-123": b"rescued data", ".worthd-backup-notes": b"not ours",
            f".worthd-backup-{os.getpid()}-1.tmp": b"a running process's",  # its pid is alive
            "worthd-20261203T061500Z.db": b"a finished backup"}
    for n, data in keep.items():
        (bk / n).write_bytes(data)
    outside = tmp_path / "target"
    outside.write_bytes(b"keep me")
    os.symlink(outside, bk / f".worthd-backup-{dead}-3.tmp")
    if os.geteuid() == 0:
        theirs = f".worthd-backup-{dead}-4.tmp"
        (bk / theirs).write_bytes(b"another user's")
        os.chown(bk / theirs, NOBODY, NOBODY)
        keep[theirs] = b"another user's"
    d = daemon("--backup-dir", bk)
    for n in leftovers:
        assert not os.path.lexists(bk / n), f"{n} was not removed"
        assert f"removed {os.path.realpath(bk)}/{n}" in d.stderr, d.tail()
    for n, data in keep.items():
        assert (bk / n).read_bytes() == data, f"{n} was touched"
    assert os.path.islink(bk / f".worthd-backup-{dead}-3.tmp")
    assert outside.read_bytes() == b"keep me"
    d.client().assert_open()


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


# file modes -----------------------------------------------------------------------------------

@pytest.fixture
def umask022():
    old = os.umask(0o022)  # worthd inherits it: files would be 0644 without worthd's own
    yield
    os.umask(old)


@pytest.mark.parametrize("file_mode", [None, "0640"])
def test_file_modes(daemon, tmp_path, umask022, file_mode):
    want = 0o640 if file_mode else 0o600
    args = ["--file-mode", file_mode] if file_mode else []
    d = daemon(*args)
    c = d.client()
    fill(c)
    rep = c.ok({"op": "backup", "name": "b.db"}, timeout=30)
    db = d.db
    got = {n: mode(db + n) for n in ("", "-wal", "-shm", ".lock")}
    assert got == {"": want, "-wal": want, "-shm": want, ".lock": 0o600}, \
        {k: oct(v) for k, v in got.items()}
    assert mode(rep["path"]) == want, oct(mode(rep["path"]))
    assert mode(tmp_path / "backups") == (0o750 if file_mode else 0o700)
    assert stat.S_IMODE(os.stat(d.sock).st_mode) == 0o660, "the socket lost its 0660"


@pytest.mark.parametrize("bad", ["0644", "0666", "644", "0", "0600x", "rw"])
def test_file_mode_other_values_refused(daemon, tmp_path, bad):
    d = daemon("--file-mode", bad, ready=False, expect_rc=None)
    assert d.wait_exit(10) == 2, d.tail()
    assert "--file-mode must be 0600 or 0640" in d.stderr, d.tail()
    assert not os.path.exists(tmp_path / "worthd.db")


@pytest.mark.parametrize("file_mode,loose,want", [(None, 0o644, 0o600), ("0640", 0o666, 0o640),
                                                  (None, 0o440, 0o400)])
def test_existing_loose_database_tightened(daemon, tmp_path, umask022, file_mode, loose, want):
    if loose == 0o440 and os.geteuid() != 0:
        pytest.skip("a database of mode 0400 is writable by root only")
    d = daemon()
    fill(d.client())
    d.shutdown()
    os.chmod(d.db, loose)
    args = ["--file-mode", file_mode] if file_mode else []
    d = daemon(*args)
    c = d.client()
    assert c.stats("m")["received"] == 20
    assert mode(d.db) == want, oct(mode(d.db))  # bits removed, none added
    assert f"had mode {loose:04o}" in d.stderr, d.tail()
    fill(c, 1, first=21)
    assert mode(d.db + "-wal") == want and mode(d.db + "-shm") == want
