"""Ingest end to end: Boyan's chain over the socket, concurrent producers, shutdown under load,
TCP with and without a token, and the Unix socket's life cycle (schema/protocol.md).

Each test starts its own worthd (conftest.daemon); every loop is bounded in count and time.
"""
import json
import os
import re
import signal
import socket
import stat
import subprocess
import threading
import time

import numpy as np
import pytest

from conftest import Client, Daemon, daemon_path, is_closed_error


# Boyan's chain ---------------------------------------------------------------------------------
#
# Boyan 2002, "Technical update: least-squares temporal difference learning", Machine Learning
# 49, 233-246 (as tests/reference/boyan.h): states 12..0, 0 absorbing, gamma = 1; from s >= 2
# to s-1 or s-2 with reward -3, from 1 to 0 with reward -2.  Four features interpolate linearly
# between the anchors 12, 8, 4, 0; the true values V(s) = -2s are represented exactly by
# w = [-24, -16, -8, 0].  The data set is deterministic: each s -> s-1 and s -> s-2 once (the
# expected transitions, both equally likely), then 1 -> 0, repeated SWEEPS times.  The state
# sent is the feature vector itself, with the raw basis on [0, 1]^4, so phi(x) = x exactly.

BOYAN_W = np.array([-24.0, -16.0, -8.0, 0.0])
SWEEPS = 100
RLS_DELTA = 1e6


def boyan_phi(s):
    """phi(s) of boyan.h: feature j belongs to anchor 12 - 4j."""
    phi = np.zeros(4)
    j = (12 - s) // 4
    if j >= 3:
        phi[3] = 1.0
        return phi
    above = 12 - 4 * j
    phi[j] = 1.0 - (above - s) / 4.0
    phi[j + 1] = (above - s) / 4.0
    return phi


def boyan_transitions():
    """One sweep: (s, s', r) for s = 12..2 to s-1 and s-2 (r = -3), then 1 -> 0 (r = -2)."""
    out = []
    for s in range(12, 1, -1):
        out += [(s, s - 1, -3.0), (s, s - 2, -3.0)]
    return out + [(1, 0, -2.0)]


def boyan_create(name):
    return {"op": "model.create", "model": name, "dims": 4, "gamma": 1,
            "ranges": [[0, 1]] * 4, "features": [{"basis": "raw"}],
            "estimators": [{"name": "lstd", "kind": "lstd", "ridge": 0},
                           {"name": "rls", "kind": "rls_td", "delta": RLS_DELTA, "forget": 1}]}


def boyan_reference():
    """A and b of one sweep, the exact solution, and RLS-TD's ridge solution after SWEEPS."""
    A, b = np.zeros((4, 4)), np.zeros(4)
    for s, sn, r in boyan_transitions():
        phi, phin = boyan_phi(s), (np.zeros(4) if sn == 0 else boyan_phi(sn))
        A += np.outer(phi, phi - phin)
        b += phi * r
    w_lstd = np.linalg.solve(A, b)  # reference: numpy.linalg.solve (LAPACK gesv)
    # RLS-TD with mu = 1, lambda = 0 from w = 0, P0 = delta I is ridge LSTD with eps = 1/delta
    # after every step (Sherman-Morrison; as in tests/reference/test_numpy_ref.py).
    w_rls = np.linalg.solve(SWEEPS * A + np.eye(4) / RLS_DELTA, SWEEPS * b)
    return w_lstd, w_rls


def check_boyan(c, name):
    """Refits lstd with train, then checks both estimators' values at every state."""
    c.wait_applied(name, 23 * SWEEPS)
    c.send({"op": "train", "model": name, "estimator": "lstd"})
    for _ in range(3):
        rep = c.recv(30)
        if "ok" in rep:
            break
    assert rep == {"ok": True, "passes": 1, "change": rep.get("change"), "converged": True}, rep
    w_lstd, w_rls = boyan_reference()
    # Premises: the exact solution is Boyan's w, and SWEEPS makes the ridge bias < 1e-6.
    np.testing.assert_allclose(w_lstd, BOYAN_W, rtol=0, atol=1e-12)
    assert np.abs(w_rls - BOYAN_W).max() < 2e-7
    got = {}
    for s in range(12, 0, -1):
        rep = c.ok({"op": "value", "model": name, "x": boyan_phi(s).tolist()})
        assert rep["seq"] == 23 * SWEEPS, rep
        got[s] = (rep["estimators"]["lstd"], rep["estimators"]["rls"])
        assert rep["value"] == got[s][0]  # lstd is the primary (first)
    for s in (12, 8, 4):
        lstd, rls = got[s]
        # reference: Boyan 2002, V(s) = -2s
        assert abs(lstd - (-2 * s)) <= 1e-9, (s, lstd)
        assert abs(rls - (-2 * s)) <= 1e-6, (s, rls)
    for s in range(1, 13):
        lstd, rls = got[s]
        assert abs(lstd - (-2 * s)) <= 1e-9, (s, lstd)
        # reference: numpy.linalg.solve of the ridge path (above)
        assert abs(rls - boyan_phi(s) @ w_rls) <= 1e-9 * 24, (s, rls, boyan_phi(s) @ w_rls)
    return got


def test_boyan_chain_json_and_bulk(daemon):
    d = daemon()
    c = d.client()
    assert c.call(boyan_create("boyan-json")) == {"ok": True, "model": "boyan-json",
                                                  "features": 4}
    assert c.call(boyan_create("boyan-bulk")) == {"ok": True, "model": "boyan-bulk",
                                                  "features": 4}
    sweep = boyan_transitions()
    assert len(sweep) == 23
    # JSON lines: one observe per transition, a sweep's lines written at once, then its replies
    seq = 0
    for _ in range(SWEEPS):
        lines = []
        for s, sn, r in sweep:
            req = {"op": "observe", "model": "boyan-json", "x": boyan_phi(s).tolist(), "r": r}
            if sn == 0:
                req["terminal"] = True
            else:
                req["x_next"] = boyan_phi(sn).tolist()
            lines.append(req)
        c.send_raw(b"".join(json.dumps(q).encode() + b"\n" for q in lines))
        for _ in lines:
            seq += 1
            assert c.recv() == {"ok": True, "seq": seq, "durable": True}
    # observe.bulk: the same transitions, one header and 23 * SWEEPS records
    rec = np.array([np.concatenate([boyan_phi(s), [r], boyan_phi(sn), [1.0 if sn == 0 else 0.0]])
                    for s, sn, r in sweep] * SWEEPS)
    assert rec.shape == (23 * SWEEPS, 10)
    c.send({"op": "observe.bulk", "model": "boyan-bulk", "count": len(rec)})
    c.send_raw(rec.astype("<f8").tobytes())
    assert c.recv(30) == {"ok": True, "seq": len(rec), "count": len(rec), "durable": True}
    got_json = check_boyan(c, "boyan-json")
    got_bulk = check_boyan(c, "boyan-bulk")
    # Same transitions in the same order give the same bits, whatever the framing.
    assert got_json == got_bulk


# Concurrent producers ------------------------------------------------------------------------

N_PRODUCERS = 8
SINGLES = 200          # single observes per producer
BATCHES = 4            # then this many batches ...
BATCH = 50             # ... of this many transitions
PER_PRODUCER = SINGLES + BATCHES * BATCH
ALPHA = 0.01


def test_concurrent_producers_and_queries(daemon):
    d = daemon()
    c = d.client()
    c.ok({"op": "model.create", "model": "fleet", "dims": 1, "gamma": 0.9, "ranges": [[0, 1]],
          "features": [{"basis": "bias"}],
          "estimators": [{"name": "td", "kind": "td", "alpha": ALPHA}]})
    total = N_PRODUCERS * PER_PRODUCER
    seqs = [[] for _ in range(N_PRODUCERS)]
    errors = []
    done = threading.Event()

    def produce(i):
        try:
            p = Client(d.sock)
            try:
                tr = {"x": [i / N_PRODUCERS], "r": 1.0, "terminal": True, "source": f"p{i}"}
                for _ in range(SINGLES):
                    rep = p.call(dict(tr, op="observe", model="fleet"))
                    assert rep.get("ok") is True and set(rep) == {"ok", "seq", "durable"}, rep
                    seqs[i].append(rep["seq"])
                for _ in range(BATCHES):
                    rep = p.call({"op": "observe", "model": "fleet", "batch": [tr] * BATCH})
                    assert rep.get("ok") is True and rep["count"] == BATCH, rep
                    seqs[i] += range(rep["seq"] - BATCH + 1, rep["seq"] + 1)
            finally:
                p.close()
        except BaseException as e:  # reported by the main thread
            errors.append(f"producer {i}: {e!r}")

    answers, stats = [], []

    def query():
        try:
            q = Client(d.sock)
            try:
                deadline = time.monotonic() + 60
                for k in range(200_000):
                    if done.is_set() or time.monotonic() > deadline:
                        break
                    rep = q.call({"op": "value", "model": "fleet", "x": [0.5]})
                    assert rep.get("ok") is True, rep
                    answers.append((rep["seq"], rep["value"]))
                    if k % 10 == 0:
                        st = q.stats("fleet")
                        stats.append((st["received"], st["applied"], st["queue"]))
            finally:
                q.close()
        except BaseException as e:
            errors.append(f"query: {e!r}")

    threads = [threading.Thread(target=produce, args=(i,)) for i in range(N_PRODUCERS)]
    querier = threading.Thread(target=query)
    querier.start()
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    done.set()
    querier.join(60)
    assert not any(t.is_alive() for t in threads + [querier]), "a client thread hung"
    assert not errors, errors

    # every transition accepted exactly once, numbered 1..total
    allseq = sorted(s for per in seqs for s in per)
    assert allseq == list(range(1, total + 1))
    st = c.wait_applied("fleet", total)
    assert (st["received"], st["applied"], st["queue"], st["sources"]) == (total, total, 0, 8)
    assert st["estimators"]["td"]["updates"] == total

    # Bias-only TD(0), terminal r = 1 from w = 0: w_k = w_{k-1} + alpha (1 - w_{k-1}), the same
    # whatever the order of the sources; so each answer's value is fixed by its seq.
    ref = np.empty(total + 1)
    ref[0] = w = 0.0
    for k in range(1, total + 1):
        w += ALPHA * (1.0 - w)
        ref[k] = w
    mid = sum(0 < s < total for s, _ in answers)
    print(f"{len(answers)} value answers, {mid} while ingesting; {len(stats)} stats")
    assert len(answers) > 0
    for (s0, v0), (s1, v1) in zip(answers, answers[1:]):
        assert s0 <= s1, "value seq went backwards"
    for s, v in answers:
        assert 0 <= s <= total and abs(v - ref[s]) < 1e-12, (s, v, ref[s])
    for rcv, app, queue in stats:
        assert 0 <= app <= rcv <= total and queue == rcv - app, (rcv, app, queue)
    # converged: 0.99^6400 ~ 1e-28
    rep = c.ok({"op": "value", "model": "fleet", "x": [0.5]})
    assert rep["seq"] == total and abs(rep["value"] - 1.0) < 1e-12, rep


def test_stats_consistent_under_load(daemon):
    # protocol.md, stats: "queue is their difference" (received - applied), in every reply,
    # including while the learner is behind.
    d = daemon()
    c = d.client()
    c.ok({"op": "model.create", "model": "busy", "dims": 2, "gamma": 0.9,
          "ranges": [[0, 1], [0, 1]],
          "features": [{"basis": "rbf", "centers": 4, "width": 0.3}],
          "estimators": [{"name": "lstd", "kind": "lstd"}, {"name": "rls", "kind": "rls_td"}]})
    n, rounds = 5000, 20
    payload = np.tile([0.5, 0.5, 1.0, 0.4, 0.4, 0.0], (n, 1)).astype("<f8").tobytes()
    errors = []

    def produce():
        try:
            p = Client(d.sock)
            for _ in range(rounds):
                p.send({"op": "observe.bulk", "model": "busy", "count": n})
                p.send_raw(payload)
                assert p.recv(30)["ok"] is True
            p.close()
        except BaseException as e:
            errors.append(repr(e))

    t = threading.Thread(target=produce)
    t.start()
    samples = []
    deadline = time.monotonic() + 60
    for _ in range(100_000):
        if not t.is_alive() or time.monotonic() > deadline:
            break
        st = c.stats("busy")
        samples.append((st["received"], st["applied"], st["queue"]))
    t.join(30)
    assert not t.is_alive() and not errors, errors
    bad = [s for s in samples if s[2] != s[0] - s[1]]
    print(f"{len(samples)} stats samples, {len(bad)} with queue != received - applied")
    assert not bad, f"(received, applied, queue) with queue != received - applied: {bad[:5]}"
    applied = [s[1] for s in samples]
    assert applied == sorted(applied), "applied went backwards"
    assert c.wait_applied("busy", n * rounds, timeout=60)["queue"] == 0


def heavy_model(c, name, centers):
    """A model whose learner is slow: rbf centers^2 features, lstd and rls_td (O(n^2) each)."""
    c.ok({"op": "model.create", "model": name, "dims": 2, "gamma": 0.9,
          "ranges": [[0, 1], [0, 1]],
          "features": [{"basis": "rbf", "centers": centers, "width": 0.2}],
          "estimators": [{"name": "lstd", "kind": "lstd"}, {"name": "rls", "kind": "rls_td"}]})


def test_small_queue_backpressure(daemon):
    # --queue 10: producers wait for room; nothing is refused or lost, queries go on.
    d = daemon("--max-batch", 10, "--queue", 10)
    c = d.client()
    heavy_model(c, "q", 10)
    per, producers = 60, 3
    seqs, errors = [], []

    def produce(i):
        try:
            p = Client(d.sock)
            tr = {"x": [i / 3, 0.5], "r": 1.0, "x_next": [0.5, 0.5], "source": f"s{i}"}
            for k in range(per):
                if k % 2:
                    rep = p.call({"op": "observe", "model": "q", "batch": [tr] * 10}, timeout=30)
                    assert rep.get("ok") is True and rep["count"] == 10, rep
                    seqs.extend(range(rep["seq"] - 9, rep["seq"] + 1))
                else:
                    rep = p.call(dict(tr, op="observe", model="q"), timeout=30)
                    assert rep.get("ok") is True, rep
                    seqs.append(rep["seq"])
            p.close()
        except BaseException as e:
            errors.append(f"producer {i}: {e!r}")

    threads = [threading.Thread(target=produce, args=(i,)) for i in range(producers)]
    for t in threads:
        t.start()
    q = d.client()
    deadline = time.monotonic() + 60
    for _ in range(10_000):
        if not any(t.is_alive() for t in threads) or time.monotonic() > deadline:
            break
        t0 = time.monotonic()
        assert q.ok({"op": "value", "model": "q", "x": [0.5, 0.5]}, timeout=5)["seq"] >= 0
        assert time.monotonic() - t0 < 2
    for t in threads:
        t.join(60)
    assert not any(t.is_alive() for t in threads) and not errors, errors
    total = producers * (per // 2) * 11
    assert sorted(seqs) == list(range(1, total + 1))
    assert c.wait_applied("q", total, timeout=60)["applied"] == total


def test_drop_with_backlog(daemon):
    d = daemon()
    c = d.client()
    heavy_model(c, "slow", 16)
    n = 50_000
    rng = np.random.default_rng(3)
    x = rng.uniform(size=(n + 1, 2))
    c.send({"op": "observe.bulk", "model": "slow", "count": n})
    c.send_raw(np.column_stack([x[:-1], np.ones(n), x[1:], np.zeros(n)]).astype("<f8").tobytes())
    assert c.recv(30) == {"ok": True, "seq": n, "count": n, "durable": True}
    # queries never wait for the backlog
    t0 = time.monotonic()
    rep = c.ok({"op": "value", "model": "slow", "x": [0.5, 0.5]})
    assert time.monotonic() - t0 < 1.0
    st0 = c.stats("slow")
    time.sleep(0.2)
    st1 = c.stats("slow")
    assert rep["seq"] <= st0["applied"] <= st1["applied"] < n, (rep, st0, st1)
    rate = max(st1["applied"] - st0["applied"], 1) / 0.2
    left = (n - st1["applied"]) / rate
    print(f"backlog at drop: {n - st1['applied']} transitions, about {left:.1f} s of learning")
    # drop discards what is still queued: it does not wait for it
    t0 = time.monotonic()
    assert c.call({"op": "model.drop", "model": "slow"}, timeout=30) == {"ok": True, "persisted": True}
    took = time.monotonic() - t0
    if left > 1.0:
        assert took < left / 2, f"model.drop took {took:.2f} s with {left:.1f} s of backlog"
    c.err({"op": "stats", "model": "slow"}, "no_such_model")
    assert c.ok({"op": "model.list"})["models"] == []
    # the name is free; the new model starts from nothing
    heavy_model(c, "slow", 4)
    assert c.call({"op": "observe", "model": "slow", "x": [0.5, 0.5], "r": 1,
                   "terminal": True}) == {"ok": True, "seq": 1, "durable": True}
    assert c.wait_applied("slow", 1)["applied"] == 1


# Shutdown under load ---------------------------------------------------------------------------

def test_sigterm_during_ingest(daemon):
    d = daemon("--log-level", "info")
    c = d.client()
    c.ok({"op": "model.create", "model": "station-1", "dims": 2, "gamma": 0.99,
          "ranges": [[0, 12], [0, 400]],
          "features": [{"basis": "bias"}, {"basis": "rbf", "centers": 10, "width": 0.15}],
          "estimators": [{"name": "td", "kind": "td", "alpha": 0.05},
                         {"name": "rls", "kind": "rls_td", "forget": 0.995, "delta": 100},
                         {"name": "lstd", "kind": "lstd"}]})
    c.close()
    acked = [0]
    ended = []
    rng = np.random.default_rng(7)

    def produce():
        p = Client(d.sock)
        try:
            deadline = time.monotonic() + 30
            for _ in range(100_000):
                if time.monotonic() > deadline:
                    ended.append("time")
                    return
                x = rng.uniform([0, 0], [12, 400], size=(51, 2)).round(3)
                batch = [{"x": x[k].tolist(), "r": -1.5, "x_next": x[k + 1].tolist(),
                          "source": "pump-2"} for k in range(50)]
                try:
                    rep = p.call({"op": "observe", "model": "station-1", "batch": batch})
                except Exception as e:
                    ended.append(("closed", repr(e)) if is_closed_error(e) else ("error", e))
                    return
                if rep.get("ok") is not True:
                    ended.append(("reply", rep))
                    return
                if rep["seq"] != acked[0] + 50 or rep["count"] != 50:
                    ended.append(("bad seq", rep, acked[0]))
                    return
                acked[0] = rep["seq"]
            ended.append("count")
        finally:
            p.close()

    t = threading.Thread(target=produce)
    t.start()
    deadline = time.monotonic() + 20
    for _ in range(20_000):
        if acked[0] >= 2000 or not t.is_alive() or time.monotonic() > deadline:
            break
        time.sleep(0.001)
    assert t.is_alive() and acked[0] >= 2000, (acked, ended)
    d.proc.send_signal(signal.SIGTERM)
    rc = d.wait_exit(10)
    t.join(10)
    assert not t.is_alive()
    assert rc == 0, f"exit code {rc}\n{d.tail()}"
    assert ended and (ended[0][0] in ("closed", "reply")), ended
    m = re.findall(r"model station-1: applied (\d+) of (\d+) accepted", d.stderr)
    assert len(m) == 1, f"no single shutdown line for station-1 in stderr:\n{d.tail()}"
    applied, accepted = map(int, m[0])
    print(f"acknowledged {acked[0]}, applied {applied} of {accepted} accepted; ended {ended}")
    assert applied == accepted >= acked[0], (applied, accepted, acked[0])


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT], ids=["SIGTERM", "SIGINT"])
def test_signal_exits_0(daemon, sig):
    d = daemon()
    c = d.client()
    c.ok({"op": "model.create", "model": "m", "dims": 1, "gamma": 0.9, "ranges": [[0, 1]],
          "features": [{"basis": "bias"}], "estimators": [{"name": "td", "kind": "td"}]})
    c.ok({"op": "observe", "model": "m", "x": [0.5], "r": 1, "terminal": True})
    rc, killed = d.stop(sig)
    assert not killed and rc == 0, (rc, d.tail())


# TCP ---------------------------------------------------------------------------------------------

TOKEN = "s3cret-Token-9f2b"


def wait_tcp(d, port, timeout=10.0):
    """Polls (bounded) until the loopback TCP port accepts."""
    deadline = time.monotonic() + timeout
    for _ in range(int(timeout / 0.01) + 10):
        assert d.proc.poll() is None, f"worthd exited {d.proc.returncode}:\n{d.tail()}"
        try:
            return d.client(("127.0.0.1", port))
        except OSError:
            if time.monotonic() > deadline:
                break
            time.sleep(0.01)
    raise AssertionError(f"TCP 127.0.0.1:{port} not accepting within {timeout} s")


@pytest.fixture
def token_file(tmp_path):
    p = tmp_path / "token"
    p.write_text(TOKEN)
    p.chmod(0o600)
    return p


def test_tcp_with_token(daemon, free_port, token_file):
    d = daemon("--listen", f"127.0.0.1:{free_port}", "--token-file", token_file,
               "--log-level", "debug")
    addr = ("127.0.0.1", free_port)
    # wrong token: unauthorized, then closed
    c = wait_tcp(d, free_port)
    c.err({"op": "auth", "token": "wrong"}, "unauthorized")
    c.assert_closed()
    c = d.client(addr)
    c.err({"op": "auth", "token": TOKEN + "x"}, "unauthorized")
    c.assert_closed()
    # no auth: every other request is unauthorized (the connection stays open)
    c = d.client(addr)
    for req in [{"op": "hello"}, {"op": "model.list"}, {"op": "stats", "model": "m"},
                {"op": "model.create", "model": "m", "dims": 1, "gamma": 0.5,
                 "ranges": [[0, 1]], "features": [{"basis": "bias"}],
                 "estimators": [{"name": "td", "kind": "td"}]}]:
        c.err(req, "unauthorized")
    # then the right token
    assert c.call({"op": "auth", "token": TOKEN, "id": 1}) == {"ok": True, "id": 1}
    assert c.call({"op": "hello"})["server"] == "worthd"
    # a fresh connection authenticating first
    c = d.client(addr)
    assert c.call({"op": "auth", "token": TOKEN}) == {"ok": True}
    c.ok({"op": "model.create", "model": "m", "dims": 1, "gamma": 0.5, "ranges": [[0, 1]],
          "features": [{"basis": "bias"}], "estimators": [{"name": "td", "kind": "td"}]})
    assert c.call({"op": "observe", "model": "m", "x": [0.5], "r": 1, "terminal": True}) == \
        {"ok": True, "seq": 1, "durable": True}
    # the Unix socket needs no token and sees the same models
    u = d.client()
    assert u.wait_applied("m", 1)["received"] == 1
    # tokens are never logged
    assert TOKEN not in d.stderr and "s3cret" not in d.stderr


def test_tcp_loopback_needs_a_token(daemon, free_port):
    # On TCP the Unix socket's 0660 mode guards nothing: any local user could connect.  So
    # even a loopback --listen needs a token; worthd refuses to start before binding.
    d = daemon("--listen", f"127.0.0.1:{free_port}", ready=False, expect_rc=1)
    assert d.wait_exit(5) == 1, "worthd listened on loopback TCP without a token"
    assert "--token-file" in d.stderr and "--allow-tcp-without-token" in d.stderr, d.stderr
    s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    try:
        s.settimeout(1)
        assert s.connect_ex(("127.0.0.1", free_port)) != 0, "something listens on the port"
    finally:
        s.close()


def test_tcp_loopback_without_token_by_explicit_opt_out(daemon, free_port):
    d = daemon("--listen", f"127.0.0.1:{free_port}", "--allow-tcp-without-token")
    assert "WITHOUT A TOKEN" in d.stderr, d.stderr  # said loudly
    c = wait_tcp(d, free_port)
    rep = c.call({"op": "hello", "id": "tcp"})
    assert rep == {"ok": True, "id": "tcp", "server": "worthd", "version": "0.1.0", "protocol": 1}
    assert c.call({"op": "model.list"}) == {"ok": True, "models": []}


def test_non_loopback_without_token_refuses(daemon, free_port):
    # The process must refuse before binding: nothing is ever sent anywhere.
    d = daemon("--listen", f"0.0.0.0:{free_port}", ready=False, expect_rc=None)
    rc = d.wait_exit(5)
    assert rc is not None, "worthd started on 0.0.0.0 without --token-file"
    assert rc != 0
    assert "token" in d.stderr.lower(), d.stderr


# The Unix socket -----------------------------------------------------------------------------

def test_unix_socket_mode_0660(daemon):
    d = daemon()
    st = os.stat(d.sock)
    assert stat.S_ISSOCK(st.st_mode)
    assert stat.S_IMODE(st.st_mode) == 0o660, oct(st.st_mode)


def test_stale_socket_replaced(daemon, sockdir):
    path = os.path.join(str(sockdir), "stale.sock")
    s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    s.bind(path)
    s.close()
    assert stat.S_ISSOCK(os.stat(path).st_mode)
    with pytest.raises(ConnectionRefusedError):  # premise: nobody listens there
        Client(path).close()
    d = daemon(sock=path)
    d.client().assert_open()
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o660


def test_default_socket_path(tmp_path):
    # protocol.md: default ./worthd.sock, mode 0660
    if len(str(tmp_path)) > 90:
        pytest.skip("tmp_path too long for a socket path")
    d = Daemon([daemon_path()], tmp_path / "worthd.sock", str(tmp_path), 0)
    try:
        d.wait_ready()
        assert stat.S_IMODE(os.stat(d.sock).st_mode) == 0o660
        c = d.client()
        c.assert_open()
        c.close()
    finally:
        rc, killed = d.stop()
    assert not killed and rc == 0, (rc, d.tail())
    assert not d.stdout


def test_second_daemon_same_socket_refuses(daemon, tmp_path):
    first = daemon()
    c = first.client()
    c.ok({"op": "model.create", "model": "m", "dims": 1, "gamma": 0.9, "ranges": [[0, 1]],
          "features": [{"basis": "bias"}], "estimators": [{"name": "td", "kind": "td"}]})
    # a database of its own: the socket alone must make it refuse
    second = daemon(sock=first.sock, db=tmp_path / "second.db", ready=False, expect_rc=None)
    rc = second.wait_exit(5)
    assert rc is not None and rc != 0, f"second worthd on the same socket: {rc}"
    assert second.stderr.strip(), "refusal without a message on stderr"
    # the first one still owns the path: a new connection reaches it and sees its model
    c2 = first.client()
    assert [m["model"] for m in c2.ok({"op": "model.list"})["models"]] == ["m"]
    assert first.proc.poll() is None


# Command line -------------------------------------------------------------------------------

def run_cli(tmp_path, *args, timeout=5):
    try:
        return subprocess.run([daemon_path(), *args], capture_output=True, timeout=timeout,
                              cwd=tmp_path, stdin=subprocess.DEVNULL)
    except subprocess.TimeoutExpired:
        raise AssertionError(f"worthd {' '.join(args)} still running after {timeout} s")


def test_cli_version_and_help(tmp_path):
    p = run_cli(tmp_path, "--version")
    assert p.returncode == 0 and b"0.1.0" in p.stdout + p.stderr, p
    p = run_cli(tmp_path, "--help")
    assert p.returncode == 0 and b"--socket" in p.stdout + p.stderr, p
    assert not os.path.exists(tmp_path / "worthd.sock")


@pytest.mark.parametrize("args", [["--no-such-option"], ["--log-level", "loud"],
                                  ["--max-line", "abc"]],
                         ids=["unknown", "log_level", "max_line"])
def test_cli_bad_arguments(tmp_path, args):
    sock = str(tmp_path / "w.sock")
    if len(sock) > 100:
        pytest.skip("tmp_path too long for a socket path")
    p = run_cli(tmp_path, "--socket", sock, *args)
    assert p.returncode != 0 and p.stderr.strip(), p
    assert not p.stdout
