#!/usr/bin/python3
"""`worth feed` of a historian's wide sample file against the transition CSV of the same data
(a benchmark, not a test).

Writes an N-row wide historian file (ISO-8601 times with a zone, 8 named dimensions with units,
a reward column, one source) and the transition CSV of the same data (the N - 1 transitions
worthd pairs from it: x0.., r, xn0..), starts worthd on a temporary socket and database,
creates two models with the same spec (65 features: bias + Fourier order 8, one dimension per
term; td + rls_td; named dimensions, reward "next"), and times `worth feed` of each from start
to exit (every row durable, and the model has learnt the feed: feed waits for that to count
clipped values), in one run, alternating which goes first.  Prints both rates, their ratio
and the wall time of each; checks that both models hold the same number of transitions and
answer the same values (bit for bit) at three states.
Usage: feed_samples.py WORTHD WORTH [N] [ROUNDS]
"""
import json
import os
import socket
import subprocess
import sys
import tempfile
import time
from datetime import datetime, timezone

import numpy as np

D = 8
NAMES = [f"tag{i}" for i in range(D)]
UNITS = ["m", "m3/h", "bar", "kW", "degC", "rpm", "%", "m"]


def write_files(tmp, n):
    rng = np.random.default_rng(1)
    x = rng.random((n, D))
    r = rng.random(n) - 0.5
    t0 = datetime(2026, 11, 16, tzinfo=timezone.utc).timestamp()
    wide, trans = os.path.join(tmp, "wide.csv"), os.path.join(tmp, "trans.csv")
    xs = [[f"{v:.6f}" for v in row] for row in x]
    rs = [f"{v:.6f}" for v in r]
    with open(wide, "w") as f:
        f.write("time," + ",".join(f"{nm} [{u}]" for nm, u in zip(NAMES, UNITS)) + ",r\n")
        for i in range(n):
            when = datetime.fromtimestamp(t0 + 60 * i, timezone.utc).strftime(
                "%Y-%m-%dT%H:%M:%SZ")
            f.write(when + "," + ",".join(xs[i]) + "," + rs[i] + "\n")
    with open(trans, "w") as f:
        f.write(",".join([f"x{i}" for i in range(D)] + ["r"] + [f"xn{i}" for i in range(D)])
                + "\n")
        for i in range(n - 1):  # reward "next": the transition i -> i+1 carries sample i+1's r
            f.write(",".join(xs[i]) + "," + rs[i + 1] + "," + ",".join(xs[i + 1]) + "\n")
    return wide, trans


def call(sock, obj):
    s = socket.socket(socket.AF_UNIX)
    s.settimeout(60)
    s.connect(sock)
    f = s.makefile("rwb")
    f.write(json.dumps(obj).encode() + b"\n")
    f.flush()
    rep = json.loads(f.readline())
    s.close()
    return rep


def main():
    worthd, worth = sys.argv[1], sys.argv[2]
    n = int(sys.argv[3]) if len(sys.argv) > 3 else 1_000_000
    rounds = int(sys.argv[4]) if len(sys.argv) > 4 else 1
    tmp = tempfile.mkdtemp(prefix="worth-bench-", dir=os.environ.get("BENCH_TMP", "/tmp"))
    wide, trans = write_files(tmp, n)
    sizes = os.path.getsize(wide) / 1e6, os.path.getsize(trans) / 1e6
    results = {"wide": [], "transitions": []}
    for rnd in range(rounds):
        sock, db = os.path.join(tmp, f"w{rnd}.sock"), os.path.join(tmp, f"w{rnd}.db")
        proc = subprocess.Popen([worthd, "--socket", sock, "--db", db, "--log-level", "warn",
                                 "--checkpoint-every", "0"])
        try:
            for _ in range(1000):
                if os.path.exists(sock):
                    break
                time.sleep(0.01)
            env = dict(os.environ, WORTH_SOCKET=sock)
            for name in ("mw", "mt"):
                spec = {"model": name, "gamma": 0.99,
                        "dims": [{"name": nm, "unit": u, "range": [0, 1]}
                                 for nm, u in zip(NAMES, UNITS)],
                        "reward_unit": "EUR", "period_s": 60,
                        "samples": {"reward": "next", "max_gap_periods": 3},
                        "features": [{"basis": "bias"},
                                     {"basis": "fourier", "order": 8, "couple": 1}],
                        "estimators": [{"name": "td", "kind": "td"},
                                       {"name": "rls", "kind": "rls_td"}]}
                assert call(sock, {"op": "model.create", **spec})["ok"]
            order = [("wide", "mw", wide), ("transitions", "mt", trans)]
            if rnd % 2:
                order.reverse()
            for kind, model, path in order:
                t0 = time.perf_counter()
                p = subprocess.run([worth, "feed", model, path], env=env, capture_output=True,
                                   text=True)
                dt = time.perf_counter() - t0
                assert p.returncode == 0, p.stderr
                rows = n if kind == "wide" else n - 1
                results[kind].append((rows / dt, dt, (p.stdout + p.stderr).strip()))
            sw, st = call(sock, {"op": "stats", "model": "mw"}), call(
                sock, {"op": "stats", "model": "mt"})
            assert sw["received"] == st["received"] == n - 1, (sw["received"], st["received"])
            for x in ([0.5] * D, [0.1] * D, list(np.linspace(0, 1, D))):
                vw = call(sock, {"op": "value", "model": "mw", "x": x})
                vt = call(sock, {"op": "value", "model": "mt", "x": x})
                assert vw["estimators"] == vt["estimators"], (vw, vt)
        finally:
            proc.terminate()
            proc.wait(timeout=120)
    print(f"{n} samples, {D} named dims, 65 features, td + rls_td; wide {sizes[0]:.0f} MB "
          f"(ISO-8601 times), transitions {sizes[1]:.0f} MB; {rounds} round(s), each in one "
          f"worthd, the order alternating")
    for kind in ("wide", "transitions"):
        rates = [r for r, _, _ in results[kind]]
        print(f"worth feed {kind:11s}: {np.median(rates):,.0f} rows/s (median; "
              f"{', '.join(f'{r:,.0f}' for r in rates)}); "
              f"{np.median([d for _, d, _ in results[kind]]):.2f} s")
    ratios = [w[0] / t[0] for w, t in zip(results["wide"], results["transitions"])]
    print(f"wide / transitions: {np.median(ratios):.2f} (per round: "
          f"{', '.join(f'{r:.2f}' for r in ratios)}; target >= 0.50)")
    print("both models: the same transitions and bit-identical values at 3 states")
    print(f"worth said (wide): {results['wide'][-1][2]}")


if __name__ == "__main__":
    main()
