"""worthd run like the services around it (tests only): systemd's notify protocol under a
listener of our own, journald's priority prefixes, the config file and SIGHUP, roles over TCP
and over the Unix socket's peer credentials, status, retention, model.purge, the metrics under
promtool, and the CLI's confirmations.  The contract is schema/protocol.md ("Operations") and
worthd(8).  Every wait is bounded in time and count; servers listen on temporary Unix sockets
and loopback only.  Outside validator: `promtool check metrics` (Debian's prometheus).
"""
import json
import os
import pty
import select
import shutil
import signal
import socket
import sqlite3
import subprocess
import tempfile
import time
import urllib.request

import pytest

from conftest import Client, daemon_path
import logdb

SPEC = {"op": "model.create", "model": "m", "dims": 2, "gamma": 0.9,
        "ranges": [[0, 1], [0, 1]], "features": [{"basis": "bias"}, {"basis": "raw"}],
        "estimators": [{"name": "td", "kind": "td", "alpha": 0.05},
                       {"name": "rls", "kind": "rls_td", "forget": 1.0}]}
STATES = [[0.1, 0.2], [0.5, 0.5], [0.9, 0.3]]


def batch(n, k, t0=1764633600.0):
    """n deterministic transitions, the k-th batch (each state depends on its seq only)."""
    out = []
    for i in range(n):
        s = k * n + i
        x = [(s * 0.37) % 1.0, (s * 0.71) % 1.0]
        xn = [((s + 1) * 0.37) % 1.0, ((s + 1) * 0.71) % 1.0]
        out.append({"x": x, "r": x[0] - 0.5 * x[1], "x_next": xn, "t": t0 + s})
    return out


def feed(c, batches, n=500, first=0):
    for k in range(first, first + batches):
        c.ok({"op": "observe", "model": "m", "batch": batch(n, k)})


def values(c):
    """The estimators' values at STATES: equal lists mean bit-identical weights (17 digits)."""
    return [c.ok({"op": "value", "model": "m", "x": x})["estimators"] for x in STATES]


def cli(*args, sock, stdin=None, timeout=20):
    exe = os.environ.get("WORTH_CLI")
    assert exe, "set WORTH_CLI"
    return subprocess.run([exe, "--socket", str(sock), *map(str, args)], capture_output=True,
                          text=True, timeout=timeout, input=stdin)


# systemd's notify protocol ------------------------------------------------------------------

class Notify:
    """A datagram socket standing in for systemd's $NOTIFY_SOCKET; keeps what arrives."""

    def __init__(self, path):
        self.path = path
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self.sock.bind(path)
        self.msgs = []  # (monotonic time, text)

    def drain(self, seconds):
        end = time.monotonic() + seconds
        for _ in range(100000):
            left = end - time.monotonic()
            if left <= 0:
                return
            r, _, _ = select.select([self.sock], [], [], left)
            if r:
                self.msgs.append((time.monotonic(), self.sock.recv(4096).decode()))

    def wait_for(self, needle, seconds):
        end = time.monotonic() + seconds
        for _ in range(100000):
            if any(needle in m for _, m in self.msgs):
                return
            left = end - time.monotonic()
            assert left > 0, f"no {needle!r} within {seconds} s: {self.msgs[-20:]}"
            self.drain(min(left, 0.05))

    def close(self):
        self.sock.close()


def test_notify_ready_after_recovery_status_watchdog_stopping(daemon, tmp_path, sockdir):
    d = daemon("--checkpoint-every", "0")
    c = d.client()
    c.ok(SPEC)
    # enough log that recovery takes a while and reports progress on the way
    recs = []
    for s in range(150000):
        x = [(s * 0.37) % 1.0, (s * 0.71) % 1.0]
        recs += x + [x[0] - x[1], ((s + 1) * 0.37) % 1.0, ((s + 1) * 0.71) % 1.0, 0.0]
    import struct
    for k in range(0, 150000, 50000):
        payload = struct.pack(f"<{50000 * 6}d", *recs[k * 6:(k + 50000) * 6])
        c.send({"op": "observe.bulk", "model": "m", "count": 50000})
        c.send_raw(payload)
        assert c.recv(30)["ok"] is True
    c.wait_applied("m", 150000, timeout=60)
    want = values(c)
    d.kill9()  # no shutdown checkpoint: recovery replays all 150000
    n = Notify(os.path.join(str(sockdir), "notify"))
    try:
        d2 = daemon("--checkpoint-every", "0", sock=d.sock, ready=False,
                    env={"NOTIFY_SOCKET": n.path, "WATCHDOG_USEC": "400000"})
        n.wait_for("READY=1", 60)
        t_ready = next(t for t, m in n.msgs if "READY=1" in m)
        # READY only after recovery: the socket serves and every transition is learnt
        c2 = d2.client()
        assert c2.stats("m")["applied"] == 150000
        assert values(c2) == want
        before = [m for t, m in n.msgs if t <= t_ready]
        status = [m for m in before if "STATUS=recovering" in m]
        assert status, f"no STATUS during recovery: {before}"
        assert any("recovering m (model 1 of 1), " in m for m in status), status
        assert not any("READY=1" in m for t, m in n.msgs if t < t_ready)
        assert "STATUS=serving 1 model" in next(m for t, m in n.msgs if t == t_ready)
        # the watchdog: every half of WATCHDOG_USEC from the loop
        n.drain(2.0)
        pings = [t for t, m in n.msgs if t > t_ready and m == "WATCHDOG=1"]
        span = pings[-1] - pings[0]
        rate = (len(pings) - 1) / span
        print(f"{len(pings)} WATCHDOG=1 in {span:.2f} s after READY: {rate:.2f}/s (want 5/s)")
        assert 3.5 <= rate <= 6.5, (len(pings), span)
        # SIGTERM: STOPPING=1 first
        d2.proc.send_signal(signal.SIGTERM)
        n.wait_for("STOPPING=1", 10)
        assert d2.wait_exit(20) == 0, d2.tail()
        stop = next(m for _, m in n.msgs if "STOPPING=1" in m)
        assert "STATUS=stopping (SIGTERM)" in stop, stop
    finally:
        n.close()


def test_sighup_says_reloading_then_ready(daemon, sockdir, tmp_path):
    n = Notify(os.path.join(str(sockdir), "notify"))
    try:
        d = daemon(env={"NOTIFY_SOCKET": n.path})
        n.wait_for("READY=1", 10)
        n.msgs.clear()
        d.proc.send_signal(signal.SIGHUP)
        n.wait_for("READY=1", 10)
        texts = [m for _, m in n.msgs]
        assert texts[0].startswith("RELOADING=1"), texts
    finally:
        n.close()


def test_journald_priority_prefixes(tmp_path, sockdir):
    """With $JOURNAL_STREAM naming stderr, each line starts with <N> (sd-daemon(3))."""
    errp = tmp_path / "stderr"
    sock = os.path.join(str(sockdir), "j.sock")
    with open(errp, "wb") as err:
        st = os.fstat(err.fileno())
        env = {**os.environ, "JOURNAL_STREAM": f"{st.st_dev}:{st.st_ino}"}
        p = subprocess.Popen([daemon_path(), "--socket", str(tmp_path / "no" / "j.sock"),
                              "--db", str(tmp_path / "j.db"), "--max-line", "300"],
                             stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=err,
                             env=env, cwd=tmp_path)
        assert p.wait(timeout=20) == 1  # no socket directory: an error line, then exit 1
    lines = errp.read_text().splitlines()
    assert lines and all(l[:3] in ("<3>", "<4>", "<6>", "<7>") for l in lines), lines
    assert any(l.startswith("<6>worthd ") for l in lines), lines   # info
    assert any(l.startswith("<3>socket directory") for l in lines), lines  # the failed listen
    # without the variable (or when it names another file): the usual time stamps
    with open(errp, "wb") as err:
        env = {**os.environ, "JOURNAL_STREAM": "1:1"}
        p = subprocess.Popen([daemon_path(), "--socket", sock, "--db", str(tmp_path / "j.db"),
                              "--max-line", "x"], stderr=err, env=env, cwd=tmp_path)
        assert p.wait(timeout=10) == 2
    p = subprocess.run([daemon_path(), "--socket", str(tmp_path / "no" / "j.sock"),
                        "--db", str(tmp_path / "j.db")],
                       capture_output=True, text=True, timeout=20, cwd=tmp_path,
                       env={**os.environ, "JOURNAL_STREAM": "1:1"})
    assert p.returncode == 1
    assert all(l[:2] == "20" for l in p.stderr.splitlines()), p.stderr


# the config file ----------------------------------------------------------------------------

def check_config(tmp_path, *args, env=None):
    return subprocess.run([daemon_path(), *map(str, args), "--check-config"],
                          capture_output=True, text=True, timeout=10, cwd=tmp_path,
                          env={**os.environ, **(env or {})})


def effective(out):
    return dict(l.split(" = ", 1) if " = " in l else (l.rstrip(" ="), "")
                for l in out.splitlines() if l and not l.startswith("#"))


# a value of every key other than its default (and valid together)
EVERY_KEY = {
    "socket": "{d}/w.sock", "db": "{d}/w.db", "backup-dir": "{d}/bk", "file-mode": "0640",
    "sync": "normal", "checkpoint-every": "5000", "keep": "3", "db-max-mb": "512",
    "retain-days": "90", "retain-transitions": "1000000", "retain-every": "600",
    "listen": "127.0.0.1:7777", "allow-tcp-without-token": "true",
    "metrics": "127.0.0.1:9464", "token-file": "{d}/tokens", "peer-role": "uid=65534:read",
    "unix-role": "write", "auth-timeout": "5", "max-unauthenticated": "8", "unix-slots": "4",
    "log-level": "debug", "max-line": "65536", "max-batch": "1024", "queue": "4096",
    "max-models": "16", "max-features": "1024", "max-model-mb": "64", "max-conns": "100",
    "idle-timeout": "60", "send-timeout": "5", "max-buffer-mb": "64", "max-query-work": "8",
}


def test_config_every_key(tmp_path):
    (tmp_path / "tokens").write_text("read dashboard-token-1 grafana\nadmin admin-token-22\n")
    os.chmod(tmp_path / "tokens", 0o600)
    defaults = effective(check_config(tmp_path, "--config", "/dev/null").stdout)
    keys = [l.split(" =")[0].lstrip("#") for l in subprocess.run(
        [daemon_path(), "--print-config"], capture_output=True, text=True,
        timeout=10).stdout.splitlines() if l.startswith("#") and " =" in l and l[1:2] != " "]
    assert sorted(keys) == sorted(EVERY_KEY), "a key of --print-config has no case here"
    conf = tmp_path / "w.conf"
    conf.write_text("# every key\n\n" + "".join(
        f"{k} = {v.format(d=tmp_path)}\n" for k, v in EVERY_KEY.items()))
    p = check_config(tmp_path, "--config", conf)
    assert p.returncode == 0, p.stderr
    got = effective(p.stdout)
    for k, v in EVERY_KEY.items():
        assert got[k] == v.format(d=tmp_path), (k, got[k])
        assert got[k] != defaults[k], f"{k}: the test's value is the default"


@pytest.mark.parametrize("text,line,needle", [
    ("max-line = 1000\nfrobnicate = 1\n", 2, 'unknown key "frobnicate"'),
    ("\n# c\nmax-line = x\n", 3, "max-line must be an integer 256..1073741824"),
    ("sync = sometimes\n", 1, "sync must be full or normal"),
    ("log-level = loud\n", 1, "log-level must be error, warn, info or debug"),
    ("keep = 3\nkeep = 4\n", 2, '"keep" is given twice'),
    ("max line 7\n", 1, 'expected "key = value"'),
    ("help = 1\n", 1, "a command-line option only"),
])
def test_config_bad_line_exits_78(tmp_path, daemon, text, line, needle):
    conf = tmp_path / "bad.conf"
    conf.write_text(text)
    p = check_config(tmp_path, "--config", conf)
    assert p.returncode == 78, p
    assert f"{conf}:{line}: " in p.stderr and needle in p.stderr, p.stderr
    # worthd itself refuses to start the same way
    d = daemon("--config", conf, expect_rc=78, ready=False)
    assert d.wait_exit(10) == 78
    assert f"{conf}:{line}: " in d.stderr, d.tail()


def test_config_missing_file_and_cross_checks(tmp_path):
    p = check_config(tmp_path, "--config", tmp_path / "nope.conf")
    assert p.returncode == 78 and "cannot read the config file" in p.stderr, p
    conf = tmp_path / "c.conf"
    conf.write_text("listen = 127.0.0.1:7000\n")  # TCP without a token, from the file: 78
    p = subprocess.run([daemon_path(), "--config", conf, "--socket", tmp_path / "s"],
                       capture_output=True, text=True, timeout=10, cwd=tmp_path)
    assert p.returncode == 78 and "refusing --listen" in p.stderr, p
    # the same from the command line keeps its old status (1)
    p = subprocess.run([daemon_path(), "--listen", "127.0.0.1:7000", "--socket", tmp_path / "s"],
                       capture_output=True, text=True, timeout=10, cwd=tmp_path)
    assert p.returncode == 1, p


def test_config_flags_override_file(tmp_path):
    conf = tmp_path / "c.conf"
    conf.write_text("log-level = debug\nmax-batch = 100\nqueue = 200\nsocket = /x/file.sock\n")
    got = effective(check_config(tmp_path, "--config", conf, "--log-level", "warn",
                                 "--socket", tmp_path / "flag.sock").stdout)
    assert got["log-level"] == "warn" and got["socket"] == str(tmp_path / "flag.sock"), got
    assert got["max-batch"] == "100" and got["queue"] == "200", got


def test_systemd_directories_give_defaults(tmp_path):
    (tmp_path / "cred").mkdir()
    (tmp_path / "cred" / "token").write_text("a-credential-token\n")
    got = effective(check_config(tmp_path, "--config", "/dev/null", env={
        "STATE_DIRECTORY": f"{tmp_path}/state:{tmp_path}/other",
        "RUNTIME_DIRECTORY": f"{tmp_path}/run",
        "CREDENTIALS_DIRECTORY": f"{tmp_path}/cred"}).stdout)
    assert got["db"] == f"{tmp_path}/state/worthd.db", got
    assert got["socket"] == f"{tmp_path}/run/worthd.sock", got
    assert got["token-file"] == f"{tmp_path}/cred/token", got


def test_sighup_reloads_live_keys_and_names_the_rest(daemon, tmp_path):
    conf = tmp_path / "live.conf"
    conf.write_text("log-level = info\nidle-timeout = 0\nmax-line = 1048576\n")
    d = daemon("--config", conf)
    c = d.client()
    c.ok({"op": "hello"})
    conf.write_text("log-level = debug\nidle-timeout = 1\nmax-line = 2048\n")
    d.proc.send_signal(signal.SIGHUP)
    for _ in range(200):
        if "configuration reloaded" in d.stderr:
            break
        time.sleep(0.02)
    err = d.stderr
    assert "SIGHUP: idle-timeout 0 -> 1" in err, err
    assert "SIGHUP: log-level info -> debug" in err, err
    assert "max-line changed (1048576 -> 2048) but needs a restart" in err, err
    # the new idle timeout applies to connections now
    c2 = d.client()
    c2.ok({"op": "hello"})
    e = c2.recv(5)
    assert e["error"]["code"] == "idle_timeout", e
    # a faulty file changes nothing
    conf.write_text("idle-timeout = soon\n")
    d.proc.send_signal(signal.SIGHUP)
    for _ in range(200):
        if "was not reloaded" in d.stderr:
            break
        time.sleep(0.02)
    assert f"{conf}:1: idle-timeout must be an integer" in d.stderr, d.tail()
    assert d.client().call({"op": "hello"})["ok"] is True


# roles --------------------------------------------------------------------------------------

TOKENS = "# role token name\nread read-token-0001 dashboard\nwrite write-token-001 gateway\n" \
         "admin admin-token-001\n"


def tcp_client(d, port, token):
    c = d.client(("127.0.0.1", port))
    assert c.call({"op": "auth", "token": token})["ok"] is True
    return c


def test_roles_over_tcp(daemon, tmp_path, free_port):
    tok = tmp_path / "tokens"
    tok.write_text(TOKENS)
    os.chmod(tok, 0o600)
    d = daemon("--listen", f"127.0.0.1:{free_port}", "--token-file", tok)
    admin = tcp_client(d, free_port, "admin-token-001")
    admin.ok(SPEC)
    cp = admin.ok({"op": "checkpoint", "model": "m"})["checkpoint"]
    read = tcp_client(d, free_port, "read-token-0001")
    write = tcp_client(d, free_port, "write-token-001")
    obs = {"op": "observe", "model": "m", "x": [0.1, 0.2], "r": 1, "x_next": [0.2, 0.3]}
    # read: queries yes, observe and rollback no
    read.ok({"op": "stats", "model": "m"})
    read.ok({"op": "value", "model": "m", "x": [0.1, 0.1]})
    read.ok({"op": "events", "model": "m"})
    e = read.err(obs, "forbidden")
    assert "needs the role write" in e["message"] and "dashboard" in e["message"], e
    read.err({"op": "rollback", "model": "m", "checkpoint": cp}, "forbidden")
    read.err({"op": "model.drop", "model": "m"}, "forbidden")
    read.assert_open()  # forbidden leaves the connection open
    # write: observe yes, rollback, drop, backup, train, checkpoint no
    write.ok(obs)
    for req in ({"op": "rollback", "model": "m", "checkpoint": cp},
                {"op": "model.drop", "model": "m"}, {"op": "backup"},
                {"op": "checkpoint", "model": "m"}, {"op": "model.purge", "model": "m"},
                {"op": "retention", "run": True}):
        write.err(req, "forbidden")
    # admin: rollback, recorded with who asked
    admin.ok({"op": "rollback", "model": "m", "checkpoint": cp})
    audit = [e for e in admin.ok({"op": "events"})["events"] if e["kind"] == "audit"]
    assert audit and audit[-1]["detail"]["op"] == "rollback", audit
    assert audit[-1]["detail"]["by"].startswith("token on line 4"), audit
    assert audit[-1]["detail"]["role"] == "admin"
    assert "rollback of m asked by token on line 4" in d.stderr
    for t in ("read-token-0001", "write-token-001", "admin-token-001"):
        assert t not in d.stderr  # tokens are never logged
    # status says who a connection is
    assert read.ok({"op": "status"})["you"]["role"] == "read"
    # SIGHUP reads the token file again: a token taken out no longer authenticates, a new
    # one does, and connections already in keep the role they had
    tok.write_text("admin admin-token-002 ops\n")
    d.proc.send_signal(signal.SIGHUP)
    for _ in range(250):
        if "1 token" in d.stderr and "configuration reloaded" in d.stderr:
            break
        time.sleep(0.02)
    assert "configuration reloaded" in d.stderr, d.tail()
    late = d.client(("127.0.0.1", free_port))
    late.err({"op": "auth", "token": "read-token-0001"}, "unauthorized")
    assert tcp_client(d, free_port, "admin-token-002").ok({"op": "status"})["you"]["role"] == \
        "admin"
    read.ok({"op": "stats", "model": "m"})


def as_user_client(sock, reqs, uid=65534):
    """Sends reqs over the Unix socket from a process of uid; returns the replies."""
    code = ("import json,socket,sys\n"
            "s=socket.socket(socket.AF_UNIX); s.settimeout(10); s.connect(sys.argv[1])\n"
            "f=s.makefile('rwb')\n"
            "for q in json.loads(sys.argv[2]):\n"
            "    f.write((json.dumps(q)+'\\n').encode()); f.flush()\n"
            "    print(f.readline().decode().strip(), flush=True)\n")
    p = subprocess.run(["/usr/bin/python3", "-c", code, sock, json.dumps(reqs)],
                       capture_output=True, text=True, timeout=20, user=uid, group=uid,
                       extra_groups=[])
    assert p.returncode == 0, p.stderr
    return [json.loads(l) for l in p.stdout.splitlines()]


@pytest.mark.skipif(os.geteuid() != 0, reason="needs root to connect as another uid")
def test_roles_by_peer_credentials(daemon, tmp_path):
    # a socket another uid can reach: a directory of root's, 0755, the socket's group nogroup
    d0 = tempfile.mkdtemp(prefix="worth-peer-")
    os.chmod(d0, 0o755)
    sock = os.path.join(d0, "w.sock")
    try:
        d = daemon("--peer-role", "uid=65534:read", "--unix-role", "admin", sock=sock,
                   db=tmp_path / "p.db")
        os.chown(sock, -1, 65534)
        c = d.client()
        c.ok(SPEC)
        cp = c.ok({"op": "checkpoint", "model": "m"})["checkpoint"]
        obs = {"op": "observe", "model": "m", "x": [0.1, 0.2], "r": 1, "x_next": [0.2, 0.3]}
        reps = as_user_client(sock, [{"op": "stats", "model": "m"}, obs,
                                     {"op": "rollback", "model": "m", "checkpoint": cp},
                                     {"op": "status"}])
        assert reps[0]["ok"] is True, reps
        assert reps[1]["error"]["code"] == "forbidden", reps
        assert reps[2]["error"]["code"] == "forbidden", reps
        assert reps[3]["you"]["role"] == "read" and reps[3]["you"]["who"].startswith("uid 65534")
        assert c.stats("m")["received"] == 0  # nothing of the refused observe
        # a group rule (the peer's primary group) and the fallback role
        d.shutdown()
        d = daemon("--peer-role", "gid=65534:write", "--unix-role", "read", sock=sock,
                   db=tmp_path / "p.db")
        os.chown(sock, -1, 65534)
        reps = as_user_client(sock, [obs, {"op": "checkpoint", "model": "m"}])
        assert reps[0]["ok"] is True and reps[1]["error"]["code"] == "forbidden", reps
        d.shutdown()
        d = daemon("--unix-role", "read", sock=sock, db=tmp_path / "p.db")
        os.chown(sock, -1, 65534)
        reps = as_user_client(sock, [obs])
        assert reps[0]["error"]["code"] == "forbidden", reps
        # root is admin whatever the rules say
        d.client().ok({"op": "checkpoint", "model": "m"})
    finally:
        shutil.rmtree(d0, ignore_errors=True)


def test_bad_token_file_and_peer_rules_refused(tmp_path):
    tok = tmp_path / "t"
    tok.write_text("read short\n")
    p = check_config(tmp_path, "--config", "/dev/null", "--token-file", tok)
    assert p.returncode == 78 and f"--token-file {tok}:1: a token must be 8..1000" in p.stderr
    tok.write_text("reader tok-tok-tok-tok\n")  # not a role: the whole file is one legacy token
    assert check_config(tmp_path, "--config", "/dev/null", "--token-file", tok).returncode == 0
    tok.write_text("read abcdefgh1\nwrite abcdefgh1\n")
    p = check_config(tmp_path, "--config", "/dev/null", "--token-file", tok)
    assert p.returncode == 78 and "the same token as token on line 1" in p.stderr, p.stderr
    for rule in ("uid=x:read", "user=no-such-user-here:read", "uid=5:boss", "host=a:read"):
        p = check_config(tmp_path, "--config", "/dev/null", "--peer-role", rule)
        assert p.returncode == 78 and "--peer-role" in p.stderr, (rule, p.stderr)


# status, retention, purge -------------------------------------------------------------------

def test_status(daemon, tmp_path):
    d = daemon("--db-max-mb", "64")
    c = d.client()
    c.ok(SPEC)
    feed(c, 2)
    c.wait_applied("m", 1000)
    st = c.ok({"op": "status", "id": 7})
    assert st["id"] == 7 and st["server"] == "worthd" and st["protocol"] == 1
    assert 0 <= st["uptime_s"] < 60 and abs(st["now"] - time.time()) < 5
    db = st["database"]
    assert db["path"] == os.path.realpath(d.db) and db["bytes"] > 0
    assert db["limit_bytes"] == 64 << 20 and 0 < db["used"] < 1 and db["disk_free_bytes"] > 0
    assert db["auto_vacuum"] == "incremental"
    (m,) = st["models"]
    assert m["model"] == "m" and m["state"] == "ok" and m["received"] == 1000
    assert m["health"] == {"td": "ok", "rls": "ok"} and m["healthy"] == 2
    assert 0 <= m["wall_age_s"] < 30
    assert m["last_logged"]["seq"] == 1000 and m["last_logged"]["t"] == 1764633600.0 + 999
    assert abs(m["last_logged"]["plant_age_s"] - (time.time() - 1764634599)) < 5
    c.err({"op": "status", "model": "m"}, "bad_request")
    out = cli("status", sock=d.sock)
    assert out.returncode == 0, out.stderr
    assert "worthd 0.1.0" in out.stdout and "of its limit 64.0 MiB" in out.stdout, out.stdout
    assert "m  " in out.stdout and "2/2" in out.stdout, out.stdout


def row_count(db, table, model="m"):
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        if table == "transitions":  # the log: rows and blocks (logdb.py)
            return sum(logdb.count(con, mid) for (mid,) in con.execute(
                "SELECT id FROM models WHERE name = ?", (model,)).fetchall())
        return con.execute(f"SELECT count(*) FROM {table} WHERE model IN "
                           "(SELECT id FROM models WHERE name = ?)", (model,)).fetchone()[0]
    finally:
        con.close()


def file_size(db):
    return os.path.getsize(db) + (os.path.getsize(db + "-wal") if os.path.exists(db + "-wal")
                                  else 0)


def test_retention_keeps_every_rollback_and_recovery_bit_identical(daemon, tmp_path):
    db = str(tmp_path / "r.db")
    d = daemon("--checkpoint-every", "2000", "--keep", "100", db=db)
    c = d.client()
    c.ok(SPEC)
    feed(c, 20)  # 10000 transitions, checkpoints at 2000, 4000, ... 10000
    c.wait_applied("m", 10000)
    c.ok({"op": "checkpoint", "model": "m", "label": "mid"})
    feed(c, 4, first=20)  # 12000
    c.wait_applied("m", 12000)
    d.shutdown()
    ref = str(tmp_path / "ref.db")
    shutil.copy(db, ref)  # the same database without retention, for reference
    size_before = file_size(db)

    d = d.restart()
    c = d.client()
    before = values(c)
    r = c.ok({"op": "retention", "model": "m", "transitions": 3000, "run": True})
    (pol,) = r["models"]
    # the newest 3000 (seq 9001..12000) are in the window; the anchor is the checkpoint at
    # 8000, so the log is kept from 8001; the checkpoints before it go
    assert pol["log_floor"] == 8000 and pol["transitions"] == 3000 and pol["own"]["transitions"]
    assert pol["deleted"]["transitions"] == 8000, pol
    assert r["bytes_freed"] > 0, r
    kept = c.ok({"op": "checkpoints", "model": "m"})["checkpoints"]
    assert min(k["seq"] for k in kept) == 8000, kept
    assert values(c) == before  # the live weights are not touched
    audit = [e for e in c.ok({"op": "events"})["events"] if e["kind"] == "audit"]
    assert audit[-1]["detail"]["op"] == "retention"
    d.shutdown()
    assert row_count(db, "transitions") == 12000 - 8000
    size_after = file_size(db)
    print(f"retention: database {size_before} -> {size_after} bytes")
    assert size_after < size_before * 0.7, (size_before, size_after)

    # recovery: the same weights, bit for bit
    d = d.restart()
    c = d.client()
    assert values(c) == before
    d.shutdown()
    # rollback to every kept checkpoint: the same weights as the same rollback without retention
    work, wref = str(tmp_path / "w.db"), str(tmp_path / "wref.db")
    for k in kept:
        for src, dst in ((db, work), (ref, wref)):
            shutil.copy(src, dst)
        got = []
        for path in (work, wref):
            dd = daemon(db=path)
            cc = dd.client()
            rep = cc.ok({"op": "rollback", "model": "m", "checkpoint": k["checkpoint"],
                         "replay": k["seq"] % 4000 == 0})
            got.append((values(cc), rep["undone"], rep["replayed"]))
            dd.shutdown()
        assert got[0] == got[1], (k, got)
    # a run again deletes nothing more; the policy stays the model's
    d = daemon(db=db)
    c = d.client()
    r = c.ok({"op": "retention", "model": "m", "run": True})
    assert r["models"][0]["deleted"]["transitions"] == 0 and r["models"][0]["log_floor"] == 8000
    c.ok({"op": "retention", "model": "m", "transitions": None})
    assert c.ok({"op": "retention"})["models"][0]["own"]["transitions"] is False
    c.err({"op": "retention", "days": 3}, "bad_request")
    c.err({"op": "retention", "model": "m", "days": -1}, "bad_param")
    c.err({"op": "retention", "model": "m", "transitions": 1.5}, "bad_param")
    c.err({"op": "retention", "model": "m", "keep": 1}, "bad_request")


def test_retention_by_days_and_daemon_default(daemon, tmp_path):
    db = str(tmp_path / "d.db")
    d = daemon("--checkpoint-every", "1000", "--retain-days", "0.00002", db=db)  # 1.7 s
    c = d.client()
    c.ok(SPEC)
    feed(c, 4)  # checkpoints at 1000 .. 2000
    c.wait_applied("m", 2000)
    time.sleep(2.0)
    feed(c, 2, first=4)  # 3000, its checkpoint is new
    c.wait_applied("m", 3000)
    before = values(c)
    r = c.ok({"op": "retention", "run": True})
    (pol,) = r["models"]
    assert pol["own"]["days"] is False and pol["days"] == 0.00002
    assert pol["log_floor"] == 2000 and pol["deleted"]["transitions"] == 2000, pol
    d.shutdown()
    d = d.restart()
    assert values(d.client()) == before


def test_recovery_refuses_to_replay_below_the_floor(daemon, tmp_path):
    db = str(tmp_path / "f.db")
    d = daemon("--checkpoint-every", "1000", db=db)
    c = d.client()
    c.ok(SPEC)
    feed(c, 6)
    c.wait_applied("m", 3000)
    c.ok({"op": "retention", "model": "m", "transitions": 500, "run": True})
    d.shutdown()
    # every checkpoint left unloadable: a replay from nothing would miss deleted rows
    con = sqlite3.connect(db)
    con.execute("UPDATE checkpoints SET state = x'00'")
    con.commit()
    con.close()
    d = d.restart()
    c = d.client()
    (m,) = c.ok({"op": "model.list"})["models"]
    assert m["state"] == "damaged" and "retention deleted the log" in m["reason"], m


def test_drop_purge_removes_rows_keeps_events(daemon, tmp_path):
    db = str(tmp_path / "p.db")
    d = daemon("--checkpoint-every", "1000", db=db)
    c = d.client()
    c.ok(SPEC)
    feed(c, 6)
    c.wait_applied("m", 3000)
    c.ok({"op": "model.drop", "model": "m"})  # an older generation, dropped without purge
    c.ok(SPEC)
    feed(c, 4)
    c.wait_applied("m", 2000)
    size_before = file_size(db)
    r = c.ok({"op": "model.purge", "model": "m"})
    assert r["purged"]["models"] == 2, r
    assert r["purged"]["rows"]["transitions"] == 5000 and r["purged"]["rows"]["checkpoints"] >= 5
    assert r["bytes_freed"] > 0
    again = c.ok({"op": "model.purge", "model": "m"})  # purging again finds nothing more
    assert sum(again["purged"]["rows"].values()) == 0, again
    c.err({"op": "model.purge", "model": "never-was"}, "no_such_model")
    c.err({"op": "stats", "model": "m"}, "no_such_model")
    d.shutdown()
    for t in ("transitions", "checkpoints", "trainings", "retention"):
        assert row_count(db, t) == 0, t
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    kinds = [k for (k,) in con.execute(
        "SELECT kind FROM events WHERE model IN (SELECT id FROM models WHERE name = 'm')")]
    con.close()
    assert "purge" in kinds and "create" in kinds, kinds
    assert file_size(db) < size_before * 0.6, (size_before, file_size(db))
    # a new model of the name starts afresh
    d = d.restart()
    c = d.client()
    c.ok(SPEC)
    assert c.stats("m")["received"] == 0


def test_cli_drop_and_rollback_ask_on_a_terminal(daemon, tmp_path):
    d = daemon()
    c = d.client()
    c.ok(SPEC)
    cp = c.ok({"op": "checkpoint", "model": "m"})["checkpoint"]

    def on_tty(args, answer):
        pid, fd = pty.fork()
        if pid == 0:
            os.execv(os.environ["WORTH_CLI"], ["worth", "--socket", d.sock, *args])
        out = b""
        end = time.monotonic() + 10
        sent = False
        for _ in range(10000):
            if time.monotonic() > end:
                break
            r, _, _ = select.select([fd], [], [], 0.1)
            if r:
                try:
                    chunk = os.read(fd, 4096)
                except OSError:
                    break
                if not chunk:
                    break
                out += chunk
            if not sent and b"[y/N]" in out:
                os.write(fd, answer.encode() + b"\n")
                sent = True
        _, status = os.waitpid(pid, 0)
        os.close(fd)
        return os.waitstatus_to_exitcode(status), out.decode(errors="replace")

    rc, out = on_tty(["rollback", "m", str(cp)], "n")
    assert rc == 2 and "roll m back to checkpoint" in out and "not confirmed" in out, out
    rc, out = on_tty(["drop", "m"], "no")
    assert rc == 2 and "not confirmed" in out, out
    assert c.stats("m")["received"] == 0  # still there
    rc, out = on_tty(["rollback", "m", str(cp)], "y")
    assert rc == 0 and "rolled back m" in out, out
    rc, out = on_tty(["drop", "m", "--purge"], "yes")
    assert rc == 0 and "dropped and purged model m" in out, out
    # not a terminal (a script) or --yes: no question
    c.ok(SPEC)
    p = cli("drop", "m", sock=d.sock)
    assert p.returncode == 0 and "dropped model m" in p.stdout, p


# metrics ------------------------------------------------------------------------------------

def test_metrics_pass_promtool(daemon, free_port):
    promtool = shutil.which("promtool")
    assert promtool, "promtool (Debian's prometheus) is not installed: tests/deps installs it"
    d = daemon("--metrics", f"127.0.0.1:{free_port}")
    c = d.client()
    c.ok(SPEC)
    c.ok({"op": "observe", "model": "m", "x": [2.0, 0.5], "r": 1, "x_next": [0.2, 0.3],
          "t": 1764633600})  # one component clipped
    c.wait_applied("m", 1)
    c.err({"op": "value", "model": "m", "x": [1]}, "bad_dimension")
    c.err({"op": "frob"}, "unknown_op")
    body = urllib.request.urlopen(f"http://127.0.0.1:{free_port}/metrics", timeout=10).read()
    p = subprocess.run([promtool, "check", "metrics"], input=body, capture_output=True,
                       timeout=30)
    print(f"promtool check metrics: rc {p.returncode}, {p.stdout!r} {p.stderr!r}")
    assert p.returncode == 0 and not p.stdout.strip() and not p.stderr.strip(), p
    text = body.decode()
    assert 'worth_build_info{version="0.1.0",protocol="1"} 1' in text
    assert "process_start_time_seconds " in text
    assert 'worth_requests_total{op="model.create"} 1' in text
    assert 'worth_errors_total{op="value",code="bad_dimension"} 1' in text
    assert 'worth_errors_total{op="none",code="unknown_op"} 1' in text
    assert 'worth_connections{transport="unix"} 1' in text
    assert 'worth_inputs_clipped_total{model="m"} 1' in text
    assert 'worth_last_transition_timestamp_seconds{model="m"} ' in text
    assert 'worth_database_bytes{file="db"} ' in text
