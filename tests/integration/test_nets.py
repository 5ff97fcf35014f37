"""The value networks (mlp, ensemble) through worthd: model.create with their options and
the exact error codes of bad ones, ingest, value with the ensemble's sd, train, and a restart
from the checkpoint and from the log alone that rebuilds the same values bit for bit.
The contract is schema/protocol.md (model.create's estimator table, "train", "Restart").
Servers listen on a Unix socket in a temporary directory; every wait is bounded.  Run with
Debian's /usr/bin/python3 (numpy, pytest 7.2).
"""
import sqlite3
import struct

import numpy as np
import pytest

FEED = 1500
PROBES = [[0.1, 0.2], [0.5, 0.5], [0.9, 0.3]]


def model_req(name="m", **extra):
    est = [{"name": "td", "kind": "td", "alpha": 0.05},
           {"name": "net", "kind": "mlp", "hidden": [8, 8], "activation": "tanh",
            "capacity": 500, "batch": 8, "n": 2, "target_every": 20, "clip": 10, "seed": 4},
           {"name": "ens", "kind": "ensemble", "members": 3, "hidden": [6], "capacity": 500,
            "batch": 8, "activation": "relu", "seed": 9}]
    req = {"op": "model.create", "model": name, "dims": 2, "gamma": 0.9,
           "ranges": [[0, 1], [0, 1]], "features": [{"basis": "raw"}], "estimators": est}
    req.update(extra)
    return req


def feed(c, n, seed=3):
    rng = np.random.default_rng(seed)
    x = rng.random((n + 1, 2))
    recs = b"".join(struct.pack("<6d", *x[i], float(np.sin(3 * x[i, 0])), *x[i + 1],
                                1.0 if i % 50 == 49 else 0.0) for i in range(n))
    c.send_raw(b'{"op":"observe.bulk","model":"m","count":%d}\n' % n + recs)
    assert c.recv(30)["ok"] is True


def train(c, est, passes):
    """A train request; reads its progress lines (bounded) and returns the final reply."""
    c.send({"op": "train", "model": "m", "estimator": est, "passes": passes})
    for _ in range(passes + 2):
        rep = c.recv(30)
        if "progress" not in rep:
            assert rep.get("ok") is True, rep
            return rep
    raise AssertionError("no final reply to train")


def answers(c):
    out = []
    for x in PROBES:
        rep = c.ok({"op": "value", "model": "m", "x": x})
        out.append((rep["estimators"], rep["health"]["ens"]["sd"], rep["health"]["net"]["sd"]))
    return out


def test_networks_learn_answer_and_rebuild_bit_for_bit(daemon):
    d = daemon("--checkpoint-every", 0)
    c = d.client(timeout=30)
    rep = c.ok(model_req())
    feed(c, FEED)
    c.wait_applied("m", FEED, timeout=60)
    first = answers(c)
    for est, ens_sd, net_sd in first:
        assert all(np.isfinite(v) for v in est.values()), est
        assert ens_sd is not None and ens_sd > 0, ens_sd  # the members' spread
        assert net_sd is None  # one network has no sd of its own
    # mini-batch steps are reported like the replay trainer's
    st = c.ok({"op": "stats", "model": "m"})
    assert "steps" in str(st), st
    t = train(c, "net", 3)
    assert t["passes"] == 3 and t["change"] > 0, t
    train(c, "ens", 2)
    trained = answers(c)
    assert trained != first
    c.ok({"op": "checkpoint", "model": "m"})
    d = d.restart()
    assert answers(d.client()) == trained  # from the checkpoint
    d.shutdown()
    conn = sqlite3.connect(d.db)
    conn.execute("DELETE FROM checkpoints")
    conn.commit()
    conn.close()
    d = d.restart()
    assert f"replayed {FEED} transitions" in d.stderr, d.tail()
    assert answers(d.client()) == trained  # from the log and the recorded trainings alone


@pytest.mark.parametrize("est,code,part", [
    ({"hidden": []}, "bad_param", "hidden must list 1..4 layer widths"),
    ({"hidden": [8, 0]}, "bad_param", "hidden[1] must be an integer 1..1024"),
    ({"hidden": "8"}, "bad_request", "hidden must be an array"),
    ({"activation": "softplus"}, "bad_param", "activation must be"),
    ({"kind": "ensemble", "members": 1}, "bad_param", "members must be 2..32"),
    ({"kind": "ensemble", "members": 40}, "bad_param", "members must be 2..32"),
    ({"members": 3}, "bad_request", "does not apply to kind mlp"),
    ({"kind": "ensemble", "members": 8, "hidden": [1024, 1024, 1024, 1024]}, "too_large",
     "weights, over the limit"),
])
def test_bad_network_options_have_stable_codes(daemon, est, code, part):
    c = daemon().client()
    e = {"name": "net", "kind": "mlp"}
    e.update(est)
    req = model_req()
    req["estimators"] = [e]
    rep = c.call(req)
    c.expect_error(rep, code)
    assert part in rep["error"]["message"], rep


def test_max_model_mb_counts_the_networks(daemon):
    c = daemon("--max-model-mb", 16).client()
    req = model_req()
    req["estimators"] = [{"name": "ens", "kind": "ensemble", "members": 32,
                          "hidden": [256, 256], "capacity": 1000}]
    rep = c.call(req)
    c.expect_error(rep, "too_large")
    assert "MiB" in rep["error"]["message"], rep
