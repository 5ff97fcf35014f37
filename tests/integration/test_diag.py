"""Diagnostics in worthd's stats: realised returns and the drift alarm (tests only).

Boyan's chain (Boyan 2002): with LSTD converged to the exact values V(s) = -2s, the
realised-return RMS error equals the standard deviation of the return itself, which
numpy computes exactly from the chain (per-state return variances by their recursion,
weighted by the expected visits per episode). A reward shift fed over the socket
raises a drift alarm (a CUSUM whose threshold comes from the stated false-alarm
interval, learn/drift.h), dated near the shift, reported in stats with its current state,
recorded as an event in the database, and cleared once the estimator has caught up.
"""
import sqlite3

import numpy as np

from test_ingest import boyan_phi as boyan_phi  # Boyan's four interpolation features

N_EP = 10000


def exact_return_sd():
    """sd of the return over all visited states, exact (numpy)."""
    var = np.zeros(13)  # var[0] = 0 (terminal), var[1] = 0 (1 -> 0 is deterministic)
    for s in range(2, 13):
        # G_s = -3 + G_s', s' in {s-1, s-2}: the two next values differ by 2, so their
        # spread adds 1 to the mean of the next states' variances
        var[s] = 1.0 + (var[s - 1] + var[s - 2]) / 2
    visits = np.zeros(14)
    visits[12] = 1.0
    for s in range(11, 0, -1):
        visits[s] = 0.5 * visits[s + 1] + (0.5 * visits[s + 2] if s + 2 <= 12 else 0.0)
    # state 1 is also reached from 2 (prob 1/2) and 3 (prob 1/2): the loop covers it
    w = visits[1:13]
    return float(np.sqrt(np.sum(w * var[1:13]) / np.sum(w)))


def test_boyan_realised_return_rms_is_the_return_sd(daemon):
    d = daemon()
    c = d.client()
    c.ok({"op": "model.create", "model": "boyan", "dims": 4, "gamma": 1.0,
          "ranges": [[0, 1]] * 4, "features": [{"basis": "raw"}],
          "estimators": [{"name": "lstd", "kind": "lstd", "ridge": 1.0, "refit_every": 1}],
          # the sliding window holds the last ~20000 returns: the converged estimator's
          "diagnostics": {"window": 20000}})
    rng = np.random.default_rng(2002)
    rows = []
    for _ in range(N_EP):
        s = 12
        while s > 0:
            s2 = 0 if s == 1 else s - 1 - int(rng.integers(2))
            r = -2.0 if s == 1 else -3.0
            rows.append(np.concatenate([boyan_phi(s), [r], boyan_phi(s2), [float(s2 == 0)]]))
            s = s2
    data = np.array(rows)
    for k in range(0, len(data), 8192):
        chunk = data[k:k + 8192]
        c.send({"op": "observe.bulk", "model": "boyan", "count": len(chunk)})
        c.send_raw(chunk.astype("<f8").tobytes())
        assert c.recv(60)["ok"] is True
    st = c.wait_applied("boyan", len(data), timeout=120)
    real = st["estimators"]["lstd"]["realised"]
    assert real["n"] == len(data)  # every state's return became known at its episode's end
    sd = exact_return_sd()
    print(f"realised-return RMS over the window {real['rms_window']:.4f} (bias "
          f"{real['bias_window']:.4f}), over the run {real['rms']:.4f}; exact return sd "
          f"{sd:.4f}; {len(data)} returns")
    # reference: the exact return sd of the chain, computed above with numpy
    assert abs(real["rms_window"] - sd) <= 0.05 * sd
    assert abs(real["bias_window"]) < 0.05 * sd
    assert st["horizon"] == 100000  # gamma = 1: only episode ends complete a return


def test_drift_alarm_in_stats_and_events(daemon):
    d = daemon()
    c = d.client()
    c.ok({"op": "model.create", "model": "shift", "dims": 1, "gamma": 0.9,
          "ranges": [[0, 4]], "features": [{"basis": "rbf", "centers": 5, "width": 0.05}],
          "estimators": [{"name": "td", "kind": "td", "alpha": 0.02}]})
    rng = np.random.default_rng(7)
    n, shift_at = 12000, 4000
    t = np.arange(n)
    x, xn = (t % 5).astype(float), ((t + 1) % 5).astype(float)
    r = rng.normal(size=n) + (t >= shift_at) * 1.0
    rec = np.column_stack([x, r, xn, np.zeros(n)]).astype("<f8")
    c.send({"op": "observe.bulk", "model": "shift", "count": shift_at})
    c.send_raw(rec[:shift_at].tobytes())
    assert c.recv(60)["ok"] is True
    st = c.wait_applied("shift", shift_at)
    assert st["drift"]["alarms"] == 0 and st["drift"]["armed"] is True
    c.send({"op": "observe.bulk", "model": "shift", "count": n - shift_at})
    c.send_raw(rec[shift_at:].tobytes())
    assert c.recv(60)["ok"] is True
    st = c.wait_applied("shift", n)
    dr = st["drift"]
    assert dr["alarms"] == 1, st
    assert shift_at < dr["last_alarm_step"] <= shift_at + 400, dr
    # the onset is the CUSUM's last zero: within two batches of the first shifted step
    assert abs(dr["last_onset_step"] - (shift_at + 1)) <= 2 * dr["batch"], dr
    # no period_s: the stated rate is in transitions, the default 10^6; h from Siegmund's
    # approximation at ARL0 = 10^5 batches, k = 0.5 (about 10.4)
    assert dr["false_alarm_transitions"] == 1e6 and dr["k"] == 0.5 and dr["batch"] == 10, dr
    assert 10.0 < dr["threshold"] < 11.0, dr
    # TD(0) catches up with the new reward (8000 steps later): the error is back, cleared
    assert dr["active"] is False and dr["clears"] == 1 and dr["side"] == "up", dr
    assert dr["last_clear_step"] > dr["last_alarm_step"], dr
    d.shutdown()
    db = sqlite3.connect(f"file:{d.db}?mode=ro", uri=True)
    try:
        kinds = [k for (k,) in db.execute("SELECT kind FROM events ORDER BY id")]
    finally:
        db.close()
    assert kinds.index("drift") < kinds.index("drift_cleared"), kinds
