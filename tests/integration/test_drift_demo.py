"""The demo's stuck sensor against a real worthd (tests only): the frozen-input check, the
drift alarm's onset, and a rollback to the pre-drift checkpoint that re-learns the days
after the fault.

demo/plant.c (our own invented pumping station, one-minute samples) streams DAYS sound
days, FAULT_DAYS with the demand sensor stuck at 0 m3/h, then AFTER_DAYS sound days, and
itself rolls back to the pre-drift checkpoint with the fault's time window excluded.  The
constants below are those of demo/plant.c.
"""
import os
import subprocess

import pytest

from test_events_metrics import checkpoints, events

T0 = 1794787200.0      # demo/plant.c: the first sample's time
PERIOD = 60.0          # one-minute samples (period_s)
DAYS, FAULT_DAYS, AFTER_DAYS = 5, 2, 2
FAULT_T0 = T0 + DAYS * 86400.0
FAULT_T1 = FAULT_T0 + FAULT_DAYS * 86400.0  # the first sound sample after the fault

# WORTH_DAEMON is BUILD/daemon/worthd: the demo is BUILD/demo/plant
PLANT = os.path.join(os.path.dirname(os.path.dirname(os.environ.get("WORTH_DAEMON", "/x/y"))),
                     "demo", "plant")


@pytest.mark.skipif(not os.path.exists(PLANT), reason="demo/plant is not built")
def test_stuck_sensor_frozen_drift_onset_and_rollback(daemon):
    d = daemon("--checkpoint-every", 1440)
    run = subprocess.run([PLANT, d.sock, str(DAYS)], capture_output=True, text=True,
                         timeout=600)
    print(run.stdout)
    assert run.returncode == 0, run.stdout + run.stderr
    c = d.client()
    evs = events(c, model="reservoir")

    # the frozen check on demand (dimension 1) fires within 10 control periods of the fault
    frozen = [e["detail"] for e in evs if e["kind"] == "input_frozen"]
    assert frozen, [e["kind"] for e in evs]
    f = frozen[0]
    assert f["dim"] == "demand" and f["dim_index"] == 1 and f["source"] == "station", f
    assert FAULT_T0 <= f["t"] <= FAULT_T0 + 10 * PERIOD, (f, FAULT_T0)
    assert f["since_t"] == FAULT_T0 and f["value"] == 0.0, f
    # and clears when the sensor moves again
    cleared = [e["detail"] for e in evs if e["kind"] == "input_frozen_cleared"]
    assert cleared and cleared[0]["t"] == FAULT_T1, cleared
    assert not [e for e in evs if e["kind"] in ("input_out_of_range", "source_silent")], evs

    # the first drift alarm from the fault on dates the change within 5% of its length
    drift = [e["detail"] for e in evs
             if e["kind"] == "drift" and e["detail"]["t"] >= FAULT_T0 - PERIOD]
    assert drift, [e["kind"] for e in evs]
    a = drift[0]
    length = FAULT_T1 - FAULT_T0
    print(f"drift alarm at t {a['t'] - FAULT_T0:+.0f} s from the fault, onset "
          f"{a['onset_t'] - FAULT_T0:+.0f} s ({abs(a['onset_t'] - FAULT_T0) / length:.1%} of "
          f"the fault's length)")
    assert abs(a["onset_t"] - FAULT_T0) <= 0.05 * length, a
    assert a["t"] <= FAULT_T0 + 0.05 * length, a  # and fires early in the fault
    # the pre-drift checkpoint holds no transition from the onset on
    pre = a["pre_drift_checkpoint"]
    cp = next(x for x in checkpoints(c, "reservoir") if x["checkpoint"] == pre)
    assert cp["label"] == "pre-drift" and cp["seq"] < a["onset_seq"], (cp, a)

    # the demo rolled back to it with the fault window excluded and re-learnt what followed
    rb = [e["detail"] for e in evs if e["kind"] == "rollback"]
    assert rb and rb[-1]["checkpoint"] == pre and rb[-1]["replay"] is True, rb
    n_fault = int(FAULT_DAYS * 1440)
    n_after = int(AFTER_DAYS * 1440)
    st = c.stats("reservoir")
    last = st["applied"]
    assert rb[-1]["undone"] == n_fault, rb  # the excluded window: exactly the fault's
    # the same with the CLI: the replay learns every transition after the checkpoint but
    # the fault's, the days after the fault included
    cli = os.environ["WORTH_CLI"]
    out = subprocess.run([cli, "--socket", d.sock, "--json", "rollback", "reservoir", str(pre),
                          "--replay", "--exclude-time", f"{FAULT_T0 - PERIOD}/{FAULT_T1 - 1}",
                          "--yes"], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stdout + out.stderr
    print(out.stdout)
    import json
    rep = json.loads(out.stdout)
    assert rep["replayed"] >= n_after and rep["undone"] >= n_fault, rep
    st = c.stats("reservoir")
    assert st["applied"] == last and st["queue"] == 0, st
