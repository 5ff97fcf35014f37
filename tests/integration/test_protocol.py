"""Every request and every error code of schema/protocol.md, each checked by an exact reply.

Each test starts its own worthd (conftest.daemon) on a Unix socket in tmp_path.  Feature
counts are worked out from the basis table of protocol.md beside each case; expected
values are worked out by hand beside each check.
"""
import json
import math
import socket
import struct
import time

import numpy as np
import pytest

MAX_BATCH = 10  # --max-batch for the error tests


def create_req(name="m", dims=2, **kw):
    """A model.create request: bias + raw on [0,1]^dims, one td estimator; kw overrides."""
    req = {"op": "model.create", "model": name, "dims": dims, "gamma": 0.9,
           "ranges": [[0, 1]] * dims, "features": [{"basis": "bias"}, {"basis": "raw"}],
           "estimators": [{"name": "td", "kind": "td", "alpha": 0.1}]}
    req.update(kw)
    return req


def without(d, *keys):
    return {k: v for k, v in d.items() if k not in keys}


def obs(**kw):
    """An observe request on model m (D = 2), non-terminal; kw overrides."""
    req = {"op": "observe", "model": "m", "x": [0.5, 0.5], "r": 1.0, "x_next": [0.25, 0.75]}
    req.update(kw)
    return req


def records(x, r, x_next, terminal):
    """observe.bulk payload: per record x[0..D-1], r, x_next[0..D-1], terminal, '<f8'."""
    x, x_next = np.atleast_2d(x), np.atleast_2d(x_next)
    rec = np.column_stack([x, np.asarray(r, float), x_next, np.asarray(terminal, float)])
    return rec.astype("<f8").tobytes()


@pytest.fixture
def d(daemon):
    return daemon()


@pytest.fixture
def c(d):
    return d.client()


# hello and framing ---------------------------------------------------------------------------

def test_hello(c):
    rep = c.call({"op": "hello", "id": 1})
    assert rep == {"ok": True, "id": 1, "server": "worthd", "version": "0.1.0", "protocol": 1}


@pytest.mark.parametrize("rid", [7, 0, -3, 2.5, 12345678901, "abc", "", "a b\"c\\d", "pompe-ü"])
def test_id_is_echoed_unchanged(c, rid):
    rep = c.call({"op": "hello", "id": rid})
    assert rep["ok"] is True and "id" in rep and rep["id"] == rid
    assert type(rep["id"]) is type(rid)
    # on an error reply too
    rep = c.call({"op": "frobnicate", "id": rid})
    c.expect_error(rep, "unknown_op")
    assert rep["id"] == rid and type(rep["id"]) is type(rid)


def test_no_id_no_id_in_reply(c):
    rep = c.call({"op": "hello"})
    assert rep == {"ok": True, "server": "worthd", "version": "0.1.0", "protocol": 1}
    rep = c.call({"op": "frobnicate"})
    c.expect_error(rep, "unknown_op")
    assert "id" not in rep
    rep = c.call({"op": "model.list"})
    assert rep == {"ok": True, "models": []}


def test_pipelined_requests_answered_in_order(c):
    c.send_raw(b"".join(json.dumps({"op": "hello", "id": i}).encode() + b"\n" for i in range(5))
               + b'{"op":"nope","id":5}\n{"op":"model.list","id":6}\n')
    for i in range(5):
        assert c.recv()["id"] == i
    rep = c.recv()
    c.expect_error(rep, "unknown_op")
    assert rep["id"] == 5
    assert c.recv() == {"ok": True, "id": 6, "models": []}


def test_request_split_across_writes(c):
    line = b'{"op":"hello","id":"split"}\n'
    for i in range(len(line)):
        c.send_raw(line[i:i + 1])
        time.sleep(0.001)
    assert c.recv()["id"] == "split"


def test_clients_are_independent(d):
    a, b = d.client(), d.client()
    a.ok(create_req())
    assert b.call({"op": "hello", "id": "b"})["id"] == "b"
    assert [m["model"] for m in b.ok({"op": "model.list"})["models"]] == ["m"]


# model.create, list, get, drop ---------------------------------------------------------------

FEATURE_CASES = [
    # (dims, features, count): counts from the basis table of protocol.md
    (2, [{"basis": "bias"}, {"basis": "rbf", "centers": 5, "width": 0.15}], 1 + 5 ** 2),
    (3, [{"basis": "poly", "degree": 2}], 9),                        # C(3+2, 2) - 1
    (2, [{"basis": "fourier", "order": 2, "couple": 1}], 4),         # (1,0)(2,0)(0,1)(0,2)
    (2, [{"basis": "fourier", "order": 2, "couple": 0}], 8),         # 3^2 - 1, no cap
    (3, [{"basis": "fourier", "order": 1, "couple": 2}], 6),         # 3 singles + 3 pairs
    (1, [{"basis": "poly", "degree": 3}], 3),                        # C(1+3, 3) - 1
    (3, [{"basis": "raw"}], 3),
    (2, [{"basis": "tiles", "tilings": 8, "tiles": 10, "size": 1024}], 1024),
    (2, [{"basis": "bias"}, {"basis": "raw"}, {"basis": "poly", "degree": 2}], 1 + 2 + 5),
    (64, [{"basis": "bias"}], 1),                                    # dims at its limit
]


@pytest.mark.parametrize("dims,features,count", FEATURE_CASES,
                         ids=[f"case{i}" for i in range(len(FEATURE_CASES))])
def test_model_create_feature_count(c, dims, features, count):
    rep = c.call(create_req("station-1", dims, features=features, id="c"))
    assert rep == {"ok": True, "id": "c", "model": "station-1", "features": count}


def test_model_create_example_of_protocol(c):
    req = {"op": "model.create", "model": "station-1", "dims": 2, "gamma": 0.99,
           "ranges": [[0, 12], [0, 400]],
           "features": [{"basis": "bias"}, {"basis": "rbf", "centers": 5, "width": 0.15}],
           "estimators": [{"name": "td", "kind": "td", "alpha": 0.05},
                          {"name": "rls", "kind": "rls_td", "forget": 0.995, "delta": 100}]}
    assert c.call(req) == {"ok": True, "model": "station-1", "features": 26}


def test_model_names(c):
    for name in ["a", "A.b_c-9", "x" * 63]:
        assert c.call(create_req(name)) == {"ok": True, "model": name, "features": 3}


def test_model_list(c):
    assert c.ok({"op": "model.list"}) == {"ok": True, "models": []}
    c.ok(create_req("b", 3, estimators=[{"name": "td", "kind": "td"},
                                        {"name": "rls", "kind": "rls_td"}]))
    c.ok(create_req("a", 1, features=[{"basis": "bias"}]))
    c.ok({"op": "observe", "model": "b", "x": [0, 0, 0], "r": 1, "terminal": True})
    c.wait_applied("b", 1)
    rep = c.ok({"op": "model.list", "id": 3})
    assert set(rep) == {"ok", "id", "models"} and rep["id"] == 3
    # the documented fields, exactly (worthd may add more, e.g. received)
    keys = ("model", "dims", "features", "estimators", "applied")
    assert sorted(({k: m.get(k) for k in keys} for m in rep["models"]),
                  key=lambda m: m["model"]) == [
        {"model": "a", "dims": 1, "features": 1, "estimators": ["td"], "applied": 0},
        {"model": "b", "dims": 3, "features": 4, "estimators": ["td", "rls"], "applied": 1},
    ]


# Defaults of protocol.md's estimator table.
DEFAULTS = {
    "td": {"alpha": 0.01, "init": 0},
    "td_n": {"alpha": 0.01, "n": 4, "init": 0},
    "td_lambda": {"alpha": 0.01, "lambda": 0.9, "init": 0},
    "mc": {"alpha": 0.01, "horizon": 0, "max_episode": 100000, "init": 0},
    "rls_td": {"lambda": 0, "forget": 1, "delta": 100, "guard": "regularise", "trace_cap": 0,
               "init": 0},
    "lstd": {"lambda": 0, "ridge": 1e-6, "forget": 1, "refit_every": 100, "init": 0},
    "replay": {"alpha": 0.01, "capacity": 10000, "batch": 32, "steps_per_obs": 1, "decay": 0,
               "tol": 1e-4, "seed": 1, "init": 0},
}


def test_model_get_spec_round_trips_with_defaults(c):
    ests = [{"name": "td", "kind": "td", "alpha": 0.05},
            {"name": "rls", "kind": "rls_td", "forget": 0.995, "delta": 100}] + [
        {"name": f"e_{k}", "kind": k} for k in DEFAULTS]
    req = {"op": "model.create", "model": "station-1", "dims": 2, "gamma": 0.99,
           "ranges": [[0, 12], [0, 400]],
           "features": [{"basis": "bias"}, {"basis": "rbf", "centers": 5, "width": 0.15}],
           "estimators": ests}
    assert c.ok(req)["features"] == 26
    rep = c.ok({"op": "model.get", "model": "station-1", "id": "g"})
    assert {k: rep.get(k) for k in ("ok", "id", "model", "features", "received", "applied")} == {
        "ok": True, "id": "g", "model": "station-1", "features": 26, "received": 0, "applied": 0}
    spec = rep["spec"]
    assert isinstance(spec, dict), rep
    for k in ("dims", "gamma", "ranges"):
        assert spec[k] == req[k], (k, spec)
    assert spec.get("model", "station-1") == "station-1"
    # features: every given field comes back
    assert len(spec["features"]) == 2
    for given, got in zip(req["features"], spec["features"]):
        assert {k: got.get(k) for k in given} == given, got
    # estimators: every given field comes back, every other parameter has its default
    assert [e["name"] for e in spec["estimators"]] == [e["name"] for e in ests]
    for given, got in zip(ests, spec["estimators"]):
        want = dict(DEFAULTS[given["kind"]], **given)
        assert {k: got.get(k) for k in want} == want, got
        assert set(got) == set(want), f"unexpected fields in {got}, expected {sorted(want)}"
    # model-level defaults filled in: no primary given is "auto" (the headline is chosen)
    assert spec["primary"] == "auto"
    assert spec["max_sources"] == 16
    assert spec["max_features"] == 4096
    # round trip: the returned spec creates an identical model
    again = dict(spec, op="model.create", model="station-2")
    assert c.call(again) == {"ok": True, "model": "station-2", "features": 26}
    spec2 = c.ok({"op": "model.get", "model": "station-2"})["spec"]
    assert without(spec2, "model") == without(spec, "model")


def test_model_get_counts(c):
    c.ok(create_req())
    for i in range(3):
        c.ok(obs())
    st = c.wait_applied("m", 3)
    rep = c.ok({"op": "model.get", "model": "m"})
    assert (rep["received"], rep["applied"], rep["features"]) == (3, 3, 3), rep
    assert st["received"] == 3


def test_model_drop(c):
    c.ok(create_req())
    c.ok(obs())
    assert c.call({"op": "model.drop", "model": "m", "id": 4}) == {"ok": True, "id": 4,
                                                                   "persisted": True}
    for req in [{"op": "model.get", "model": "m"}, {"op": "stats", "model": "m"}, obs(),
                {"op": "value", "model": "m", "x": [0.5, 0.5]},
                {"op": "train", "model": "m", "estimator": "td"},
                {"op": "model.drop", "model": "m"}]:
        c.err(req, "no_such_model")
    assert c.ok({"op": "model.list"})["models"] == []
    # the name is free again and its sequence starts over
    c.ok(create_req())
    assert c.call(obs()) == {"ok": True, "seq": 1, "durable": True}
    c.assert_open()


# observe, observe.bulk ----------------------------------------------------------------------

def test_observe_single_seq_from_1(c):
    c.ok(create_req(gamma_per_s=0.999))  # transitions with dt use it
    c.ok(create_req("other"))
    for k in range(1, 4):
        assert c.call(obs()) == {"ok": True, "seq": k, "durable": True}
    # each model numbers its own transitions
    assert c.call(obs(model="other", id="o")) == {"ok": True, "id": "o", "seq": 1, "durable": True}
    # optional fields; terminal without x_next
    assert c.call(obs(source="pump-2", t=1764633600, dt=60)) == {"ok": True, "seq": 4,
                                                                  "durable": True}
    assert c.call(without(obs(terminal=True), "x_next")) == {"ok": True, "seq": 5, "durable": True}
    assert c.call(obs(terminal=True)) == {"ok": True, "seq": 6, "durable": True}
    assert c.call(obs(terminal=False)) == {"ok": True, "seq": 7, "durable": True}
    st = c.wait_applied("m", 7)
    assert st["queue"] == 0


def test_observe_batch(c):
    c.ok(create_req())
    c.ok(obs())
    batch = [{"x": [0.1 * i, 0.5], "r": -1.0 * i, "x_next": [0.1 * i + 0.1, 0.5]}
             for i in range(3)] + [{"x": [0.9, 0.9], "r": 2.0, "terminal": True, "source": "s2"}]
    assert c.call({"op": "observe", "model": "m", "batch": batch, "id": 2}) == \
        {"ok": True, "id": 2, "seq": 5, "count": 4, "durable": True}
    assert c.call(obs()) == {"ok": True, "seq": 6, "durable": True}
    c.wait_applied("m", 6)


def test_observe_batch_at_max_batch(daemon):
    c = daemon("--max-batch", MAX_BATCH).client()
    c.ok(create_req())
    tr = {"x": [0.5, 0.5], "r": 1.0, "terminal": True}
    assert c.call({"op": "observe", "model": "m", "batch": [tr] * MAX_BATCH}) == \
        {"ok": True, "seq": MAX_BATCH, "count": MAX_BATCH, "durable": True}
    rep = c.call({"op": "observe", "model": "m", "batch": [tr] * (MAX_BATCH + 1)})
    c.expect_error(rep, "too_large")
    c.assert_open()
    assert c.wait_applied("m")["received"] == MAX_BATCH


def test_observe_bulk(c):
    c.ok(create_req(gamma_per_s=0.999))  # the bulk header's dt uses it
    c.ok(obs())
    x = np.array([[0.1, 0.2], [0.3, 0.4], [0.5, 0.6], [0.7, 0.8]])
    payload = records(x, [1, 2, 3, 4], x[::-1], [0, 0, 0, 1])
    # layout check against struct: record 0 is x0, x1, r, xn0, xn1, terminal, little-endian
    assert payload[:48] == struct.pack("<6d", 0.1, 0.2, 1.0, 0.7, 0.8, 0.0)
    c.send({"op": "observe.bulk", "model": "m", "count": 4, "id": "b"})
    c.send_raw(payload)
    assert c.recv() == {"ok": True, "id": "b", "seq": 5, "count": 4, "durable": True}
    # text requests go on after the records
    assert c.call(obs()) == {"ok": True, "seq": 6, "durable": True}
    # optional header fields; records split into small writes
    c.send({"op": "observe.bulk", "model": "m", "count": 4, "source": "bulk-1", "dt": 1.5})
    for i in range(0, len(payload), 7):
        c.send_raw(payload[i:i + 7])
    assert c.recv() == {"ok": True, "seq": 10, "count": 4, "durable": True}
    st = c.wait_applied("m", 10)
    assert st["sources"] == 2  # the default source and bulk-1
    c.assert_open()


def test_observe_bulk_header_errors_close(daemon):
    d = daemon("--max-batch", MAX_BATCH)
    c = d.client()
    c.ok(create_req())
    rep = c.call({"op": "observe.bulk", "model": "m", "count": MAX_BATCH + 1})
    c.expect_error(rep, "too_large")
    c.assert_closed()
    c = d.client()
    rep = c.call({"op": "observe.bulk", "model": "nope", "count": 1})
    c.expect_error(rep, "no_such_model")
    c.assert_closed()
    c = d.client()
    rep = c.call({"op": "observe.bulk", "model": "m", "count": 0})  # count is 1..--max-batch
    c.expect_error(rep, "bad_param")
    c.assert_closed()
    c = d.client()
    assert c.stats("m")["received"] == 0
    # count at the limit is accepted
    c.send({"op": "observe.bulk", "model": "m", "count": MAX_BATCH})
    c.send_raw(records(np.full((MAX_BATCH, 2), 0.5), np.ones(MAX_BATCH),
                       np.full((MAX_BATCH, 2), 0.5), np.zeros(MAX_BATCH)))
    assert c.recv() == {"ok": True, "seq": MAX_BATCH, "count": MAX_BATCH, "durable": True}


def test_observe_bulk_bad_record_rejects_all(c):
    c.ok(create_req())
    c.ok(obs())
    x = np.full((5, 2), 0.5)
    x[3, 1] = np.nan
    x[4, 0] = np.inf  # a later bad record: the first one is named
    c.send({"op": "observe.bulk", "model": "m", "count": 5})
    c.send_raw(records(x, np.ones(5), np.full((5, 2), 0.5), np.zeros(5)))
    err = c.expect_error(c.recv(), "bad_number")
    assert err["index"] == 3, err
    c.assert_open()
    assert c.wait_applied("m")["received"] == 1
    assert c.call(obs()) == {"ok": True, "seq": 2, "durable": True}


def test_observe_bulk_truncated(c, d):
    c.ok(create_req())
    c.ok(obs())
    c.wait_applied("m", 1)
    p = d.client()
    p.send({"op": "observe.bulk", "model": "m", "count": 10})
    full = records(np.full((10, 2), 0.5), np.ones(10), np.full((10, 2), 0.5), np.zeros(10))
    p.send_raw(full[:5 * 48 + 20])  # five records and part of the sixth
    time.sleep(0.1)
    p.sock.shutdown(socket.SHUT_WR)
    c.expect_error(p.recv(), "truncated")
    p.assert_closed()
    time.sleep(0.2)
    st = c.wait_applied("m")
    assert (st["received"], st["applied"]) == (1, 1), st
    assert c.call(obs()) == {"ok": True, "seq": 2, "durable": True}


def test_observe_dt_discount(c):
    # Bias-only TD(0), alpha 0.5; gamma 0.9, gamma_per_s 0.5.  A terminal r = 1 step gives
    # w = 0.5; then x -> x with r = 0: delta = g w - w, w += 0.5 delta, i.e. w (1 + g) / 2.
    # dt = 2 gives g = 0.5^2 = 0.25 -> w = 0.3125; no dt gives g = gamma -> w = 0.475.
    spec = dict(dims=1, gamma=0.9, gamma_per_s=0.5, features=[{"basis": "bias"}],
                estimators=[{"name": "td", "kind": "td", "alpha": 0.5}])
    step0 = {"x": [0.5], "r": 1.0, "terminal": True}
    step1 = {"x": [0.5], "r": 0.0, "x_next": [0.5]}
    for name, extra, want in [("dt2", {"dt": 2}, 0.3125), ("nodt", {}, 0.475)]:
        c.ok(create_req(name, **spec))
        c.ok({"op": "observe", "model": name, "batch": [step0, dict(step1, **extra)]})
        c.wait_applied(name, 2)
        v = c.ok({"op": "value", "model": name, "x": [0.5]})["value"]
        assert v == pytest.approx(want, rel=1e-15), (name, v)
    # observe.bulk: the header's dt applies to every record
    c.ok(create_req("bulk", **spec))
    c.ok({"op": "observe", "model": "bulk", "x": [0.5], "r": 1.0, "terminal": True})
    c.send({"op": "observe.bulk", "model": "bulk", "count": 1, "dt": 2})
    c.send_raw(records([[0.5]], [0.0], [[0.5]], [0]))
    assert c.recv() == {"ok": True, "seq": 2, "count": 1, "durable": True}
    c.wait_applied("bulk", 2)
    assert c.ok({"op": "value", "model": "bulk", "x": [0.5]})["value"] == pytest.approx(0.3125)


# value ------------------------------------------------------------------------------------------

def feed_terminal(c, model, n, x, r=1.0, **kw):
    for _ in range(n):
        c.ok({"op": "observe", "model": model, "x": x, "r": r, "terminal": True, **kw})


def test_value_before_any_transition(c):
    c.ok(create_req(estimators=[{"name": "td", "kind": "td", "init": 0.5}]))
    rep = c.ok({"op": "value", "model": "m", "x": [0.5, 1.0]})
    # V = init * sum(phi) = 0.5 * (1 + 0.5 + 1.0); td answers it, but warming: no return yet
    warming = {"state": "warming", "why": "0 of 50 realised returns needed to judge it"}
    assert rep["primary"] == dict(warming, name="td", auto=True, reason=rep["primary"]["reason"])
    assert rep["primary"]["reason"].startswith("auto: no estimator is ok yet"), rep
    assert rep["health"] == {"td": dict(warming, sd=None, interval95=None)}
    del rep["primary"], rep["health"]
    assert rep == {"ok": True, "value": 1.25, "estimators": {"td": 1.25}, "sd": None,
                   "interval95": None, "spread": 0, "seq": 0}


def test_value_exact_td(c):
    # Bias-only TD(0), alpha 0.5, terminal r = 1 from w = 0: w_k = 1 - 0.5^k (exact in binary).
    c.ok(create_req(dims=1, features=[{"basis": "bias"}],
                    estimators=[{"name": "td", "kind": "td", "alpha": 0.5}]))
    feed_terminal(c, "m", 3, [0.3])
    c.wait_applied("m", 3)
    rep = c.call({"op": "value", "model": "m", "x": [0.7], "id": "v"})
    assert rep["health"]["td"]["state"] == "warming" and rep["primary"]["name"] == "td", rep
    del rep["primary"], rep["health"]
    assert rep == {"ok": True, "id": "v", "value": 0.875, "estimators": {"td": 0.875},
                   "sd": None, "interval95": None, "spread": 0, "seq": 3}


def test_value_estimators_sd_and_selection(c):
    c.ok(create_req(dims=1, features=[{"basis": "bias"}],
                    estimators=[{"name": "td", "kind": "td", "alpha": 0.5},
                                {"name": "rls", "kind": "rls_td", "delta": 100}]))
    feed_terminal(c, "m", 3, [0.3])
    c.wait_applied("m", 3)
    rep = c.ok({"op": "value", "model": "m", "x": [0.7]})
    assert set(rep) == {"ok", "value", "estimators", "sd", "interval95", "primary", "health",
                        "spread", "seq"}, rep
    assert rep["seq"] == 3
    # spread: the largest minus the smallest estimator value at this state
    assert rep["spread"] == max(rep["estimators"].values()) - min(rep["estimators"].values())
    assert rep["value"] == rep["estimators"]["td"] == 0.875
    # RLS-TD with mu = 1 is ridge LSTD with eps = 1/delta (Sherman-Morrison; see
    # tests/reference/test_numpy_ref.py): bias only, three r = 1 terminal steps: 3 / (3 + 0.01).
    assert rep["estimators"]["rls"] == pytest.approx(3 / 3.01, rel=1e-12, abs=0)
    # the headline (td, the first, while none is ok) has no sd of its own: none is borrowed
    assert rep["primary"]["name"] == "td" and rep["sd"] is None, rep
    rls_sd = rep["health"]["rls"]["sd"]
    assert isinstance(rls_sd, (int, float)) and rls_sd >= 0 and math.isfinite(rls_sd), rep
    sel = c.ok({"op": "value", "model": "m", "x": [0.7], "estimator": "rls"})
    assert "estimators" not in sel, sel
    assert sel["value"] == rep["estimators"]["rls"] and sel["sd"] == rls_sd, (sel, rep)
    # rls_td over 1 feature is warming for 3 x 1 updates, then on realised returns
    assert sel["state"] == "warming" and "realised returns" in sel["why"], sel
    assert sel.get("seq", 3) == 3
    sel = c.ok({"op": "value", "model": "m", "x": [0.7], "estimator": "td"})
    assert "estimators" not in sel, sel
    assert sel["value"] == 0.875 and sel["sd"] is None, sel


def test_value_primary(c):
    c.ok(create_req(dims=1, features=[{"basis": "bias"}], primary="rls",
                    estimators=[{"name": "td", "kind": "td", "alpha": 0.5},
                                {"name": "rls", "kind": "rls_td", "delta": 100}]))
    feed_terminal(c, "m", 3, [0.3])
    c.wait_applied("m", 3)
    rep = c.ok({"op": "value", "model": "m", "x": [0.7]})
    assert rep["value"] == rep["estimators"]["rls"] == pytest.approx(3 / 3.01, rel=1e-12)
    assert rep["estimators"]["td"] == 0.875
    assert rep["sd"] == c.ok({"op": "value", "model": "m", "x": [0.7], "estimator": "rls"})["sd"]
    assert c.ok({"op": "model.get", "model": "m"})["spec"]["primary"] == "rls"


def test_value_xs(c):
    c.ok(create_req(estimators=[{"name": "td", "kind": "td", "alpha": 0.5}]))
    c.ok({"op": "observe", "model": "m", "x": [1, 0], "r": 2.0, "terminal": True})
    c.ok({"op": "observe", "model": "m", "x": [0, 1], "r": -1.0, "terminal": True})
    c.wait_applied("m", 2)
    xs = [[1, 0], [0, 1], [0.5, 0.5], [0, 0]]
    single = [c.ok({"op": "value", "model": "m", "x": x})["value"] for x in xs]
    rep = c.call({"op": "value", "model": "m", "xs": xs, "id": 9})
    assert rep == {"ok": True, "id": 9, "values": single, "seq": 2,
                   "primary": {"name": "td", "state": "warming",
                               "why": "2 of 50 realised returns needed to judge it"}}
    # by hand: phi = (1, x0, x1); after step 1 w = (1, 1, 0); step 2: delta = -1 - 1 = -2,
    # w += 0.5 * -2 * (1, 0, 1) = (0, 1, -1)
    assert single == [1.0, -1.0, 0.0, 0.0]
    # inputs outside the declared ranges are clipped: [7, -3] reads as [1, 0]
    assert c.ok({"op": "value", "model": "m", "xs": [[7, -3], [1, 0]]})["values"] == [1.0, 1.0]


def test_value_seq_equals_applied(c):
    c.ok(create_req(estimators=[{"name": "td", "kind": "td"}, {"name": "rls", "kind": "rls_td"}]))
    c.ok({"op": "observe", "model": "m", "batch": [
        {"x": [i / 50, 1 - i / 50], "r": 1.0, "x_next": [0.5, 0.5]} for i in range(50)]})
    st = c.wait_applied("m", 50)
    assert c.ok({"op": "value", "model": "m", "x": [0.5, 0.5]})["seq"] == st["applied"] == 50
    assert c.ok({"op": "value", "model": "m", "xs": [[0.5, 0.5]]})["seq"] == 50


# train --------------------------------------------------------------------------------------

def read_train(c, passes, rid=None, timeout=30):
    """Reads progress lines then the final reply of a train request, all within timeout
    seconds; returns (progress, final)."""
    progress = []
    deadline = time.monotonic() + timeout
    for _ in range(passes + 2):
        rep = c.recv(max(deadline - time.monotonic(), 0.001))
        if "ok" in rep:
            return progress, rep
        assert set(rep) == ({"progress"} if rid is None else {"id", "progress"}), rep
        assert rep.get("id") == rid
        progress.append(rep["progress"])
    raise AssertionError(f"no final reply after {passes + 2} lines: {progress}")


def replay_model(c, name="m"):
    c.ok(create_req(name, 1, features=[{"basis": "bias"}, {"basis": "raw"}],
                    estimators=[{"name": "td", "kind": "td"},
                                {"name": "rp", "kind": "replay", "alpha": 0.05, "batch": 4,
                                 "tol": 1e-300}]))
    rng = np.random.default_rng(1)
    x = rng.uniform(size=40)
    c.ok({"op": "observe", "model": name, "batch": [
        {"x": [x[i]], "r": float(np.sin(7 * x[i])), "x_next": [x[(i + 1) % 40]]}
        for i in range(40)]})


def test_train_replay_progress(c):
    replay_model(c)
    c.send({"op": "train", "model": "m", "estimator": "rp", "passes": 3, "id": 7})
    progress, final = read_train(c, 3, rid=7)
    assert [(p["pass"], p["of"]) for p in progress] == [(1, 3), (2, 3), (3, 3)], progress
    assert all(isinstance(p["change"], float) and p["change"] > 0 for p in progress), progress
    assert set(final) == {"ok", "id", "passes", "change", "converged"}, final
    assert final == {"ok": True, "id": 7, "passes": 3, "change": progress[-1]["change"],
                     "converged": False}
    # default passes: 10; no id: no id on progress lines either
    c.send({"op": "train", "model": "m", "estimator": "rp"})
    progress, final = read_train(c, 10)
    assert [(p["pass"], p["of"]) for p in progress] == [(i, 10) for i in range(1, 11)]
    assert final["passes"] == 10 and "id" not in final
    c.assert_open()


def test_train_replay_stops_when_converged(c):
    c.ok(create_req(dims=1, features=[{"basis": "bias"}],
                    estimators=[{"name": "rp", "kind": "replay", "alpha": 0.5, "batch": 1,
                                 "steps_per_obs": 0, "tol": 0.01}]))
    feed_terminal(c, "m", 4, [0.5])
    c.send({"op": "train", "model": "m", "estimator": "rp", "passes": 1000})
    progress, final = read_train(c, 1000)
    # every sample is the target 1: w halves its distance to 1 each step, so the relative change
    # drops under 0.01 after a few passes and training stops there
    assert final["converged"] is True and 1 < final["passes"] < 1000, final
    assert len(progress) == final["passes"]
    assert [p["pass"] for p in progress] == list(range(1, final["passes"] + 1))
    assert progress[-1]["change"] == final["change"] < 0.01
    assert all(p["change"] >= 0.01 for p in progress[:-1]), progress


def test_train_lstd(c):
    c.ok(create_req(dims=1, features=[{"basis": "bias"}],
                    estimators=[{"name": "lstd", "kind": "lstd", "ridge": 0}]))
    feed_terminal(c, "m", 4, [0.5], r=2.0)
    c.send({"op": "train", "model": "m", "estimator": "lstd", "id": "t"})
    progress, final = read_train(c, 10, rid="t")
    assert final["ok"] is True and final["passes"] == 1 and final["converged"] is True, final
    assert len(progress) == 1 and progress[0]["pass"] == 1, progress
    # LSTD: A = 4, b = 8 -> w = 2 (refit_every 100 had not refitted before train)
    assert final["change"] == progress[0]["change"]
    assert c.ok({"op": "value", "model": "m", "x": [0.5]})["value"] == pytest.approx(2.0, 1e-12)


def test_train_runs_while_ingest_and_queries_go_on(d):
    c, other = d.client(), d.client()
    c.ok(create_req(dims=1, features=[{"basis": "bias"}, {"basis": "rbf", "centers": 32,
                                                          "width": 0.05}],
                    estimators=[{"name": "td", "kind": "td"},
                                {"name": "rp", "kind": "replay", "batch": 1, "tol": 1e-300,
                                 "steps_per_obs": 0}]))
    n = 5000
    c.ok({"op": "observe", "model": "m", "batch": [
        {"x": [i / n], "r": float(i % 7), "x_next": [(i + 1) / n]} for i in range(n)]},
        timeout=30)
    c.wait_applied("m", n, timeout=30)
    # calibrate: passes enough for about 3 s of training (at most 100000), far longer than the
    # few requests the other connection makes meanwhile
    t0 = time.monotonic()
    c.send({"op": "train", "model": "m", "estimator": "rp", "passes": 20})
    read_train(c, 20)
    per_pass = max((time.monotonic() - t0) / 20, 1e-6)
    passes = int(min(100000, max(50, 3.0 / per_pass)))
    c.send({"op": "train", "model": "m", "estimator": "rp", "passes": passes, "id": "long"})
    first = c.recv(30)
    assert first.get("progress", {}).get("pass") == 1, first
    # training is under way; the other connection is served meanwhile
    t1 = time.monotonic()
    assert other.call({"op": "hello"}, timeout=2)["ok"] is True
    seq = other.ok({"op": "observe", "model": "m", "x": [0.5], "r": 1.0, "terminal": True},
                   timeout=2)["seq"]
    assert seq == n + 1
    val = other.ok({"op": "value", "model": "m", "x": [0.5]}, timeout=2)
    st = other.stats("m")
    t2 = time.monotonic()
    progress, final = read_train(c, passes, rid="long", timeout=60)
    if len(progress) + 1 < passes // 2:
        pytest.fail(f"training ended early: {final}")
    print(f"{passes} passes, other connection served in {t2 - t1:.3f} s")
    # the observe accepted during training waits in the queue, behind the train request
    assert val["seq"] == n, val
    assert (st["received"], st["applied"], st["queue"]) == (n + 1, n, 1), st
    assert final["ok"] is True and final["passes"] == passes, final
    c.wait_applied("m", n + 1)


def test_train_unsupported(c):
    c.ok(create_req(estimators=[{"name": "td", "kind": "td"}, {"name": "r", "kind": "rls_td"}]))
    c.ok(obs())
    for est in ("td", "r"):
        c.err({"op": "train", "model": "m", "estimator": est, "passes": 2}, "unsupported")
        c.assert_open()


# stats ------------------------------------------------------------------------------------------

def test_stats(c):
    c.ok(create_req(dims=2, ranges=[[0, 1], [0, 1]], features=[{"basis": "bias"}],
                    estimators=[{"name": "td", "kind": "td", "alpha": 0.5},
                                {"name": "rls", "kind": "rls_td"}]))
    st = c.call({"op": "stats", "model": "m", "id": 1})
    assert {k: st.get(k) for k in ("ok", "id", "model", "received", "applied", "queue",
                                   "clipped", "sources")} == {
        "ok": True, "id": 1, "model": "m", "received": 0, "applied": 0, "queue": 0,
        "clipped": 0, "sources": 0}
    t0 = time.time()
    # x components outside [0, 1]: 1, then 2, then none clipped (terminal, no x_next)
    for x, src in [([2, 0.5], "a"), ([-1, 5], "b"), ([0.5, 0.5], "a")]:
        c.ok({"op": "observe", "model": "m", "x": x, "r": 1.0, "terminal": True, "source": src})
    st = c.wait_applied("m", 3)
    t1 = time.time()
    assert {k: st[k] for k in ("model", "received", "applied", "queue", "clipped", "sources")} \
        == {"model": "m", "received": 3, "applied": 3, "queue": 0, "clipped": 3, "sources": 2}
    assert set(st["estimators"]) == {"td", "rls"}
    for name, kind in [("td", "td"), ("rls", "rls_td")]:
        e = st["estimators"][name]
        assert {"kind", "updates", "td_rms", "td_last", "guarded", "last_update"} <= set(e), e
        assert (e["kind"], e["updates"], e["guarded"]) == (kind, 3, 0), e
        assert t0 - 1 <= e["last_update"] <= t1 + 1, (e, t0, t1)
        assert e["td_rms"] > 0
    # td, bias only, alpha 0.5: V = 0, 0.5, 0.75 before each update -> last TD error 1 - 0.75
    assert st["estimators"]["td"]["td_last"] == 0.25
    assert st["estimators"]["rls"]["trace_p"] > 0


def test_too_many_sources(c):
    c.ok(create_req(max_sources=2))
    assert c.call(obs(source="a")) == {"ok": True, "seq": 1, "durable": True}
    assert c.call(obs(source="b")) == {"ok": True, "seq": 2, "durable": True}
    c.err(obs(source="c"), "too_many_sources")
    c.assert_open()
    # known sources still welcome; nothing of the refused one counted
    assert c.call(obs(source="a")) == {"ok": True, "seq": 3, "durable": True}
    st = c.wait_applied("m", 3)
    assert st["sources"] == 2
    # in a batch too: whole batch refused, index of the new source
    err = c.err({"op": "observe", "model": "m", "batch": [
        without(obs(source="b"), "op", "model"), without(obs(source="d"), "op", "model")]},
        "too_many_sources")
    assert err.get("index") == 1, err
    assert c.wait_applied("m")["received"] == 3


# errors -----------------------------------------------------------------------------------------

def bad_ests(*ests):
    return create_req("fresh", estimators=list(ests))


ERROR_CASES = [
    ("garbage", b"this is not json\n", "bad_json"),
    ("json_array", b'[{"op":"hello"}]\n', "bad_json"),
    ("truncated_object", b'{"op":"hello","id":1\n', "bad_json"),
    ("json_string", b'"hello"\n', "bad_json"),
    ("json_number", b"42\n", "bad_json"),
    ("unknown_op", {"op": "frobnicate"}, "unknown_op"),
    ("unknown_op_case", {"op": "HELLO"}, "unknown_op"),
    ("missing_op", {"id": 1}, "bad_request"),
    ("op_not_string", {"op": 5}, "bad_request"),
    ("observe_missing_model", without(obs(), "model"), "bad_request"),
    ("value_missing_model", {"op": "value", "x": [0.5, 0.5]}, "bad_request"),
    ("value_missing_x", {"op": "value", "model": "m"}, "bad_request"),
    ("x_not_array_object", obs(x={"a": 1}), "bad_request"),
    ("x_not_array_number", obs(x=0.5), "bad_request"),
    ("observe_missing_r", without(obs(), "r"), "bad_request"),
    ("observe_missing_x_next", without(obs(), "x_next"), "bad_request"),
    ("terminal_not_bool", obs(terminal="yes"), "bad_request"),
    ("batch_not_array", {"op": "observe", "model": "m", "batch": {"x": [0.5, 0.5]}},
     "bad_request"),
    ("create_missing_dims", without(create_req("fresh"), "dims"), "bad_request"),
    ("create_missing_estimators", without(create_req("fresh"), "estimators"), "bad_request"),
    ("estimator_unknown_param",
     bad_ests({"name": "td", "kind": "td", "alpah": 0.1}), "bad_request"),
    ("basis_unknown_field",
     create_req("fresh", features=[{"basis": "poly", "degree": 2, "degee": 3}]), "bad_request"),
    ("no_such_model_observe", obs(model="nope"), "no_such_model"),
    ("no_such_model_value", {"op": "value", "model": "nope", "x": [0.5, 0.5]}, "no_such_model"),
    ("no_such_model_stats", {"op": "stats", "model": "nope"}, "no_such_model"),
    ("no_such_model_get", {"op": "model.get", "model": "nope"}, "no_such_model"),
    ("no_such_model_drop", {"op": "model.drop", "model": "nope"}, "no_such_model"),
    ("no_such_model_train", {"op": "train", "model": "nope", "estimator": "td"},
     "no_such_model"),
    ("model_exists", create_req("m"), "model_exists"),
    ("x_wrong_length", obs(x=[0.5]), "bad_dimension"),
    ("x_next_wrong_length", obs(x_next=[0.5, 0.5, 0.5]), "bad_dimension"),
    ("terminal_x_next_wrong_length", obs(terminal=True, x_next=[0.5]), "bad_dimension"),
    ("ranges_wrong_count", create_req("fresh", ranges=[[0, 1]]), "bad_dimension"),
    ("value_x_wrong_length", {"op": "value", "model": "m", "x": [0.5]}, "bad_dimension"),
    ("value_xs_one_wrong", {"op": "value", "model": "m", "xs": [[0.5, 0.5], [0.5]]},
     "bad_dimension"),
    ("x_overflow",
     b'{"op":"observe","model":"m","x":[1e400,0.5],"r":1,"terminal":true}\n', "bad_number"),
    ("r_overflow",
     b'{"op":"observe","model":"m","x":[0.5,0.5],"r":-1e400,"terminal":true}\n', "bad_number"),
    ("r_nan_string", obs(r="NaN"), "bad_number"),
    ("x_nan_string", obs(x=["NaN", 0.5]), "bad_number"),
    ("x_next_inf_string", obs(x_next=[0.5, "Infinity"]), "bad_number"),
    ("x_null", obs(x=[None, 0.5]), "bad_number"),
    ("r_null", obs(r=None), "bad_number"),
    ("value_x_null", {"op": "value", "model": "m", "x": [0.5, None]}, "bad_number"),
    ("value_x_overflow", b'{"op":"value","model":"m","x":[0.5,1e400]}\n', "bad_number"),
    ("gamma_nan_string", create_req("fresh", gamma="NaN"), "bad_number"),
    ("gamma_1.5", create_req("fresh", gamma=1.5), "bad_param"),
    ("gamma_negative", create_req("fresh", gamma=-0.1), "bad_param"),
    ("gamma_per_s_0", create_req("fresh", gamma_per_s=0), "bad_param"),
    ("alpha_0", bad_ests({"name": "td", "kind": "td", "alpha": 0}), "bad_param"),
    ("kind_unknown", bad_ests({"name": "q", "kind": "sarsa"}), "bad_param"),
    ("forget_0", bad_ests({"name": "r", "kind": "rls_td", "forget": 0}), "bad_param"),
    ("lambda_2", bad_ests({"name": "l", "kind": "td_lambda", "lambda": 2}), "bad_param"),
    ("dims_0", create_req("fresh", dims=0, ranges=[]), "bad_param"),
    ("range_lo_not_below_hi", create_req("fresh", ranges=[[0, 1], [1, 1]]), "bad_param"),
    ("rbf_width_0", create_req("fresh", features=[{"basis": "rbf", "centers": 3, "width": 0}]),
     "bad_param"),
    ("max_sources_0", create_req("fresh", max_sources=0), "bad_param"),
    ("poly_degree_0", create_req("fresh", features=[{"basis": "poly", "degree": 0}]),
     "bad_param"),
    ("poly_degree_256", create_req("fresh", features=[{"basis": "poly", "degree": 256}]),
     "bad_param"),
    ("fourier_order_0", create_req("fresh", features=[{"basis": "fourier", "order": 0}]),
     "bad_param"),
    ("fourier_couple_over_dims",
     create_req("fresh", features=[{"basis": "fourier", "order": 2, "couple": 3}]), "bad_param"),
    ("rbf_centers_0", create_req("fresh", features=[{"basis": "rbf", "centers": 0,
                                                     "width": 0.1}]), "bad_param"),
    ("rbf_missing_width", create_req("fresh", features=[{"basis": "rbf", "centers": 3}]),
     "bad_request"),
    ("tiles_tilings_1025", create_req("fresh", features=[
        {"basis": "tiles", "tilings": 1025, "tiles": 4, "size": 64}]), "bad_param"),
    ("tiles_size_0", create_req("fresh", features=[
        {"basis": "tiles", "tilings": 2, "tiles": 4, "size": 0}]), "bad_param"),
    ("tiles_tiles_over_2^20", create_req("fresh", features=[
        {"basis": "tiles", "tilings": 2, "tiles": 2 ** 20 + 1, "size": 64}]), "bad_param"),
    ("basis_unknown", create_req("fresh", features=[{"basis": "wavelet"}]), "bad_param"),
    ("features_empty", create_req("fresh", features=[]), "bad_param"),
    ("guard_unknown", bad_ests({"name": "r", "kind": "rls_td", "guard": "bogus"}), "bad_param"),
    ("estimator_name_64_bytes", bad_ests({"name": "e" * 64, "kind": "td"}), "bad_param"),
    ("estimator_missing_name", bad_ests({"kind": "td"}), "bad_request"),
    ("value_unknown_estimator",
     {"op": "value", "model": "m", "x": [0.5, 0.5], "estimator": "zz"}, "bad_param"),
    ("id_null", {"op": "hello", "id": None}, "bad_request"),
    ("id_array", {"op": "hello", "id": [1]}, "bad_request"),
    ("id_bool", {"op": "hello", "id": True}, "bad_request"),
    ("name_empty", create_req(""), "bad_param"),
    ("name_64_bytes", create_req("x" * 64), "bad_param"),
    ("name_slash", create_req("../x"), "bad_param"),
    ("name_space", create_req("a b"), "bad_param"),
    ("estimators_empty", create_req("fresh", estimators=[]), "bad_param"),
    ("estimators_17", create_req("fresh", estimators=[
        {"name": f"e{i}", "kind": "td"} for i in range(17)]), "bad_param"),
    ("estimator_names_duplicate", bad_ests({"name": "a", "kind": "td"},
                                           {"name": "a", "kind": "mc"}), "bad_param"),
    ("primary_unknown", create_req("fresh", primary="zz"), "bad_param"),
    ("train_passes_0", {"op": "train", "model": "m", "estimator": "rp", "passes": 0},
     "bad_param"),
    ("train_passes_100001", {"op": "train", "model": "m", "estimator": "rp", "passes": 100001},
     "bad_param"),
    ("train_unknown_estimator", {"op": "train", "model": "m", "estimator": "zz"}, "bad_param"),
    ("train_missing_estimator", {"op": "train", "model": "m"}, "bad_request"),
    ("max_sources_1025", create_req("fresh", max_sources=1025), "bad_param"),
    ("batch_over_max_batch", {"op": "observe", "model": "m", "batch": [
        {"x": [0.5, 0.5], "r": 1.0, "terminal": True}] * (MAX_BATCH + 1)}, "too_large"),
    ("dims_65", create_req("fresh", dims=65, features=[{"basis": "bias"}]), "too_large"),
    ("features_over_max_features",  # C(3+3, 3) - 1 = 19 > 10
     create_req("fresh", dims=3, features=[{"basis": "poly", "degree": 3}], max_features=10),
     "too_large"),
    ("features_over_default_4096",  # 65^2 = 4225
     create_req("fresh", features=[{"basis": "rbf", "centers": 65, "width": 0.1}]), "too_large"),
    ("train_td", {"op": "train", "model": "m", "estimator": "td"}, "unsupported"),
]


@pytest.mark.parametrize("payload,code", [c[1:] for c in ERROR_CASES],
                         ids=[c[0] for c in ERROR_CASES])
def test_error_code(daemon, payload, code):
    d = daemon("--max-batch", MAX_BATCH)
    c = d.client()
    c.ok(create_req("m", estimators=[{"name": "td", "kind": "td", "alpha": 0.1},
                                     {"name": "rp", "kind": "replay"}]))
    c.err(payload, code)
    # the connection stays open and nothing was accepted or created
    c.assert_open()
    assert c.wait_applied("m")["received"] == 0
    assert [m["model"] for m in c.ok({"op": "model.list"})["models"]] == ["m"]


def test_error_reply_shape(c):
    rep = c.call({"op": "frobnicate", "id": "e"})
    assert set(rep) == {"ok", "id", "error"}, rep
    assert set(rep["error"]) == {"code", "message"}, rep


def test_batch_with_one_bad_element(c):
    c.ok(create_req())
    c.ok(obs())
    c.ok(obs())
    assert c.wait_applied("m", 2)["received"] == 2
    good = {"x": [0.5, 0.5], "r": 1.0, "x_next": [0.5, 0.5]}
    for i, (bad, code) in enumerate([({"x": [0.5]}, "bad_dimension"),
                                     ({"r": "NaN"}, "bad_number"),
                                     ({"x_next": [0.5, None]}, "bad_number"),
                                     ({"x": "a"}, "bad_request")]):
        batch = [dict(good) for _ in range(5)]
        batch[i].update(bad)
        err = c.err({"op": "observe", "model": "m", "batch": batch}, code)
        assert err["index"] == i, err
        c.assert_open()
        st = c.stats("m")
        assert st["received"] == 2, st
    assert c.call(obs()) == {"ok": True, "seq": 3, "durable": True}


def test_line_too_long(daemon):
    d = daemon("--max-line", 1000)
    c = d.client()

    def hello_line(n, rid):
        """A hello line of exactly n bytes (without the newline), padded with JSON whitespace."""
        head = b'{"op":"hello","id":"' + rid.encode() + b'"'
        line = head + b" " * (n - len(head) - 1) + b"}"
        assert len(line) == n
        return line

    c.send_raw(hello_line(1000, "edge") + b"\n")  # at the limit: fine
    assert c.recv()["id"] == "edge"
    c.send_raw(hello_line(2000, "long") + b"\n")
    c.expect_error(c.recv(), "line_too_long")
    c.assert_closed()
    c = d.client()
    c.send_raw(hello_line(1001, "over") + b"\n")
    c.expect_error(c.recv(), "line_too_long")
    c.assert_closed()
    # the daemon carries on
    d.client().assert_open()


def test_line_too_long_without_newline(daemon):
    d = daemon("--max-line", 1000)
    c = d.client()
    c.send_raw(b'{"op":"hello","id":"' + b"y" * 5000)  # no newline ever comes
    c.expect_error(c.recv(), "line_too_long")
    c.assert_closed()
    d.client().assert_open()
