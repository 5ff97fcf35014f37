#!/usr/bin/python3
"""The benchmark suite behind tests/bench/run (a benchmark, not a test).

Runs each part RUNS times (default 5) against a release build of worthd and
prints one table: median, min and max of every figure.  Writes every run's
figures and the table to tests/bench/results.json.

Parts (select with --parts, default all):
  kernels   in-process ns per update and per value for each estimator kind at
            n = 16, 64, 256, 1024, and RLS-TD beside the OpenBLAS reference
            (dgemv + dgemv + dger on the same P) in the same process.
  nets      mlp and ensemble (5 members) at 8 inputs / 32-32 and 64 / 128-128:
            transitions/s through est_observe, ns per training step and its
            ratio to the bare dgemm/dgemv calls of the same shapes.
  ingest    transitions/s over the Unix socket into a model with 8 state
            dimensions and 65 features (bias + Fourier order 8, uncoupled),
            estimators td + rls_td + replay: single observe lines, batches of
            256 and bulk frames of 8192, each with the durable log (the
            default synchronous=FULL, replies after commit) and with
            "ack":"applied".  Timed from the first byte sent until every reply
            arrived and stats shows every transition applied.
  query     latency of single-state value requests (one at a time, round trip
            seen by a Python client) while another process feeds bulk frames
            at half the measured bulk maximum; then xs batch throughput.
  recovery  time to ready and replay rate after a SIGKILL with 1,000,000
            logged transitions after the last checkpoint (automatic
            checkpoints off); values after recovery checked bit-identical.
  scale     total transitions/s with 1, 4 and 16 models fed at once (one
            connection each, bulk, durable); peak RSS (VmHWM) against the
            replay trainer's capacity and n.
  baseline  tests/bench/baseline.py - JSON lines parsed in Python, TD(0) and
            RLS-TD with numpy at n = 65 - against worthd fed the same lines
            (td + rls_td), in the same run; their RLS-TD values must agree.

Usage: suite.py BUILD_DIR [--quick] [--runs N] [--parts a,b,...] [--out FILE]
"""
import argparse
import json
import multiprocessing
import os
import platform
import re
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
D = 8
FEATURES = [{"basis": "bias"}, {"basis": "fourier", "order": 8, "couple": 1}]  # 65 features
EST_INGEST = [{"name": "td", "kind": "td"}, {"name": "rls", "kind": "rls_td"},
              {"name": "replay", "kind": "replay"}]
EST_PAIR = [{"name": "td", "kind": "td"}, {"name": "rls", "kind": "rls_td"}]
BULK_FRAME = 8192
BATCH = 256

# ---------------------------------------------------------------------------
# worthd and its socket


class Daemon:
    """worthd on a temporary Unix socket and database (on disk, so fsync is real)."""

    def __init__(self, worthd, args=(), tmp=None, log=None):
        self.tmp = tmp or tempfile.mkdtemp(prefix="worth-bench-", dir=os.environ.get("BENCH_TMP"))
        self.sock = os.path.join(self.tmp, "w.sock")
        self.db = os.path.join(self.tmp, "w.db")
        self.log = log or os.path.join(self.tmp, "w.log")
        self.worthd = worthd
        self.args = list(args)
        self.proc = None

    def start(self, timeout=600):
        """Starts worthd; returns seconds until its socket accepts a connection."""
        t0 = time.perf_counter()
        self.proc = subprocess.Popen([self.worthd, "--socket", self.sock, "--db", self.db,
                                      "--log-level", "info"] + self.args,
                                     stdout=subprocess.DEVNULL, stderr=open(self.log, "ab"))
        while time.perf_counter() - t0 < timeout:
            if self.proc.poll() is not None:
                raise SystemExit(f"worthd exited with {self.proc.returncode}; see {self.log}:\n"
                                 + open(self.log).read()[-2000:])
            try:
                s = socket.socket(socket.AF_UNIX)
                s.connect(self.sock)
                s.close()
                return time.perf_counter() - t0
            except OSError:
                time.sleep(0.002)
        raise SystemExit("worthd did not become ready")

    def conn(self):
        return Conn(self.sock)

    def peak_rss_kb(self):
        for line in open(f"/proc/{self.proc.pid}/status"):
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
        return 0

    def kill9(self):
        os.kill(self.proc.pid, signal.SIGKILL)
        self.proc.wait()
        self.proc = None

    def stop(self):
        if self.proc:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=120)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
            self.proc = None

    def remove(self):
        self.stop()
        shutil.rmtree(self.tmp, ignore_errors=True)


class Conn:
    def __init__(self, path):
        self.s = socket.socket(socket.AF_UNIX)
        self.s.connect(path)
        self.f = self.s.makefile("rwb")

    def call(self, obj):
        self.f.write(json.dumps(obj).encode() + b"\n")
        self.f.flush()
        return json.loads(self.f.readline())

    def close(self):
        self.f.close()
        self.s.close()


def create(c, name, est=EST_INGEST, features=FEATURES):
    r = c.call({"op": "model.create", "model": name, "dims": D, "gamma": 0.99,
                "ranges": [[0, 1]] * D, "features": features, "estimators": est})
    assert r["ok"], r
    return r["features"]


def wait_applied(c, name, total, timeout=1200):
    t0 = time.time()
    while time.time() - t0 < timeout:
        if c.call({"op": "stats", "model": name})["applied"] >= total:
            return
        time.sleep(0.001)
    raise SystemExit(f"model {name}: not every transition applied after {timeout} s")


# ---------------------------------------------------------------------------
# Transitions and their encodings


def transitions(n, seed=1):
    """A trajectory: x_next of one transition is x of the next; rewards in [-0.5, 0.5)."""
    rng = np.random.default_rng(seed)
    s = rng.random((n + 1, D))
    return s[:-1], rng.random(n) - 0.5, s[1:]


def lines_payload(x, r, xn, model, ack=None):
    extra = f',"ack":"{ack}"' if ack else ""
    out = [f'{{"op":"observe","model":"{model}","x":{json.dumps(a)},"r":{json.dumps(b)},'
           f'"x_next":{json.dumps(c)}{extra}}}\n'
           for a, b, c in zip(x.tolist(), r.tolist(), xn.tolist())]
    return "".join(out).encode()


def batch_payload(x, r, xn, model, ack=None, size=BATCH):
    extra = f',"ack":"{ack}"' if ack else ""
    xl, rl, xnl = x.tolist(), r.tolist(), xn.tolist()
    out = []
    for i in range(0, len(rl), size):
        items = ",".join(f'{{"x":{json.dumps(xl[k])},"r":{json.dumps(rl[k])},'
                         f'"x_next":{json.dumps(xnl[k])}}}' for k in range(i, min(i + size, len(rl))))
        out.append(f'{{"op":"observe","model":"{model}","batch":[{items}]{extra}}}\n')
    return "".join(out).encode(), len(out)


def bulk_frames(x, r, xn, model, ack=None, size=BULK_FRAME):
    """Returns [(header + records)] for frames of size records."""
    n = len(r)
    rec = np.column_stack([x, r, xn, np.zeros(n)]).astype("<f8")
    frames = []
    for i in range(0, n, size):
        cnt = min(size, n - i)
        h = {"op": "observe.bulk", "model": model, "count": cnt}
        if ack:
            h["ack"] = ack
        frames.append((json.dumps(h) + "\n").encode() + rec[i:i + cnt].tobytes())
    return frames


def pump(path, chunks, replies):
    """Sends chunks on a new connection while a thread reads replies; returns when all arrived."""
    s = socket.socket(socket.AF_UNIX)
    s.connect(path)
    s.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, 4 << 20)
    bad = []

    def reader():
        got, tail = 0, b""
        while got < replies:
            b = s.recv(1 << 20)
            if not b:
                bad.append("connection closed after %d replies" % got)
                return
            got += b.count(b"\n")
            tail = (tail + b)[-4096:]
            if b'"ok":false' in b:
                bad.append(b.decode(errors="replace")[:300])
                return

    t = threading.Thread(target=reader)
    t.start()
    for c in chunks:
        s.sendall(c)
    t.join()
    s.close()
    if bad:
        raise SystemExit("ingest failed: " + bad[0])


def feed(d, name, chunks, replies, total, ctl=None):
    """Seconds from the first byte until every reply arrived and every transition is applied."""
    own = ctl is None
    ctl = ctl or d.conn()
    t0 = time.perf_counter()
    pump(d.sock, chunks, replies)
    wait_applied(ctl, name, total)
    dt = time.perf_counter() - t0
    if own:
        ctl.close()
    return dt


# ---------------------------------------------------------------------------
# Parts.  Each returns {figure: value} for one run.


def part_kernels(a, run):
    out = subprocess.run([os.path.join(a.build, "tests", "bench", "kernels"), "-t",
                          str(0.05 if a.quick else 0.3)], check=True, capture_output=True,
                         text=True).stdout
    fig = {}
    rows = [json.loads(l) for l in out.splitlines() if l.strip()]
    for row in rows:
        fig[f"kernel {row['kind']} update n={row['n']} [ns]"] = row["update_ns"]
        if "value_ns" in row:
            fig[f"kernel {row['kind']} value n={row['n']} [ns]"] = row["value_ns"]
    for row in rows:
        if row["kind"] == "rls_td":
            ref = fig.get(f"kernel openblas_rls update n={row['n']} [ns]")
            if ref:
                fig[f"kernel rls_td / openblas n={row['n']} [ratio]"] = row["update_ns"] / ref
    return fig


def part_nets(a, run):
    out = subprocess.run([os.path.join(a.build, "tests", "bench", "nets"), "-t",
                          str(0.1 if a.quick else 0.5)], check=True, capture_output=True,
                         text=True).stdout
    fig = {}
    for row in (json.loads(l) for l in out.splitlines() if l.strip()):
        tag = f"{row['kind']} n={row['n']} hidden={row['hidden']}"
        fig[f"net {tag} observe [transitions/s]"] = row["obs_per_s"]
        fig[f"net {tag} step [ns]"] = row["step_ns"]
        fig[f"net {tag} step / dgemm bound [ratio]"] = row["ratio"]
    return fig


INGEST_MODES = [("lines", None), ("lines", "applied"), ("batch", None), ("batch", "applied"),
                ("bulk", None), ("bulk", "applied")]


def ingest_counts(a):
    if a.quick:
        return {"lines": 20000, "batch": 51200, "bulk": 8192 * 12}
    return {"lines": 200000, "batch": 512000, "bulk": 8192 * 122}  # bulk ~1,000,000


def encode(mode, x, r, xn, model, ack):
    if mode == "lines":
        return [lines_payload(x, r, xn, model, ack)], len(r)
    if mode == "batch":
        p, k = batch_payload(x, r, xn, model, ack)
        return [p], k
    fr = bulk_frames(x, r, xn, model, ack)
    return fr, len(fr)


_cache = {}


def payload(mode, n, ack, model="bench"):
    key = (mode, n, ack, model)
    if key not in _cache:
        x, r, xn = transitions(n)
        _cache[key] = encode(mode, x, r, xn, model, ack)
    return _cache[key]


def ingest_once(a, mode, ack, n, est=EST_INGEST):
    chunks, replies = payload(mode, n, ack)
    d = Daemon(a.worthd)
    try:
        d.start()
        c = d.conn()
        create(c, "bench", est)
        dt = feed(d, "bench", chunks, replies, n, c)
        c.close()
        return n / dt
    finally:
        d.remove()


def part_ingest(a, run):
    fig = {}
    counts = ingest_counts(a)
    for mode, ack in INGEST_MODES:
        label = "durable (FULL)" if ack is None else "ack applied"
        fig[f"ingest {mode}, {label} [transitions/s]"] = ingest_once(a, mode, ack, counts[mode])
    return fig


def paced_feeder(path, rate, stop_at, frame, out):
    """Feeds bulk frames of `frame` records at `rate` transitions/s until stop_at (monotonic)."""
    x, r, xn = transitions(frame, seed=7)
    fr = bulk_frames(x, r, xn, "bench", None, frame)[0]
    s = socket.socket(socket.AF_UNIX)
    s.connect(path)
    f = s.makefile("rb")
    sent = 0
    got = [0]

    def reader():
        while True:
            line = f.readline()
            if not line:
                return
            got[0] += 1

    t = threading.Thread(target=reader, daemon=True)
    t.start()
    t0 = time.monotonic()
    while time.monotonic() < stop_at:
        due = t0 + sent * frame / rate
        now = time.monotonic()
        if due > now:
            time.sleep(due - now)
        s.sendall(fr)
        sent += 1
    while got[0] < sent and time.monotonic() < stop_at + 30:
        time.sleep(0.001)
    out.value = sent * frame / (time.monotonic() - t0)
    s.close()


def percentile(v, q):
    return float(np.percentile(np.asarray(v), q))


def latency_loop(c, states, count):
    s, f = c.s, c.f
    reqs = [(json.dumps({"op": "value", "model": "bench", "x": st}) + "\n").encode()
            for st in states]
    lat = []
    pc = time.perf_counter_ns
    for i in range(count):
        q = reqs[i % len(reqs)]
        t0 = pc()
        s.sendall(q)
        line = f.readline()
        lat.append(pc() - t0)
        if not line.startswith(b'{"ok":true'):
            raise SystemExit("value failed: " + line.decode()[:200])
    return [v / 1000.0 for v in lat]  # microseconds


def part_query(a, run):
    fig = {}
    max_rate = a.results_median.get("ingest bulk, durable (FULL) [transitions/s]")
    d = Daemon(a.worthd)
    try:
        d.start()
        c = d.conn()
        create(c, "bench")
        if not max_rate:  # not measured in this run: measure it now
            chunks, replies = payload("bulk", 8192 * (6 if a.quick else 30), None)
            n = 8192 * (6 if a.quick else 30)
            max_rate = n / feed(d, "bench", chunks, replies, n, c)
            base = n
        else:
            base = 0
            x, r, xn = transitions(50000, seed=3)
            chunks = bulk_frames(x, r, xn, "bench")
            feed(d, "bench", chunks, len(chunks), 50000, c)
            base = 50000
        rng = np.random.default_rng(5)
        states = rng.random((1000, D)).tolist()
        count = 3000 if a.quick else 30000
        idle = latency_loop(c, states, count // 3)
        fig["value p50, idle [us]"] = percentile(idle, 50)
        fig["value p99, idle [us]"] = percentile(idle, 99)
        rate = max_rate / 2
        est_s = count * max(statistics.median(idle), 30) / 1e6 * 1.5 + 1.0
        out = multiprocessing.get_context("fork").Value("d", 0.0)
        stop_at = time.monotonic() + est_s
        p = multiprocessing.get_context("fork").Process(
            target=paced_feeder, args=(d.sock, rate, stop_at, 512, out))
        p.start()
        time.sleep(0.3)  # let the feeder reach its rate
        lat = latency_loop(c, states, count)
        p.join()
        fig["value p50, half-rate ingest [us]"] = percentile(lat, 50)
        fig["value p99, half-rate ingest [us]"] = percentile(lat, 99)
        fig["value p99.9, half-rate ingest [us]"] = percentile(lat, 99.9)
        fig["value max, half-rate ingest [us]"] = max(lat)
        fig["ingest rate during queries [transitions/s]"] = out.value
        # xs batches of 1000 states
        xs_req = (json.dumps({"op": "value", "model": "bench", "xs": states}) + "\n").encode()
        reps = 20 if a.quick else 200
        t0 = time.perf_counter()
        for _ in range(reps):
            c.s.sendall(xs_req)
            line = c.f.readline()
            assert line.startswith(b'{"ok":true'), line[:200]
        fig["value xs (1000 a request) [states/s]"] = reps * 1000 / (time.perf_counter() - t0)
        del base
        c.close()
    finally:
        d.remove()
    return fig


def replay_rate(log):
    lines = [ln for ln in open(log).read().splitlines() if "replayed" in ln]
    m = re.search(r"replayed (\d+) transitions in ([\d.]+) s \((\d+)/s\)", lines[-1])
    return int(m.group(1)), float(m.group(2))


class RecoveryDb:
    """One database with N transitions logged after the last checkpoint, built once per suite."""

    def __init__(self, a, est, n):
        self.d = Daemon(a.worthd, ["--checkpoint-every", "0"])
        self.d.start()
        c = self.d.conn()
        create(c, "bench", est)
        x, r, xn = transitions(n, seed=11)
        chunks = bulk_frames(x, r, xn, "bench")
        feed(self.d, "bench", chunks, len(chunks), n, c)
        self.probe = transitions(4, seed=12)[0].tolist()
        self.values = [c.call({"op": "value", "model": "bench", "x": s})["estimators"]
                       for s in self.probe]
        c.close()
        self.d.kill9()  # no shutdown checkpoint
        self.n = n

    def restart(self):
        ready = self.d.start()
        c = self.d.conn()
        after = [c.call({"op": "value", "model": "bench", "x": s})["estimators"]
                 for s in self.probe]
        c.close()
        self.d.kill9()  # again no checkpoint: the next restart replays the same log
        replayed, secs = replay_rate(self.d.log)
        assert replayed == self.n, (replayed, self.n)
        return ready, replayed / secs, after == self.values


def part_recovery(a, run):
    n = 100000 if a.quick else 1000000
    fig = {}
    for label, est in (("td+rls_td", EST_PAIR), ("td+rls_td+replay", EST_INGEST)):
        key = ("recovery", label)
        if key not in _cache:
            _cache[key] = RecoveryDb(a, est, n)
        ready, rate, same = _cache[key].restart()
        fig[f"recovery {label}, {n} transitions: ready [s]"] = ready
        fig[f"recovery {label}: replay [transitions/s]"] = rate
        if not same:
            raise SystemExit(f"recovery {label}: values after recovery differ from before")
    return fig


def scale_once(a, models, total):
    per = total // models
    x, r, xn = transitions(per, seed=21)
    d = Daemon(a.worthd)
    try:
        d.start()
        c = d.conn()
        names = [f"m{i}" for i in range(models)]
        jobs = []
        for nm in names:
            create(c, nm)
            fr = bulk_frames(x, r, xn, nm)
            jobs.append((fr, len(fr)))
        t0 = time.perf_counter()
        ths = [threading.Thread(target=pump, args=(d.sock, fr, k)) for fr, k in jobs]
        for t in ths:
            t.start()
        for t in ths:
            t.join()
        for nm in names:
            wait_applied(c, nm, per)
        dt = time.perf_counter() - t0
        rss = d.peak_rss_kb()
        c.close()
        return per * models / dt, rss / 1024
    finally:
        d.remove()


def rss_once(a, order, capacity):
    """Peak RSS of worthd with one model: td + replay (capacity), its buffer filled."""
    d = Daemon(a.worthd)
    try:
        d.start()
        c = d.conn()
        est = [{"name": "td", "kind": "td"},
               {"name": "replay", "kind": "replay", "capacity": capacity, "steps_per_obs": 0}]
        n = create(c, "bench", est,
                   [{"basis": "bias"}, {"basis": "fourier", "order": order, "couple": 1}])
        x, r, xn = transitions(capacity, seed=31)
        fr = bulk_frames(x, r, xn, "bench")
        feed(d, "bench", fr, len(fr), capacity, c)
        rss = d.peak_rss_kb()
        c.close()
        return n, rss / 1024
    finally:
        d.remove()


def part_scale(a, run):
    fig = {}
    total = 8192 * (8 if a.quick else 64)
    for models in (1, 4, 16):
        rate, rss = scale_once(a, models, total)
        fig[f"scale {models} model(s) [transitions/s total]"] = rate
        fig[f"scale {models} model(s) peak RSS [MiB]"] = rss
    caps = (1000, 10000) if a.quick else (1000, 10000, 100000)
    for order in (8, 32, 128):  # n = 65, 257, 1025
        for cap in caps:
            if order == 128 and cap > 10000:
                continue  # 1.6 GB of buffer: not on a shared 2-core machine
            n, rss = rss_once(a, order, cap)
            fig[f"peak RSS, replay capacity {cap}, n={n} [MiB]"] = rss
    return fig


def part_baseline(a, run):
    n = 10000 if a.quick else 100000
    fig = {}
    x, r, xn = transitions(n, seed=41)
    lines = lines_payload(x, r, xn, "bench")
    tmp = tempfile.mkdtemp(prefix="worth-bench-", dir=os.environ.get("BENCH_TMP"))
    try:
        path = os.path.join(tmp, "t.jsonl")
        with open(path, "wb") as f:
            f.write(lines)
        probe = [[0.25] * D, [0.5] * D, [0.8] * D]
        out = subprocess.run([sys.executable, os.path.join(HERE, "baseline.py"), path,
                              json.dumps(probe)], check=True, capture_output=True,
                             text=True).stdout
        base = json.loads(out.splitlines()[-1])
        fig["numpy loop (JSON lines, td + rls_td) [transitions/s]"] = base["rate"]
        for mode in ("lines", "batch", "bulk"):
            chunks, replies = encode(mode, x, r, xn, "bench", None)
            d = Daemon(a.worthd)
            try:
                d.start()
                c = d.conn()
                create(c, "bench", EST_PAIR)
                rate = n / feed(d, "bench", chunks, replies, n, c)
                vals = [c.call({"op": "value", "model": "bench", "x": s})["estimators"]
                        for s in probe]
                c.close()
            finally:
                d.remove()
            fig[f"worthd {mode}, durable, td + rls_td [transitions/s]"] = rate
            fig[f"worthd {mode} / numpy loop [ratio]"] = rate / base["rate"]
            diff = max(abs(v["rls"] - b) / max(1.0, abs(b)) for v, b in zip(vals, base["rls"]))
            tdd = max(abs(v["td"] - b) / max(1.0, abs(b)) for v, b in zip(vals, base["td"]))
            fig[f"worthd {mode} vs numpy: RLS-TD value rel. diff"] = diff
            fig[f"worthd {mode} vs numpy: TD(0) value rel. diff"] = tdd
            if diff > 1e-6 or tdd > 1e-9:
                raise SystemExit(f"baseline: worthd and numpy disagree (rls {diff}, td {tdd})")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return fig


PARTS = {"kernels": part_kernels, "nets": part_nets, "ingest": part_ingest, "query": part_query,
         "recovery": part_recovery, "scale": part_scale, "baseline": part_baseline}

# ---------------------------------------------------------------------------


def fmt(v):
    if abs(v) >= 1000:
        return f"{v:,.0f}"
    if abs(v) >= 10:
        return f"{v:.1f}"
    if abs(v) >= 0.01 or v == 0:
        return f"{v:.3f}"
    return f"{v:.1e}"


def machine():
    cpu = "?"
    for line in open("/proc/cpuinfo"):
        if line.startswith("model name"):
            cpu = line.split(":", 1)[1].strip()
            break
    return {"cpu": cpu, "cores": os.cpu_count(), "kernel": platform.release(),
            "load_before": os.getloadavg()}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("build")
    ap.add_argument("--quick", action="store_true", help="fewer transitions, a smoke check")
    ap.add_argument("--runs", type=int, default=None, help="runs per part (default 5; quick 2)")
    ap.add_argument("--parts", default=",".join(PARTS))
    ap.add_argument("--out", default=os.path.join(HERE, "results.json"))
    a = ap.parse_args()
    a.worthd = os.path.join(a.build, "daemon", "worthd")
    runs = a.runs or (2 if a.quick else 5)
    parts = [p for p in a.parts.split(",") if p]
    for p in parts:
        if p not in PARTS:
            raise SystemExit(f"unknown part {p}; parts: {', '.join(PARTS)}")
    info = machine()
    info.update({"date": time.strftime("%Y-%m-%d %H:%M %Z"), "quick": a.quick, "runs": runs,
                 "parts": parts})
    results = {}  # figure -> [values]
    a.results_median = {}
    for p in parts:
        t0 = time.time()
        for run in range(runs):
            print(f"[{p} {run + 1}/{runs}]", file=sys.stderr, flush=True)
            for k, v in PARTS[p](a, run).items():
                results.setdefault(k, []).append(v)
        a.results_median = {k: statistics.median(v) for k, v in results.items()}
        print(f"[{p} done in {time.time() - t0:.0f} s]", file=sys.stderr, flush=True)
    for v in _cache.values():
        if isinstance(v, RecoveryDb):
            v.d.remove()
    info["load_after"] = os.getloadavg()

    width = max(len(k) for k in results)
    print(f"worth benchmarks, {info['date']}, {info['cpu']}, {info['cores']} cores, "
          f"load average before {info['load_before'][0]:.2f}, after {info['load_after'][0]:.2f}"
          f"{', QUICK' if a.quick else ''}; median of {runs} runs (min, max)")
    print(f"{'figure':<{width}}  {'median':>12}  {'min':>12}  {'max':>12}")
    table = []
    for k, v in results.items():
        med, lo, hi = statistics.median(v), min(v), max(v)
        table.append({"figure": k, "median": med, "min": lo, "max": hi, "runs": v})
        print(f"{k:<{width}}  {fmt(med):>12}  {fmt(lo):>12}  {fmt(hi):>12}")
    with open(a.out, "w") as f:
        json.dump({"machine": info, "table": table}, f, indent=1)
        f.write("\n")
    print(f"(written to {os.path.relpath(a.out)})", file=sys.stderr)


if __name__ == "__main__":
    main()
