"""Storage faults while worthd runs: its database file removed, replaced or made read-only
under it, and a file system that really runs out of space (ENOSPC, not the --db-max-mb cap).

The contract is schema/protocol.md ("observe: durability", "The database file under a running
worthd" and the error table): nothing is acknowledged as durable unless it is in the file at
the database's path; a removed file (or -wal) is written back there from the open connection
and ingest goes on; a replaced file is never overwritten and every write is refused with
`storage_error` until a restart; a file worthd may no longer write refuses writes with
`storage_error` until it is writable again; a full disk gives `storage_full`, and ingest
resumes when space returns.  Queries go on throughout.

Checks use the helpers of test_faults.py and test_durable.py: every acknowledged transition
must be in the log read back with Python's sqlite3 module (after a kill -9, so nothing but
the files on disk counts), nothing refused may be there, and after a restart the values at
the probe states must equal (==, every estimator) those of a reference daemon fed exactly
the log.  Two tests need root: the read-only one runs worthd as the user nobody (root ignores
file modes), the ENOSPC one mounts a small tmpfs; each skips, saying so, where that is not
possible.  Every loop is bounded in count and time.
"""
import os
import shutil
import subprocess
import tempfile
import threading
import time

import pytest

from conftest import Client, is_closed_error
from test_durable import feed, log_rows, row_to_tr, snapshot
from test_faults import (MODEL, NAMES, Reference, Stream, create_model, log_prefix_check,
                         records, send_request)

NOBODY = 65534


def stream_until(d, stream, stop, out, max_s=20.0):
    """Producer thread body: durable requests from stream on a new connection until stop is
    set (or max_s); out collects the acknowledged transitions, the request in flight and how
    it ended."""
    try:
        p = Client(d.sock, timeout=15)
    except OSError as e:
        out["end"] = ("connect", repr(e))
        return
    deadline = time.monotonic() + max_s
    try:
        for _ in range(100_000):
            if stop.is_set() or time.monotonic() > deadline:
                out["end"] = ("stopped",)
                return
            kind, req, rec, trs = stream.next_request()
            out["pending"] = trs
            try:
                send_request(p, kind, req, rec)
                rep = p.recv()
            except Exception as e:
                out["end"] = ("closed" if is_closed_error(e) else "error", repr(e))
                return
            if rep.get("ok") is not True or rep.get("durable") is not True:
                out["end"] = ("reply", rep)
                return
            out["acked"].extend(trs)
            out["pending"] = []
    finally:
        p.close()


def wait_for(cond, what, timeout=20.0):
    deadline = time.monotonic() + timeout
    for _ in range(int(timeout / 0.005) + 10):
        if cond():
            return
        if time.monotonic() > deadline:
            break
        time.sleep(0.005)
    raise AssertionError(f"timed out waiting for {what}")


@pytest.mark.parametrize("what", ["db", "wal", "db+wal+shm"])
def test_database_removed_under_ingest(daemon, tmp_path, what):
    """The database file (or only its -wal, or all three files) is unlinked while a producer
    streams durable requests.  worthd writes the database back to its path from the open
    connection and goes on; after a kill -9 the file at the path holds every acknowledged
    transition, and a restart learns exactly them."""
    d = daemon("--checkpoint-every", 0)
    c = d.client(timeout=30)
    create_model(c)
    stream = Stream(4100 + len(what))
    out = {"acked": [], "pending": [], "end": None}
    stop = threading.Event()
    t = threading.Thread(target=stream_until, args=(d, stream, stop, out), daemon=True)
    t.start()
    wait_for(lambda: len(out["acked"]) >= 500 or out["end"], "500 acknowledged transitions")
    names = {"db": [""], "wal": ["-wal"], "db+wal+shm": ["", "-wal", "-shm"]}[what]
    before = len(out["acked"])
    for suffix in names:
        os.unlink(d.db + suffix)
    # the producer goes on: at least 500 more acknowledged after the removal
    wait_for(lambda: len(out["acked"]) >= before + 500 or out["end"], "ingest after the removal")
    stop.set()
    t.join(20)
    assert not t.is_alive(), "producer hung"
    assert out["end"] == ("stopped",), f"ingest stopped after the removal: {out['end']}"
    acked = list(out["acked"])
    assert os.path.exists(d.db), f"nothing at {d.db} after the removal"
    c.wait_applied(MODEL, len(acked), timeout=30)
    live = snapshot(c, MODEL)
    d.kill9()
    rows = log_rows(d.db, MODEL)
    logged = log_prefix_check(rows, acked, len(acked), [])
    print(f"{what} removed after {before} acknowledged; {len(acked)} acknowledged in all, "
          f"{len(rows)} in the file at the path after kill -9")
    assert "written back" in d.stderr, f"worthd did not report the write-back:\n{d.tail()}"
    d2 = d.restart()
    c = d2.client(timeout=30)
    assert snapshot(c, MODEL) == live, "values after the restart differ from before the crash"
    assert live == Reference(daemon, tmp_path).feed(logged), "values differ from the reference"


def test_database_replaced_under_worthd(daemon, tmp_path):
    """The database file is moved away and another file put at its path: worthd must not
    write into the moved file as if it were the database, nor overwrite the newcomer.  Every
    write is refused with storage_error (nothing of it applied), queries go on, and the moved
    file holds every transition acknowledged before (worthd checkpoints its log into it)."""
    d = daemon("--checkpoint-every", 0)
    c = d.client(timeout=30)
    create_model(c)
    stream = Stream(4200)
    trs = [stream.one(None, None) for _ in range(600)]
    feed(c, MODEL, trs, batch=100, first=1)
    c.wait_applied(MODEL, 600)
    before = snapshot(c, MODEL)
    moved = str(tmp_path / "moved.db")
    os.rename(d.db, moved)
    with open(d.db, "wb") as f:
        f.write(b"someone else's file\n")
    err = c.err({"op": "observe", "model": MODEL, **stream.one(None, None)}, "storage_error")
    assert "replaced" in err["message"], err
    c.send({"op": "observe.bulk", "model": MODEL, "count": 50})
    c.send_raw(records([stream.one(None, None) for _ in range(50)]))
    c.expect_error(c.recv(), "storage_error")
    c.err({"op": "checkpoint", "model": MODEL}, "storage_error")
    c.err(dict(fault_spec_small("other")), "storage_error")
    # queries go on, from what was learnt before
    st = c.wait_applied(MODEL, timeout=10)
    assert {n: e["updates"] for n, e in st["estimators"].items()} == {n: 600 for n in NAMES}, st
    assert snapshot(c, MODEL) == before, "a refused write moved the values"
    assert d.proc.poll() is None
    d.kill9()
    with open(d.db, "rb") as f:
        assert f.read() == b"someone else's file\n", "worthd wrote into the file at its path"
    rows = log_rows(moved, MODEL)
    assert [row_to_tr(r) for r in rows] == trs, \
        f"the moved file holds {len(rows)} transitions, not the 600 acknowledged"


def fault_spec_small(name):
    return {"op": "model.create", "model": name, "dims": 1, "gamma": 0.9, "ranges": [[0, 1]],
            "features": [{"basis": "bias"}], "estimators": [{"name": "td", "kind": "td"}]}


@pytest.fixture
def nobody_dir():
    """A directory that the user nobody owns, outside pytest's root-only tmp_path."""
    if os.geteuid() != 0:
        pytest.skip("needs root to run worthd as another user (as root, file modes are moot)")
    d = tempfile.mkdtemp(prefix="worth-ro-")
    os.chown(d, NOBODY, NOBODY)
    os.chmod(d, 0o755)
    yield d
    shutil.rmtree(d, ignore_errors=True)


def test_database_made_read_only(daemon, tmp_path, nobody_dir):
    """worthd runs as nobody; its database file is chmod 0444 while it runs.  Its open
    descriptor could still write, but the operator said no: every write is refused with
    storage_error, queries go on, nothing refused is logged; chmod 0644 again and ingest
    resumes.  After a kill -9 the log holds exactly the acknowledged transitions."""
    db = os.path.join(nobody_dir, "worthd.db")
    d = daemon("--checkpoint-every", 0, sock=os.path.join(nobody_dir, "w.sock"), db=db,
               user=NOBODY)
    c = d.client(timeout=30)
    create_model(c)
    assert os.stat(db).st_uid == NOBODY
    stream = Stream(4300)
    acked = [stream.one(None, None) for _ in range(300)]
    feed(c, MODEL, acked, batch=50, first=1)
    c.wait_applied(MODEL, 300)
    before = snapshot(c, MODEL)
    os.chmod(db, 0o444)
    err = c.err({"op": "observe", "model": MODEL, **stream.one("pump-2", None)}, "storage_error")
    assert "not writable" in err["message"], err
    c.err({"op": "observe", "model": MODEL, "batch": [stream.one(None, 30.0)
                                                      for _ in range(20)]}, "storage_error")
    c.send({"op": "observe.bulk", "model": MODEL, "count": 40})
    c.send_raw(records([stream.one(None, None) for _ in range(40)]))
    c.expect_error(c.recv(), "storage_error")
    c.err({"op": "checkpoint", "model": MODEL}, "storage_error")
    st = c.wait_applied(MODEL, timeout=10)
    assert {n: e["updates"] for n, e in st["estimators"].items()} == {n: 300 for n in NAMES}, st
    assert snapshot(c, MODEL) == before, "a refused write moved the values"
    assert "not writable" in d.stderr, d.tail()
    # writable again: ingest resumes
    os.chmod(db, 0o644)
    more = [stream.one(None, None) for _ in range(100)]
    rep = c.ok({"op": "observe", "model": MODEL, "batch": more})
    assert rep["durable"] is True and rep["count"] == 100, rep
    acked += more
    c.wait_applied(MODEL, rep["seq"])
    live = snapshot(c, MODEL)
    assert "writable again" in d.stderr, d.tail()
    d.kill9()
    assert [row_to_tr(r) for r in log_rows(db, MODEL)] == acked, \
        "the log is not exactly the acknowledged transitions"
    c = d.restart().client(timeout=30)
    assert snapshot(c, MODEL) == live
    assert live == Reference(daemon, tmp_path).feed(acked)


@pytest.fixture
def small_fs():
    """A 6 MiB tmpfs mounted on a new directory (root with CAP_SYS_ADMIN), with a 'ballast'
    file that leaves about 1.5 MiB free; unmounted at teardown."""
    if os.geteuid() != 0:
        pytest.skip("needs root to mount a small tmpfs (the --db-max-mb tests cover the cap)")
    mnt = tempfile.mkdtemp(prefix="worth-enospc-")
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=6m,mode=0755", "tmpfs", mnt],
                       capture_output=True, text=True, timeout=30)
    if r.returncode != 0:
        os.rmdir(mnt)
        pytest.skip(f"cannot mount a tmpfs here ({r.stderr.strip()}); the --db-max-mb tests "
                    f"stand in for a full disk")
    try:
        with open(os.path.join(mnt, "ballast"), "wb") as f:
            f.write(b"\0" * (int(4.5 * 1024 * 1024)))
        yield mnt
    finally:
        for _ in range(50):
            if subprocess.run(["umount", mnt], capture_output=True, timeout=30).returncode == 0:
                break
            time.sleep(0.1)
        else:
            subprocess.run(["umount", "-l", mnt], capture_output=True, timeout=30)
        os.rmdir(mnt)


def test_disk_really_full(daemon, tmp_path, small_fs):
    """The database on a tmpfs that runs out of space (write(2) fails with ENOSPC): bulk
    frames until one is refused with storage_full; worthd stays up, answers queries, refuses
    further ingest the same way; once the ballast is removed, ingest resumes.  After a kill -9
    the log holds exactly the acknowledged transitions, and a restart learns them."""
    db = os.path.join(small_fs, "worthd.db")
    d = daemon("--checkpoint-every", 0, db=db)
    c = d.client(timeout=30)
    create_model(c)
    stream = Stream(4400)
    acked, refused = [], None
    for k in range(200):  # 1.5 MiB holds some 20000 transitions of D = 2, log and WAL
        trs = [stream.one(None, None) for _ in range(500)]
        send_request(c, "bulk", {"op": "observe.bulk", "model": MODEL, "count": 500},
                     records(trs))
        rep = c.recv(30)
        if rep.get("ok") is True:
            assert rep == {"ok": True, "seq": len(acked) + 500, "count": 500,
                           "durable": True}, rep
            acked += trs
            continue
        refused = rep
        break
    assert refused is not None, f"no refusal after {len(acked)} transitions"
    c.expect_error(refused, "storage_full")
    assert len(acked) >= 1000, f"refused after only {len(acked)} transitions"
    print(f"ENOSPC after {len(acked)} acknowledged transitions: {refused}")
    assert d.proc.poll() is None, "worthd exited on a full disk"
    c.assert_open()
    st = c.wait_applied(MODEL, timeout=10)
    assert {n: e["updates"] for n, e in st["estimators"].items()} == \
        {n: len(acked) for n in NAMES}, st
    full = snapshot(c, MODEL)
    # still full: refused the same way
    c.err({"op": "observe", "model": MODEL,
           "batch": [stream.one(None, None) for _ in range(2000)]}, "storage_full")
    assert snapshot(c, MODEL) == full
    # space returns: ingest resumes
    os.unlink(os.path.join(small_fs, "ballast"))
    more = [stream.one(None, None) for _ in range(1000)]
    feed(c, MODEL, more, batch=250)
    acked += more
    st = c.wait_applied(MODEL, timeout=30)
    assert {n: e["updates"] for n, e in st["estimators"].items()} == \
        {n: len(acked) for n in NAMES}, st
    live = snapshot(c, MODEL)
    d.kill9()
    assert [row_to_tr(r) for r in log_rows(db, MODEL)] == acked, \
        "the log is not exactly the acknowledged transitions"
    d2 = d.restart()
    c = d2.client(timeout=30)
    assert snapshot(c, MODEL) == live
    assert live == Reference(daemon, tmp_path).feed(acked)
    d2.shutdown()


def test_read_only_remount_refused_while_worthd_writes(daemon, small_fs):
    """The other meaning of "made read-only": a remount of the file system.  Linux refuses it
    (EBUSY, "mount point is busy") while worthd holds its database open for writing, so
    worthd goes on; this is why the read-only test above changes the file's mode."""
    db = os.path.join(small_fs, "worthd.db")
    d = daemon(db=db)
    c = d.client()
    create_model(c)
    stream = Stream(4500)
    feed(c, MODEL, [stream.one(None, None) for _ in range(100)], batch=50, first=1)
    r = subprocess.run(["mount", "-o", "remount,ro", small_fs], capture_output=True, text=True,
                       timeout=30)
    print(f"remount,ro while worthd runs: exit {r.returncode}: {r.stderr.strip()}")
    assert r.returncode != 0, "the file system was remounted read-only under worthd"
    assert "busy" in r.stderr, r.stderr
    feed(c, MODEL, [stream.one(None, None) for _ in range(100)], batch=50, first=101)
    d.shutdown()
