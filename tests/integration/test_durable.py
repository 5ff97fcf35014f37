"""Persistence: the SQLite transition log, checkpoints, rollback, crash recovery and backup.

The contract is schema/protocol.md ("observe: durability", "checkpoint", "checkpoints",
"rollback", "backup", "Restart" and the error table), schema/README.md and
schema/001_init.sql.  Each test starts its own worthd (conftest.daemon) with its database in
tmp_path; restarts reuse the same socket and database (Daemon.restart), crashes are SIGKILL
(Daemon.kill9).  The database is read with the standard sqlite3 module, read-only (mode=ro),
and only ever written by a test while worthd is stopped.

"Bit-identical" is checked by comparing the values worthd answers as parsed JSON numbers
with ==, for every estimator at a few probe states.  The reference for a restored or
replayed model is either the same daemon before the event or a fresh daemon (its own
database) fed exactly the transitions that should have been learnt, in order.  The model
mixes td, td_lambda, rls_td, lstd and replay (whose buffer, random generator and background
steps make any divergence show), two sources, terminal transitions and dt.
Every loop is bounded in count and time.
"""
import json
import os
import re
import select
import socket
import sqlite3
import threading
import time

import numpy as np
import pytest

from conftest import Client, is_closed_error
import logdb

HERE = os.path.dirname(os.path.abspath(__file__))
SCHEMA_DIR = os.path.join(HERE, "..", "..", "schema")
# Every migration, in order: the database worthd makes must have their shape.
MIGRATIONS = sorted(os.path.join(SCHEMA_DIR, f) for f in os.listdir(SCHEMA_DIR)
                    if f[:3].isdigit() and f.endswith(".sql"))
SCHEMA_VERSION = int(os.path.basename(MIGRATIONS[-1])[:3])
T0 = 1764633600.0  # a sender's clock, for transitions that carry t
PROBES = [[0.5, -4.0], [3.3, 0.0], [7.7, 2.5], [10.0, 5.0], [1.25, 1.0]]
PROBES_1D = [[0.1], [0.5], [0.9]]  # for small_spec()
ESTIMATORS = ["td", "tdl", "rls", "lstd", "rp"]


# helpers -------------------------------------------------------------------------------------

def spec(name="m"):
    """model.create for the determinism checks: 1 + 2 + 3^2 = 12 features, five estimators."""
    return {"op": "model.create", "model": name, "dims": 2, "gamma": 0.95, "gamma_per_s": 0.999,
            "ranges": [[0, 10], [-5, 5]],
            "features": [{"basis": "bias"}, {"basis": "raw"},
                         {"basis": "rbf", "centers": 3, "width": 0.3}],
            "estimators": [
                {"name": "td", "kind": "td", "alpha": 0.05},
                {"name": "tdl", "kind": "td_lambda", "alpha": 0.02, "lambda": 0.8},
                {"name": "rls", "kind": "rls_td", "lambda": 0.5, "forget": 0.999, "delta": 100},
                {"name": "lstd", "kind": "lstd", "lambda": 0.3, "ridge": 1e-3,
                 "refit_every": 25},
                {"name": "rp", "kind": "replay", "alpha": 0.02, "capacity": 64, "batch": 4,
                 "steps_per_obs": 2, "seed": 7, "tol": 1e-300}]}


def small_spec(name="s"):
    """A cheap model: bias + raw on [0, 1], TD(0)."""
    return {"op": "model.create", "model": name, "dims": 1, "gamma": 0.9, "ranges": [[0, 1]],
            "features": [{"basis": "bias"}, {"basis": "raw"}],
            "estimators": [{"name": "td", "kind": "td", "alpha": 0.1}]}


def create(c, name="m"):
    assert c.call(spec(name)) == {"ok": True, "model": name, "features": 12}


def transitions(n, seed, with_t=False, first=1):
    """n transitions for spec(): every 13th terminal (no x_next), every 3rd from source
    pump-2, every 5th with dt = 30 s; with_t: t = T0 + 60 * seq, counting seq from first."""
    rng = np.random.default_rng(seed)
    x = rng.uniform([0, -5], [10, 5], size=(n + 1, 2))
    r = rng.normal(size=n)
    out = []
    for i in range(n):
        tr = {"x": x[i].tolist(), "r": float(r[i])}
        if i % 13 == 12:
            tr["terminal"] = True
        else:
            tr["x_next"] = x[i + 1].tolist()
        if i % 3 == 0:
            tr["source"] = "pump-2"
        if i % 5 == 0:
            tr["dt"] = 30.0
        if with_t:
            tr["t"] = T0 + 60.0 * (first + i)
        out.append(tr)
    return out


def send_lines(c, reqs):
    c.send_raw(b"".join(json.dumps(q, separators=(",", ":"), allow_nan=False).encode() + b"\n"
                        for q in reqs))


def feed(c, model, trs, batch=50, ack=None, first=None):
    """Sends trs as observe batches (every line written at once, then the replies read);
    asserts every reply (count, consecutive seq, durable unless ack) and returns the last
    seq.  first: the seq the first transition must get."""
    reqs = []
    for i in range(0, len(trs), batch):
        q = {"op": "observe", "model": model, "batch": trs[i:i + batch]}
        if ack:
            q["ack"] = ack
        reqs.append(q)
    send_lines(c, reqs)
    last = None if first is None else first - 1
    for q in reqs:
        n = len(q["batch"])
        rep = c.recv(30)
        assert rep.get("ok") is True, rep
        assert set(rep) == {"ok", "seq", "count", "durable"}, rep
        assert rep["count"] == n and rep["durable"] is (ack is None), rep
        if last is not None:
            assert rep["seq"] == last + n, (rep, last)
        last = rep["seq"]
    return last


def snapshot(c, model, probes=PROBES):
    """Every estimator's value and the sd at each probe state, as answered."""
    out = []
    for x in probes:
        rep = c.ok({"op": "value", "model": model, "x": x})
        out.append((rep["value"], rep["estimators"], rep["sd"]))
    return out


def assert_learnt(snap, names=ESTIMATORS):
    """Premise of a comparison: every estimator moved away from its initial 0."""
    for name in names:
        assert any(est[name] != 0 for _, est, _ in snap), f"{name} learnt nothing: {snap}"


def read_train(c, passes, timeout=30):
    """Reads the progress lines and the final reply of a train request; returns the final."""
    deadline = time.monotonic() + timeout
    for _ in range(passes + 2):
        rep = c.recv(max(deadline - time.monotonic(), 0.001))
        if "ok" in rep:
            assert rep["ok"] is True, rep
            return rep
        assert "progress" in rep, rep
    raise AssertionError(f"train: no final reply after {passes + 2} lines")


def ro(path, immutable=False):
    """A read-only connection to worthd's database.  immutable: read the file alone, with no
    -wal or -shm beside it (nor created), as for a backup copy."""
    assert os.path.exists(path), path
    extra = "&immutable=1" if immutable else ""
    return sqlite3.connect(f"file:{path}?mode=ro{extra}", uri=True, timeout=10)


def model_id(db, name):
    rows = db.execute("SELECT id FROM models WHERE name = ? AND dropped_at IS NULL",
                      (name,)).fetchall()
    assert len(rows) == 1, (name, rows)
    return rows[0][0]


def log_rows(path, name, after=0):
    """The model's transition log (the rows with seq > after), in seq order, as dicts (x,
    x_next decoded)."""
    db = ro(path)
    try:
        mid = model_id(db, name)
        rows = logdb.rows(db, mid, after)
    finally:
        db.close()
    out = []
    for seq, t, source, x, r, x_next, terminal, dt, rb in rows:
        assert isinstance(x, bytes) and len(x) % 8 == 0, (seq, x)
        out.append({"seq": seq, "t": t, "source": source, "r": r, "terminal": terminal,
                    "dt": dt, "rolled_back": rb,
                    "x": np.frombuffer(x, "<f8").tolist(),
                    "x_next": None if x_next is None else np.frombuffer(x_next, "<f8").tolist()})
    return out


def row_to_tr(row):
    """A logged transition as an observe batch element (the same fields as sent)."""
    tr = {"x": row["x"], "r": row["r"]}
    if row["terminal"]:
        tr["terminal"] = True
    else:
        tr["x_next"] = row["x_next"]
    if row["source"]:
        tr["source"] = row["source"]
    if row["t"] is not None:
        tr["t"] = row["t"]
    if row["dt"] is not None:
        tr["dt"] = row["dt"]
    return tr


def fresh_snapshot(daemon, tmp_path, trs, name="m", trains=()):
    """Values of a fresh worthd (its own database) fed exactly trs in order; trains:
    (k, estimator, passes) to train after the first k transitions."""
    db = tmp_path / f"fresh-{len(os.listdir(tmp_path))}.db"
    f = daemon(db=db)
    c = f.client()
    create(c, name)
    done = 0
    for k, est, passes in list(trains) + [(len(trs), None, 0)]:
        if k > done:
            done = feed(c, name, trs[done:k], batch=100, first=done + 1)
        if est:
            c.send({"op": "train", "model": name, "estimator": est, "passes": passes})
            assert read_train(c, passes)["passes"] == passes
    c.wait_applied(name, len(trs), timeout=30)
    snap = snapshot(c, name)
    f.shutdown()
    return snap


def checkpoint(c, model, label=None):
    q = {"op": "checkpoint", "model": model}
    if label is not None:
        q["label"] = label
    rep = c.ok(q, timeout=30)
    assert set(rep) == {"ok", "checkpoint", "seq"}, rep
    assert isinstance(rep["checkpoint"], int) and isinstance(rep["seq"], int), rep
    return rep


def listed(c, model):
    rep = c.ok({"op": "checkpoints", "model": model})
    assert set(rep) == {"ok", "checkpoints"}, rep
    return rep["checkpoints"]


# observe: durability --------------------------------------------------------------------------

@pytest.mark.parametrize("sync", ["full", "normal"])
def test_durable_flag_and_log_rows(daemon, sync):
    d = daemon("--sync", sync)
    c = d.client()
    assert c.call(small_spec("s")) == {"ok": True, "model": "s", "features": 2}
    assert c.call({"op": "observe", "model": "s", "x": [0.25], "r": 1.5, "x_next": [0.5],
                   "source": "pump-2", "t": T0, "dt": 60}) == \
        {"ok": True, "seq": 1, "durable": True}
    assert c.call({"op": "observe", "model": "s", "batch": [
        {"x": [0.5], "r": -2.0, "x_next": [0.75]}, {"x": [0.75], "r": 0.5, "terminal": True}],
        "id": "b"}) == {"ok": True, "id": "b", "seq": 3, "count": 2, "durable": True}
    rec = np.array([[0.1, 1.0, 0.2, 0.0], [0.2, 2.0, 0.3, 1.0]], "<f8")
    c.send({"op": "observe.bulk", "model": "s", "count": 2})
    c.send_raw(rec.tobytes())
    assert c.recv() == {"ok": True, "seq": 5, "count": 2, "durable": True}
    # "ack":"applied": an early reply that says it is not durable yet
    assert c.call({"op": "observe", "model": "s", "x": [0.3], "r": 3.0, "terminal": True,
                   "ack": "applied"}) == {"ok": True, "seq": 6, "durable": False}
    assert c.call({"op": "observe", "model": "s", "ack": "applied", "batch": [
        {"x": [0.4], "r": 4.0, "terminal": True}] * 2}) == \
        {"ok": True, "seq": 8, "count": 2, "durable": False}
    c.send({"op": "observe.bulk", "model": "s", "count": 2, "ack": "applied"})
    c.send_raw(rec.tobytes())
    assert c.recv() == {"ok": True, "seq": 10, "count": 2, "durable": False}
    assert c.call({"op": "observe", "model": "s", "x": [0.9], "r": -1.0, "x_next": [0.1]}) == \
        {"ok": True, "seq": 11, "durable": True}
    c.wait_applied("s", 11)
    d.shutdown()
    rows = log_rows(d.db, "s")
    assert [r["seq"] for r in rows] == list(range(1, 12))
    assert all(r["rolled_back"] == 0 for r in rows)
    first = rows[0]
    assert (first["x"], first["r"], first["x_next"], first["terminal"], first["source"],
            first["t"], first["dt"]) == ([0.25], 1.5, [0.5], 0, "pump-2", T0, 60.0), first
    # defaults: source '', no t, no dt; a terminal transition has x_next NULL
    assert (rows[1]["source"], rows[1]["t"], rows[1]["dt"]) == ("", None, None), rows[1]
    assert (rows[2]["terminal"], rows[2]["x_next"], rows[2]["r"]) == (1, None, 0.5), rows[2]
    # bulk records: x, r, x_next, terminal as sent
    assert (rows[3]["x"], rows[3]["r"], rows[3]["x_next"], rows[3]["terminal"]) == \
        ([0.1], 1.0, [0.2], 0), rows[3]
    assert (rows[4]["x"], rows[4]["r"], rows[4]["x_next"], rows[4]["terminal"]) == \
        ([0.2], 2.0, None, 1), rows[4]
    # the early-acknowledged ones are in the log too (clean shutdown)
    assert [r["r"] for r in rows[5:10]] == [3.0, 4.0, 4.0, 1.0, 2.0]


def test_bad_sync_value_refused(daemon):
    d = daemon("--sync", "sometimes", ready=False, expect_rc=None)
    rc = d.wait_exit(5)
    assert rc is not None and rc != 0, f"worthd --sync sometimes: {rc}"
    assert d.stderr.strip(), "refusal without a message on stderr"


# Restart -------------------------------------------------------------------------------------

def test_models_persist_across_restart(daemon):
    d = daemon()
    c = d.client()
    create(c, "a")
    assert c.call(small_spec("b"))["ok"] is True
    assert c.call(small_spec("gone"))["ok"] is True
    assert feed(c, "a", transitions(250, seed=1), first=1) == 250
    cp = checkpoint(c, "a", label="before-restart")
    assert cp["seq"] == 250
    assert feed(c, "a", transitions(50, seed=2), first=251) == 300
    assert feed(c, "b", [{"x": [k / 20], "r": 1.0, "x_next": [(k + 1) / 20]}
                         for k in range(20)], first=1) == 20
    feed(c, "gone", [{"x": [0.5], "r": 1.0, "terminal": True}] * 5, first=1)
    assert c.call({"op": "model.drop", "model": "gone"}) == {"ok": True, "persisted": True}
    c.wait_applied("a", 300)
    c.wait_applied("b", 20)
    models = sorted(c.ok({"op": "model.list"})["models"], key=lambda m: m["model"])
    assert [m["model"] for m in models] == ["a", "b"]
    gets = {n: c.ok({"op": "model.get", "model": n}) for n in ("a", "b")}
    snaps = {"a": snapshot(c, "a"), "b": snapshot(c, "b", PROBES_1D)}
    assert_learnt(snaps["a"])
    assert_learnt(snaps["b"], ["td"])
    cps = listed(c, "a")
    assert [(e["checkpoint"], e["label"]) for e in cps] == [(cp["checkpoint"], "before-restart")]

    d2 = d.restart()
    c = d2.client()
    assert sorted(c.ok({"op": "model.list"})["models"], key=lambda m: m["model"]) == models
    for n in ("a", "b"):
        assert c.ok({"op": "model.get", "model": n}) == gets[n]
        assert snapshot(c, n, PROBES if n == "a" else PROBES_1D) == snaps[n], \
            f"model {n}: values changed across the restart"
    st = c.stats("a")
    assert (st["received"], st["applied"], st["queue"]) == (300, 300, 0), st
    assert c.ok({"op": "value", "model": "a", "x": PROBES[0]})["seq"] == 300
    # the checkpoint taken before survives; the clean shutdown took an automatic one at 300
    after = listed(c, "a")
    assert cps[0] in after, (cps, after)
    assert after[0]["seq"] == 300 and after[0]["label"] is None, after
    assert after[0]["checkpoint"] > cp["checkpoint"], after
    # the sequence goes on; a new transition is learnt
    assert c.call({"op": "observe", "model": "a", "x": [5, 0], "r": 10.0, "terminal": True}) == \
        {"ok": True, "seq": 301, "durable": True}
    assert c.call({"op": "observe", "model": "b", "x": [0.5], "r": 5.0, "terminal": True}) == \
        {"ok": True, "seq": 21, "durable": True}
    c.wait_applied("a", 301)
    assert snapshot(c, "a") != snaps["a"]
    # a dropped model stays dropped; its name starts a new sequence
    c.err({"op": "stats", "model": "gone"}, "no_such_model")
    assert c.call(small_spec("gone"))["ok"] is True
    assert c.ok({"op": "value", "model": "gone", "x": [0.5]})["value"] == 0  # nothing learnt
    assert c.call({"op": "observe", "model": "gone", "x": [0.5], "r": 1.0, "terminal": True}) \
        == {"ok": True, "seq": 1, "durable": True}


def test_create_drop_and_checkpoint_survive_a_crash(daemon):
    # What was answered ok is on disk: a crash right after the replies loses none of it.
    d = daemon()
    c = d.client()
    create(c, "kept")
    assert c.call(small_spec("dropped"))["ok"] is True
    feed(c, "kept", transitions(30, seed=29), first=1)
    cp = checkpoint(c, "kept", label="crash")
    assert c.call({"op": "model.drop", "model": "dropped"}) == {"ok": True, "persisted": True}
    assert c.call(small_spec("new"))["ok"] is True
    d.kill9()
    c = d.restart().client()
    assert sorted(m["model"] for m in c.ok({"op": "model.list"})["models"]) == ["kept", "new"]
    assert [(e["checkpoint"], e["seq"], e["label"]) for e in listed(c, "kept")] == \
        [(cp["checkpoint"], 30, "crash")]
    c.err({"op": "stats", "model": "dropped"}, "no_such_model")
    assert c.stats("new")["received"] == 0


@pytest.mark.parametrize("sync", ["full", "normal"])
def test_kill9_recovers_checkpoint_and_log(daemon, sync):
    # --sync normal: a commit survives a crash of worthd (not of the machine)
    d = daemon("--sync", sync)
    c = d.client()
    create(c)
    trs = transitions(400, seed=3)
    feed(c, "m", trs[:200], first=1)
    assert checkpoint(c, "m")["seq"] == 200
    assert feed(c, "m", trs[200:], first=201) == 400
    c.wait_applied("m", 400)
    before = snapshot(c, "m")
    assert_learnt(before)
    d.kill9()
    rows = log_rows(d.db, "m")
    assert [r["seq"] for r in rows] == list(range(1, 401)), "acknowledged transitions missing"
    assert [row_to_tr(r) for r in rows] == trs, "the log differs from what was sent"
    d2 = d.restart()
    c = d2.client()
    assert snapshot(c, "m") == before, "values differ after kill -9 and recovery"
    st = c.stats("m")
    assert (st["received"], st["applied"]) == (400, 400), st
    assert c.call({"op": "observe", "model": "m", "x": [1, 1], "r": 0.5, "terminal": True}) == \
        {"ok": True, "seq": 401, "durable": True}
    c.wait_applied("m", 401)


@pytest.mark.parametrize("every", [0, 37], ids=["no-auto-checkpoint", "checkpoint-every-37"])
def test_kill9_while_streaming(daemon, tmp_path, every):
    # with automatic checkpoints, recovery restores the newest one and replays after it
    d = daemon("--checkpoint-every", every)
    c = d.client()
    create(c)
    c.close()
    trs = transitions(3000, seed=4)
    acked, pending, ended = [], [0], []

    def produce():
        p = Client(d.sock)
        try:
            deadline = time.monotonic() + 30
            i = 0
            for k in range(len(trs)):
                if i >= len(trs) or time.monotonic() > deadline:
                    ended.append("limit")
                    return
                n = 1 if k % 2 else 10
                chunk = trs[i:i + n]
                q = ({"op": "observe", "model": "m", **chunk[0]} if n == 1 else
                     {"op": "observe", "model": "m", "batch": chunk})
                pending[0] = len(chunk)
                try:
                    rep = p.call(q)
                except Exception as e:
                    ended.append(("closed", repr(e)) if is_closed_error(e) else ("error", e))
                    return
                if rep.get("ok") is not True or rep.get("durable") is not True:
                    ended.append(("reply", rep))
                    return
                first = rep["seq"] - len(chunk) + 1
                if first != len(acked) + 1:
                    ended.append(("bad seq", rep, len(acked)))
                    return
                acked.extend(range(first, rep["seq"] + 1))
                pending[0] = 0
                i += len(chunk)
        finally:
            p.close()

    t = threading.Thread(target=produce)
    t.start()
    deadline = time.monotonic() + 20
    for _ in range(20_000):
        if len(acked) >= 300 or not t.is_alive() or time.monotonic() > deadline:
            break
        time.sleep(0.002)
    assert t.is_alive() and len(acked) >= 300, (len(acked), ended)
    d.kill9()
    t.join(10)
    assert not t.is_alive(), "producer hung after the kill"
    assert ended and ended[0][0] == "closed", ended
    rows = log_rows(d.db, "m")
    seqs = [r["seq"] for r in rows]
    have = len(acked)
    print(f"acknowledged {have}, logged {len(seqs)}, in flight {pending[0]}")
    # every acknowledged transition is in the log; the log is a prefix of what was sent, and
    # the request in flight is in it entirely or not at all
    assert seqs == list(range(1, len(seqs) + 1)), "gaps in the log"
    assert len(seqs) in (have, have + pending[0]), (len(seqs), have, pending[0])
    assert all(r["rolled_back"] == 0 for r in rows)
    assert [row_to_tr(r) for r in rows] == trs[:len(rows)]

    d2 = d.restart()
    c = d2.client()
    st = c.wait_applied("m", len(seqs))
    assert st["received"] == st["applied"] == len(seqs), st
    got = snapshot(c, "m")
    assert_learnt(got)
    assert got == fresh_snapshot(daemon, tmp_path, [row_to_tr(r) for r in rows]), \
        "recovered values differ from a fresh daemon fed the logged transitions"
    assert c.call({"op": "observe", "model": "m", "x": [1, 1], "r": 0.5, "terminal": True})[
        "seq"] == len(seqs) + 1


def test_sigterm_while_streaming_early_acks(daemon, tmp_path):
    # A clean shutdown applies and logs everything accepted, also what was acknowledged
    # early ("ack":"applied", not durable yet); the restart continues from there.
    d = daemon()
    c = d.client()
    create(c)
    c.close()
    trs = transitions(3000, seed=26)
    acked, ended = [0], []

    def produce():
        p = Client(d.sock)
        try:
            deadline = time.monotonic() + 30
            for i in range(0, len(trs), 10):
                if time.monotonic() > deadline:
                    ended.append("time")
                    return
                try:
                    rep = p.call({"op": "observe", "model": "m", "batch": trs[i:i + 10],
                                  "ack": "applied"})
                except Exception as e:
                    ended.append(("closed", repr(e)) if is_closed_error(e) else ("error", e))
                    return
                if rep.get("ok") is not True:
                    ended.append(("reply", rep))
                    return
                if rep["seq"] != i + 10 or rep["durable"] is not False:
                    ended.append(("bad reply", rep, i))
                    return
                acked[0] = rep["seq"]
            ended.append("all sent")
        finally:
            p.close()

    t = threading.Thread(target=produce)
    t.start()
    deadline = time.monotonic() + 20
    for _ in range(20_000):
        if acked[0] >= 300 or not t.is_alive() or time.monotonic() > deadline:
            break
        time.sleep(0.002)
    assert t.is_alive() and acked[0] >= 300, (acked, ended)
    d.shutdown()
    t.join(10)
    assert not t.is_alive()
    assert ended and ended[0][0] in ("closed", "reply"), ended
    rows = log_rows(d.db, "m")
    print(f"acknowledged {acked[0]}, logged {len(rows)}")
    assert [r["seq"] for r in rows] == list(range(1, len(rows) + 1))
    assert len(rows) >= acked[0], "early-acknowledged transitions lost at a clean shutdown"
    assert [row_to_tr(r) for r in rows] == trs[:len(rows)]
    c = d.restart().client()
    st = c.stats("m")
    assert (st["received"], st["applied"], st["queue"]) == (len(rows), len(rows), 0), st
    got = snapshot(c, "m")
    assert got == fresh_snapshot(daemon, tmp_path, [row_to_tr(r) for r in rows])


# checkpoint, checkpoints ---------------------------------------------------------------------

def test_checkpoint_and_list(daemon):
    d = daemon()
    c = d.client()
    create(c)
    assert listed(c, "m") == []
    t0 = time.time()
    feed(c, "m", transitions(120, seed=5), first=1)
    cp1 = checkpoint(c, "m", label="first")
    assert cp1["seq"] == 120 == c.stats("m")["applied"], cp1
    # a checkpoint covers every transition accepted before it, also the not yet learnt ones
    c.send({"op": "observe", "model": "m", "batch": transitions(200, seed=6), "ack": "applied"})
    c.send({"op": "checkpoint", "model": "m", "id": "cp"})
    rep = c.recv(30)
    assert rep == {"ok": True, "seq": 320, "count": 200, "durable": False}, rep
    cp2 = c.recv(30)
    assert cp2.get("ok") is True and cp2["id"] == "cp" and cp2["seq"] == 320, cp2
    assert c.stats("m")["applied"] == 320
    cp3 = checkpoint(c, "m", label="x" * 63)
    assert cp3["seq"] == 320
    t1 = time.time()
    ids = [cp3["checkpoint"], cp2["checkpoint"], cp1["checkpoint"]]
    assert len(set(ids)) == 3 and ids == sorted(ids, reverse=True), ids
    got = listed(c, "m")
    assert [(e["checkpoint"], e["seq"], e["label"]) for e in got] == [
        (cp3["checkpoint"], 320, "x" * 63), (cp2["checkpoint"], 320, None),
        (cp1["checkpoint"], 120, "first")], got
    for e in got:
        assert set(e) == {"checkpoint", "seq", "label", "created_at", "size"}, e
        assert t0 - 1 <= e["created_at"] <= t1 + 1, (e, t0, t1)
        assert isinstance(e["size"], int) and e["size"] > 0, e
    assert [e["created_at"] for e in got] == sorted((e["created_at"] for e in got),
                                                    reverse=True)
    # labels are 1..63 bytes (bytes, not characters); a wrong type is bad_request
    for label in ["y" * 64, "\u00e9" * 32, ""]:
        c.err({"op": "checkpoint", "model": "m", "label": label}, "bad_param")
    c.err({"op": "checkpoint", "model": "m", "label": 5}, "bad_request")
    c.err({"op": "checkpoint", "model": "nope"}, "no_such_model")
    c.err({"op": "checkpoints", "model": "nope"}, "no_such_model")
    c.err({"op": "checkpoint"}, "bad_request")
    assert listed(c, "m") == got
    # the other model has none
    assert c.call(small_spec("s"))["ok"] is True
    assert listed(c, "s") == []
    d.shutdown()
    db = ro(d.db)
    try:
        mid = model_id(db, "m")
        rows = {r[0]: r[1:] for r in db.execute(
            "SELECT id, seq, label, size, length(state), invalid FROM checkpoints "
            "WHERE model = ?", (mid,))}
    finally:
        db.close()
    for e in got:
        assert rows[e["checkpoint"]] == (e["seq"], e["label"], e["size"], e["size"], 0), \
            (e, rows.get(e["checkpoint"]))


# rollback ------------------------------------------------------------------------------------

def rollback_events(path):
    db = ro(path)
    try:
        return [r[0] for r in db.execute("SELECT id FROM events WHERE kind = 'rollback'")]
    finally:
        db.close()


def test_rollback_without_replay(daemon, tmp_path):
    d = daemon()
    c = d.client()
    create(c)
    trs = transitions(400, seed=7)
    feed(c, "m", trs[:150], first=1)
    cp = checkpoint(c, "m", label="base")
    assert cp["seq"] == 150
    at_cp = snapshot(c, "m")
    feed(c, "m", trs[150:], first=151)
    c.wait_applied("m", 400)
    assert snapshot(c, "m") != at_cp  # premise
    rep = c.call({"op": "rollback", "model": "m", "checkpoint": cp["checkpoint"], "id": 1})
    assert rep == {"ok": True, "id": 1, "checkpoint": cp["checkpoint"], "seq": 150,
                   "undone": 250, "replayed": 0}, rep
    assert snapshot(c, "m") == at_cp, "values after rollback differ from those at the checkpoint"
    assert listed(c, "m")[0]["checkpoint"] == cp["checkpoint"]
    # a rollback counts as learning up to its position; seqs are never reused
    st = c.stats("m")
    assert (st["received"], st["applied"], st["queue"]) == (400, 400, 0), st
    # a crash: recovery must not learn the rolled-back rows again
    d.kill9()
    rows = log_rows(d.db, "m")
    assert [r["seq"] for r in rows] == list(range(1, 401))
    assert all(r["rolled_back"] == 0 for r in rows[:150])
    marks = {r["rolled_back"] for r in rows[150:]}
    assert len(marks) == 1 and 0 not in marks, marks
    assert marks <= set(rollback_events(d.db)), "rolled_back names no rollback event"
    d2 = d.restart()
    c = d2.client()
    assert snapshot(c, "m") == at_cp, "recovery learnt rolled-back transitions"
    st = c.stats("m")
    assert (st["received"], st["applied"], st["queue"]) == (400, 400, 0), st
    # new transitions continue the sequence and are learnt after the checkpoint's state
    new = transitions(30, seed=8)
    assert feed(c, "m", new, first=401) == 430
    st = c.wait_applied("m", 430)
    assert st["applied"] == 430
    now = snapshot(c, "m")
    assert now != at_cp
    assert now == fresh_snapshot(daemon, tmp_path, trs[:150] + new), \
        "after a rollback: values differ from a fresh daemon fed the kept transitions"
    d2.kill9()
    d3 = d2.restart()
    assert snapshot(d3.client(), "m") == now


def rollback_replay_case(daemon, tmp_path, trs, exclude, kept, undone, untimed=0):
    """Feeds trs (300) with a checkpoint after 100, rolls back to it with replay and exclude,
    then checks the reply, the values against a fresh daemon fed `kept`, the log marks, and
    that a crash and recovery give the same values."""
    d = daemon()
    c = d.client()
    create(c)
    feed(c, "m", trs[:100], first=1)
    cp = checkpoint(c, "m")
    feed(c, "m", trs[100:], first=101)
    c.wait_applied("m", 300)
    before = snapshot(c, "m")
    rep = c.call({"op": "rollback", "model": "m", "checkpoint": cp["checkpoint"],
                  "replay": True, "exclude": exclude}, timeout=30)
    want = {"ok": True, "checkpoint": cp["checkpoint"], "seq": 100, "undone": undone,
            "replayed": 200 - undone}
    if "t" in exclude:
        want["untimed"] = untimed  # transitions after the checkpoint without a t
    assert rep == want, rep
    c.wait_applied("m", 300)
    got = snapshot(c, "m")
    assert got != before  # premise: the window mattered
    assert_learnt(got)
    assert got == fresh_snapshot(daemon, tmp_path, kept), \
        "after rollback with replay: values differ from a fresh daemon fed the kept transitions"
    assert c.call({"op": "observe", "model": "m", "x": [2, 2], "r": 1.0, "terminal": True}) == \
        {"ok": True, "seq": 301, "durable": True}
    c.wait_applied("m", 301)
    after = snapshot(c, "m")
    d.kill9()
    rows = log_rows(d.db, "m")
    assert [r["seq"] for r in rows] == list(range(1, 302))
    assert [row_to_tr(r) for r in rows if r["rolled_back"] == 0][:-1] == kept
    assert sum(r["rolled_back"] != 0 for r in rows) == undone
    c = d.restart().client()
    assert snapshot(c, "m") == after, "recovery after a rollback with replay differs"
    return rows


def test_rollback_replay_exclude_seq(daemon, tmp_path):
    trs = transitions(300, seed=9)
    rows = rollback_replay_case(daemon, tmp_path, trs, {"seq": [151, 180]},
                                trs[:150] + trs[180:], undone=30)
    assert [r["seq"] for r in rows if r["rolled_back"]] == list(range(151, 181))


def test_rollback_replay_exclude_t(daemon, tmp_path):
    trs = transitions(300, seed=10, with_t=True)
    # the window [t of seq 131, t of seq 160], both inclusive; seq 140 and 150 carry no t
    # (never in a window), seq 200 arrived late with a t inside it (excluded by its t)
    del trs[139]["t"], trs[149]["t"]
    trs[199]["t"] = T0 + 60.0 * 145 + 1
    window = [T0 + 60.0 * 131, T0 + 60.0 * 160]
    out = set(range(131, 161)) - {140, 150} | {200}
    kept = [tr for k, tr in enumerate(trs, 1) if k not in out]
    rows = rollback_replay_case(daemon, tmp_path, trs, {"t": window}, kept, undone=len(out),
                                untimed=2)
    assert {r["seq"] for r in rows if r["rolled_back"]} == out


def test_rollback_errors_and_invalidation(daemon):
    d = daemon()
    c = d.client()
    create(c, "a")
    create(c, "b")
    trs = transitions(100, seed=11)
    feed(c, "a", trs[:50], first=1)
    cp1 = checkpoint(c, "a", label="one")
    at_cp1 = snapshot(c, "a")
    feed(c, "a", trs[50:], first=51)
    cp2 = checkpoint(c, "a", label="two")
    feed(c, "b", trs[:10], first=1)
    cpb = checkpoint(c, "b")
    c.wait_applied("a", 100)
    c.wait_applied("b", 10)
    before = snapshot(c, "a")
    b_before = snapshot(c, "b")
    listing = listed(c, "a")
    assert [e["checkpoint"] for e in listing] == [cp2["checkpoint"], cp1["checkpoint"]]
    unknown = max(cp1["checkpoint"], cp2["checkpoint"], cpb["checkpoint"]) + 1000
    rb = {"op": "rollback", "model": "a"}
    for q, code in [
            (dict(rb, checkpoint=unknown), "no_such_checkpoint"),
            (dict(rb, checkpoint=cpb["checkpoint"]), "no_such_checkpoint"),  # b's
            (dict(rb, checkpoint=cp1["checkpoint"], exclude={"seq": [60, 70]}), "bad_request"),
            (dict(rb, checkpoint=cp1["checkpoint"], replay=False, exclude={"seq": [60, 70]}),
             "bad_request"),
            (dict(rb, checkpoint=cp1["checkpoint"], replay=True, exclude={"seq": [60]}),
             "bad_request"),
            (dict(rb, checkpoint=cp1["checkpoint"], replay=True, exclude={"seq": "60-70"}),
             "bad_request"),
            (dict(rb, checkpoint=cp1["checkpoint"], replay=True, exclude={"when": [60, 70]}),
             "bad_request"),
            (rb, "bad_request"),
            ({"op": "rollback", "model": "nope", "checkpoint": cp1["checkpoint"]},
             "no_such_model")]:
        c.err(q, code)
    # nothing changed
    assert snapshot(c, "a") == before
    assert listed(c, "a") == listing
    assert c.stats("a")["received"] == 100
    # rolling back to cp1 invalidates cp2, which was taken after it
    rep = c.ok(dict(rb, checkpoint=cp1["checkpoint"]))
    assert (rep["seq"], rep["undone"], rep["replayed"]) == (50, 50, 0), rep
    assert snapshot(c, "a") == at_cp1
    assert [e["checkpoint"] for e in listed(c, "a")] == [cp1["checkpoint"]]
    c.err(dict(rb, checkpoint=cp2["checkpoint"]), "no_such_checkpoint")
    assert [e["checkpoint"] for e in listed(c, "b")] == [cpb["checkpoint"]]
    assert snapshot(c, "b") == b_before, "a rollback of a changed another model"
    # a checkpoint of a dropped model does not belong to a new model of the same name
    assert c.call({"op": "model.drop", "model": "b"}) == {"ok": True, "persisted": True}
    create(c, "b")
    feed(c, "b", trs[:10], first=1)
    c.err({"op": "rollback", "model": "b", "checkpoint": cpb["checkpoint"]},
          "no_such_checkpoint")
    assert listed(c, "b") == []
    d.shutdown()
    db = ro(d.db)
    try:
        inv = dict(db.execute("SELECT id, invalid FROM checkpoints WHERE id IN (?, ?)",
                              (cp1["checkpoint"], cp2["checkpoint"])).fetchall())
    finally:
        db.close()
    assert inv.get(cp1["checkpoint"]) == 0, inv
    assert cp2["checkpoint"] not in inv or inv[cp2["checkpoint"]] != 0, inv
    # still invalid after a restart
    c = d.restart().client()
    c.err(dict(rb, checkpoint=cp2["checkpoint"]), "no_such_checkpoint")
    assert cp2["checkpoint"] not in [e["checkpoint"] for e in listed(c, "a")]


def test_rollback_orders_with_pipelined_observes(daemon, tmp_path):
    # "Transitions accepted after the rollback request are learnt after it"; those accepted
    # before it (even if not learnt yet) are after the checkpoint, so they are undone.
    d = daemon()
    c = d.client()
    create(c)
    trs = transitions(220, seed=19)
    new = transitions(20, seed=20)
    feed(c, "m", trs[:100], first=1)
    cp = checkpoint(c, "m")
    feed(c, "m", trs[100:200], first=101)
    send_lines(c, [{"op": "observe", "model": "m", "batch": trs[200:], "ack": "applied"},
                   {"op": "rollback", "model": "m", "checkpoint": cp["checkpoint"]},
                   {"op": "observe", "model": "m", "batch": new}])
    assert c.recv(30) == {"ok": True, "seq": 220, "count": 20, "durable": False}
    assert c.recv(30) == {"ok": True, "checkpoint": cp["checkpoint"], "seq": 100,
                          "undone": 120, "replayed": 0}
    assert c.recv(30) == {"ok": True, "seq": 240, "count": 20, "durable": True}
    c.wait_applied("m", 240)
    got = snapshot(c, "m")
    assert got == fresh_snapshot(daemon, tmp_path, trs[:100] + new)
    d.kill9()
    rows = log_rows(d.db, "m")
    assert [r["seq"] for r in rows if r["rolled_back"]] == list(range(101, 221))
    assert snapshot(d.restart().client(), "m") == got


def test_rollback_replays_and_undoes_trainings(daemon, tmp_path):
    d = daemon()
    c = d.client()
    create(c)
    trs = transitions(250, seed=21)
    feed(c, "m", trs[:100], first=1)
    cp1 = checkpoint(c, "m", label="one")
    at_cp1 = snapshot(c, "m")
    feed(c, "m", trs[100:150], first=101)
    c.send({"op": "train", "model": "m", "estimator": "rp", "passes": 4})
    assert read_train(c, 4)["passes"] == 4
    feed(c, "m", trs[150:200], first=151)
    cp2 = checkpoint(c, "m", label="two")
    feed(c, "m", trs[200:], first=201)
    c.wait_applied("m", 250)
    # replay: the training after seq 150 is learnt again in its place; cp2 is invalidated
    rep = c.call({"op": "rollback", "model": "m", "checkpoint": cp1["checkpoint"],
                  "replay": True, "exclude": {"seq": [121, 130]}}, timeout=30)
    assert rep == {"ok": True, "checkpoint": cp1["checkpoint"], "seq": 100, "undone": 10,
                   "replayed": 140}, rep
    assert [e["checkpoint"] for e in listed(c, "m")] == [cp1["checkpoint"]]
    c.err({"op": "rollback", "model": "m", "checkpoint": cp2["checkpoint"]},
          "no_such_checkpoint")
    c.wait_applied("m", 250)
    got = snapshot(c, "m")
    kept = trs[:120] + trs[130:]
    assert got == fresh_snapshot(daemon, tmp_path, kept, trains=[(140, "rp", 4)]), \
        "rollback with replay: values differ from a fresh daemon fed the same and trained"
    d.kill9()
    d = d.restart()
    c = d.client()
    assert snapshot(c, "m") == got, "recovery after a rollback with a training differs"
    # without replay: the training is undone with the transitions
    rep = c.ok({"op": "rollback", "model": "m", "checkpoint": cp1["checkpoint"]})
    assert (rep["undone"], rep["replayed"]) == (140, 0), rep
    assert snapshot(c, "m") == at_cp1
    d.kill9()
    db = ro(d.db)
    try:
        tr = db.execute("SELECT after_seq, rolled_back FROM trainings WHERE model = ?",
                        (model_id(db, "m"),)).fetchall()
    finally:
        db.close()
    assert len(tr) == 1 and tr[0][0] == 150 and tr[0][1] != 0, tr
    assert snapshot(d.restart().client(), "m") == at_cp1, "recovery learnt an undone training"


def test_rollback_replay_while_ingesting(daemon, tmp_path):
    # A producer streams durable batches meanwhile.  Whatever the interleaving, the result is
    # the checkpoint's state plus every transition after it that is not in the window, in seq
    # order: the same as a fresh daemon fed the log's kept rows.
    d = daemon()
    c = d.client()
    create(c)
    trs = transitions(4000, seed=25)
    feed(c, "m", trs[:20], first=1)
    cp = checkpoint(c, "m")
    acked, stop, errors = [20], threading.Event(), []

    def produce():
        try:
            p = Client(d.sock)
            deadline = time.monotonic() + 30
            for i in range(20, len(trs), 10):
                if stop.is_set() or time.monotonic() > deadline:
                    break
                rep = p.call({"op": "observe", "model": "m", "batch": trs[i:i + 10]})
                assert rep.get("ok") is True and rep["seq"] == i + 10, rep
                acked[0] = rep["seq"]
            p.close()
        except BaseException as e:
            errors.append(repr(e))

    def wait_acked(n):
        deadline = time.monotonic() + 20
        for _ in range(20_000):
            if acked[0] >= n or not t.is_alive() or time.monotonic() > deadline:
                break
            time.sleep(0.002)
        assert acked[0] >= n, (acked[0], errors)

    t = threading.Thread(target=produce)
    t.start()
    wait_acked(200)
    low = acked[0]
    rep = c.call({"op": "rollback", "model": "m", "checkpoint": cp["checkpoint"],
                  "replay": True, "exclude": {"seq": [50, 80]}}, timeout=30)
    high = acked[0] + 10
    wait_acked(high + 200)
    stop.set()
    t.join(30)
    assert not t.is_alive() and not errors, errors
    assert rep.get("ok") is True and rep["undone"] == 31 and rep["seq"] == 20, rep
    covered = rep["seq"] + rep["undone"] + rep["replayed"]  # the log the rollback saw
    assert low <= covered <= high, (low, covered, high)
    total = acked[0]
    c.wait_applied("m", total, timeout=30)
    got = snapshot(c, "m")
    d.kill9()
    rows = log_rows(d.db, "m")
    assert [r["seq"] for r in rows] == list(range(1, total + 1))
    assert [r["seq"] for r in rows if r["rolled_back"]] == list(range(50, 81))
    kept = [row_to_tr(r) for r in rows if not r["rolled_back"]]
    assert got == fresh_snapshot(daemon, tmp_path, kept), \
        "rollback under ingest: values differ from the kept log learnt in order"
    assert snapshot(d.restart().client(), "m") == got


def test_kill9_during_rollback_replay(daemon, tmp_path):
    # A crash while a rollback re-learns a long log, just after it marked its window (seen
    # through a read-only connection): after recovery the model is what the log says.
    d = daemon("--checkpoint-every", 0)
    c = d.client()
    create(c)
    first = transitions(10, seed=27)
    feed(c, "m", first, first=1)
    cp = checkpoint(c, "m")
    n, bulks = 65536, 3  # (bulks of at most --max-batch records)
    rng = np.random.default_rng(28)
    x = rng.uniform([0, -5], [10, 5], size=(n * bulks + 1, 2))
    rec = np.column_stack([x[:-1], rng.normal(size=n * bulks), x[1:],
                           np.zeros(n * bulks)]).astype("<f8")
    for k in range(bulks):
        c.send({"op": "observe.bulk", "model": "m", "count": n})
        c.send_raw(rec[k * n:(k + 1) * n].tobytes())
        assert c.recv(60)["seq"] == 10 + (k + 1) * n
    total = 10 + n * bulks
    c.wait_applied("m", total, timeout=60)
    db = ro(d.db)
    try:
        mid = model_id(db, "m")
        c.send({"op": "rollback", "model": "m", "checkpoint": cp["checkpoint"], "replay": True,
                "exclude": {"seq": [20, 30]}})
        deadline = time.monotonic() + 20
        for _ in range(20_000):
            if logdb.undone_count(db, mid) or time.monotonic() > deadline:
                break
            time.sleep(0.001)
    finally:
        db.close()
    answered = bool(select.select([c.sock], [], [], 0)[0])
    d.kill9()
    print(f"rollback {'answered' if answered else 'not yet answered'} at the crash")
    db = ro(d.db)
    try:
        marked = logdb.undone_seqs(db, mid)
        assert logdb.count_max(db, mid) == (total, total)
    finally:
        db.close()
    assert marked == list(range(20, 31)), marked[:20]
    c = d.restart(ready_timeout=60).client()
    st = c.stats("m")
    assert (st["received"], st["applied"]) == (total, total), st
    got = snapshot(c, "m")
    # the reference: a fresh daemon fed the same minus the window (the first ten as JSON, the
    # rest as the same binary records)
    f = daemon(db=tmp_path / "fresh.db")
    fc = f.client()
    create(fc)
    feed(fc, "m", first, first=1)
    kept = np.delete(rec, np.arange(20, 31) - 11, axis=0)  # rec[i] is seq 11 + i
    for k in range(0, len(kept), n):
        part = kept[k:k + n]
        fc.send({"op": "observe.bulk", "model": "m", "count": len(part)})
        fc.send_raw(part.tobytes())
        assert fc.recv(60)["seq"] == 10 + k + len(part)
    fc.wait_applied("m", 10 + len(kept), timeout=60)
    assert got == snapshot(fc, "m"), "recovery after a crash in a rollback differs from the log"


# train ---------------------------------------------------------------------------------------

def test_train_is_logged(daemon):
    # Trainings are replayed in their place: after a checkpoint that includes one (not again),
    # after the checkpoint restored, and in a full replay.
    d = daemon()
    c = d.client()
    create(c)
    trs = transitions(160, seed=12)
    feed(c, "m", trs[:100], first=1)
    c.wait_applied("m", 100)
    untrained = snapshot(c, "m")
    c.send({"op": "train", "model": "m", "estimator": "rp", "passes": 5})
    assert read_train(c, 5)["passes"] == 5
    trained = snapshot(c, "m")
    assert trained != untrained  # premise: training moved the weights
    feed(c, "m", trs[100:150], first=101)
    assert checkpoint(c, "m", label="after-first-training")["seq"] == 150
    c.send({"op": "train", "model": "m", "estimator": "lstd"})
    read_train(c, 10)
    c.send({"op": "train", "model": "m", "estimator": "rp", "passes": 3})
    assert read_train(c, 3)["passes"] == 3
    feed(c, "m", trs[150:], first=151)
    c.wait_applied("m", 160)
    before = snapshot(c, "m")
    d.kill9()
    db = ro(d.db)
    try:
        tr = db.execute("SELECT after_seq, estimator, passes, rolled_back FROM trainings "
                        "WHERE model = ? ORDER BY id", (model_id(db, "m"),)).fetchall()
    finally:
        db.close()
    assert [(a, e, r) for a, e, _, r in tr] == [(100, "rp", 0), (150, "lstd", 0),
                                                (150, "rp", 0)], tr
    assert (tr[0][2], tr[2][2]) == (5, 3), tr
    # restored from the checkpoint at 150, then the two trainings and 10 transitions
    d = d.restart()
    assert snapshot(d.client(), "m") == before, "values differ after replaying trainings"
    d.kill9()
    # a full replay: every checkpoint damaged
    db = ro(d.db)
    try:
        ids = [r[0] for r in db.execute("SELECT id FROM checkpoints")]
    finally:
        db.close()
    assert ids
    flip_state_byte(d.db, ids)
    d = d.restart()
    assert snapshot(d.client(), "m") == before, "a full replay of trainings differs"
    # and through the clean-shutdown path
    d = d.restart()
    assert snapshot(d.client(), "m") == before


# automatic checkpoints -----------------------------------------------------------------------

def test_automatic_checkpoints_pruned(daemon):
    d = daemon("--checkpoint-every", 100, "--keep", 2)
    c = d.client()
    create(c)
    trs = transitions(1100, seed=13)
    feed(c, "m", trs[:150], batch=10, first=1)
    keep = checkpoint(c, "m", label="keep-me")
    assert keep["seq"] == 150
    feed(c, "m", trs[150:1000], batch=10, first=151)
    c.wait_applied("m", 1000)
    got = None
    deadline = time.monotonic() + 5
    for _ in range(500):
        got = listed(c, "m")
        auto = [e for e in got if e["label"] is None]
        if auto and auto[0]["seq"] >= 900 or time.monotonic() > deadline:
            break
        time.sleep(0.01)
    auto = [e for e in got if e["label"] is None]
    assert 1 <= len(auto) <= 2, got
    assert auto[0]["seq"] >= 900, f"no automatic checkpoint in the last 100 transitions: {got}"
    assert [e["label"] for e in got if e["label"] is not None] == ["keep-me"], got
    assert got[0]["seq"] == max(e["seq"] for e in got), got
    ids = [e["checkpoint"] for e in got]
    assert ids == sorted(ids, reverse=True), got
    # a labelled newest, then more automatic ones: still at most 2 unlabelled
    top = checkpoint(c, "m", label="top")
    feed(c, "m", trs[1000:], batch=10, first=1001)
    c.wait_applied("m", 1100)
    got = listed(c, "m")
    labels = [e["label"] for e in got]
    assert "keep-me" in labels and "top" in labels, got
    assert sum(lb is None for lb in labels) <= 2, got
    assert got[0]["seq"] >= top["seq"]
    d.shutdown()
    db = ro(d.db)
    try:
        n = db.execute("SELECT count(*) FROM checkpoints WHERE model = ? AND label IS NULL "
                       "AND invalid = 0", (model_id(db, "m"),)).fetchone()[0]
    finally:
        db.close()
    assert 1 <= n <= 2, f"{n} unlabelled checkpoints kept in the database with --keep 2"


def test_checkpoint_every_0_is_off(daemon):
    d = daemon("--checkpoint-every", 0)
    c = d.client()
    create(c)
    feed(c, "m", transitions(300, seed=22), batch=10, first=1)
    c.wait_applied("m", 300)
    assert listed(c, "m") == []
    # the shutdown checkpoint is still taken
    c = d.restart().client()
    assert [e["seq"] for e in listed(c, "m")] == [300]


def test_restart_answers_only_after_recovery(daemon):
    # A log long enough that replaying it takes a while (no checkpoint: a full replay): the
    # first answers after the restart already come from the recovered model.
    d = daemon("--checkpoint-every", 0)
    c = d.client()
    create(c)
    bulk, bulks = 65536, 3
    n = bulk * bulks
    rng = np.random.default_rng(23)
    x = rng.uniform([0, -5], [10, 5], size=(n + 1, 2))
    term = (np.arange(n) % 13 == 12).astype(float)
    rec = np.column_stack([x[:-1], rng.normal(size=n), x[1:], term]).astype("<f8")
    for k in range(bulks):
        c.send({"op": "observe.bulk", "model": "m", "count": bulk})
        c.send_raw(rec[k * bulk:(k + 1) * bulk].tobytes())
        assert c.recv(60) == {"ok": True, "seq": (k + 1) * bulk, "count": bulk,
                              "durable": True}
    t0 = time.monotonic()
    c.wait_applied("m", n, timeout=60)
    print(f"learnt {n} transitions in {time.monotonic() - t0:.2f} s after the last reply")
    before = snapshot(c, "m")
    d.kill9()
    t0 = time.monotonic()
    d = d.restart(ready_timeout=60)
    took = time.monotonic() - t0
    c = d.client()
    st = c.stats("m")
    assert (st["received"], st["applied"], st["queue"]) == (n, n, 0), st
    assert c.ok({"op": "value", "model": "m", "x": PROBES[0]})["seq"] == n
    assert snapshot(c, "m") == before
    print(f"recovery of {n} transitions: ready after {took:.2f} s")


# corrupted checkpoints -----------------------------------------------------------------------

def flip_state_byte(path, ids):
    """Flips one byte in the middle of each checkpoint's state (worthd must be stopped)."""
    db = sqlite3.connect(str(path), timeout=10)
    try:
        for cid in ids:
            (state,) = db.execute("SELECT state FROM checkpoints WHERE id = ?",
                                  (cid,)).fetchone()
            b = bytearray(state)
            b[len(b) // 2] ^= 0x5A
            db.execute("UPDATE checkpoints SET state = ? WHERE id = ?", (bytes(b), cid))
        db.commit()
    finally:
        db.close()


def test_corrupted_checkpoint_refused(daemon):
    d = daemon()
    c = d.client()
    create(c)
    trs = transitions(300, seed=14)
    feed(c, "m", trs[:150], first=1)
    checkpoint(c, "m", label="a")
    feed(c, "m", trs[150:250], first=151)
    checkpoint(c, "m")
    feed(c, "m", trs[250:], first=251)
    c.wait_applied("m", 300)
    before = snapshot(c, "m")
    d.shutdown()
    db = ro(d.db)
    try:
        ids = [r[0] for r in db.execute(
            "SELECT id FROM checkpoints WHERE model = ? AND invalid = 0 ORDER BY id",
            (model_id(db, "m"),))]
    finally:
        db.close()
    assert len(ids) == 3, ids  # a, the unlabelled one, the shutdown one
    # the newest is damaged: recovery falls back to an older one and replays from there
    flip_state_byte(d.db, [ids[-1]])
    d2 = d.restart()
    assert snapshot(d2.client(), "m") == before, "values differ after refusing a checkpoint"
    lines = [ln for ln in d2.stderr.splitlines()
             if "checkpoint" in ln.lower() and re.search(rf"\b{ids[-1]}\b", ln)]
    assert lines, f"worthd did not log the refused checkpoint {ids[-1]}:\n{d2.tail()}"
    d2.kill9()
    # every checkpoint of the model damaged (the newest already is): a full replay of the log
    db = ro(d.db)
    try:
        rest = [r[0] for r in db.execute("SELECT id FROM checkpoints WHERE model = ? AND id != ?",
                                         (model_id(db, "m"), ids[-1]))]
    finally:
        db.close()
    assert len(rest) >= 2, rest
    flip_state_byte(d.db, rest)
    d3 = d2.restart()
    c = d3.client()
    assert snapshot(c, "m") == before, "values differ after a full replay"
    assert c.call({"op": "observe", "model": "m", "x": [1, 1], "r": 1.0, "terminal": True}) == \
        {"ok": True, "seq": 301, "durable": True}


# backup --------------------------------------------------------------------------------------

def test_backup(daemon, tmp_path):
    bk = tmp_path / "bk"
    bk.mkdir()
    d = daemon("--backup-dir", bk)
    c = d.client()
    create(c, "a")
    assert c.call(small_spec("b"))["ok"] is True
    feed(c, "a", transitions(200, seed=15), first=1)
    feed(c, "b", [{"x": [0.5], "r": 1.0, "terminal": True}] * 30, first=1)
    checkpoint(c, "a", label="bk")
    path = os.path.realpath(bk / "worth.db")
    rep = c.call({"op": "backup", "name": "worth.db", "id": "b1"}, timeout=30)
    assert rep == {"ok": True, "id": "b1", "name": "worth.db", "path": path,
                   "bytes": os.path.getsize(path)}, rep
    assert os.listdir(bk) == ["worth.db"], f"left behind: {os.listdir(bk)}"

    def check(expect_a, expect_b):
        db = ro(path, immutable=True)  # the copy alone must hold everything
        try:
            assert db.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
            assert db.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
            n = {name: logdb.count(db, model_id(db, name)) for name in ("a", "b")}
            assert n == {"a": expect_a, "b": expect_b}, n
            labels = [r[0] for r in db.execute("SELECT label FROM checkpoints")]
            assert "bk" in labels, labels
        finally:
            db.close()

    check(200, 30)
    # a second backup replaces the first, through a temporary file that does not stay
    feed(c, "a", transitions(20, seed=16), first=201)
    c.wait_applied("a", 220)
    c.wait_applied("b", 30)
    snap = snapshot(c, "a")
    rep = c.call({"op": "backup", "name": "worth.db"}, timeout=30)
    assert rep == {"ok": True, "name": "worth.db", "path": path,
                   "bytes": os.path.getsize(path)}, rep
    assert os.listdir(bk) == ["worth.db"], f"left behind: {os.listdir(bk)}"
    check(220, 30)
    # a name that is a path fails, writes nothing, and worthd goes on
    c.err({"op": "backup", "name": "nodir/x.db"}, "bad_param", timeout=30)
    assert not os.path.exists(bk / "nodir") and os.listdir(bk) == ["worth.db"]
    c.assert_open()
    # the copy is a whole worthd database: a daemon started on it has the same models
    d.shutdown()
    r = daemon(db=path).client()
    assert sorted(m["model"] for m in r.ok({"op": "model.list"})["models"]) == ["a", "b"]
    assert snapshot(r, "a") == snap
    assert r.stats("a")["received"] == 220


def test_backup_onto_the_live_database_loses_nothing(daemon, tmp_path):
    # With the backup directory the database's own, a backup named as worthd's database (or
    # one of its companions) must not replace the live file: worthd refuses it (bad_param),
    # every acknowledged transition stays, the file stays sound.
    d = daemon("--backup-dir", tmp_path)
    c = d.client()
    assert c.call(small_spec("s"))["ok"] is True
    assert c.call({"op": "observe", "model": "s", "x": [0.5], "r": 1.0, "terminal": True}) == \
        {"ok": True, "seq": 1, "durable": True}
    base = os.path.basename(d.db)
    for name in (base, base + "-wal", base + "-shm", base + "-journal", base + ".lock"):
        err = c.err({"op": "backup", "name": name}, "bad_param", timeout=30)
        assert "own" in err["message"], err
    assert not os.path.exists(d.db + "-journal")
    c.assert_open()
    # enough writes (about 4 MB of log) for SQLite to checkpoint its WAL into the main file
    n, bulks = 65536, 4
    rec = np.tile([0.5, 1.0, 0.5, 0.0], (n, 1)).astype("<f8").tobytes()
    for k in range(bulks):
        c.send({"op": "observe.bulk", "model": "s", "count": n})
        c.send_raw(rec)
        assert c.recv(60) == {"ok": True, "seq": 1 + (k + 1) * n, "count": n, "durable": True}
    c.wait_applied("s", 1 + bulks * n, timeout=60)
    d.kill9()
    db = ro(d.db)
    try:
        assert db.execute("PRAGMA integrity_check").fetchall() == [("ok",)], \
            "the database is damaged after a backup onto its own path"
        assert logdb.count_max(db) == (1 + bulks * n, 1 + bulks * n)
    finally:
        db.close()


def test_backup_during_ingest(daemon, tmp_path):
    d = daemon()
    c = d.client()
    create(c)
    trs = transitions(5000, seed=24)
    acked, stop = [0], threading.Event()
    errors = []

    def produce():
        try:
            p = Client(d.sock)
            deadline = time.monotonic() + 30
            for i in range(0, len(trs), 10):
                if stop.is_set() or time.monotonic() > deadline:
                    break
                rep = p.call({"op": "observe", "model": "m", "batch": trs[i:i + 10]})
                assert rep.get("ok") is True and rep["seq"] == i + 10, rep
                acked[0] = rep["seq"]
            p.close()
        except BaseException as e:
            errors.append(repr(e))

    t = threading.Thread(target=produce)
    t.start()
    deadline = time.monotonic() + 20
    for _ in range(20_000):
        if acked[0] >= 200 or not t.is_alive() or time.monotonic() > deadline:
            break
        time.sleep(0.002)
    path = os.path.realpath(tmp_path / "backups" / "during.db")  # the default --backup-dir
    low = acked[0]
    rep = c.call({"op": "backup", "name": "during.db"}, timeout=30)
    high = acked[0] + 10  # a batch may be committed but not yet acknowledged
    stop.set()
    t.join(30)
    assert not t.is_alive() and not errors, errors
    assert low >= 200, low
    assert rep == {"ok": True, "name": "during.db", "path": path,
                   "bytes": os.path.getsize(path)}, rep
    db = ro(path, immutable=True)
    try:
        assert db.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
        seqs = logdb.seqs(db, model_id(db, "m"))
    finally:
        db.close()
    print(f"acknowledged {low} before the backup, {high - 10} after; the copy has {len(seqs)}")
    assert seqs == list(range(1, len(seqs) + 1)), "the copy's log has gaps"
    assert low <= len(seqs) <= high, (low, len(seqs), high)


# schema, events, lock -----------------------------------------------------------------------

def table_shape(db):
    tables = {r[0] for r in db.execute(
        "SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'")}
    shape = {t: db.execute(f"PRAGMA table_info({t})").fetchall() for t in tables}
    indexes = {r[0] for r in db.execute(
        "SELECT name FROM sqlite_master WHERE type = 'index' AND sql IS NOT NULL")}
    return shape, indexes


def test_schema(daemon):
    d = daemon()
    c = d.client()
    assert c.call(small_spec("s"))["ok"] is True
    d.shutdown()
    ref = sqlite3.connect(":memory:")
    for path in MIGRATIONS:
        with open(path) as f:
            ref.executescript(f.read())
    want, want_idx = table_shape(ref)
    ref.close()
    assert set(want) == {"models", "transitions", "trainings", "checkpoints", "events",
                         "sources", "retention", "history", "log_blocks", "log_undone"}
    db = ro(d.db)
    try:
        assert db.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
        assert db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        got, got_idx = table_shape(db)
        for t in want:
            assert got.get(t) == want[t], f"table {t}: {got.get(t)} != {want[t]}"
        assert want_idx <= got_idx, (want_idx, got_idx)
        (name, spec_text, created, dropped) = db.execute(
            "SELECT name, spec, created_at, dropped_at FROM models").fetchone()
    finally:
        db.close()
    assert (name, dropped) == ("s", None)
    assert abs(created - time.time()) < 300
    stored = json.loads(spec_text)
    for k in ("dims", "gamma", "ranges"):
        assert stored[k] == small_spec()[k], stored
    assert [e["name"] for e in stored["estimators"]] == ["td"]
    assert stored["estimators"][0]["alpha"] == 0.1 and "init" in stored["estimators"][0]
    # a restart on the migrated database keeps it at the newest version
    d.restart().shutdown()
    db = ro(d.db)
    try:
        assert db.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
    finally:
        db.close()


@pytest.mark.parametrize("kind", ["newer-schema", "not-a-database"])
def test_unusable_database_refused(daemon, tmp_path, kind):
    # A database of a newer schema version, or a file that is no database: worthd exits
    # non-zero with a message and leaves the file as it was.
    path = tmp_path / f"{kind}.db"
    if kind == "newer-schema":
        db = sqlite3.connect(path)
        db.execute("CREATE TABLE later (a)")
        db.execute("PRAGMA user_version = 99")
        db.commit()
        db.close()
    else:
        path.write_bytes(b"this is not an SQLite database\n" * 200)
    content = path.read_bytes()
    d = daemon(db=path, ready=False, expect_rc=None)
    rc = d.wait_exit(10)
    assert rc is not None and rc != 0, f"worthd started on a {kind} file: {rc}\n{d.tail()}"
    assert d.stderr.strip(), "refusal without a message on stderr"
    if kind == "newer-schema":
        # (the journal mode may have been set: WAL, as a newer worthd uses too)
        db = ro(path)
        try:
            assert db.execute("PRAGMA user_version").fetchone()[0] == 99
            tables = {r[0] for r in db.execute("SELECT name FROM sqlite_master")}
            assert tables == {"later"}, f"worthd migrated a newer database: {tables}"
        finally:
            db.close()
    else:
        assert path.read_bytes() == content, "worthd changed a file it refused"


def test_events(daemon):
    d = daemon()
    c = d.client()
    create(c)
    assert c.call(small_spec("s"))["ok"] is True
    feed(c, "m", transitions(40, seed=17), first=1)
    cp = checkpoint(c, "m", label="ev")
    feed(c, "m", transitions(10, seed=18), first=41)
    c.wait_applied("m", 50)
    assert c.ok({"op": "rollback", "model": "m", "checkpoint": cp["checkpoint"]})["undone"] == 10
    assert c.call({"op": "model.drop", "model": "s"}) == {"ok": True, "persisted": True}
    d.shutdown()
    db = ro(d.db)
    try:
        mid = model_id(db, "m")
        sid = db.execute("SELECT id FROM models WHERE name = 's'").fetchone()[0]
        assert db.execute("SELECT dropped_at FROM models WHERE id = ?",
                          (sid,)).fetchone()[0] is not None
        ev = db.execute("SELECT id, model, kind, detail, at FROM events ORDER BY id").fetchall()
        rb_marks = logdb.rollback_ids(db, mid)
    finally:
        db.close()
    kinds = [(model, kind) for _, model, kind, _, _ in ev]
    for detail in (e[3] for e in ev):
        assert isinstance(json.loads(detail), dict), detail
    assert all(abs(e[4] - time.time()) < 300 for e in ev), ev
    assert (mid, "checkpoint") in kinds, ev
    assert (mid, "rollback") in kinds, ev
    assert (sid, "drop") in kinds, ev
    assert "start" in [k for _, k in kinds] and "stop" in [k for _, k in kinds], ev
    rollback_ids = {e[0] for e in ev if e[2] == "rollback"}
    assert rb_marks and rb_marks <= rollback_ids, (rb_marks, rollback_ids)


def test_second_daemon_same_db_refuses(daemon):
    first = daemon()
    c = first.client()
    assert c.call(small_spec("s"))["ok"] is True
    assert c.call({"op": "observe", "model": "s", "x": [0.5], "r": 1.0, "terminal": True}) == \
        {"ok": True, "seq": 1, "durable": True}
    # the same database, another socket path
    second = daemon(ready=False, expect_rc=None)
    assert second.db == first.db and second.sock != first.sock
    rc = second.wait_exit(10)
    assert rc is not None and rc != 0, f"second worthd on the same database: {rc}"
    assert second.stderr.strip(), "refusal without a message on stderr"
    # the first goes on, and the database holds its transitions only
    assert c.call({"op": "observe", "model": "s", "x": [0.5], "r": 1.0, "terminal": True}) == \
        {"ok": True, "seq": 2, "durable": True}
    c.wait_applied("s", 2)
    assert first.proc.poll() is None
    first.shutdown()
    assert [r["seq"] for r in log_rows(first.db, "s")] == [1, 2]


def test_second_daemon_same_db_via_symlink_refuses(daemon, tmp_path):
    # The same database file under another name is the same database.
    first = daemon()
    c = first.client()
    assert c.call(small_spec("s"))["ok"] is True
    link = tmp_path / "link.db"
    os.symlink(first.db, link)
    second = daemon(db=link, ready=False, expect_rc=None)
    rc = second.wait_exit(5)
    assert rc is not None and rc != 0, \
        f"a second worthd on the same database through a symlink: {rc}\n{second.tail()}"
    assert second.stderr.strip(), "refusal without a message on stderr"
    assert c.call({"op": "observe", "model": "s", "x": [0.5], "r": 1.0, "terminal": True}) == \
        {"ok": True, "seq": 1, "durable": True}


def test_refused_requests_are_not_logged(daemon):
    d = daemon()
    c = d.client()
    assert c.call(small_spec("s"))["ok"] is True
    assert c.call({"op": "observe", "model": "s", "x": [0.5], "r": 1.0, "terminal": True}) == \
        {"ok": True, "seq": 1, "durable": True}
    # a batch with one bad element: nothing of it
    c.err({"op": "observe", "model": "s", "batch": [
        {"x": [0.1], "r": 1.0, "terminal": True}, {"x": [0.2], "r": "NaN", "terminal": True}]},
        "bad_number")
    # a bulk cut short by the end of the connection: nothing of it
    p = d.client()
    p.send({"op": "observe.bulk", "model": "s", "count": 4})
    p.send_raw(np.array([[0.3, 1.0, 0.4, 0.0]] * 2, "<f8").tobytes())
    p.sock.shutdown(socket.SHUT_WR)
    c.expect_error(p.recv(), "truncated")
    assert c.call({"op": "observe", "model": "s", "x": [0.6], "r": 2.0, "terminal": True}) == \
        {"ok": True, "seq": 2, "durable": True}
    c.wait_applied("s", 2)
    d.kill9()
    rows = log_rows(d.db, "s")
    assert [(r["seq"], r["x"], r["r"]) for r in rows] == [(1, [0.5], 1.0), (2, [0.6], 2.0)], rows
