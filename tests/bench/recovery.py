#!/usr/bin/python3
"""Recovery replay speed of worthd (a benchmark, not a test).

Feeds N transitions (bulk frames) into a model with 8 dimensions and 65 features
(estimators as given, default td,rls_td) with automatic checkpoints off, kills
worthd with SIGKILL (so there is no shutdown checkpoint), restarts it and reports
the time until the socket answers and the replay rate worthd logs.
Usage: recovery.py WORTHD [N] [ESTIMATORS]
"""
import json
import os
import re
import signal
import socket
import subprocess
import sys
import tempfile
import time

import numpy as np


def start(worthd, sock, db, log):
    p = subprocess.Popen([worthd, "--socket", sock, "--db", db, "--checkpoint-every", "0"],
                         stderr=open(log, "ab"))
    t0 = time.perf_counter()
    for _ in range(60000):
        try:
            s = socket.socket(socket.AF_UNIX)
            s.connect(sock)
            return p, s, time.perf_counter() - t0
        except OSError:
            time.sleep(0.005)
    raise SystemExit("worthd did not become ready")


def main():
    worthd = sys.argv[1]
    n = int(sys.argv[2]) if len(sys.argv) > 2 else 1_000_000
    kinds = (sys.argv[3] if len(sys.argv) > 3 else "td,rls_td").split(",")
    d, b = 8, 8192
    tmp = tempfile.mkdtemp(prefix="worth-bench-")
    sock, db, log = (os.path.join(tmp, f) for f in ("w.sock", "w.db", "w.log"))
    p, s, _ = start(worthd, sock, db, log)
    f = s.makefile("rwb")

    def call(obj):
        f.write(json.dumps(obj).encode() + b"\n")
        f.flush()
        return json.loads(f.readline())

    r = call({"op": "model.create", "model": "bench", "dims": d, "gamma": 0.99,
              "ranges": [[0, 1]] * d,
              "features": [{"basis": "bias"}, {"basis": "fourier", "order": 8, "couple": 1}],
              "estimators": [{"name": k, "kind": k} for k in kinds]})
    assert r["ok"], r
    rng = np.random.default_rng(1)
    rec = np.column_stack([rng.random((b, d)), rng.random(b), rng.random((b, d)),
                           np.zeros(b)]).astype("<f8").tobytes()
    header = (json.dumps({"op": "observe.bulk", "model": "bench", "count": b}) + "\n").encode()
    for _ in range(n // b):
        f.write(header)
        f.write(rec)
        f.flush()
        assert json.loads(f.readline())["ok"]
    total = (n // b) * b
    for _ in range(60000):
        if call({"op": "stats", "model": "bench"})["applied"] == total:
            break
        time.sleep(0.005)
    values = call({"op": "value", "model": "bench", "x": [0.3] * d})
    os.kill(p.pid, signal.SIGKILL)
    p.wait()
    s.close()
    p, s, ready = start(worthd, sock, db, log)
    f = s.makefile("rwb")
    after = call({"op": "value", "model": "bench", "x": [0.3] * d})
    p.terminate()
    p.wait(timeout=120)
    line = [ln for ln in open(log).read().splitlines() if "replayed" in ln][-1]
    rate = re.search(r"replayed (\d+) transitions in ([\d.]+) s \((\d+)/s\)", line)
    print(f"estimators {','.join(kinds)}, 65 features, {total} transitions after the last checkpoint")
    print(f"ready after restart: {ready:.2f} s")
    print(f"replay: {int(rate.group(1))} transitions in {float(rate.group(2)):.2f} s "
          f"= {int(rate.group(3)):,} transitions/s")
    print("values after recovery equal those before the kill:",
          values["estimators"] == after["estimators"])


if __name__ == "__main__":
    main()
