"""Samples paired into transitions by worthd, producer sequences, named dimensions and plant
time (schema/protocol.md, "Samples").

What is checked: the transitions worthd logs for a sample stream are the hand-paired ones
(read back from the database file with Python's sqlite3), under both reward rules; a gap
longer than the model's limit makes no transition across it; a stream resent from its start
adds nothing twice, also across a restart and a kill -9 (the weights, read through value,
equal those of one clean feed bit for bit); out-of-order and bad samples are refused with
their stable codes and leave nothing behind; the pairing survives a failed commit.

The sample data is a made-up station (level in m, demand in m3/h), not plant data.  Each test
starts its own worthd (conftest.daemon); every loop is bounded in count and time.
"""
import json
import math
import sqlite3
import struct

import pytest

from conftest import Client
import logdb

PERIOD = 60.0
T0 = 1764633600.0  # 2025-12-02T00:00:00Z


def station(name="st", reward="next", gap_periods=3, **kw):
    spec = {"op": "model.create", "model": name,
            "dims": [{"name": "level", "unit": "m", "range": [0, 12]},
                     {"name": "demand", "unit": "m3/h", "range": [0, 400]}],
            "reward_unit": "EUR", "period_s": PERIOD,
            "samples": {"reward": reward, "max_gap_periods": gap_periods},
            "gamma": 0.9, "features": [{"basis": "tiles", "tilings": 4, "tiles": 4, "size": 128}],
            "estimators": [{"name": "td", "kind": "td", "alpha": 0.1},
                           {"name": "rls", "kind": "rls_td", "forget": 0.999}]}
    spec.update(kw)
    return spec


def stream(n, t0=T0, period=PERIOD, source="pump-2"):
    """n samples of a made-up station, one per period: level, demand, a cost."""
    out = []
    for i in range(n):
        level = 4.0 + 3.0 * math.sin(i / 7.0)
        demand = 180.0 + 60.0 * math.cos(i / 5.0)
        out.append({"source": source, "t": t0 + i * period, "x": [level, demand],
                    "r": -0.01 * demand - 0.5 * abs(level - 5.0)})
    return out


def logged(db, model="st"):
    """The model's transitions as logged: (seq, t, source, x, r, x_next, terminal, dt)."""
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        (mid,) = con.execute("SELECT id FROM models WHERE name = ? AND dropped_at IS NULL",
                             (model,)).fetchone()
        rows = [r[:8] for r in logdb.rows(con, mid)]
    finally:
        con.close()
    vec = lambda b: None if b is None else list(struct.unpack(f"<{len(b) // 8}d", b))
    return [(s, t, src, vec(x), r, vec(xn), term, dt) for s, t, src, x, r, xn, term, dt in rows]


def send_samples(c, samples, chunk=50, model="st"):
    """Sends samples in requests of chunk; returns the summed paired, skipped and gaps."""
    tot = {"paired": 0, "skipped": 0, "gaps": 0}
    for i in range(0, len(samples), chunk):
        rep = c.ok({"op": "observe", "model": model, "samples": samples[i:i + chunk]})
        assert rep["durable"] is True
        for k in tot:
            tot[k] += rep[k]
    return tot


PROBES = [[x, d] for x in (1.0, 4.5, 9.0) for d in (100.0, 250.0)]


def values(c, model="st"):
    """The estimators' values at the probe states: identical weights give identical floats."""
    c.wait_applied(model)
    return c.ok({"op": "value", "model": model, "xs": PROBES})["values"], \
        [c.ok({"op": "value", "model": model, "x": x})["estimators"] for x in PROBES]


def test_pairs_consecutive_samples_reward_next(daemon):
    d = daemon()
    c = d.client()
    c.ok(station())
    s = stream(5)
    rep = c.ok({"op": "observe", "model": "st", "sample": s[0]})
    assert (rep["seq"], rep["paired"], rep["skipped"], rep["gaps"]) == (0, 0, 0, 0)
    tot = send_samples(c, s[1:])
    assert tot == {"paired": 4, "skipped": 0, "gaps": 0}
    rows = logged(d.db)
    assert len(rows) == 4
    for k, (seq, t, src, x, r, xn, term, dt) in enumerate(rows):
        a, b = s[k], s[k + 1]
        assert seq == k + 1 and src == "pump-2" and term == 0
        assert t == a["t"] and dt == b["t"] - a["t"]
        assert x == a["x"] and xn == b["x"]
        assert r == b["r"]  # "next": the step that ends at B earned B's r


def test_reward_same_takes_the_earlier_samples_r(daemon):
    d = daemon()
    c = d.client()
    c.ok(station(reward="same"))
    s = stream(4)
    send_samples(c, s)
    rows = logged(d.db)
    assert [r for _, _, _, _, r, _, _, _ in rows] == [s[k]["r"] for k in range(3)]


def test_terminal_sample_ends_the_chain(daemon):
    d = daemon()
    c = d.client()
    c.ok(station())
    s = stream(5)
    s[2]["terminal"] = True
    tot = send_samples(c, s)
    # 0->1, 1->2 (terminal); 2 ends the chain, 3 starts a new one; 3->4
    assert tot["paired"] == 3
    rows = logged(d.db)
    assert [(x, term, xn is None) for _, _, _, x, _, xn, term, _ in rows] == [
        (s[0]["x"], 0, False), (s[1]["x"], 1, True), (s[3]["x"], 0, False)]


def test_two_hour_outage_makes_no_transition_across_it(daemon):
    d = daemon()
    c = d.client()
    c.ok(station())
    before = stream(10)
    after = stream(10, t0=before[-1]["t"] + 7200.0)  # a 2-hour outage
    tot = send_samples(c, before + after)
    assert tot == {"paired": 18, "skipped": 0, "gaps": 1}
    for _, t, _, _, _, _, _, dt in logged(d.db):
        assert dt <= 3 * PERIOD, "a transition spans the outage"
    # max_gap_s instead of periods, and no limit at all
    nolimit = station("nolimit", samples={"reward": "next"})
    del nolimit["period_s"]  # neither a period nor max_gap_s: no gap breaks a chain
    c.ok(nolimit)
    assert send_samples(c, before + after, model="nolimit")["paired"] == 19
    c.ok(station("secs", samples={"max_gap_s": 90}))
    gappy = stream(3) + stream(2, t0=T0 + 2 * PERIOD + 100)
    assert send_samples(c, gappy, model="secs") == {"paired": 3, "skipped": 0, "gaps": 1}


def test_resend_from_the_start_adds_nothing_twice(daemon):
    d = daemon()
    c = d.client()
    c.ok(station("a"))
    c.ok(station("b"))
    s = stream(300)
    send_samples(c, s, model="a")
    # b: fed 120, the client "dies", then the whole file again from its start
    send_samples(c, s[:120], model="b")
    tot = send_samples(c, s, chunk=70, model="b")
    assert tot == {"paired": 180, "skipped": 120, "gaps": 0}
    assert c.stats("a")["received"] == c.stats("b")["received"] == 299
    assert values(c, "a") == values(c, "b")


def test_pairing_survives_restart_and_kill9(daemon):
    d = daemon()
    c = d.client()
    c.ok(station("clean"))
    c.ok(station("k"))
    s = stream(200)
    send_samples(c, s, model="clean")
    send_samples(c, s[:80], model="k")
    c.close()
    d = d.restart()
    c = d.client()
    assert c.ok({"op": "sources", "model": "k"})["sources"] == [
        {"source": "pump-2", "t": s[79]["t"], "pseq": 0}]
    send_samples(c, s[80:150], model="k")
    c.close()
    d.kill9()
    d = d.restart()
    c = d.client()
    # the feeder resumes from its start: everything acknowledged is skipped, the rest pairs
    tot = send_samples(c, s, model="k")
    assert tot == {"paired": 50, "skipped": 150, "gaps": 0}
    assert c.stats("k")["received"] == c.stats("clean")["received"] == 199
    assert values(c, "k") == values(c, "clean")
    assert [r[1:] for r in logged(d.db, "k")] == [r[1:] for r in logged(d.db, "clean")]


def test_sources_are_separate_chains(daemon):
    d = daemon()
    c = d.client()
    c.ok(station())
    a, b = stream(6, source="pump-1"), stream(6, t0=T0 + 5, source="pump-2")
    mixed = [x for pair in zip(a, b) for x in pair]
    assert send_samples(c, mixed, chunk=5)["paired"] == 10
    for _, t, src, x, _, xn, _, _ in logged(d.db):
        chain = a if src == "pump-1" else b
        k = [e["t"] for e in chain].index(t)
        assert x == chain[k]["x"] and xn == chain[k + 1]["x"]
    srcs = c.ok({"op": "sources", "model": "st"})["sources"]
    assert {e["source"]: e["t"] for e in srcs} == {"pump-1": a[-1]["t"], "pump-2": b[-1]["t"]}


def test_out_of_order_and_duplicate_t_refused_whole(daemon):
    d = daemon()
    c = d.client()
    c.ok(station())
    s = stream(4)
    send_samples(c, s[:2])
    back = [s[2], dict(s[3], t=s[2]["t"] - 1)]
    rep = c.err({"op": "observe", "model": "st", "samples": back}, "out_of_order")
    assert rep["index"] == 1 and "pump-2" in rep["message"]
    dup = [s[2], dict(s[3], t=s[2]["t"])]
    assert c.err({"op": "observe", "model": "st", "samples": dup},
                 "out_of_order")["index"] == 1
    # nothing of either was applied: the next good request pairs from s[1]
    assert c.stats("st")["received"] == 1
    assert send_samples(c, s[2:])["paired"] == 2


@pytest.mark.parametrize("sample,code", [
    ({"t": T0, "x": [1, 2]}, "bad_request"),                       # no r
    ({"x": [1, 2], "r": 0}, "bad_request"),                        # no t
    ({"t": "2025-12-02", "x": [1, 2], "r": 0}, "bad_number"),      # t not a number
    ({"t": T0, "x": [1], "r": 0}, "bad_dimension"),                # one value short
    ({"t": T0, "x": {"level": 1, "pressure": 3}, "r": 0}, "bad_dimension"),  # unknown tag
    ({"t": T0, "x": {"level": 1}, "r": 0}, "bad_dimension"),       # a dimension missing
    ({"t": T0, "x": {"level": 1, "demand": "x"}, "r": 0}, "bad_number"),
    ({"t": T0, "x": [1, 2], "r": 0, "terminal": 1}, "bad_request"),
    ({"t": T0, "x": [1, 2], "r": 0, "quality": "bad"}, "bad_request"),  # unknown field
    ({"t": T0, "x": [1, 2], "r": 1e13}, "bad_number"),
    ({"t": T0, "x": [1, 2], "r": 0, "source": "p" * 64}, "bad_param"),
])
def test_bad_samples_refused_nothing_lost(daemon, sample, code):
    d = daemon()
    c = d.client()
    c.ok(station())
    good = stream(3)
    send_samples(c, good[:2])
    c.err({"op": "observe", "model": "st", "samples": [good[2], sample]}, code)
    assert c.stats("st")["received"] == 1
    assert len(logged(d.db)) == 1
    assert send_samples(c, good[2:]) == {"paired": 1, "skipped": 0, "gaps": 0}


def test_samples_request_shape_errors(daemon):
    d = daemon()
    c = d.client()
    c.ok(station())
    c.err({"op": "observe", "model": "st", "samples": []}, "bad_request")
    c.err({"op": "observe", "model": "st", "samples": {}}, "bad_request")
    c.err({"op": "observe", "model": "st", "sample": stream(1)[0], "samples": stream(1)},
          "bad_request")
    c.err({"op": "observe", "model": "st", "samples": stream(1), "batch": []}, "bad_request")
    # NaN through the raw line: JSON has no NaN, cJSON refuses it
    c.send_raw(b'{"op":"observe","model":"st","sample":{"t":NaN,"x":[1,2],"r":0}}\n')
    assert c.recv()["ok"] is False
    # a model without names takes arrays only
    c.ok({"op": "model.create", "model": "plain", "dims": 2, "ranges": [[0, 1], [0, 1]],
          "gamma": 0.9, "features": [{"basis": "raw"}], "estimators": [{"name": "td", "kind": "td"}]})
    c.err({"op": "observe", "model": "plain",
           "sample": {"t": T0, "x": {"a": 1, "b": 2}, "r": 0}}, "bad_request")
    c.ok({"op": "observe", "model": "plain", "sample": {"t": T0, "x": [0.5, 0.5], "r": 0}})


def test_too_many_sources(daemon):
    d = daemon()
    c = d.client()
    c.ok(station(max_sources=2))
    send_samples(c, stream(2, source="a") + stream(2, source="b"))
    rep = c.err({"op": "observe", "model": "st", "samples": stream(2, source="c")},
                "too_many_sources")
    assert rep["index"] == 0
    # a source with one sample only holds its slot too: no crash, a clear refusal
    c.ok(station("one", max_sources=1))
    c.ok({"op": "observe", "model": "one", "sample": stream(1, source="a")[0]})
    c.err({"op": "observe", "model": "one", "sample": stream(1, source="b")[0]},
          "too_many_sources")


def test_bulk_samples_equal_json_samples(daemon):
    d = daemon()
    c = d.client()
    c.ok(station("j"))
    c.ok(station("b"))
    s = stream(400)
    send_samples(c, s, chunk=100, model="j")
    for lo in (0, 250):
        part = s[lo:lo + 250] if lo == 0 else s[lo - 50:]  # the second overlaps the first
        c.send({"op": "observe.bulk", "model": "b", "form": "samples", "source": "pump-2",
                "count": len(part)})
        c.send_raw(b"".join(struct.pack("<4d", e["t"], *e["x"], e["r"]) + struct.pack("<d", 0)
                            for e in part))
        rep = c.recv()
        assert rep["ok"], rep
    assert rep["skipped"] == 50 and rep["paired"] == 150
    assert values(c, "j") == values(c, "b")
    # a bad record: refused with its index, nothing applied
    c.send({"op": "observe.bulk", "model": "b", "form": "samples", "count": 2})
    c.send_raw(struct.pack("<5d", T0 + 1e6, 1, 1, 0, 0) + struct.pack("<5d", T0 + 2e6, 1, 1, 0, 2))
    rep = c.recv()
    assert rep["error"]["code"] == "bad_param" and rep["error"]["index"] == 1
    c.err({"op": "observe.bulk", "model": "b", "form": "rows", "count": 1}, "bad_param")


def test_pseq_skips_what_was_logged(daemon):
    d = daemon()
    c = d.client()
    c.ok({"op": "model.create", "model": "m", "dims": 2, "ranges": [[0, 1], [0, 1]],
          "gamma": 0.9, "features": [{"basis": "raw"}], "estimators": [{"name": "td", "kind": "td"}]})
    tr = [{"x": [i / 20, 0.5], "r": -1.0, "x_next": [(i + 1) / 20, 0.5], "pseq": i + 1,
           "source": "gw"} for i in range(20)]
    rep = c.ok({"op": "observe", "model": "m", "batch": tr[:12]})
    assert (rep["count"], rep["skipped"], rep["seq"]) == (12, 0, 12)
    rep = c.ok({"op": "observe", "model": "m", "batch": tr})
    assert (rep["count"], rep["skipped"], rep["seq"]) == (8, 12, 20)
    rep = c.ok(dict(tr[5], op="observe", model="m"))
    assert (rep["skipped"], rep["seq"]) == (1, 20)
    # bulk with a pseq header numbers its records from it
    recs = b"".join(struct.pack("<6d", *t["x"], t["r"], *t["x_next"], 0) for t in tr)
    c.send({"op": "observe.bulk", "model": "m", "source": "gw", "pseq": 1, "count": 20})
    c.send_raw(recs)
    rep = c.recv()
    assert rep["ok"] and (rep["count"], rep["skipped"], rep["seq"]) == (0, 20, 20)
    c.send({"op": "observe.bulk", "model": "m", "source": "gw", "pseq": 15, "count": 20})
    c.send_raw(recs)
    rep = c.recv()
    assert rep["ok"] and (rep["count"], rep["skipped"], rep["seq"]) == (14, 6, 34)
    # another source has its own numbering; transitions without pseq are never skipped
    rep = c.ok({"op": "observe", "model": "m", "batch": [dict(tr[0], source="gw2"),
                                                          {k: v for k, v in tr[0].items()
                                                           if k != "pseq"}]})
    assert (rep["count"], rep["skipped"]) == (2, 0)
    assert {e["source"]: e["pseq"] for e in c.ok({"op": "sources", "model": "m"})["sources"]} \
        == {"gw": 34, "gw2": 1}
    d.kill9()
    d = d.restart()
    c = d.client()
    rep = c.ok({"op": "observe", "model": "m", "batch": tr})
    assert (rep["count"], rep["skipped"]) == (0, 20)
    for bad in (0, -1, 1.5, "1", 2 ** 53 + 2):
        c.err(dict(tr[0], op="observe", model="m", pseq=bad), "bad_param")


def test_value_by_dimension_name(daemon):
    d = daemon()
    c = d.client()
    c.ok(station())
    send_samples(c, stream(100))
    c.wait_applied("st")
    by_list = c.ok({"op": "value", "model": "st", "x": [4.2, 180]})
    by_name = c.ok({"op": "value", "model": "st", "x": {"demand": 180, "level": 4.2}})
    assert by_list["value"] == by_name["value"]
    many = c.ok({"op": "value", "model": "st", "xs": [{"level": 4.2, "demand": 180}, [4.2, 180]]})
    assert many["values"] == [by_list["value"]] * 2
    rep = c.err({"op": "value", "model": "st", "x": {"level": 4.2, "flow": 1}}, "bad_dimension")
    assert "flow" in rep["message"]
    rep = c.err({"op": "value", "model": "st", "x": {"level": 4.2}}, "bad_dimension")
    assert "demand" in rep["message"]
    got = c.ok({"op": "model.get", "model": "st"})
    assert json.dumps(got).count("m3/h") == 1


def test_plant_time_on_checkpoints_history_and_events(daemon):
    d = daemon()
    c = d.client()
    c.ok(station())
    s = stream(50)
    send_samples(c, s)
    c.wait_applied("st")
    cp = c.ok({"op": "checkpoint", "model": "st", "label": "after-50"})
    listed = c.ok({"op": "checkpoints", "model": "st"})["checkpoints"]
    mine = [e for e in listed if e["checkpoint"] == cp["checkpoint"]][0]
    assert mine["plant_t"] == s[48]["t"]  # the t of the last transition: 48 -> 49
    evs = c.ok({"op": "events", "model": "st"})["events"]
    ck = [e for e in evs if e["kind"] == "checkpoint" and e["detail"]["checkpoint"] ==
          cp["checkpoint"]][0]
    assert ck["detail"]["t"] == s[48]["t"]
    assert c.stats("st")["plant_t"] == s[48]["t"]
    hist = c.ok({"op": "history", "model": "st"})["history"]
    assert hist and hist[-1]["plant_t"] <= s[48]["t"] and hist[-1]["t"] > s[48]["t"]
    # after a restart the recovered model knows its plant time too
    c.close()
    d = d.restart()
    c = d.client()
    cp2 = c.ok({"op": "checkpoint", "model": "st"})
    listed = c.ok({"op": "checkpoints", "model": "st"})["checkpoints"]
    assert [e for e in listed if e["checkpoint"] == cp2["checkpoint"]][0]["plant_t"] == s[48]["t"]


def test_rollback_by_t_says_what_has_no_t(daemon):
    d = daemon()
    c = d.client()
    c.ok({"op": "model.create", "model": "m", "dims": 1, "ranges": [[0, 1]],
          "gamma": 0.9, "features": [{"basis": "raw"}], "estimators": [{"name": "td", "kind": "td"}]})
    c.ok({"op": "observe", "model": "m", "x": [0.1], "r": 0, "x_next": [0.2]})
    cp = c.ok({"op": "checkpoint", "model": "m"})
    c.ok({"op": "observe", "model": "m", "batch": [
        {"x": [0.2], "r": 0, "x_next": [0.3]},
        {"x": [0.3], "r": 0, "x_next": [0.4], "t": 100},
        {"x": [0.4], "r": 0, "x_next": [0.5]}]})
    rep = c.ok({"op": "rollback", "model": "m", "checkpoint": cp["checkpoint"], "replay": True,
                "exclude": {"t": [0, 1000]}})
    assert (rep["undone"], rep["untimed"]) == (1, 2)
    rep = c.ok({"op": "rollback", "model": "m", "checkpoint": cp["checkpoint"], "replay": True,
                "exclude": {"seq": [2, 2]}})
    assert "untimed" not in rep


def test_failed_commit_reloads_the_pairing(daemon, tmp_path):
    """The database fills up mid-stream: the requests refused are not paired on, and once it
    has room again (a restart with a larger limit) resending everything ends as one clean
    feed."""
    d = daemon("--db-max-mb", 1)
    c = d.client(timeout=30)
    c.ok(station("k"))
    s = stream(40000)
    acked, failed = 0, None
    for i in range(0, len(s), 200):
        rep = c.call({"op": "observe", "model": "k", "samples": s[i:i + 200]}, timeout=30)
        if not rep["ok"]:
            failed = rep
            break
        acked = i + 200
    assert failed is not None and acked > 0, "the database never filled up"
    assert failed["error"]["code"] == "storage_full", failed
    # the same request again: paired on what the log holds, refused again, nothing lost
    rep = c.call({"op": "observe", "model": "k", "samples": s[acked:acked + 200]}, timeout=30)
    assert rep["error"]["code"] in ("storage_full", "storage_error"), rep
    assert c.ok({"op": "sources", "model": "k"})["sources"][0]["t"] == s[acked - 1]["t"]
    c.close()
    d.stop()
    d2 = daemon(db=d.db)
    c = d2.client(timeout=30)
    assert c.ok({"op": "sources", "model": "k"})["sources"][0]["t"] == s[acked - 1]["t"]
    assert len(logged(d.db, "k")) == acked - 1
    tot = send_samples(c, s[:acked + 1000], chunk=500, model="k")
    assert tot == {"paired": 1000, "skipped": acked, "gaps": 0}
    rows = logged(d.db, "k")
    assert len(rows) == acked + 999
    assert all(b[1] == a[1] + PERIOD for a, b in zip(rows, rows[1:])), "a hole in the chain"
