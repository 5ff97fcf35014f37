"""fleetnet.py - a NATS JetStream cluster and worthd fleet nodes for the fleet tests and the
fleet benchmark, all on loopback in a temporary directory.

nats-server (Debian's nats-server 2.9) is started with the subject mappings of
contrib/nats/ (worth.in.<model> -> worth.t.<shard>.<model>, worth.ask.<model> ->
worth.q.<shard>.<model>) and an MQTT listener; `worthd fleet` nodes and `worth fleet`
are the programs under test.  Every wait is bounded in time.
"""
import json
import os
import signal
import socket
import subprocess
import time
import urllib.request

NATS_SERVER = "/usr/sbin/nats-server"
MOSQUITTO_PUB = "/usr/bin/mosquitto_pub"
MOSQUITTO = "/usr/sbin/mosquitto"


def free_ports(n):
    socks, ports = [], []
    for _ in range(n):
        s = socket.socket()
        s.bind(("127.0.0.1", 0))
        socks.append(s)
        ports.append(s.getsockname()[1])
    for s in socks:
        s.close()
    return ports


CONTRIB = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "contrib")


def mapping_conf(shards):
    """contrib/nats/mappings.conf, with its partition count set to shards."""
    with open(os.path.join(CONTRIB, "nats", "mappings.conf")) as f:
        text = f.read()
    assert text.count("partition(16,") == 2, "contrib/nats/mappings.conf changed its form"
    return text.replace("partition(16,", f"partition({shards},")


class Cluster:
    """n nats-server processes in one JetStream cluster (n = 1: a single server)."""

    def __init__(self, workdir, n=3, shards=16):
        assert os.access(NATS_SERVER, os.X_OK), "nats-server is not installed (tests/deps)"
        self.dir = str(workdir)
        self.n, self.shards = n, shards
        ports = free_ports(4 * n)
        self.client = ports[0:n]
        self.route = ports[n:2 * n]
        self.mqtt = ports[2 * n:3 * n]
        self.http = ports[3 * n:4 * n]
        self.procs = [None] * n
        for i in range(n):
            self.start(i)
        self.wait_ready()

    def conf(self, i):
        routes = ",".join(f"nats-route://127.0.0.1:{p}" for p in self.route)
        cluster = ("" if self.n == 1 else
                   f"cluster {{ name: worth-test, listen: 127.0.0.1:{self.route[i]}, "
                   f"routes: [{routes}] }}\n")
        return (f"server_name: n{i}\n"
                f"listen: 127.0.0.1:{self.client[i]}\n"
                f"http: 127.0.0.1:{self.http[i]}\n"
                f'jetstream {{ store_dir: "{self.dir}/js{i}", max_memory_store: 268435456, '
                f"max_file_store: 4294967296 }}\n"
                f"mqtt {{ listen: 127.0.0.1:{self.mqtt[i]} }}\n"
                + cluster + mapping_conf(self.shards))

    def start(self, i):
        path = os.path.join(self.dir, f"n{i}.conf")
        with open(path, "w") as f:
            f.write(self.conf(i))
        log = open(os.path.join(self.dir, f"n{i}.log"), "ab")
        self.procs[i] = subprocess.Popen([NATS_SERVER, "-c", path], stdout=log, stderr=log)

    def healthy(self, i):
        try:
            with urllib.request.urlopen(
                    f"http://127.0.0.1:{self.http[i]}/healthz?js-enabled-only=true",
                    timeout=1) as r:
                return r.status == 200
        except Exception:
            return False

    def wait_ready(self, timeout=30):
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if all(p is None or self.healthy(i) for i, p in enumerate(self.procs)):
                return
            for i, p in enumerate(self.procs):
                assert p is None or p.poll() is None, f"nats-server n{i} exited:\n{self.log(i)}"
            time.sleep(0.1)
        raise AssertionError("the NATS cluster did not become ready in time")

    def log(self, i):
        with open(os.path.join(self.dir, f"n{i}.log"), errors="replace") as f:
            return f.read()[-3000:]

    def urls(self, skip=()):
        return ",".join(f"nats://127.0.0.1:{p}" for i, p in enumerate(self.client)
                        if i not in skip)

    def kill9(self, i):
        self.procs[i].send_signal(signal.SIGKILL)
        self.procs[i].wait(timeout=10)
        self.procs[i] = None

    def stop(self):
        for p in self.procs:
            if p and p.poll() is None:
                p.terminate()
        for i, p in enumerate(self.procs):
            if p:
                try:
                    p.wait(timeout=10)
                except subprocess.TimeoutExpired:
                    p.kill()
                    p.wait(timeout=10)
                self.procs[i] = None


class Node:
    """One `worthd fleet` process."""

    def __init__(self, worthd, urls, name, workdir, args=()):
        self.name = name
        self.logpath = os.path.join(str(workdir), f"worthd-{name}.log")
        self.logf = open(self.logpath, "ab")
        self.proc = subprocess.Popen([worthd, "fleet", "--nats", urls, "--node", name, *args],
                                     stdout=subprocess.PIPE, stderr=self.logf)

    def log(self):
        with open(self.logpath, errors="replace") as f:
            return f.read()[-4000:]

    def kill9(self):
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(timeout=10)

    def stop(self, timeout=20):
        """SIGTERM; returns the exit code (asserting nothing went to stdout)."""
        if self.proc.poll() is None:
            self.proc.terminate()
        try:
            rc = self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=10)
            raise AssertionError(f"node {self.name} still running {timeout} s after SIGTERM")
        out = self.proc.stdout.read()
        assert not out, f"node {self.name} wrote to stdout: {out[:200]!r}"
        return rc


class Fleet:
    """`worth fleet` against a cluster."""

    def __init__(self, cli, urls):
        self.cli, self.urls = cli, urls

    def run(self, *args, via=None, stdin=None, timeout=60, check=True, cli_timeout=30):
        argv = [self.cli, "--timeout", str(cli_timeout), "fleet", "--nats", self.urls]
        if via:
            argv += ["--via", via]
        try:
            p = subprocess.run(argv + [str(a) for a in args], input=stdin, capture_output=True,
                               text=True, timeout=timeout)
        except subprocess.TimeoutExpired as e:
            raise AssertionError(f"worth fleet {args}: no end in {timeout} s; stderr: "
                                 f"{e.stderr!r}") from None
        assert "Sanitizer" not in p.stderr and "runtime error" not in p.stderr, p.stderr
        if check:
            assert p.returncode == 0, f"{args}: rc {p.returncode}: {p.stderr}"
        return p

    def ask(self, model, req, via=None, check=True, owner_wait=15):
        """The answer to req; a no_owner (a shard changing hands) is asked again for up to
        owner_wait seconds, as doc/fleet.md tells a client to."""
        end = time.monotonic() + owner_wait
        while True:
            p = self.run("ask", model, json.dumps(req), via=via, check=False)
            if "no_owner" not in p.stderr + p.stdout or time.monotonic() > end:
                break
            time.sleep(0.1)
        if check:
            assert p.returncode == 0, f"ask {model} {req}: rc {p.returncode}: {p.stderr}{p.stdout}"
        return json.loads(p.stdout) if p.stdout.strip() else None

    def status(self, check=True):
        p = self.run("--json", "status", check=check, cli_timeout=5)
        self.last_status_error = p.stderr
        return json.loads(p.stdout) if p.returncode == 0 else None

    def dump(self, model=None):
        """The stream's messages of model (in stream order), or {model: messages} of all."""
        out = self.run("dump", *([model] if model else [])).stdout
        msgs = [json.loads(line) for line in out.splitlines() if line.strip()]
        if model:
            return msgs
        by = {}
        for m in msgs:
            by.setdefault(m["model"], []).append(m)
        return by

    def wait_applied(self, model, n, timeout=60):
        end = time.monotonic() + timeout
        last = None
        while time.monotonic() < end:
            r = self.ask(model, {"op": "stats"}, check=False)
            if r and r.get("ok"):
                last = r
                if r["applied"] + r["rejected"] >= n:
                    return r
            time.sleep(0.2)
        raise AssertionError(f"{model}: {n} not applied within {timeout} s; last {last}")

    def wait_owned(self, nodes, timeout=30):
        """Waits until every shard has a lease held by one of nodes; returns the status."""
        end = time.monotonic() + timeout
        st = None
        while time.monotonic() < end:
            st = self.status(check=False)
            if st is None:
                time.sleep(0.2)
                continue
            owners = {s["shard"]: s.get("node") for s in st["shards"]}
            if len(owners) == SHARDS and all(o in nodes for o in owners.values()):
                return st
            time.sleep(0.1)
        raise AssertionError(f"shards not all owned by {nodes} within {timeout} s: {st} "
                             f"{getattr(self, 'last_status_error', '')}")


SHARDS = 16

# A model as the fleet tests create it (fields as model.create takes them).
SPEC = {"dims": 2, "gamma": 0.9, "ranges": [[0, 12], [0, 400]],
        "features": [{"basis": "bias"}, {"basis": "rbf", "centers": 4, "width": 0.2}],
        "estimators": [{"name": "td", "kind": "td", "alpha": 0.05},
                       {"name": "rls", "kind": "rls_td", "forget": 0.999, "delta": 100}]}


def transitions(rng, n):
    """n transitions of a made-up tank (test data of our own, not a plant's)."""
    out = []
    level = rng.uniform(0, 12)
    for _ in range(n):
        demand = rng.uniform(0, 400)
        nxt = min(12.0, max(0.0, level + rng.uniform(-1, 1) - demand / 800))
        out.append({"x": [level, demand], "r": -abs(nxt - 6.0), "x_next": [nxt, demand]})
        level = nxt
    return out
