"""Faults: kill -9 at random moments of an ingest, a full database, unusable database files,
and a damaged checkpoint.

The contract is schema/protocol.md ("observe: durability", "checkpoint", "rollback",
"Restart" and the error table), schema/001_init.sql and worthd's options: `--db-max-mb N`
caps the database (SQLite's max_page_count); when it is full a commit fails, the requests
waiting for it get `storage_full` and nothing of them is applied, while queries go on.  A
corrupt or foreign database file makes worthd refuse to start: exit status 1, a line on
stderr with `bad_database`, the file left as it was.

Helpers and fixtures come from conftest.py and test_durable.py.  "Bit-identical" means the
values worthd answers, as parsed JSON numbers, compared with == for every estimator at a few
probe states, against a reference daemon (its own database) fed exactly the transitions that
should have been learnt, in seq order.  Every loop is bounded in count and time, and every
random choice comes from a seeded generator.
"""
import os
import re
import signal
import sqlite3

import numpy as np
import pytest

import logdb
from test_durable import (PROBES, SCHEMA_VERSION, assert_learnt, feed, log_rows, ro, row_to_tr,
                          snapshot, spec)

MODEL = "f"
NAMES = ["td", "tdl", "rls", "lstd", "rp"]


def fault_spec(name=MODEL):
    """test_durable's spec() (12 features; td, td_lambda, rls_td, lstd, replay), with a
    shorter RLS-TD memory (forget 0.99), LSTD refits every 40 and a larger replay buffer, whose
    buffer, generator and background steps make any divergence show."""
    sp = spec(name)
    est = {e["name"]: e for e in sp["estimators"]}
    est["rls"].update({"lambda": 0.3, "forget": 0.99})
    est["lstd"]["refit_every"] = 40
    est["rp"].update({"capacity": 128, "steps_per_obs": 1, "seed": 11})
    return sp


def create_model(c, name=MODEL):
    assert c.call(fault_spec(name)) == {"ok": True, "model": name, "features": 12}


class Stream:
    """A seeded stream of requests (single observes, batches, bulk frames) for fault_spec().

    next_request() returns (kind, request, records or None, transitions): the request dict
    (the bulk header for a bulk), the binary records of a bulk, and the transitions as they
    must appear in the log (row_to_tr form).  one() makes a single transition."""

    def __init__(self, seed, bulk_max=300, batch_max=40):
        self.rng = np.random.default_rng(seed)
        self.bulk_max, self.batch_max = bulk_max, batch_max

    def one(self, source, dt):
        rng = self.rng
        x = rng.uniform([0, -5], [10, 5]).tolist()
        tr = {"x": x, "r": float(rng.normal())}
        if rng.random() < 0.08:
            tr["terminal"] = True
        else:
            tr["x_next"] = rng.uniform([0, -5], [10, 5]).tolist()
        if source:
            tr["source"] = source
        if dt is not None:
            tr["dt"] = dt
        return tr

    def next_request(self):
        rng = self.rng
        u = rng.random()
        if u < 0.5:  # a bulk frame; header source and dt apply to every record
            n = int(rng.integers(1, self.bulk_max + 1))
            source = "pump-2" if rng.random() < 0.3 else None
            dt = 30.0 if rng.random() < 0.3 else None
            trs = [self.one(source, dt) for _ in range(n)]
            head = {"op": "observe.bulk", "model": MODEL, "count": n}
            if source:
                head["source"] = source
            if dt is not None:
                head["dt"] = dt
            return "bulk", head, records(trs), trs
        trs = []
        n = 1 if u < 0.7 else int(rng.integers(2, self.batch_max + 1))
        for _ in range(n):
            trs.append(self.one("pump-2" if rng.random() < 0.3 else None,
                                 30.0 if rng.random() < 0.2 else None))
        if n == 1:
            return "observe", {"op": "observe", "model": MODEL, **trs[0]}, None, trs
        return "batch", {"op": "observe", "model": MODEL, "batch": trs}, None, trs


def send_request(c, kind, req, rec):
    c.send(req)
    if kind == "bulk":
        c.send_raw(rec)


def log_prefix_check(rows, sent, acked, pending):
    """The log after a crash: seqs 1..n without gaps, nothing rolled back, every acknowledged
    transition present and as sent, and the request in flight entirely or not at all."""
    seqs = [r["seq"] for r in rows]
    assert seqs == list(range(1, len(seqs) + 1)), f"gaps in the log: {seqs[:5]}..{seqs[-5:]}"
    assert all(r["rolled_back"] == 0 for r in rows)
    assert len(rows) in (acked, acked + len(pending)), \
        f"log has {len(rows)} rows; acknowledged {acked}, in flight {len(pending)}"
    logged = [row_to_tr(r) for r in rows]
    assert logged[:acked] == sent[:acked], "the log differs from the acknowledged transitions"
    assert logged[acked:] == pending[:len(logged) - acked], "the in-flight request, altered"
    return logged


class Reference:
    """A worthd that is never interrupted, on its own database: fed the same transitions in
    seq order, incrementally."""

    def __init__(self, daemon, tmp_path, name="ref"):
        self.d = daemon("--sync", "normal", "--checkpoint-every", 0,
                        db=tmp_path / f"{name}.db")
        self.c = self.d.client(timeout=30)
        create_model(self.c)
        self.n = 0

    def feed(self, trs):
        if len(trs) > self.n:
            assert feed(self.c, MODEL, trs[self.n:], batch=500, first=self.n + 1) == len(trs)
            self.n = len(trs)
        st = self.c.wait_applied(MODEL, self.n, timeout=30)
        assert st["received"] == self.n, st
        return snapshot(self.c, MODEL)


# 1. kill -9 at random moments of an ingest -------------------------------------------------

CRASH_SEED = 20261201
KILL9_TRIALS = 8  # tests/reliability/kill9.py runs 100 of the same trials


def test_kill9_at_random_moments(daemon, tmp_path):
    """8 kill -9 trials on one database (crashtrials.py says what one trial checks): three
    connections stream durable observes, batches and bulk frames, one lock-step and two
    pipelined; worthd is killed at a seeded moment (or while it starts); after each restart
    every acknowledged transition is in the log, requests in flight are logged whole or not
    at all, and the recovered values and checkpointed state equal, bit for bit, those of a
    reference worthd that learnt the log's transitions uninterrupted."""
    import crashtrials  # (it imports this module's helpers)

    def start(*args, db, ready=True):
        return daemon(*args, db=db, ready=ready)

    fig = crashtrials.run_trials(start, tmp_path, KILL9_TRIALS, CRASH_SEED)
    print(crashtrials.summary(fig))
    assert fig["losses"] == 0
    # the premises: the crashes hit a real ingest, of every kind of request
    assert fig["acked"] >= 50 * KILL9_TRIALS, fig
    assert fig["kinds"] == ["batch", "bulk", "observe"], fig
    assert fig["compared"] == KILL9_TRIALS - fig["startup_kills"] + 1, fig
    assert fig["from_checkpoint"] >= (fig["compared"] - 1) // 2, fig


# 2. a full database ---------------------------------------------------------------------------

def records(trs):
    """observe.bulk records (x, r, x_next, terminal; x_next = x when terminal) of trs."""
    return np.array([tr["x"] + [tr["r"]] + tr.get("x_next", tr["x"]) +
                     [1.0 if tr.get("terminal") else 0.0] for tr in trs], "<f8").tobytes()


@pytest.mark.parametrize("frames", ["small", "group", "growing"])
def test_storage_full(daemon, tmp_path, frames):
    """1 MiB holds some 15000 logged transitions of D = 2.  Bulk frames until one is refused:
    small: 500 records each (the database is then nearly full); group: 4000 records each, one
    commit of the writer's (at most 4096 records) per frame, the refused one leaving room for
    checkpoints; growing: 700, 1400, 2800, ... records, frames that span several commits."""
    d = daemon("--db-max-mb", 1)
    c = d.client(timeout=30)
    create_model(c)
    stream = Stream(777)
    sent = []
    failed = None
    for k in range({"small": 100, "group": 20, "growing": 12}[frames]):
        n = {"small": 500, "group": 4000, "growing": min(700 << k, 65536)}[frames]
        source = "pump-2" if k % 2 == 0 else None
        trs = [stream.one(source, None) for _ in range(n)]
        head = {"op": "observe.bulk", "model": MODEL, "count": n, "id": k}
        if source:
            head["source"] = source
        send_request(c, "bulk", head, records(trs))
        rep = c.recv(30)
        if rep.get("ok") is True:
            assert rep == {"ok": True, "id": k, "seq": len(sent) + n, "count": n,
                           "durable": True}, rep
            sent.extend(trs)
            continue
        assert rep.get("id") == k, rep
        c.expect_error(rep, "storage_full")
        failed = trs
        break
    assert failed is not None, f"no storage_full after {len(sent)} transitions in 1 MiB"
    assert len(sent) >= 1000, f"storage_full after only {len(sent)} transitions"
    acked = len(sent)
    print(f"storage_full after {acked} acknowledged transitions, refused {len(failed)}")
    # worthd is still up and answers queries
    assert d.proc.poll() is None, "worthd exited when the database filled up"
    c.assert_open()

    def learnt(st):
        return {name: e["updates"] for name, e in st["estimators"].items()}

    # Nothing of the refused bulk is learnt.  Its seqs were handed out when it was accepted:
    # received may count them (a seq is never reused) or not, and applied catches up with
    # received either way; the estimators' updates count the acknowledged transitions only.
    st = c.wait_applied(MODEL, timeout=10)
    seen = st["received"]
    assert seen in (acked, acked + len(failed)), (st, acked)
    assert (st["applied"], st["queue"]) == (seen, 0), st
    assert learnt(st) == {name: acked for name in NAMES}, f"the refused bulk was learnt: {st}"
    models = c.ok({"op": "model.list"})["models"]
    assert [(m["model"], m["applied"]) for m in models] == [(MODEL, seen)], models
    rep = c.ok({"op": "value", "model": MODEL, "x": PROBES[0]})
    assert rep["seq"] == seen, rep
    full = snapshot(c, MODEL)
    assert_learnt(full, NAMES)
    # another client sees the same; a further bulk is refused the same way (nothing applied)
    c2 = d.client(timeout=30)
    assert snapshot(c2, MODEL) == full
    # (small, group: one commit, larger than the frame refused; growing: several commits)
    big = 60000 if frames == "growing" else 4096
    c2.send({"op": "observe.bulk", "model": MODEL, "count": big})
    c2.send_raw(records([stream.one(None, None) for _ in range(big)]))
    c2.expect_error(c2.recv(30), "storage_full")
    c2.assert_open()
    st = c.wait_applied(MODEL, timeout=10)
    assert st["received"] in (seen, seen + big), (st, seen)
    seen = st["received"]
    assert learnt(st) == {name: acked for name in NAMES}, f"a refused bulk was learnt: {st}"
    assert snapshot(c, MODEL) == full, "a refused bulk moved the weights"
    # the values are those of a daemon fed only the acknowledged transitions
    ref = Reference(daemon, tmp_path)
    assert ref.feed(sent) == full, "values differ from a daemon fed the acknowledged ones"
    # a checkpoint: stored (there is room left), or refused the same way
    rep = c.call({"op": "checkpoint", "model": MODEL, "label": "full"}, timeout=30)
    if rep.get("ok") is True:
        assert rep["seq"] == seen, (rep, seen)
    else:
        c.expect_error(rep, "storage_full")
    print(f"checkpoint on the full database: {rep}")
    c.assert_open()
    d.close_clients()
    d.stop(signal.SIGTERM)
    print(f"worthd stopped on a full database: exit {d.proc.returncode}; stderr tail:\n"
          f"{d.tail(6)}")
    assert d.proc.returncode == 0, f"SIGTERM on a full database: exit {d.proc.returncode}\n" \
        f"{d.tail()}"
    rows = log_rows(d.db, MODEL)
    assert [row_to_tr(r) for r in rows] == sent, \
        f"the log ({len(rows)} rows) is not exactly the {acked} acknowledged transitions"
    # a larger cap: the same database recovers and ingest resumes
    d2 = daemon("--db-max-mb", 64, "--checkpoint-every", 0)
    assert d2.db == d.db
    c = d2.client(timeout=30)
    st = c.stats(MODEL)
    assert st["received"] == st["applied"] and learnt(st) == {n: acked for n in NAMES}, st
    assert snapshot(c, MODEL) == full, "values changed across the restart after storage_full"
    more = [stream.one(None, None) for _ in range(1000)]
    last = feed(c, MODEL, more, batch=100)
    first_new = last - len(more) + 1
    c.wait_applied(MODEL, last)
    live = snapshot(c, MODEL)
    assert live == ref.feed(sent + more), "ingest after storage_full: values differ"
    # a crash now: recovery learns every acknowledged transition again, in order
    d2.kill9()
    rows = log_rows(d.db, MODEL)
    assert [row_to_tr(r) for r in rows] == sent + more, "acknowledged transitions missing"
    seqs = [r["seq"] for r in rows]
    assert seqs == sorted(set(seqs)), "the log's seqs are not increasing"
    d3 = d2.restart()
    c = d3.client(timeout=30)
    st = c.stats(MODEL)
    got = snapshot(c, MODEL)
    assert learnt(st) == {n: acked + len(more) for n in NAMES} and got == live, \
        f"after storage_full, a restart and kill -9, recovery lost acknowledged transitions " \
        f"(seqs {first_new}..{last}, the daemon had reported received={seen} before the " \
        f"restart): stats {learnt(st)}, expected {acked + len(more)} updates each;\n" \
        f"{d3.tail(4)}"
    # An acknowledged seq is never reused; seqs of refused transitions are given out again
    # after a restart only when no checkpoint recorded them (protocol.md, "stats").
    last_logged = max(r["seq"] for r in log_rows(d3.db, MODEL) if r["seq"] < first_new)
    assert first_new in (seen + 1, last_logged + 1), \
        f"the first seq after the restart is {first_new}; before it, received was {seen}, " \
        f"the log ended at {last_logged}"


# 3. unusable database files --------------------------------------------------------------------

def refused(daemon, path, what, unchanged=True):
    content = path.read_bytes()
    d = daemon(db=path, ready=False, expect_rc=None)
    rc = d.wait_exit(5)
    assert rc is not None, f"worthd still running 5 s after starting on {what}"
    assert rc == 1, f"worthd on {what}: exit status {rc}, expected 1\n{d.tail()}"
    lines = [ln for ln in d.stderr.splitlines() if "bad_database" in ln]
    assert lines, f"worthd on {what}: no bad_database on stderr:\n{d.tail()}"
    if unchanged:
        assert path.read_bytes() == content, f"worthd changed {what}"
    assert not os.path.exists(d.sock), "a refused worthd left its socket"
    return d


def test_garbage_file_refused(daemon, tmp_path):
    path = tmp_path / "garbage.db"
    path.write_bytes(np.random.default_rng(5).integers(0, 256, 8192, dtype=np.uint8).tobytes())
    refused(daemon, path, "a file of random bytes")


def test_sqlite_header_then_garbage_refused(daemon, tmp_path):
    # the SQLite magic, then nonsense: not a readable database
    path = tmp_path / "magic.db"
    body = np.random.default_rng(6).integers(0, 256, 4 * 4096, dtype=np.uint8).tobytes()
    path.write_bytes(b"SQLite format 3\x00" + body)
    refused(daemon, path, "a file with an SQLite header and random bytes")


def test_foreign_sqlite_database_refused(daemon, tmp_path):
    path = tmp_path / "foreign.db"
    db = sqlite3.connect(path)
    db.execute("CREATE TABLE foo (a INTEGER, b TEXT)")
    db.executemany("INSERT INTO foo VALUES (?, ?)", [(i, f"row {i}") for i in range(50)])
    db.commit()
    db.close()
    refused(daemon, path, "another program's SQLite database")
    db = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        assert db.execute("SELECT count(*) FROM foo").fetchone() == (50,)
        assert {r[0] for r in db.execute("SELECT name FROM sqlite_master")} == {"foo"}
        assert db.execute("PRAGMA user_version").fetchone()[0] == 0
    finally:
        db.close()


def test_damaged_worthd_database_refused(daemon, tmp_path):
    # A worthd database whose log pages were overwritten with garbage: corrupt, refused.
    path = tmp_path / "damaged.db"
    d = daemon(db=path)
    c = d.client()
    create_model(c)
    stream = Stream(8)
    trs = [stream.one(None, None) for _ in range(4000)]
    feed(c, MODEL, trs, batch=1000, first=1)
    d.shutdown()
    db = sqlite3.connect(path)
    try:
        db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        page = db.execute("PRAGMA page_size").fetchone()[0]
        npages = db.execute("PRAGMA page_count").fetchone()[0]
        assert db.execute("PRAGMA journal_mode = DELETE").fetchone()[0] == "delete"
    finally:
        db.close()
    assert npages >= 20, npages
    raw = bytearray(path.read_bytes())
    junk = np.random.default_rng(9).integers(0, 256, page * (npages - 8), dtype=np.uint8)
    raw[page * 4:page * (npages - 4)] = junk.tobytes()  # pages 5..n-4: the log's b-tree
    path.write_bytes(bytes(raw))
    refused(daemon, path, "a worthd database with damaged pages", unchanged=False)


@pytest.mark.parametrize("start", ["absent", "empty-file"])
def test_worthd_database_reopens(daemon, tmp_path, start):
    path = tmp_path / "mine.db"
    if start == "empty-file":
        path.write_bytes(b"")
    d = daemon(db=path)
    c = d.client()
    create_model(c)
    stream = Stream(10)
    trs = [stream.one(None, None) for _ in range(300)]
    feed(c, MODEL, trs, batch=100, first=1)
    c.wait_applied(MODEL, 300)
    before = snapshot(c, MODEL)
    d.shutdown()

    def version():
        db = ro(str(path))
        try:
            return (db.execute("PRAGMA user_version").fetchone()[0],
                    logdb.count(db))
        finally:
            db.close()

    assert version() == (SCHEMA_VERSION, 300)
    d = d.restart()
    c = d.client()
    assert [m["model"] for m in c.ok({"op": "model.list"})["models"]] == [MODEL]
    assert c.stats(MODEL)["received"] == 300
    assert snapshot(c, MODEL) == before
    assert c.call({"op": "observe", "model": MODEL, "x": [1, 1], "r": 1.0, "terminal": True}) \
        == {"ok": True, "seq": 301, "durable": True}
    d.shutdown()
    assert version() == (SCHEMA_VERSION, 301)
    assert [row_to_tr(r) for r in log_rows(str(path), MODEL)][:300] == trs


# 4. a damaged checkpoint -------------------------------------------------------------------------

def damaged_newest_checkpoint(daemon, where):
    """A model fed 300 transitions, with a labelled checkpoint at 120 and an unlabelled one at
    240; kill -9; one byte of the newer one's state flipped (first, a seeded random one, or
    the last: the CRC); restart.  Returns (daemon, values before, prev, newest, byte)."""
    d = daemon("--checkpoint-every", 0)
    c = d.client()
    create_model(c)
    stream = Stream(12)
    trs = [stream.one(None, None) for _ in range(300)]
    feed(c, MODEL, trs[:120], first=1)
    prev = c.ok({"op": "checkpoint", "model": MODEL, "label": "prev"})
    feed(c, MODEL, trs[120:240], first=121)
    newest = c.ok({"op": "checkpoint", "model": MODEL})
    assert (prev["seq"], newest["seq"]) == (120, 240)
    feed(c, MODEL, trs[240:], first=241)
    c.wait_applied(MODEL, 300)
    before = snapshot(c, MODEL)
    assert_learnt(before, NAMES)
    d.kill9()
    db = sqlite3.connect(d.db, timeout=10)
    try:
        (state,) = db.execute("SELECT state FROM checkpoints WHERE id = ?",
                              (newest["checkpoint"],)).fetchone()
        b = bytearray(state)
        pos = {"first": 0, "last": len(b) - 1,
               "random": int(np.random.default_rng(13).integers(1, len(b) - 1))}[where]
        b[pos] ^= 0x01
        db.execute("UPDATE checkpoints SET state = ? WHERE id = ?",
                   (bytes(b), newest["checkpoint"]))
        db.commit()
    finally:
        db.close()
    return d.restart(), before, prev, newest, pos


@pytest.mark.parametrize("where", ["first", "random", "last"])
def test_corrupted_newest_checkpoint_falls_back(daemon, where):
    """One byte of the newest checkpoint's state flipped while worthd is stopped (after a
    crash): the checksum catches it, stderr names the checkpoint, and the previous one is
    restored (then the log after it replayed): the values are those from before."""
    d2, before, prev, newest, pos = damaged_newest_checkpoint(daemon, where)
    c = d2.client()
    assert snapshot(c, MODEL) == before, \
        f"values differ after refusing checkpoint {newest['checkpoint']} (byte {pos} flipped)"
    st = c.stats(MODEL)
    assert (st["received"], st["applied"]) == (300, 300), st
    err = d2.stderr
    named = [ln for ln in err.splitlines()
             if "checkpoint" in ln.lower() and re.search(rf"\b{newest['checkpoint']}\b", ln)]
    assert named, f"worthd did not report the damaged checkpoint {newest['checkpoint']}:\n" \
        f"{d2.tail()}"
    if where != "first":  # (the first byte is the header's magic, checked before the CRC)
        assert any(re.search(r"checksum|crc", ln, re.I) for ln in named), \
            f"the report does not say the checksum failed: {named}"
    restored = re.findall(r"restored checkpoint (\d+)", err)
    assert restored == [str(prev["checkpoint"])], \
        f"expected checkpoint {prev['checkpoint']} restored, log says {restored}:\n{d2.tail()}"
    # worthd goes on from there, and a clean restart keeps the values
    assert c.call({"op": "observe", "model": MODEL, "x": [1, 1], "r": 1.0, "terminal": True}) \
        == {"ok": True, "seq": 301, "durable": True}
    c.wait_applied(MODEL, 301)
    after = snapshot(c, MODEL)
    assert after != before
    assert snapshot(d2.restart().client(), MODEL) == after


def test_rollback_to_damaged_checkpoint_refused(daemon):
    d2, before, prev, newest, pos = damaged_newest_checkpoint(daemon, "random")
    c = d2.client()
    listed_ids = [e["checkpoint"] for e in c.ok({"op": "checkpoints", "model": MODEL})[
        "checkpoints"]]
    rep = c.call({"op": "rollback", "model": MODEL, "checkpoint": newest["checkpoint"]},
                 timeout=30)
    print(f"checkpoints listed {listed_ids}; rollback to the damaged one: {rep}")
    assert rep.get("ok") is False, rep
    c.assert_open()
    assert snapshot(c, MODEL) == before, "a refused rollback changed the values"
    st = c.stats(MODEL)
    assert (st["received"], st["applied"]) == (300, 300), st
    # the log is untouched: nothing marked rolled back
    assert c.call({"op": "observe", "model": MODEL, "x": [1, 1], "r": 1.0, "terminal": True}) \
        == {"ok": True, "seq": 301, "durable": True}
    d2.kill9()
    assert all(r["rolled_back"] == 0 for r in log_rows(d2.db, MODEL))
    # the refusal uses a code of protocol v1 (protocol.md: "Codes in errors.h that protocol
    # v1 does not send: corrupt, mismatch, numeric, no_memory")
    assert rep["error"]["code"] not in ("corrupt", "mismatch", "numeric", "no_memory"), \
        f"a code protocol v1 does not send: {rep}"
