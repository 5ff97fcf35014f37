"""Long work that must not hold worthd hostage: training and recovery (issue item 7).

A `train` of a replay estimator is cut short at a mini-batch step when worthd is asked to
stop, when the model is dropped and when a rollback waits behind it; the log records how many
steps it took, so a replay of the log rebuilds the same weights bit for bit; and a checkpoint
right after every training spares recovery from training again.  A stop signal during a long
recovery ends worthd within a second instead of after the whole log.

The contract is schema/protocol.md ("train", "Restart") and schema/README.md (trainings.steps).
Servers listen on a Unix socket in a temporary directory; every wait is bounded.  Run with
Debian's /usr/bin/python3 (numpy, pytest 7.2).
"""
import os
import signal
import sqlite3
import struct
import time

import numpy as np

from test_limits import poll_until

FEED = 4000


def model_req(name="m", capacity=4000):
    return {"op": "model.create", "model": name, "dims": 2, "gamma": 0.9,
            "ranges": [[0, 1], [0, 1]],
            "features": [{"basis": "bias"}, {"basis": "rbf", "centers": 4, "width": 0.2}],
            "estimators": [{"name": "td", "kind": "td", "alpha": 0.05},
                           # tol 1e-300: never converges, so a training runs all its passes
                           {"name": "rep", "kind": "replay", "alpha": 0.01,
                            "capacity": capacity, "batch": 32, "tol": 1e-300,
                            "steps_per_obs": 0}]}


def feed(c, n, seed=3):
    rng = np.random.default_rng(seed)
    x = rng.random((n + 1, 2))
    recs = b"".join(struct.pack("<6d", *x[i], float(rng.normal()), *x[i + 1], 0.0)
                    for i in range(n))
    c.send_raw(b'{"op":"observe.bulk","model":"m","count":%d}\n' % n + recs)
    assert c.recv(30)["ok"] is True


PROBES = [[0.1, 0.2], [0.5, 0.5], [0.9, 0.3]]


def values(c):
    return [c.ok({"op": "value", "model": "m", "x": x})["estimators"] for x in PROBES]


def start_training(c, passes=100000, rid="t"):
    """Sends a long train and waits for its first progress line (it is running)."""
    c.send({"op": "train", "model": "m", "estimator": "rep", "passes": passes, "id": rid})
    line = c.recv(30)
    assert "progress" in line, line
    return line


def trainings(db):
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        return conn.execute("SELECT ordinal, passes, steps FROM trainings ORDER BY ordinal")\
            .fetchall()
    finally:
        conn.close()


def drain_until_reply(c, timeout):
    """Reads progress lines until the final reply of the training; returns it."""
    deadline = time.monotonic() + timeout
    for _ in range(1_000_000):
        rep = c.recv(max(0.1, deadline - time.monotonic()))
        if "progress" not in rep:
            return rep
    raise AssertionError("no final reply")


def test_sigterm_during_train_stops_within_a_second_and_replays_exactly(daemon):
    """Before: SIGTERM waited 23 s for a training to finish."""
    d = daemon("--checkpoint-every", 0)
    c = d.client(timeout=30)
    c.ok(model_req())
    feed(c, FEED)
    c.wait_applied("m", FEED, timeout=30)
    start_training(c)
    time.sleep(0.3)
    t0 = time.monotonic()
    d.proc.send_signal(signal.SIGTERM)
    rep = drain_until_reply(c, 10)
    rc = d.wait_exit(10)
    took = time.monotonic() - t0
    print(f"SIGTERM during a 100000-pass training: worthd exited {rc} after {took:.2f} s; {rep}")
    assert rc == 0
    assert took < 1.0, f"worthd took {took:.2f} s to stop during a training"
    c.expect_error(rep, "cancelled")
    assert "worthd is stopping" in rep["error"]["message"], rep
    rows = trainings(d.db)
    assert len(rows) == 1 and rows[0][1] == 100000 and rows[0][2] > 0, rows
    steps = rows[0][2]
    # the restart restores the checkpoint taken right after the cut training: nothing replayed
    d = d.restart()
    assert "replayed 0 transitions" in d.stderr, d.tail()
    c = d.client()
    after = values(c)
    d.shutdown()
    # without any checkpoint, the log alone (4000 transitions, then the training cut at its
    # recorded steps) rebuilds the same values bit for bit
    conn = sqlite3.connect(d.db)
    conn.execute("DELETE FROM checkpoints")
    conn.commit()
    conn.close()
    d = d.restart()
    assert f"replayed {FEED} transitions" in d.stderr, d.tail()
    assert values(d.client()) == after
    assert trainings(d.db)[0][2] == steps


def test_drop_during_train_frees_the_core(daemon):
    """Before: a dropped model went on training on a full core."""
    d = daemon()
    c = d.client(timeout=30)
    c.ok(model_req())
    feed(c, FEED)
    c.wait_applied("m", FEED, timeout=30)
    start_training(c)
    other = d.client()
    t0 = time.monotonic()
    assert other.ok({"op": "model.drop", "model": "m"})["persisted"] is True
    rep = drain_until_reply(c, 5)
    took = time.monotonic() - t0
    assert rep.get("ok") is False and rep["error"]["code"] in ("cancelled", "no_such_model"), rep
    assert took < 1.0, f"the training answered {took:.2f} s after the drop"

    def cpu_s():
        with open(f"/proc/{d.proc.pid}/stat") as f:
            fields = f.read().rsplit(")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")

    time.sleep(0.2)
    before = cpu_s()
    time.sleep(1.0)
    used = cpu_s() - before
    print(f"after the drop: {used:.2f} s of CPU in 1 s")
    assert used < 0.3, f"worthd still used {used:.2f} s of CPU per second after the drop"


def test_rollback_cuts_a_training_short(daemon):
    d = daemon("--checkpoint-every", 0)
    c = d.client(timeout=30)
    c.ok(model_req())
    feed(c, FEED)
    cp = c.ok({"op": "checkpoint", "model": "m"})["checkpoint"]
    feed(c, 500, seed=4)
    c.wait_applied("m", FEED + 500, timeout=30)
    start_training(c)
    other = d.client(timeout=10)
    t0 = time.monotonic()
    rb = other.ok({"op": "rollback", "model": "m", "checkpoint": cp})
    took = time.monotonic() - t0
    assert rb["undone"] == 500, rb
    assert took < 1.0, f"the rollback waited {took:.2f} s for a training"
    rep = drain_until_reply(c, 5)
    c.expect_error(rep, "cancelled")
    assert "rollback" in rep["error"]["message"], rep
    # the model trains again afterwards: the cut does not stick
    c.send({"op": "train", "model": "m", "estimator": "rep", "passes": 2})
    rep = drain_until_reply(c, 30)
    assert rep == {"ok": True, "passes": 2, "change": rep["change"], "converged": False}, rep


def test_recovery_does_not_train_again(daemon):
    """Before: every training since the last checkpoint ran again at start-up, before the
    socket opened."""
    d = daemon("--checkpoint-every", 0)
    c = d.client(timeout=30)
    c.ok(model_req())
    feed(c, FEED)
    c.send({"op": "train", "model": "m", "estimator": "rep", "passes": 40})
    assert drain_until_reply(c, 60)["ok"] is True
    before = values(c)
    # the checkpoint taken right after the training (committed by the writer a moment later)
    poll_until(lambda: c.ok({"op": "checkpoints", "model": "m"})["checkpoints"], 5,
               "the checkpoint after the training")
    d.kill9()
    t0 = time.monotonic()
    d = d.restart()
    ready = time.monotonic() - t0
    assert "replayed 0 transitions" in d.stderr, d.tail()
    assert values(d.client()) == before
    print(f"restart after a 40-pass training: ready in {ready:.2f} s")


def test_stop_signal_during_recovery(daemon, tmp_path):
    """A log of 60,000 transitions for an rls_td model of 256 features takes seconds to
    replay; SIGTERM 0.3 s into it ends worthd (exit 0) within a second, and the next start
    recovers it whole."""
    d = daemon("--checkpoint-every", 0)
    c = d.client(timeout=30)
    c.ok({"op": "model.create", "model": "big", "dims": 2, "gamma": 0.9,
          "ranges": [[0, 1], [0, 1]],
          "features": [{"basis": "rbf", "centers": 16, "width": 0.1}],
          "estimators": [{"name": "rls", "kind": "rls_td"}]})
    d.shutdown()
    # the log is written straight into the database (as worthd writes it): feeding it through
    # worthd would learn it live first and make this test slow
    n = 60_000
    rng = np.random.default_rng(5)
    x = rng.random((n + 1, 2))
    conn = sqlite3.connect(d.db)
    mid = conn.execute("SELECT id FROM models WHERE name = 'big'").fetchone()[0]
    conn.executemany(
        "INSERT INTO transitions(model, seq, t, source, x, r, x_next, terminal, dt)"
        " VALUES(?,?,NULL,'',?,?,?,0,NULL)",
        ((mid, i + 1, x[i].astype("<f8").tobytes(), float(i % 7), x[i + 1].astype("<f8").tobytes())
         for i in range(n)))
    conn.commit()
    conn.close()
    d = d.restart(ready=False)
    poll_until(lambda: "database" in d.stderr, 5, "worthd opening its database")
    time.sleep(0.3)
    t0 = time.monotonic()
    d.proc.send_signal(signal.SIGTERM)
    rc = d.wait_exit(20)
    took = time.monotonic() - t0
    print(f"SIGTERM 0.3 s into recovery: exit {rc} after {took:.2f} s")
    assert rc == 0, d.tail()
    assert took < 1.0, f"worthd took {took:.2f} s to stop during recovery"
    assert "stop signal" in d.stderr, d.tail()
    d = d.restart(ready_timeout=120)
    st = d.client().stats("big")
    assert st["received"] == n and st["applied"] == n, st
