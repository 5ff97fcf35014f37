#!/usr/bin/python3
"""fleet.py - ingest rate of a worth fleet with 1, 2 and 3 worthd nodes on a 3-server NATS
JetStream cluster (stream and buckets with 3 replicas), against one worthd on SQLite fed the
same transitions, in one run; and question latency through a node that does not own the
model.  A benchmark: it prints figures and writes them to --json; it asserts nothing but that
every transition was applied.

  /usr/bin/python3 tests/bench/fleet.py --worthd build-rel/daemon/worthd \\
      --cli build-rel/client/cli/worth --fleetq build-rel/tests/bench/fleetq --json F

Workload: 16 models (8 state dimensions, 65 features: bias + Fourier order 8; td + rls_td),
the transitions a random trajectory in [0, 1]^8.  Four producers (`worth fleet feed` /
`worth feed`), each feeding 4 models one after the other.  "batch64": messages of 64
transitions; "single": one transition per message.  Rate = transitions / (first publish
until every model has applied all), so it covers the stream, the nodes' learning and the
producers alike - on a 2-core machine where all of them (3 nats-servers, up to 3 nodes, the
producers) share the two cores.
"""
import argparse
import json
import os
import random
import socket
import subprocess
import sys
import tempfile
import threading
import time

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "integration"))
from fleetnet import SHARDS, Cluster, Fleet, Node  # noqa: E402

D = 8
SPEC = {"dims": D, "gamma": 0.95, "ranges": [[0, 1]] * D,
        "features": [{"basis": "bias"}, {"basis": "fourier", "order": 8, "couple": 1}],
        "estimators": [{"name": "td", "kind": "td", "alpha": 0.01},
                       {"name": "rls_td", "kind": "rls_td", "forget": 0.999, "delta": 100}]}
MODELS = [f"bench-{i:02d}" for i in range(16)]


def trajectory(rng, n):
    x = [rng.random() for _ in range(D)]
    out = []
    for _ in range(n):
        nx = [min(1.0, max(0.0, v + rng.uniform(-0.05, 0.05))) for v in x]
        out.append({"x": x, "r": rng.uniform(-0.5, 0.5), "x_next": nx})
        x = nx
    return out


def write_files(tmp, per_model, batch):
    """One JSON-lines file per model: messages of `batch` transitions (1: plain objects)."""
    rng = random.Random(42)
    paths = {}
    for m in MODELS:
        rows = trajectory(rng, per_model)
        path = os.path.join(tmp, f"{m}-{per_model}-{batch}.jsonl")
        with open(path, "w") as f:
            if batch == 1:
                for r in rows:
                    f.write(json.dumps(r) + "\n")
            else:
                for i in range(0, len(rows), batch):
                    f.write(json.dumps({"batch": rows[i:i + batch]}) + "\n")
        paths[m] = path
    return paths


def producers(feed_one):
    errors = []

    def run(k):
        try:
            for m in MODELS[k::4]:
                feed_one(m)
        except Exception as e:
            errors.append(e)

    threads = [threading.Thread(target=run, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=900)
    assert not errors, errors


def fleet_run(args, tmp, k, paths, per_model):
    d = tempfile.mkdtemp(dir=tmp, prefix=f"fleet{k}-")
    cl = Cluster(d, n=3, shards=SHARDS)
    nodes = [Node(args.worthd, cl.urls(), f"n{i}", d,
                  ["--replicas", "3", "--shards", str(SHARDS), "--quiet"]) for i in range(k)]
    fl = Fleet(args.cli, cl.urls())
    try:
        fl.wait_owned({n.name for n in nodes}, timeout=60)
        time.sleep(3.5)  # a lease time: let the shards spread before timing
        fl.wait_owned({n.name for n in nodes}, timeout=60)
        owners = [s["node"] for s in fl.status()["shards"]]
        for m in MODELS:
            p = fl.run("create", m, "-", stdin=json.dumps(SPEC), check=False)
            assert p.returncode == 0, p.stderr
        out = {"nodes": k, "shards_per_node": {n.name: owners.count(n.name) for n in nodes}}
        for name, files in paths.items():
            t0 = time.monotonic()
            producers(lambda m: fl.run("feed", m, files[m], "--id", f"{name}-{m}", timeout=900))
            t_pub = time.monotonic() - t0
            base = {m: 0 for m in MODELS} if name == "batch64" else {m: per_model["batch64"]
                                                                     for m in MODELS}
            for m in MODELS:
                fl.wait_applied(m, base[m] + per_model[name], timeout=900)
            t_all = time.monotonic() - t0
            n = per_model[name] * len(MODELS)
            out[name] = {"transitions": n, "publish_s": round(t_pub, 3),
                         "applied_s": round(t_all, 3), "rate": round(n / t_all)}
            print(f"  fleet, {k} node(s), {name}: {n} transitions in {t_all:.2f} s = "
                  f"{n / t_all:,.0f}/s (published in {t_pub:.2f} s)", flush=True)
        # Questions: straight to the owner, and through another node.
        owner = fl.ask(MODELS[0], {"op": "stats"})["node"]
        other = next((n.name for n in nodes if n.name != owner), owner)
        req = json.dumps({"op": "value", "x": [0.5] * D})
        for label, subj in (("owner", f"worth.ask.{MODELS[0]}"),
                            ("via", f"worth.via.{other}.{MODELS[0]}")):
            p = subprocess.run([args.fleetq, cl.urls(), subj, str(args.queries), req],
                               capture_output=True, text=True, timeout=300)
            assert p.returncode == 0, p.stderr
            out[f"query_{label}"] = dict(json.loads(p.stdout), node=other if label == "via"
                                         else owner)
            q = out[f"query_{label}"]
            print(f"  fleet, {k} node(s), value via {q['node']} ({label}): p50 {q['p50_us']} us, "
                  f"p99 {q['p99_us']} us", flush=True)
        return out
    finally:
        for n in nodes:
            n.stop(timeout=60)
        cl.stop()


def single_run(args, tmp, paths, per_model):
    """Each workload into a fresh worthd on SQLite (durable log), by `worth feed` (bulk frames
    for plain transitions), four producers as for the fleet."""
    out = {}
    for name, files in paths.items():
        d = tempfile.mkdtemp(dir=tmp, prefix=f"single-{name}-")
        sock = os.path.join(d, "w.sock")
        log = open(os.path.join(d, "worthd.log"), "ab")
        p = subprocess.Popen([args.worthd, "--socket", sock, "--db", os.path.join(d, "w.db")],
                             stderr=log)
        try:
            end = time.monotonic() + 30
            while not os.path.exists(sock) and time.monotonic() < end:
                time.sleep(0.05)
            s = socket.socket(socket.AF_UNIX)
            s.connect(sock)
            f = s.makefile("rw")

            def call(o):
                f.write(json.dumps(o) + "\n")
                f.flush()
                r = json.loads(f.readline())
                assert r.get("ok"), r
                return r

            for m in MODELS:
                call({"op": "model.create", "model": m, **SPEC})
            cli = [args.cli, "--socket", sock]
            t0 = time.monotonic()
            producers(lambda m: subprocess.run(cli + ["feed", m, files[m]], check=True,
                                               capture_output=True, timeout=900))
            for m in MODELS:
                end = time.monotonic() + 900
                while call({"op": "stats", "model": m})["applied"] < per_model[name]:
                    assert time.monotonic() < end
                    time.sleep(0.02)
            t = time.monotonic() - t0
            n = per_model[name] * len(MODELS)
            out[name] = {"transitions": n, "applied_s": round(t, 3), "rate": round(n / t)}
            print(f"  single node on SQLite, {name}: {n} transitions in {t:.2f} s = "
                  f"{n / t:,.0f}/s", flush=True)
            s.close()
        finally:
            p.terminate()
            p.wait(timeout=60)
    return out


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--worthd", required=True)
    ap.add_argument("--cli", required=True)
    ap.add_argument("--fleetq", required=True)
    ap.add_argument("--batch-n", type=int, default=16384, help="transitions per model, batch64")
    ap.add_argument("--single-n", type=int, default=2048, help="transitions per model, single")
    ap.add_argument("--queries", type=int, default=3000)
    ap.add_argument("--json")
    args = ap.parse_args()
    tmp = tempfile.mkdtemp(prefix="worth-fleet-bench-")
    per_model = {"batch64": args.batch_n, "single": args.single_n}
    paths = {"batch64": write_files(tmp, args.batch_n, 64),
             "single": write_files(tmp, args.single_n, 1)}
    # `worth feed` takes one transition a line (and batches them itself): the same transitions.
    plain = {"batch64": write_files(tmp, args.batch_n, 1), "single": paths["single"]}
    res = {"date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()),
           "cpu": next((l.split(":", 1)[1].strip() for l in open("/proc/cpuinfo")
                        if l.startswith("model name")), "?"),
           "cores": os.cpu_count(), "load_before": os.getloadavg()[0],
           "models": len(MODELS), "features": 65, "estimators": ["td", "rls_td"]}
    res["single_node"] = single_run(args, tmp, plain, per_model)
    res["fleet"] = [fleet_run(args, tmp, k, paths, per_model) for k in (1, 2, 3)]
    res["load_after"] = os.getloadavg()[0]
    if args.json:
        with open(args.json, "w") as f:
            json.dump(res, f, indent=1)
    print(json.dumps(res))


if __name__ == "__main__":
    main()
