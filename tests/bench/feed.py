#!/usr/bin/python3
"""`worth feed` of a large CSV, end to end (a benchmark, not a test).

Writes an N-row CSV (8 state dimensions), starts worthd on a temporary socket and
database, creates a model with 65 features (bias + Fourier order 8, one dimension
per term) and estimators td + rls_td, and times `worth feed` from start to exit
(every row durable), then checks stats: every row applied.
Usage: feed.py WORTHD WORTH [N]
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
    worthd, worth = sys.argv[1], sys.argv[2]
    n = int(sys.argv[3]) if len(sys.argv) > 3 else 1_000_000
    d = 8
    tmp = tempfile.mkdtemp(prefix="worth-bench-")
    sock, db, csv = (os.path.join(tmp, f) for f in ("w.sock", "w.db", "rows.csv"))
    rng = np.random.default_rng(1)
    cols = [f"x{i}" for i in range(d)] + ["r"] + [f"xn{i}" for i in range(d)] + ["terminal"]
    data = np.column_stack([rng.random((n, d)), rng.random(n), rng.random((n, d)),
                            (rng.random(n) < 0.01).astype(int)])
    with open(csv, "w") as f:
        f.write(",".join(cols) + "\n")
        np.savetxt(f, data, delimiter=",", fmt=["%.6f"] * (2 * d + 1) + ["%d"])
    size = os.path.getsize(csv)
    proc = subprocess.Popen([worthd, "--socket", sock, "--db", db, "--log-level", "warn"])
    try:
        for _ in range(1000):
            if os.path.exists(sock):
                break
            time.sleep(0.01)
        spec = {"model": "bench", "dims": d, "gamma": 0.99, "ranges": [[0, 1]] * d,
                "features": [{"basis": "bias"}, {"basis": "fourier", "order": 8, "couple": 1}],
                "estimators": [{"name": "td", "kind": "td"}, {"name": "rls", "kind": "rls_td"}]}
        sp = os.path.join(tmp, "spec.json")
        with open(sp, "w") as f:
            json.dump(spec, f)
        env = dict(os.environ, WORTH_SOCKET=sock)
        subprocess.run([worth, "create", sp], env=env, check=True, capture_output=True)
        t0 = time.perf_counter()
        p = subprocess.run([worth, "feed", "bench", csv], env=env, capture_output=True, text=True)
        dt = time.perf_counter() - t0
        assert p.returncode == 0, p.stderr
        s = socket.socket(socket.AF_UNIX)
        s.connect(sock)
        f = s.makefile("rwb")
        for _ in range(60000):
            f.write(b'{"op":"stats","model":"bench"}\n')
            f.flush()
            st = json.loads(f.readline())
            if st["applied"] == n:
                break
            time.sleep(0.005)
        t_all = time.perf_counter() - t0
        print(f"{n} rows ({size / 1e6:.0f} MB CSV), 65 features, td + rls_td")
        print(f"worth feed: {n / dt:,.0f} rows/s ({dt:.2f} s, every row durable)")
        print(f"until all applied: {n / t_all:,.0f} rows/s ({t_all:.2f} s)")
        print(f"worth said: {(p.stdout + p.stderr).strip()}")
    finally:
        proc.terminate()
        proc.wait(timeout=120)


if __name__ == "__main__":
    main()
