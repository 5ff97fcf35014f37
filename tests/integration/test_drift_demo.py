"""The demo's stuck sensor against a real worthd (tests only): the frozen-input check, the
drift alarm's onset, and a rollback that re-learns the days after the fault.

demo/plant.c (our own invented pumping station, one-minute samples) streams DAYS sound
days, a lead-in to the evening's low band, FAULT_DAYS with the demand transmitter stuck at
0 m3/h, then two sound days, and itself rolls back with the fault's time window excluded.
The test does not take the fault's times from the demo: it reads them off the log (the
stuck samples are the only ones whose demand is exactly 0), and holds the events to them.
"""
import json
import os
import re
import sqlite3
import struct
import subprocess

import pytest

from test_events_metrics import checkpoints, events
import logdb

PERIOD = 60.0          # one-minute samples (the model's period_s)
DAYS = 5

# WORTH_DAEMON is BUILD/daemon/worthd: the demo is BUILD/demo/plant
PLANT = os.path.join(os.path.dirname(os.path.dirname(os.environ.get("WORTH_DAEMON", "/x/y"))),
                     "demo", "plant")


def fault_window(db_path):
    """(t of the first stuck sample, t of the first sound one after, transitions in the
    window the demo excludes, transitions after it) from the log."""
    db = sqlite3.connect(f"file:{db_path}?mode=ro", uri=True)
    try:
        (mid,) = db.execute("SELECT id FROM models WHERE name = 'reservoir'").fetchone()
        rows = [(r[1], r[3], r[5]) for r in logdb.rows(db, mid)]
    finally:
        db.close()
    demand = [(t, struct.unpack("<5d", x)[1], struct.unpack("<5d", xn)[1]) for t, x, xn in rows]
    into = next(t for t, d, dn in demand if d != 0.0 and dn == 0.0)
    t0 = into + PERIOD
    t1 = next(t for t, d, dn in demand if t > t0 and d == 0.0 and dn != 0.0) + PERIOD
    n_window = sum(1 for t, _, _ in demand if t0 - PERIOD <= t <= t1 - 1)
    assert n_window == (t1 - t0) / PERIOD + 1  # into, within and out of the fault
    n_after = sum(1 for t, _, _ in demand if t >= t1)
    return t0, t1, n_window, n_after


@pytest.mark.skipif(not os.path.exists(PLANT), reason="demo/plant is not built")
def test_stuck_sensor_frozen_drift_onset_and_rollback(daemon, tmp_path):
    db = tmp_path / "demo.db"
    d = daemon(db=db)
    run = subprocess.run([PLANT, d.sock, str(DAYS)], capture_output=True, text=True,
                         timeout=300)
    print(run.stdout)
    assert run.returncode == 0, run.stdout + run.stderr
    t0, t1, n_window, n_after = fault_window(db)
    length = t1 - t0
    # three stuck days, then two sound days (the last sample starts no transition)
    assert length == 3 * 86400 and n_after == 2 * 1440 - 1, (t0, t1, n_after)
    c = d.client()
    evs = events(c, model="reservoir", limit=1000)

    # the frozen check on demand (dimension 1) fires within 10 control periods of the fault
    frozen = [e["detail"] for e in evs if e["kind"] == "input_frozen"]
    assert len(frozen) == 1, [e["kind"] for e in evs]
    f = frozen[0]
    assert f["dim"] == "demand" and f["dim_index"] == 1 and f["source"] == "station", f
    assert t0 <= f["t"] <= t0 + 10 * PERIOD, (f, t0)
    assert f["since_t"] == t0 and f["value"] == 0.0, f
    # and clears when the sensor moves again
    cleared = [e["detail"] for e in evs if e["kind"] == "input_frozen_cleared"]
    assert len(cleared) == 1 and cleared[0]["t"] == t1, cleared
    assert not [e for e in evs if e["kind"] in ("input_out_of_range", "source_silent")], evs

    # no drift alarm in the sound days before it (the stated rate is one in 90 days)
    drift = [e["detail"] for e in evs if e["kind"] == "drift"]
    assert drift and drift[0]["t"] >= t0 - PERIOD, drift
    # the first alarm dates the change within 5% of the fault's length
    a = drift[0]
    print(f"drift alarm {a['t'] - t0:+.0f} s from the fault's start, onset "
          f"{a['onset_t'] - t0:+.0f} s ({abs(a['onset_t'] - t0) / length:.1%} of its length)")
    assert abs(a["onset_t"] - t0) <= 0.05 * length, a
    assert a["t"] <= t0 + 0.25 * length, a  # and fires in its first quarter
    # the pre-drift checkpoint holds no transition from the onset on
    pre = a["pre_drift_checkpoint"]
    listed = checkpoints(c, "reservoir")
    cp = next(x for x in listed if x["checkpoint"] == pre)
    assert cp["label"] == "pre-drift" and cp["seq"] < a["onset_seq"], (cp, a)
    # every later alarm reuses the one copy (its checkpoint has not changed)
    assert len([x for x in listed if x["label"] == "pre-drift"]) == 1, listed

    # the demo rolled back to it (it is older than the fault) with the fault window excluded
    # and re-learnt what followed the fault
    assert cp["plant_t"] < t0, cp
    rb = [e["detail"] for e in evs if e["kind"] == "rollback"]
    assert len(rb) == 1 and rb[0]["checkpoint"] == pre and rb[0]["replay"] is True, rb
    m = re.search(r"(\d+) undone, (\d+) replayed", run.stdout)
    undone, replayed = int(m.group(1)), int(m.group(2))
    assert rb[0]["undone"] == undone and replayed >= n_after, (rb, undone, replayed, n_after)
    last = c.stats("reservoir")["applied"]
    probe = {"op": "value", "model": "reservoir", "x": [3.0, 300.0, -0.97, 0.26, 0.24]}
    before = c.ok(probe)["estimators"]

    # the same again with the CLI: the same counts, and nothing changes in the model
    cli = os.environ["WORTH_CLI"]
    out = subprocess.run([cli, "--socket", d.sock, "--json", "rollback", "reservoir", str(pre),
                          "--replay", "--exclude-time", f"{t0 - PERIOD:.0f}/{t1 - 1:.0f}",
                          "--yes"], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stdout + out.stderr
    rep = json.loads(out.stdout)
    # (the fault's transitions are already undone: this one undoes nothing more)
    assert rep["replayed"] == replayed and rep["undone"] == 0, (rep, undone, replayed)
    assert undone >= n_window, (undone, n_window)
    assert "the 2879 transitions after the fault were learnt again: yes" in run.stdout
    st = c.stats("reservoir")
    assert st["applied"] == last and st["queue"] == 0, st
    assert c.ok(probe)["estimators"] == before

    # each estimator's own drift test, and which one the alarm follows, in stats and watch
    sj = c.stats("reservoir")
    assert sj["drift"]["follows"] == sj["primary"]["name"], sj["drift"]
    for name, e in sj["estimators"].items():
        assert {"armed", "active", "raised", "last_onset_step", "statistic"} <= set(e["drift"])
        assert e["drift"]["armed"] is True and e["drift"]["raised"] >= 1, (name, e["drift"])
    table = subprocess.run([cli, "--socket", d.sock, "stats", "reservoir"], capture_output=True,
                           text=True, timeout=60).stdout
    assert f"drift.follows                  {sj['primary']['name']}" in table, table
    rows = table.split("\nDRIFT", 1)[1].splitlines()
    assert rows[0].split() == ["ARMED", "ACTIVE", "RAISED", "LAST_ONSET_STEP", "STATISTIC"]
    assert [r.split()[0] for r in rows[1:6]] == list(sj["estimators"]), rows
    w = subprocess.run([cli, "--socket", d.sock, "watch", "reservoir", "--count", "1"],
                       capture_output=True, text=True, timeout=60).stdout
    head = next(ln for ln in w.splitlines() if ln.startswith("estimator"))
    assert head.split()[-1] == "drift", w
