"""The fleet mode (doc/fleet.md): worthd nodes on a NATS JetStream cluster.

Real servers on loopback: three nats-server 2.9 processes in one JetStream cluster (stream
and buckets with 3 replicas), three `worthd fleet` nodes, producers running `worth fleet
feed`, and mosquitto_pub through the servers' MQTT gateway.  Every comparison of weights is
against worthd's own single-node mode on the same transitions (model_save's bytes, as the
single node stores them in its checkpoints table), not against an outside source.

The module's tests share one cluster and run in order: the kill -9 of a worthd node, the
MQTT path, then the kill -9 of a nats-server node (which leaves the cluster at two).
"""
import json
import os
import random
import sqlite3
import subprocess
import threading
import time
import urllib.error
import urllib.request

import pytest

from fleetnet import (CONTRIB, MOSQUITTO, MOSQUITTO_PUB, SHARDS, SPEC, Cluster, Fleet, Node,
                      free_ports, transitions)

LEASE_MS = 3000
# The takeover bound this suite holds (doc/fleet.md: a lease time, a tick and the shards'
# opening, some 5 s here; 10 s leaves room for a loaded CI machine).
TAKEOVER_S = 10.0
T0 = time.monotonic()


def phase(what):
    print(f"[{time.monotonic() - T0:7.2f} s] {what}", flush=True)


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    d = tmp_path_factory.mktemp("fleet")
    cl = Cluster(d, n=3, shards=SHARDS)
    worthd = os.environ["WORTH_DAEMON"]
    args = ["--replicas", "3", "--lease-ms", str(LEASE_MS), "--shards", str(SHARDS),
            "--checkpoint-every", "500", "--checkpoint-ms", "1000"]
    mports = dict(zip("abc", free_ports(3)))

    def args_of(n):  # each node's metrics on a loopback port of its own
        return args + ["--metrics", f"127.0.0.1:{mports[n]}"]

    nodes = {n: Node(worthd, cl.urls(), n, d, args_of(n)) for n in ("a", "b", "c")}
    fl = Fleet(os.environ["WORTH_CLI"], cl.urls())
    ctx = {"cluster": cl, "nodes": nodes, "fleet": fl, "worthd": worthd, "args_of": args_of,
           "dir": d, "metrics_ports": mports}
    try:
        fl.wait_owned(set(nodes), timeout=60)
        yield ctx
    finally:
        problems = []
        for n, node in ctx["nodes"].items():
            if node.proc.poll() is None:
                try:
                    rc = node.stop()
                except AssertionError as e:
                    rc = str(e)
                if rc != 0:
                    problems.append(f"node {n} exit {rc}:\n{node.log()}")
        cl.stop()
        assert not problems, "\n".join(problems)


def create(fl, model, spec=SPEC):
    p = fl.run("create", model, "-", stdin=json.dumps(spec), check=False)
    assert p.returncode == 0, f"create {model}: {p.stderr}"


def feed_lines(fl, model, rows, pid, retries=60):
    """One producer's feed of model; returns worth's stderr.  Retried whole with the same --id
    after a failure: the message ids keep every line once."""
    text = "".join(json.dumps(r) + "\n" for r in rows)
    for _ in range(retries):
        p = fl.run("feed", model, "-", "--id", pid, stdin=text, check=False, timeout=120)
        if p.returncode == 0:
            return p.stderr
        time.sleep(0.5)
    raise AssertionError(f"feed {model}: {p.stderr}")


def single_node_states(daemon, tmp_path, models, db_name="single.db"):
    """Feeds each model's messages (as the stream holds them, in stream order) to a single
    worthd on SQLite; returns {model: model_save bytes} read from its checkpoints table."""
    db = tmp_path / db_name
    d = daemon(db=db)
    c = d.client()
    out = {}
    for name, msgs in models.items():
        create_msg = msgs[0]["msg"]
        assert create_msg["op"] == "model.create", create_msg
        c.ok(create_msg)
        rows = [m["msg"] for m in msgs[1:]]
        for i in range(0, len(rows), 200):
            c.ok({"op": "observe", "model": name, "batch": rows[i:i + 200]})
        c.wait_applied(name, len(rows))
        cp = c.ok({"op": "checkpoint", "model": name})["checkpoint"]
        with sqlite3.connect(db) as con:
            (blob,) = con.execute("SELECT state FROM checkpoints WHERE id = ?", (cp,)).fetchone()
        out[name] = bytes(blob)
    c.close()
    return out


def fleet_state(fl, model, via=None):
    r = fl.ask(model, {"op": "state"}, via=via)
    assert r["ok"], r
    return bytes.fromhex(r["state"]), r


def test_kill9_worthd_node_takeover_exactly_once_bit_identical(fleet, daemon, tmp_path):
    fl, nodes = fleet["fleet"], fleet["nodes"]
    rng = random.Random(20261204)
    models = [f"pump-{i:03d}" for i in range(100)]
    data = {m: transitions(rng, 150) for m in models}
    for m in models:
        create(fl, m)
    phase("100 models created")
    # Four producers, 25 models each, fed concurrently.
    errors = []
    done = []

    def producer(k):
        try:
            for m in models[k::4]:
                feed_lines(fl, m, data[m], f"prod{k}-{m}")
                done.append(m)
        except Exception as e:  # reported below
            errors.append(e)

    threads = [threading.Thread(target=producer, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    # Mid-ingest: a quarter of the models fed, kill -9 the node owning the most shards.
    end = time.monotonic() + 120
    while len(done) < 25 and time.monotonic() < end and not errors:
        time.sleep(0.05)
    assert len(done) >= 25 and not errors, (len(done), errors)
    owners = [s.get("node") for s in fl.status()["shards"]]
    victim = max(nodes, key=owners.count)
    assert owners.count(victim) > 0
    nodes[victim].kill9()
    killed_at = time.monotonic()
    survivors = set(nodes) - {victim}
    fl.wait_owned(survivors, timeout=TAKEOVER_S)
    takeover_s = time.monotonic() - killed_at
    print(f"takeover of {owners.count(victim)} shards of {victim}: {takeover_s:.2f} s")
    assert takeover_s <= TAKEOVER_S
    for t in threads:
        t.join(timeout=300)
    phase("fed")
    assert not errors, errors
    assert len(done) == 100
    # Every acknowledged line applied exactly once: the counts, and the stream's own copy.
    dumps = {}
    everything = fl.dump()
    for m in models:
        st = fl.wait_applied(m, len(data[m]), timeout=60)
        assert st["applied"] == len(data[m]) and st["rejected"] == 0, st
        msgs = everything[m]
        assert len(msgs) == 1 + len(data[m]), (m, len(msgs))  # nothing stored twice
        seqs = [x["seq"] for x in msgs]
        assert seqs == sorted(seqs) and len(set(seqs)) == len(seqs)
        stored = sorted(json.dumps(x["msg"], sort_keys=True) for x in msgs[1:])
        fed = sorted(json.dumps(r, sort_keys=True) for r in data[m])
        assert stored == fed, m  # every fed line is there, once
        dumps[m] = msgs
    phase("applied and dumped")
    # Bit for bit: each model's state on the fleet equals a single node's on the same stream.
    ref = single_node_states(daemon, tmp_path, dumps)
    phase("single node fed")
    same = 0
    for m in models:
        got, r = fleet_state(fl, m)
        assert r["node"] in survivors
        assert got == ref[m], f"{m}: fleet state differs from the single node's"
        same += 1
    assert same == 100
    # Values agree through every surviving node, bit for bit (JSON numbers round-trip).
    x = [5.0, 120.0]
    answers = {n: fl.ask("pump-007", {"op": "value", "x": x}, via=n) for n in survivors}
    vals = {json.dumps(a["values"], sort_keys=True) for a in answers.values()}
    assert len(vals) == 1, answers
    phase("states compared")
    # The killed node comes back and takes a fair share again; nothing relearnt twice.
    nodes[victim] = Node(fleet["worthd"], fleet["cluster"].urls(), victim, fleet["dir"],
                         fleet["args_of"](victim))
    end = time.monotonic() + 30
    while time.monotonic() < end:
        owners = [s.get("node") for s in fl.status()["shards"]]
        if owners.count(victim) >= 3 and len(owners) == SHARDS:
            break
        time.sleep(0.2)
    assert owners.count(victim) >= 3, owners
    fl.wait_owned(set(nodes), timeout=TAKEOVER_S)
    for m in models[:10]:
        got, r = fleet_state(fl, m)
        assert got == ref[m] and r["applied"] == len(data[m]), m


def test_errors_are_clear(fleet):
    fl = fleet["fleet"]
    p = fl.run("feed", "no-such-model", "-", stdin='{"x":[1,2],"r":0,"x_next":[1,2]}\n',
               check=False)
    assert p.returncode == 1 and "no_such_model" in p.stderr, p.stderr
    p = fl.run("create", "bad-spec", "-", stdin=json.dumps({**SPEC, "gamma": 2}), check=False)
    assert p.returncode == 1 and "bad_param" in p.stderr, p.stderr
    p = fl.run("create", "has.dot", "-", stdin=json.dumps(SPEC), check=False)
    assert p.returncode == 2 and "'.'" in p.stderr, p.stderr
    create(fl, "err-1")
    p = fl.run("create", "err-1", "-", stdin=json.dumps(SPEC), check=False)
    assert p.returncode == 1 and "model_exists" in p.stderr, p.stderr
    r = fl.ask("err-1", {"op": "value", "x": [1.0]}, check=False)
    assert r["error"]["code"] == "bad_dimension", r
    r = fl.ask("err-1", {"op": "nope"}, check=False)
    assert r["error"]["code"] == "unknown_op", r
    # A bad transition in the stream is counted and skipped, never learnt, never fatal.
    feed_lines(fl, "err-1", [{"x": [1, 2], "r": 0, "x_next": [1]}, {"x": [1, 2], "r": 0,
                              "x_next": [2, 3]}], "err-1-a")
    st = fl.wait_applied("err-1", 2)
    assert st["applied"] == 1 and st["rejected"] == 1, st
    # A node that does not exist: nobody answers the forwarded question.
    p = fl.run("value", "err-1", "1", "2", via="nobody", check=False, cli_timeout=2)
    assert p.returncode == 1 and "no_owner" in p.stderr, p.stderr


def test_mqtt_device_through_gateway(fleet):
    fl, cl, nodes = fleet["fleet"], fleet["cluster"], fleet["nodes"]
    assert os.access(MOSQUITTO_PUB, os.X_OK), "mosquitto_pub is not installed (tests/deps)"
    create(fl, "mq-tank")
    rows = transitions(random.Random(7), 300)
    # MQTT 3.1.1, QoS 1: topic worth/in/mq-tank is the subject worth.in.mq-tank.
    p = subprocess.run([MOSQUITTO_PUB, "-h", "127.0.0.1", "-p", str(cl.mqtt[0]), "-V", "mqttv311",
                        "-q", "1", "-i", "tank-gw", "-t", "worth/in/mq-tank", "-l"],
                       input="".join(json.dumps(r) + "\n" for r in rows), text=True,
                       capture_output=True, timeout=60)
    assert p.returncode == 0, p.stderr
    st = fl.wait_applied("mq-tank", len(rows), timeout=30)
    assert st["applied"] == len(rows) and st["rejected"] == 0, st
    # What a device may send by mistake is counted and skipped; the owner goes on.
    for junk in ("not json", '{"x":"a","r":1}', '[1,2,3]', '{"x":[1e999,1],"r":0,"x_next":[1,1]}',
                 '{"batch":7}'):
        p = subprocess.run([MOSQUITTO_PUB, "-h", "127.0.0.1", "-p", str(cl.mqtt[0]), "-q", "1",
                            "-t", "worth/in/mq-tank", "-m", junk], capture_output=True,
                           text=True, timeout=30)
        assert p.returncode == 0, p.stderr
    st = fl.wait_applied("mq-tank", len(rows) + 5, timeout=30)
    assert st["applied"] == len(rows) and st["rejected"] == 5, st
    # Through every node, owner or not, the same value.
    x = [6.0, 200.0]
    got = {n: fl.ask("mq-tank", {"op": "value", "x": x}, via=n) for n in nodes}
    assert all(g["ok"] for g in got.values()), got
    assert len({json.dumps(g["values"], sort_keys=True) for g in got.values()}) == 1, got
    assert isinstance(got["a"]["value"], float)
    out = fl.run("value", "mq-tank", "6", "200", via="b").stdout
    assert "300 transitions" in out, out
    # Every node's metrics: Prometheus's text format (promtool, Debian's prometheus, checks
    # it), the consumer lag of each shard it owns, 0 once all is learnt.
    owner = got["a"]["node"]
    text = fl.run("metrics", owner).stdout
    p = subprocess.run(["promtool", "check", "metrics"], input=text, capture_output=True,
                       text=True, timeout=30)
    assert p.returncode == 0, p.stdout + p.stderr
    shard = got["a"]["shard"]
    assert f'worth_fleet_consumer_lag{{node="{owner}",shard="{shard}"}} 0' in text, text
    owned = json.loads(fl.run("--json", "metrics", owner).stdout)
    assert shard in [s["shard"] for s in owned["shards"]], owned
    # The same over HTTP, for Prometheus to scrape (worthd fleet --metrics).
    url = f"http://127.0.0.1:{fleet['metrics_ports'][owner]}"
    with urllib.request.urlopen(url + "/metrics", timeout=10) as r:
        assert r.status == 200 and r.headers["Content-Type"].startswith("text/plain")
        scraped = r.read().decode()
    p = subprocess.run(["promtool", "check", "metrics"], input=scraped, capture_output=True,
                       text=True, timeout=30)
    assert p.returncode == 0, p.stdout + p.stderr
    assert f'worth_fleet_consumer_lag{{node="{owner}",shard="{shard}"}} 0' in scraped, scraped
    with pytest.raises(urllib.error.HTTPError) as e:
        urllib.request.urlopen(url + "/other", timeout=10)
    assert e.value.code == 404


def test_mosquitto_bridge_from_contrib(fleet):
    """contrib/mqtt/bridge-to-fleet.conf: a plant's own mosquitto broker forwards
    plant/site-a/worth/<model> into the fleet through the gateway."""
    fl, cl = fleet["fleet"], fleet["cluster"]
    assert os.access(MOSQUITTO, os.X_OK), "mosquitto is not installed (tests/deps)"
    with open(os.path.join(CONTRIB, "mqtt", "bridge-to-fleet.conf")) as f:
        bridge = f.read()
    assert "address 127.0.0.1:1883" in bridge
    bridge = bridge.replace("address 127.0.0.1:1883", f"address 127.0.0.1:{cl.mqtt[1]}")
    (port,) = free_ports(1)
    conf = os.path.join(fleet["dir"], "mosquitto.conf")
    with open(conf, "w") as f:
        f.write(f"listener {port} 127.0.0.1\nallow_anonymous true\npersistence false\n" + bridge)
    log = open(os.path.join(fleet["dir"], "mosquitto.log"), "ab")
    broker = subprocess.Popen([MOSQUITTO, "-c", conf], stdout=log, stderr=log)
    try:
        create(fl, "br-tank")
        rows = transitions(random.Random(11), 200)
        text = "".join(json.dumps(r) + "\n" for r in rows)
        end = time.monotonic() + 20
        while True:  # until the broker listens
            p = subprocess.run([MOSQUITTO_PUB, "-h", "127.0.0.1", "-p", str(port), "-q", "1",
                                "-t", "plant/site-a/worth/probe", "-m", "{}"],
                               capture_output=True, text=True, timeout=10)
            if p.returncode == 0 or time.monotonic() > end:
                break
            time.sleep(0.2)
        assert p.returncode == 0, p.stderr
        time.sleep(1.0)  # the bridge's connection to the gateway
        p = subprocess.run([MOSQUITTO_PUB, "-h", "127.0.0.1", "-p", str(port), "-q", "1",
                            "-t", "plant/site-a/worth/br-tank", "-l"], input=text,
                           capture_output=True, text=True, timeout=60)
        assert p.returncode == 0, p.stderr
        st = fl.wait_applied("br-tank", len(rows), timeout=30)
        assert st["applied"] == len(rows) and st["rejected"] == 0, st
    finally:
        broker.terminate()
        broker.wait(timeout=10)


def test_rollback_excludes_windows_and_survives_takeover(fleet, daemon, tmp_path):
    """A rollback re-learns the model from the stream without the windows; the state equals
    a single node fed only the kept transitions, before and after a kill -9 takeover."""
    fl, nodes = fleet["fleet"], fleet["nodes"]
    create(fl, "rb-1")
    rows = transitions(random.Random(5), 300)
    for i, r in enumerate(rows):
        r["t"] = 1_800_000_000 + 60 * i  # plant time, one-minute steps
    feed_lines(fl, "rb-1", rows, "rb-1-a")
    fl.wait_applied("rb-1", 300)
    msgs = fl.dump("rb-1")
    assert len(msgs) == 301
    lo, hi = msgs[101]["seq"], msgs[180]["seq"]  # rows 100..179, by stream sequence
    t0, t1 = rows[250]["t"], rows[259]["t"]  # rows 250..259, by plant time
    p = fl.run("rollback", "rb-1", "--exclude-seq", f"{lo}:{hi}", "--exclude-t", f"{t0}:{t1}")
    assert "210 transitions re-learnt, 90 left out" in p.stdout, p.stdout
    st = fl.ask("rb-1", {"op": "stats"})
    assert st["applied"] == 210 and st["excluded"] == 90 and st["rollbacks"] == 1, st
    assert st["exclude"] == [{"seq": [lo, hi]}, {"t": [t0, t1]}], st
    kept = [m for m in msgs[1:] if not lo <= m["seq"] <= hi and not t0 <= m["msg"]["t"] <= t1]
    assert len(kept) == 210
    ref = single_node_states(daemon, tmp_path, {"rb-1": [msgs[0]] + kept}, "rb1.db")
    assert fleet_state(fl, "rb-1")[0] == ref["rb-1"]
    # Later transitions are learnt on top; one inside the time window stays out.
    more = transitions(random.Random(6), 40)
    for i, r in enumerate(more):
        r["t"] = 1_800_100_000 + 60 * i
    more[7]["t"] = t0 + 30
    feed_lines(fl, "rb-1", more, "rb-1-b")
    st = fl.wait_applied("rb-1", 210 + 39)
    assert st["applied"] == 249 and st["excluded"] == 91, st
    msgs2 = fl.dump("rb-1")
    assert msgs2[301]["msg"]["op"] == "model.rollback"  # the rollback is in the stream
    kept2 = kept + [m for m in msgs2[302:] if not t0 <= m["msg"]["t"] <= t1]
    assert len(kept2) == 249
    ref2 = single_node_states(daemon, tmp_path, {"rb-1": [msgs[0]] + kept2}, "rb2.db")
    assert fleet_state(fl, "rb-1")[0] == ref2["rb-1"]
    # kill -9 the owner: the node taking over honours the stored exclusion.
    owner = st["node"]
    nodes[owner].kill9()
    end = time.monotonic() + TAKEOVER_S + 15
    while time.monotonic() < end:
        r = fl.ask("rb-1", {"op": "stats"}, check=False)
        if r and r.get("ok") and r["node"] != owner:
            break
        time.sleep(0.2)
    got, r = fleet_state(fl, "rb-1")
    assert r["node"] != owner and r["applied"] == 249, r
    assert got == ref2["rb-1"]
    nodes[owner] = Node(fleet["worthd"], fleet["cluster"].urls(), owner, fleet["dir"],
                        fleet["args_of"](owner))
    # Bad windows are refused with bad_param, and nothing changes.
    r = fl.ask("rb-1", {"op": "rollback", "exclude": [{"seq": [5, 2]}]}, check=False)
    assert r["error"]["code"] == "bad_param", r
    r = fl.ask("rb-1", {"op": "rollback", "exclude": []}, check=False)
    assert r["error"]["code"] == "bad_param", r
    p = fl.run("rollback", "rb-1", check=False)
    assert p.returncode == 2, p.stderr
    assert fl.ask("rb-1", {"op": "stats"})["rollbacks"] == 1


def test_kill9_nats_node_ingest_goes_on(fleet):
    fl, cl = fleet["fleet"], fleet["cluster"]
    rng = random.Random(99)
    models = [f"valve-{i:02d}" for i in range(12)]
    data = {m: transitions(rng, 200) for m in models}
    for m in models:
        create(fl, m)
    errors, done = [], []

    def producer(k):  # like a gateway: 50 lines at a time, a pause between
        try:
            for c in range(4):
                for m in models[k::3]:
                    feed_lines(fl, m, data[m][50 * c:50 * (c + 1)], f"v{k}-{m}-{c}")
                    time.sleep(0.05)
                done.append(c)
        except Exception as e:
            errors.append(e)

    threads = [threading.Thread(target=producer, args=(k,)) for k in range(3)]
    for t in threads:
        t.start()
    end = time.monotonic() + 60
    while len(done) < 2 and time.monotonic() < end and not errors:
        time.sleep(0.05)
    kill_at_done = len(done)
    cl.kill9(2)  # one of three servers: the stream and buckets keep a quorum of two
    phase("\nnats-server n2 killed")
    for t in threads:
        t.join(timeout=300)
    phase("fed")
    assert not errors, "\n".join(str(e) for e in errors)
    assert len(done) == 12 and kill_at_done < 12, (done, kill_at_done)  # killed mid-ingest
    for m in models:
        st = fl.wait_applied(m, len(data[m]), timeout=60)
        assert st["applied"] == len(data[m]) and st["rejected"] == 0, st
    phase("applied")
    everything = fl.dump()
    phase("dumped")
    for m in models:
        assert len(everything[m]) == 1 + len(data[m]), m
    # The cluster of two still takes a checkpoint and answers.
    r = fl.ask(models[0], {"op": "checkpoint"})
    assert r["ok"] and r["seq"] > 0, r
