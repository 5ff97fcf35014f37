#!/usr/bin/python3
"""Durable ingest at the speed of learning, and recovery against the previous build.

For two models, F=45 (4 dims, bias + Fourier order 11) and F=65 (8 dims, bias +
Fourier order 8), each with the estimators td and rls_td (defaults, gamma 0.99),
measures in one run, round by round (NEW and OLD alternate which goes first):

  in-process  tests/bench/inproc: model_observe over the very records, one
              thread, fastest of its 3 rounds; and its values at x = [0.3]*D
  ingest      observe.bulk frames of 8192 records pipelined on one connection
              (a thread reads the replies) into a fresh worthd (durable log,
              --log-level warn), from the first byte until stats shows every
              transition applied; its values at [0.3]*D must equal inproc's
  numpy       tests/bench/baseline.py (JSON lines, TD(0) and RLS-TD in numpy)
              on the first --numpy-n transitions, at the model's Fourier order
  recovery    one database per build, fed by that build with
              --checkpoint-every 0 and killed with SIGKILL; each round restarts
              it, reads the "replayed N transitions in S s (R/s)" line, checks
              the values at 4 states equal those before the kill bit for bit,
              and kills it again

Transitions: a random trajectory in [0, 1]^D (each x_next is the next x),
rewards uniform in [-0.5, 0.5), no terminals, a fixed seed per model.

Prints the medians of --runs rounds (min, max), then the ratios against their
targets with PASS or MISS, and the load average before and after.

Usage: logspeed.py --worthd NEW [--before OLD] --inproc INPROC [--n 1000000]
                   [--runs 3] [--numpy-n 100000] [--json OUT]
Temporary files go under $BENCH_TMP (default /tmp) and are removed at the end.
"""
import argparse
import json
import os
import platform
import re
import shutil
import signal
import socket
import statistics
import struct
import subprocess
import sys
import tempfile
import threading
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
FRAME = 8192
GAMMA = 0.99
ESTIMATORS = [{"name": "td", "kind": "td"}, {"name": "rls", "kind": "rls_td"}]
MODELS = [  # label, dims, Fourier order (one dimension per term): 1 + order * dims features
    ("F=45", 4, 11),
    ("F=65", 8, 8),
]
TARGETS = [  # key, what, numerator, denominator, target
    ("ingest_vs_inproc", "durable ingest NEW / in-process", "ingest NEW", "in-process", 0.70),
    ("ingest_vs_numpy", "durable ingest NEW / numpy loop", "ingest NEW", "numpy loop", 30.0),
    ("recovery_new_vs_old", "recovery replay NEW / OLD", "recovery NEW", "recovery OLD", 2.0),
]
START_TIMEOUT = 600  # s until a worthd's socket accepts (a restart replays the whole log)
APPLY_TIMEOUT = 1200  # s until every transition is applied
IO_TIMEOUT = 600  # s any one socket read or write may block
PROC_TIMEOUT = 3600  # s for inproc or baseline.py

LIVE = []  # every worthd started and not yet reaped, killed at exit whatever happens


def fail(msg):
    raise SystemExit("logspeed: " + msg)


def same_bits(a, b):
    return struct.pack("<d", a) == struct.pack("<d", b)


# ---------------------------------------------------------------------------
# The model and its transitions


def spec_of(dims, order):
    """The model.create request, exactly as sent to worthd and given to inproc."""
    return {"op": "model.create", "model": "bench", "dims": dims, "gamma": GAMMA,
            "ranges": [[0, 1]] * dims,
            "features": [{"basis": "bias"}, {"basis": "fourier", "order": order, "couple": 1}],
            "estimators": ESTIMATORS}


def trajectory(n, dims, seed):
    rng = np.random.default_rng(seed)
    s = rng.random((n + 1, dims))
    return s[:-1], rng.random(n) - 0.5, s[1:]


def records(x, r, xn):
    """observe.bulk records: x[D], r, x_next[D], terminal, little-endian doubles."""
    return np.column_stack([x, r, xn, np.zeros(len(r))]).astype("<f8")


def bulk_frames(rec):
    frames = []
    for i in range(0, len(rec), FRAME):
        part = rec[i:i + FRAME]
        head = json.dumps({"op": "observe.bulk", "model": "bench", "count": len(part)})
        frames.append(head.encode() + b"\n" + part.tobytes())
    return frames


def json_lines(x, r, xn):
    return "".join(json.dumps({"op": "observe", "model": "bench", "x": a, "r": b, "x_next": c})
                   + "\n" for a, b, c in zip(x.tolist(), r.tolist(), xn.tolist())).encode()


# ---------------------------------------------------------------------------
# worthd


class Daemon:
    def __init__(self, worthd, root, tag, args):
        self.worthd = worthd
        self.dir = tempfile.mkdtemp(prefix=tag + "-", dir=root)
        self.sock = os.path.join(self.dir, "w.sock")
        self.db = os.path.join(self.dir, "w.db")
        self.log = os.path.join(self.dir, "w.log")
        self.args = list(args)
        self.proc = None

    def start(self):
        """Starts worthd; returns (seconds until the socket accepts, log offset at start)."""
        off = os.path.getsize(self.log) if os.path.exists(self.log) else 0
        with open(self.log, "ab") as log:
            t0 = time.perf_counter()
            self.proc = subprocess.Popen([self.worthd, "--socket", self.sock, "--db", self.db]
                                         + self.args, stdin=subprocess.DEVNULL,
                                         stdout=subprocess.DEVNULL, stderr=log)
        LIVE.append(self.proc)
        for _ in range(START_TIMEOUT * 500):
            if self.proc.poll() is not None:
                fail(f"{self.worthd} exited with {self.proc.returncode}; its log ends:\n"
                     + self.log_tail())
            try:
                s = socket.socket(socket.AF_UNIX)
                s.connect(self.sock)
                s.close()
                return time.perf_counter() - t0, off
            except OSError:
                s.close()
            if time.perf_counter() - t0 > START_TIMEOUT:
                break
            time.sleep(0.002)
        fail(f"{self.worthd} did not accept on its socket within {START_TIMEOUT} s")

    def log_tail(self):
        try:
            with open(self.log, "rb") as f:
                return f.read()[-2000:].decode(errors="replace")
        except OSError:
            return "(no log)"

    def reap(self, sig):
        if self.proc is None:
            return
        if self.proc.poll() is None:
            self.proc.send_signal(sig)
        try:
            self.proc.wait(timeout=120)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=60)
        LIVE.remove(self.proc)
        self.proc = None

    def kill9(self):
        self.reap(signal.SIGKILL)

    def stop(self):
        self.reap(signal.SIGTERM)


class Conn:
    def __init__(self, path):
        self.s = socket.socket(socket.AF_UNIX)
        self.s.settimeout(IO_TIMEOUT)
        self.s.connect(path)
        self.f = self.s.makefile("rwb")

    def call(self, obj):
        self.f.write(json.dumps(obj).encode() + b"\n")
        self.f.flush()
        line = self.f.readline()
        if not line:
            fail(f"worthd closed the connection after {obj['op']}")
        r = json.loads(line)
        if not r.get("ok"):
            fail(f"{obj['op']} failed: {line.decode(errors='replace')[:300]}")
        return r

    def close(self):
        self.f.close()
        self.s.close()


def pump(path, frames):
    """Sends frames on a new connection while a thread reads their replies."""
    s = socket.socket(socket.AF_UNIX)
    s.settimeout(IO_TIMEOUT)
    s.connect(path)
    s.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, 4 << 20)
    bad = []

    def reader():
        got = 0
        try:
            while got < len(frames):
                b = s.recv(1 << 20)
                if not b:
                    bad.append(f"connection closed after {got} of {len(frames)} replies")
                    return
                got += b.count(b"\n")
                if b'"ok":false' in b:
                    bad.append(b.decode(errors="replace")[:300])
                    return
        except OSError as e:
            bad.append(f"reading replies: {e}")

    t = threading.Thread(target=reader, daemon=True)
    t.start()
    try:
        for fr in frames:
            if bad:
                break
            s.sendall(fr)
    except OSError as e:
        bad.append(f"sending frames: {e}")
    t.join(IO_TIMEOUT)
    s.close()
    if t.is_alive():
        bad.append(f"replies still missing after {IO_TIMEOUT} s")
    if bad:
        fail("ingest failed: " + bad[0])


def wait_applied(c, total):
    t0 = time.perf_counter()
    for _ in range(APPLY_TIMEOUT * 1000):
        if c.call({"op": "stats", "model": "bench"})["applied"] >= total:
            return
        if time.perf_counter() - t0 > APPLY_TIMEOUT:
            break
        time.sleep(0.001)
    fail(f"not every transition applied after {APPLY_TIMEOUT} s")


def values_at(c, states):
    return [c.call({"op": "value", "model": "bench", "x": list(map(float, s))})["estimators"]
            for s in states]


def feed(d, spec, frames, total):
    """Creates the model, feeds it; returns seconds from the first byte until all applied."""
    c = Conn(d.sock)
    c.call(spec)
    t0 = time.perf_counter()
    pump(d.sock, frames)
    wait_applied(c, total)
    dt = time.perf_counter() - t0
    return dt, c


# ---------------------------------------------------------------------------
# The four measurements


def run_inproc(a, m):
    out = subprocess.run([a.inproc, m["spec_path"], m["rec_path"], str(m["dims"])],
                         capture_output=True, text=True, timeout=PROC_TIMEOUT)
    if out.returncode != 0:
        fail(f"inproc exited with {out.returncode}: {out.stderr.strip()}")
    res = json.loads(out.stdout.splitlines()[-1])
    if res["transitions"] != m["n"]:
        fail(f"inproc read {res['transitions']} transitions, not {m['n']}")
    if res["features"] != m["features"]:
        fail(f"inproc built {res['features']} features, not {m['features']}")
    vals = dict(zip(res["estimators"], res["values"]))
    if m["inproc_values"] is None:
        m["inproc_values"] = vals
    elif vals != m["inproc_values"]:
        fail(f"{m['label']}: inproc values changed between rounds: {vals} {m['inproc_values']}")
    return res["rate"]


def run_ingest(a, m, worthd, which, root):
    d = Daemon(worthd, root, f"ingest-{which}", ["--log-level", "warn"])
    try:
        d.start()
        dt, c = feed(d, m["spec"], m["frames"], m["n"])
        got = values_at(c, [[0.3] * m["dims"]])[0]
        c.close()
        d.stop()
    finally:
        if d.proc:
            d.kill9()
        shutil.rmtree(d.dir, ignore_errors=True)
    want = m["inproc_values"]
    # NEW is the build inproc comes from: the same bits.  OLD may round in another order (its
    # RLS-TD kernels differ), so it must only agree to within rounding.
    if which == "NEW":
        same = set(got) == set(want) and all(same_bits(got[k], want[k]) for k in want)
    else:
        same = set(got) == set(want) and all(
            abs(got[k] - want[k]) <= 1e-9 * max(1.0, abs(want[k])) for k in want)
    if not same:
        fail(f"{m['label']}: {which} worthd learnt other values than model_observe in process: "
             f"at x = [0.3]*{m['dims']} worthd {got}, inproc {want}")
    return m["n"] / dt


def run_numpy(a, m):
    probe = [[0.3] * m["dims"]]
    out = subprocess.run([sys.executable, os.path.join(HERE, "baseline.py"), m["lines_path"],
                          json.dumps(probe), str(m["order"])],
                         capture_output=True, text=True, timeout=PROC_TIMEOUT)
    if out.returncode != 0:
        fail(f"baseline.py exited with {out.returncode}: {out.stderr.strip()}")
    res = json.loads(out.stdout.splitlines()[-1])
    if res["transitions"] != m["numpy_n"]:
        fail(f"baseline.py read {res['transitions']} transitions, not {m['numpy_n']}")
    return res["rate"]


REPLAYED = re.compile(r"replayed (\d+) transitions in ([\d.]+) s \((\d+)/s\)")


class RecoveryDb:
    """A database with n transitions logged after the last checkpoint, fed by its own build."""

    def __init__(self, worthd, which, m, root):
        self.which = which
        self.n = m["n"]
        self.label = m["label"]
        self.d = Daemon(worthd, root, f"recovery-{which}", ["--log-level", "info",
                                                            "--checkpoint-every", "0"])
        self.d.start()
        _, c = feed(self.d, m["spec"], m["frames"], m["n"])
        self.probe = trajectory(4, m["dims"], seed=12)[0].tolist()
        self.values = values_at(c, self.probe)
        c.close()
        self.d.kill9()  # no shutdown checkpoint: a restart replays the whole log

    def restart(self):
        ready, off = self.d.start()
        try:
            c = Conn(self.d.sock)
            after = values_at(c, self.probe)
            c.close()
        finally:
            self.d.kill9()  # again no checkpoint: the next restart replays the same log
        with open(self.d.log, "rb") as f:
            f.seek(off)
            text = f.read().decode(errors="replace")
        found = REPLAYED.findall(text)
        if not found:
            fail(f"{self.label} {self.which}: no \"replayed N transitions in S s (R/s)\" line "
                 f"in worthd's log after the restart; it ends:\n{text[-2000:]}")
        replayed, secs, rate = int(found[-1][0]), float(found[-1][1]), int(found[-1][2])
        if replayed != self.n:
            fail(f"{self.label} {self.which}: replayed {replayed} transitions, not {self.n}")
        for s, b, c in zip(self.probe, self.values, after):
            if set(b) != set(c) or not all(same_bits(b[k], c[k]) for k in b):
                fail(f"{self.label} {self.which}: values after recovery differ from before the "
                     f"kill at x = {s}: before {b}, after {c}")
        return rate, ready, secs

    def remove(self):
        if self.d.proc:
            self.d.kill9()
        shutil.rmtree(self.d.dir, ignore_errors=True)


# ---------------------------------------------------------------------------
# Report


def fmt(v):
    if v is None:
        return "-"
    if abs(v) >= 1000:
        return f"{v:,.0f}"
    if abs(v) >= 10:
        return f"{v:.1f}"
    return f"{v:.3f}"


def summary(v):
    return {"median": statistics.median(v), "min": min(v), "max": max(v), "runs": v} if v else None


def machine():
    cpu = "?"
    with open("/proc/cpuinfo") as f:
        for line in f:
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    return {"cpu": cpu, "cores": os.cpu_count(), "kernel": platform.release()}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--worthd", required=True, help="the new worthd (NEW)")
    ap.add_argument("--before", help="the previous build's worthd (OLD)")
    ap.add_argument("--inproc", required=True, help="tests/bench/inproc of the new build")
    ap.add_argument("--n", type=int, default=1_000_000, help="transitions per model")
    ap.add_argument("--runs", type=int, default=3, help="rounds; figures are their medians")
    ap.add_argument("--numpy-n", type=int, default=100_000, help="transitions for the numpy loop")
    ap.add_argument("--json", help="write every figure to this file")
    a = ap.parse_args()
    for flag, path in (("--worthd", a.worthd), ("--before", a.before), ("--inproc", a.inproc)):
        if path is not None and not os.access(path, os.X_OK):
            fail(f"{flag} {path}: not an executable file")
    if a.n < 1 or a.runs < 1 or a.numpy_n < 1:
        fail("--n, --runs and --numpy-n must be at least 1")
    a.numpy_n = min(a.numpy_n, a.n)
    builds = [("NEW", a.worthd)] + ([("OLD", a.before)] if a.before else [])

    # SIGTERM and SIGHUP end the run like Ctrl-C: daemons killed, temporary files removed.
    def on_signal(signum, frame):
        raise SystemExit(f"logspeed: stopped by signal {signum}")

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGHUP, on_signal)

    info = machine()
    info.update({"date": time.strftime("%Y-%m-%d %H:%M %Z"), "load_before": os.getloadavg(),
                 "worthd": os.path.abspath(a.worthd),
                 "before": os.path.abspath(a.before) if a.before else None,
                 "inproc": os.path.abspath(a.inproc), "n": a.n, "runs": a.runs,
                 "numpy_n": a.numpy_n, "frame": FRAME})
    root = tempfile.mkdtemp(prefix="worth-logspeed-", dir=os.environ.get("BENCH_TMP") or "/tmp")
    recs = []
    figures = {}  # label -> figure -> [values]
    try:
        models = []
        for k, (label, dims, order) in enumerate(MODELS):
            x, r, xn = trajectory(a.n, dims, seed=31 + k)
            rec = records(x, r, xn)
            m = {"label": label, "dims": dims, "order": order, "features": 1 + order * dims,
                 "n": a.n, "numpy_n": a.numpy_n, "spec": spec_of(dims, order),
                 "frames": bulk_frames(rec), "inproc_values": None,
                 "spec_path": os.path.join(root, f"{label}.spec.json"),
                 "rec_path": os.path.join(root, f"{label}.records.bin"),
                 "lines_path": os.path.join(root, f"{label}.jsonl")}
            with open(m["spec_path"], "w") as f:
                json.dump(m["spec"], f)
            with open(m["rec_path"], "wb") as f:
                f.write(rec.tobytes())
            with open(m["lines_path"], "wb") as f:
                f.write(json_lines(x[:a.numpy_n], r[:a.numpy_n], xn[:a.numpy_n]))
            models.append(m)
            figures[label] = {}

        print(f"[setup] recovery databases: {a.n:,} transitions each, fed by their own build",
              file=sys.stderr, flush=True)
        rdb = {}
        for m in models:
            for which, worthd in builds:
                rdb[(m["label"], which)] = RecoveryDb(worthd, which, m, root)
                recs.append(rdb[(m["label"], which)])

        for run in range(a.runs):
            order = builds if run % 2 == 0 else builds[::-1]
            for m in models:
                fig = figures[m["label"]]
                print(f"[round {run + 1}/{a.runs} {m['label']}] "
                      f"{' then '.join(w for w, _ in order)}", file=sys.stderr, flush=True)
                fig.setdefault("in-process", []).append(run_inproc(a, m))
                for which, worthd in order:
                    fig.setdefault(f"ingest {which}", []).append(
                        run_ingest(a, m, worthd, which, root))
                fig.setdefault("numpy loop", []).append(run_numpy(a, m))
                for which, _ in order:
                    rate, ready, secs = rdb[(m["label"], which)].restart()
                    fig.setdefault(f"recovery {which}", []).append(rate)
                    fig.setdefault(f"recovery {which} ready [s]", []).append(ready)
    finally:
        for rd in recs:
            rd.remove()
        for p in list(LIVE):
            p.kill()
            p.wait(timeout=60)
        shutil.rmtree(root, ignore_errors=True)
    info["load_after"] = os.getloadavg()

    labels = [m[0] for m in MODELS]
    rows = [("in-process", "in-process model_observe [transitions/s]")]
    rows += [(f"ingest {w}", f"durable ingest {w}, bulk {FRAME} [transitions/s]") for w, _ in builds]
    rows += [("numpy loop", f"numpy loop, {a.numpy_n:,} JSON lines [transitions/s]")]
    rows += [(f"recovery {w}", f"recovery replay {w} [transitions/s]") for w, _ in builds]
    rows += [(f"recovery {w} ready [s]", f"recovery {w}, until the socket accepts [s]")
             for w, _ in builds]
    table = {lab: {k: summary(v) for k, v in figures[lab].items()} for lab in labels}

    lb, la = info["load_before"], info["load_after"]
    print(f"logspeed, {info['date']}, {info['cpu']}, {info['cores']} cores; {a.n:,} transitions, "
          f"td + rls_td; median of {a.runs} (min, max)")
    print(f"NEW {info['worthd']}")
    print(f"OLD {info['before'] or '(not given)'}")
    print(f"load average before {lb[0]:.2f} {lb[1]:.2f} {lb[2]:.2f}, "
          f"after {la[0]:.2f} {la[1]:.2f} {la[2]:.2f}")
    w = max(len(t) for _, t in rows)
    heads = [f"{lab} ({d} dims)" for lab, d, _ in MODELS]
    body = []
    for key, title in rows:
        cells = []
        for lab in labels:
            s = table[lab].get(key)
            cells.append(f"{fmt(s['median'])} ({fmt(s['min'])}, {fmt(s['max'])})" if s else "-")
        body.append((title, cells))
    col = max(len(c) for c in heads + [c for _, cs in body for c in cs])
    print(f"{'figure':<{w}}" + "".join(f"  {h:>{col}}" for h in heads))
    for title, cells in body:
        print(f"{title:<{w}}" + "".join(f"  {c:>{col}}" for c in cells))

    ratios = {}
    print()
    tw = max(len(t[1]) for t in TARGETS)
    for key, what, num, den, target in TARGETS:
        for lab in labels:
            a_, b_ = table[lab].get(num), table[lab].get(den)
            if a_ and b_:
                v = a_["median"] / b_["median"]
                verdict = "PASS" if v >= target else "MISS"
                print(f"{what:<{tw}}  {lab}  {v:8.3f}  (target >= {target:g})  {verdict}")
            else:
                v, verdict = None, "n/a"
                print(f"{what:<{tw}}  {lab}  {'-':>8}  (target >= {target:g})  n/a (no --before)")
            ratios.setdefault(key, {})[lab] = {"ratio": v, "target": target, "verdict": verdict,
                                               "numerator": num, "denominator": den}
    if a.json:
        with open(a.json, "w") as f:
            json.dump({"machine": info, "models": {lab: {"dims": d, "order": o,
                                                         "features": 1 + o * d}
                                                   for lab, d, o in MODELS},
                       "figures": table, "ratios": ratios}, f, indent=1)
            f.write("\n")
        print(f"(written to {a.json})", file=sys.stderr)


if __name__ == "__main__":
    main()
