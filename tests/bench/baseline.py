#!/usr/bin/python3
"""The loop an engineer would otherwise write: the baseline of the benchmarks.

Reads observe requests, one JSON object a line (the very lines tests/bench
sends to worthd), parses each with json, evaluates the same 65 features
(bias + Fourier order 8 on 8 dimensions, one dimension per term, ranges
[0, 1]) and updates TD(0) (alpha 0.01) and RLS-TD(0) (delta 100, no
forgetting) with numpy, gamma 0.99: the defaults of worthd's td and rls_td.
Prints one JSON line: transitions/s over the whole loop (reading the file
included) and each estimator's value at the probe states, which the suite
compares with worthd's.  ORDER, when given, is the Fourier order (default 8:
65 features at 8 dimensions; order 11 at 4 dimensions gives 45).

Usage: baseline.py LINES.jsonl '[[x...], ...]' [ORDER]
"""
import json
import sys
import time

import numpy as np

GAMMA = 0.99
ALPHA = 0.01
DELTA = 100.0
ORDER = 8


def features(x):
    u = np.clip(np.asarray(x, dtype=float), 0.0, 1.0)
    return np.concatenate(([1.0], np.cos(np.pi * np.outer(u, np.arange(1, ORDER + 1))).ravel()))


def main():
    global ORDER
    path, probe = sys.argv[1], json.loads(sys.argv[2])
    if len(sys.argv) > 3:
        ORDER = int(sys.argv[3])
        if ORDER < 1:
            raise SystemExit("baseline.py: ORDER must be at least 1")
    n = 1 + ORDER * len(probe[0])
    w_td = np.zeros(n)
    w_rls = np.zeros(n)
    P = DELTA * np.eye(n)
    count = 0
    t0 = time.perf_counter()
    with open(path) as f:
        for line in f:
            t = json.loads(line)
            phi = features(t["x"])
            terminal = t.get("terminal", False)
            phin = np.zeros(n) if terminal else features(t["x_next"])
            r = t["r"]
            # TD(0)
            delta = r + GAMMA * (w_td @ phin) - w_td @ phi
            w_td += ALPHA * delta * phi
            # RLS-TD(0): instrument z = phi, regressor d = phi - gamma phi'
            d = phi - GAMMA * phin
            pz = P @ phi
            k = pz / (1.0 + d @ pz)
            w_rls += k * (r - d @ w_rls)
            P -= np.outer(k, d @ P)
            count += 1
    dt = time.perf_counter() - t0
    print(json.dumps({"transitions": count, "seconds": dt, "rate": count / dt,
                      "td": [float(w_td @ features(x)) for x in probe],
                      "rls": [float(w_rls @ features(x)) for x in probe]}))


if __name__ == "__main__":
    main()
