"""The learning history in plant time, kept in the database (schema/005_history.sql,
schema/protocol.md "history").

What is checked: one row per bucket of ten control periods of plant time, whatever the
requests' sizes (one sample a request or a day in one request give the same buckets); rows of
transitions without t come per 100 seqs; the history survives a restart and a kill -9 (what
was stored stays; nothing is doubled); a window of plant time and a row limit; bad windows
answer bad_param; a purge removes the rows.

The station is made up (as in test_samples.py).  Each test starts its own worthd; every loop
is bounded in count and time.
"""
import sqlite3

from test_samples import PERIOD, T0, send_samples, station, stream

WIDTH = 10 * PERIOD  # a bucket: ten control periods


def rows_in_db(db, model="st"):
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        return con.execute(
            "SELECT timed, bucket, seq, plant_t FROM history WHERE model = (SELECT id FROM"
            " models WHERE name = ? AND dropped_at IS NULL) ORDER BY seq", (model,)).fetchall()
    finally:
        con.close()


def history(c, model="st", **kw):
    return c.ok({"op": "history", "model": model, **kw})


def test_one_row_per_bucket_of_plant_time_whatever_the_request_size(daemon, tmp_path):
    s = stream(600)  # 10 plant-hours: 60 buckets of 10 minutes
    got = []
    for chunk in (1, 600):
        d = daemon(db=str(tmp_path / f"by-{chunk}.db"))
        c = d.client()
        c.ok(station())
        send_samples(c, s, chunk=chunk)
        c.wait_applied("st", 599)
        c.ok({"op": "checkpoint", "model": "st"})  # stores the rows gathered so far
        h = history(c)
        assert h["width_s"] == WIDTH and h["estimators"] == ["td", "rls"], h
        got.append([(r["seq"], r["plant_t"]) for r in h["history"]])
        c.close()
        d.shutdown()
    assert got[0] == got[1], "the rows depend on how the samples were batched"
    rows = got[0]
    # Transition k (seq k) starts at sample k - 1: its t is T0 + (k - 1) * PERIOD; a row
    # opens each bucket, at its first transition.
    buckets = [int(t // WIDTH) for _, t in rows]
    assert buckets == sorted(set(buckets)), buckets
    assert len(rows) == len({int((T0 + k * PERIOD) // WIDTH) for k in range(599)}), rows
    for seq, t in rows:
        assert t == T0 + (seq - 1) * PERIOD
        assert int((t - PERIOD) // WIDTH) != int(t // WIDTH) or seq == 1


def test_history_survives_restart_and_kill9(daemon):
    d = daemon()
    c = d.client()
    c.ok(station())
    s = stream(900)
    send_samples(c, s[:400])
    c.wait_applied("st", 399)
    c.close()
    d = d.restart()  # a clean stop stores the rows
    c = d.client()
    before = [(r["seq"], r["plant_t"], r["td_rms"]) for r in history(c)["history"]]
    assert len(before) >= 35, before
    send_samples(c, s[400:700])
    c.wait_applied("st", 699)
    c.ok({"op": "checkpoint", "model": "st"})
    mid = [(r["seq"], r["plant_t"], r["td_rms"]) for r in history(c)["history"]]
    assert mid[:len(before)] == before, "a restart changed the stored history"
    assert mid[-1][0] > 600
    c.close()
    d.kill9()
    d = d.restart()
    c = d.client()
    after = [(r["seq"], r["plant_t"], r["td_rms"]) for r in history(c)["history"]]
    assert after[:len(mid)] == mid, "the kill -9 lost or changed stored rows"
    send_samples(c, s[700:])
    c.wait_applied("st", 899)
    c.ok({"op": "checkpoint", "model": "st"})
    c.close()
    d.shutdown()
    db = rows_in_db(d.db)
    assert len({(t, b) for t, b, _, _ in db}) == len(db)  # one row per bucket
    assert [b for _, b, _, _ in db] == sorted(b for _, b, _, _ in db)
    assert db[-1][2] > 850


def test_window_of_plant_time_and_row_limit(daemon):
    d = daemon()
    c = d.client()
    c.ok(station())
    send_samples(c, stream(1200), chunk=200)
    c.wait_applied("st", 1199)
    c.ok({"op": "checkpoint", "model": "st"})
    every = history(c)["history"]
    lo, hi = T0 + 3600, T0 + 4 * 3600
    win = history(c, since=lo, until=hi)
    assert win["rows"] == len([r for r in every if lo <= r["plant_t"] <= hi]) > 0
    assert all(lo <= r["plant_t"] <= hi for r in win["history"])
    few = history(c, max=10)
    assert len(few["history"]) <= 10 and few["every"] > 1 and few["rows"] == len(every)
    assert few["history"][0] == every[0] and few["history"][-1] == every[-1]
    for bad, code in (({"max": 1}, "bad_param"), ({"max": 2.5}, "bad_param"),
                      ({"since": hi, "until": lo}, "bad_param"), ({"since": "x"}, "bad_number"),
                      ({"window": 1}, "bad_request")):
        c.err({"op": "history", "model": "st", **bad}, code)


def test_transitions_without_t_make_a_row_per_100(daemon):
    d = daemon()
    c = d.client()
    c.ok({"op": "model.create", "model": "m", "dims": 1, "ranges": [[0, 1]], "gamma": 0.9,
          "features": [{"basis": "tiles", "tilings": 2, "tiles": 4, "size": 32}],
          "estimators": [{"name": "td", "kind": "td", "alpha": 0.1}]})
    xs = [[(i % 10) / 10.0] for i in range(451)]
    for i in range(0, 450, 50):
        c.ok({"op": "observe", "model": "m", "batch": [
            {"x": xs[k], "r": 1.0, "x_next": xs[k + 1]} for k in range(i, i + 50)]})
    c.wait_applied("m", 450)
    c.ok({"op": "checkpoint", "model": "m"})
    h = history(c, "m")["history"]
    assert [r["seq"] for r in h] == [1, 100, 200, 300, 400], h
    assert all("plant_t" not in r for r in h)
    assert all(r["td_rms"][0] is not None and r["td_rms"][0] >= 0 for r in h)


def test_purge_removes_the_history(daemon):
    d = daemon()
    c = d.client()
    c.ok(station())
    send_samples(c, stream(200))
    c.wait_applied("st", 199)
    c.ok({"op": "checkpoint", "model": "st"})
    assert rows_in_db(d.db)
    c.ok({"op": "model.drop", "model": "st"})
    c.ok({"op": "model.purge", "model": "st"})
    con = sqlite3.connect(f"file:{d.db}?mode=ro", uri=True)
    try:
        assert con.execute("SELECT COUNT(*) FROM history").fetchone()[0] == 0
    finally:
        con.close()
