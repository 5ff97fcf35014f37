#!/usr/bin/python3
"""Bulk-ingest throughput of worthd over its Unix socket (a benchmark, not a test).

Starts worthd on a temporary socket, creates a model with 8 state dimensions and
65 features (bias + Fourier order 8, one dimension per term) running td and
rls_td, streams N transitions as observe.bulk frames of B records, and reports
transitions per second from the first byte sent until stats shows all applied.
Usage: ingest.py WORTHD [N] [B] [ESTIMATORS]   (ESTIMATORS e.g. td,rls_td)
FORGET=0.999 in the environment sets rls_td's forgetting factor (default 1).
"""
import json
import os
import socket
import subprocess
import sys
import tempfile
import time

import numpy as np


def main():
    worthd = sys.argv[1]
    n = int(sys.argv[2]) if len(sys.argv) > 2 else 1_000_000
    b = int(sys.argv[3]) if len(sys.argv) > 3 else 8192
    kinds = (sys.argv[4] if len(sys.argv) > 4 else "td,rls_td").split(",")
    d = 8
    tmp = tempfile.mkdtemp(prefix="worth-bench-")
    sock = os.path.join(tmp, "w.sock")
    proc = subprocess.Popen([worthd, "--socket", sock, "--db", os.path.join(tmp, "w.db"),
                             "--log-level", "warn"] + os.environ.get("WORTHD_ARGS", "").split())
    try:
        for _ in range(1000):
            if os.path.exists(sock):
                break
            time.sleep(0.01)
        s = socket.socket(socket.AF_UNIX)
        s.connect(sock)
        f = s.makefile("rwb")

        def call(obj):
            f.write(json.dumps(obj).encode() + b"\n")
            f.flush()
            return json.loads(f.readline())

        est = [{"name": k, "kind": k} for k in kinds]
        for e in est:
            if e["kind"] == "rls_td":
                e["forget"] = float(os.environ.get("FORGET", "1"))
        r = call({"op": "model.create", "model": "bench", "dims": d, "gamma": 0.99,
                  "ranges": [[0, 1]] * d,
                  "features": [{"basis": "bias"}, {"basis": "fourier", "order": 8, "couple": 1}],
                  "estimators": est})
        assert r["ok"], r
        rng = np.random.default_rng(1)
        rec = np.empty((b, 2 * d + 2))
        rec[:, :d] = rng.random((b, d))
        rec[:, d] = rng.random(b)
        rec[:, d + 1:2 * d + 1] = rng.random((b, d))
        rec[:, 2 * d + 1] = 0.0
        payload = rec.astype("<f8").tobytes()
        header = (json.dumps({"op": "observe.bulk", "model": "bench", "count": b}) + "\n").encode()
        frames = n // b
        t0 = time.perf_counter()
        for _ in range(frames):
            f.write(header)
            f.write(payload)
            f.flush()
            assert json.loads(f.readline())["ok"]
        t_ack = time.perf_counter() - t0
        total = frames * b
        deadline = time.time() + 600
        while time.time() < deadline:
            st = call({"op": "stats", "model": "bench"})
            if st["applied"] == total:
                break
            time.sleep(0.002)
        t_all = time.perf_counter() - t0
        print(f"estimators {','.join(kinds)}, n_features 65, {total} transitions in frames of {b}")
        print(f"accepted: {total / t_ack:,.0f} transitions/s ({t_ack:.2f} s)")
        print(f"applied:  {total / t_all:,.0f} transitions/s ({t_all:.2f} s)")
    finally:
        proc.terminate()
        proc.wait(timeout=60)


if __name__ == "__main__":
    main()
