"""worthd's limits, load and access rules (schema/protocol.md, "Limits" and "auth").

Each limit is hit once: connections (--max-conns), idle connections (--idle-timeout), a client
that never reads its replies (--send-timeout), features per model (--max-features) and the memory
a model implies (--max-model-mb), the process's open-file limit (EMFILE), 1,000 concurrent
loopback connections, the socket directory check and the token's secrecy.  Every loop here is
bounded in count and in time; servers listen on a Unix socket in a temporary directory or on
127.0.0.1.  Run with Debian's /usr/bin/python3 (pytest 7.2).
"""
import os
import pwd
import resource
import selectors
import signal
import socket
import subprocess
import time

import pytest

from conftest import Client, Closed, daemon_path, is_closed_error

# worthd's cap on one connection's unsent replies (daemon/net/server.c, WRITE_HIGH)
WRITE_HIGH = 4 << 20
TOKEN = "limits-token-7f3a9c2e51"


def model_req(name="m", **kw):
    req = {"op": "model.create", "model": name, "dims": 2, "gamma": 0.9,
           "ranges": [[0, 1], [0, 1]], "features": [{"basis": "bias"}, {"basis": "raw"}],
           "estimators": [{"name": "td", "kind": "td", "alpha": 0.1}]}
    req.update(kw)
    return req


def poll_until(fn, timeout, what):
    """Calls fn every 20 ms (bounded) until it returns a true value; returns it."""
    deadline = time.monotonic() + timeout
    for _ in range(int(timeout / 0.02) + 10):
        v = fn()
        if v:
            return v
        if time.monotonic() > deadline:
            break
        time.sleep(0.02)
    raise AssertionError(f"{what}: not within {timeout} s")


def hello_works(d):
    return _hello(d.sock)


def wait_tcp(port, timeout=10):
    def try_connect():
        try:
            return Client(("127.0.0.1", port), timeout=5)
        except OSError:
            return None
    return poll_until(try_connect, timeout, f"127.0.0.1:{port} accepting")


# --max-conns --------------------------------------------------------------------------------------

def test_max_conns_refuses_one_more_with_its_code(daemon):
    d = daemon("--max-conns", 5)

    def one_more():
        """A served connection; None while worthd still counts a client that just left (the
        fixture's readiness probe)."""
        c = d.client()
        try:
            if c.call({"op": "hello"}).get("ok") is True:
                return c
        except (Closed, OSError):
            pass
        c.close()
        return None

    held = [poll_until(one_more, 5, "a connection under the limit") for _ in range(5)]
    extra = d.client()
    err = extra.expect_error(extra.recv(), "too_many_connections")
    assert "--max-conns" in err["message"], err
    extra.assert_closed()
    for c in held:  # the five are untouched
        c.assert_open()
    held.pop().close()
    # the freed slot is usable again once worthd has seen the close
    poll_until(lambda: hello_works(d), 5, "a connection after one was closed")
    assert "refused" in d.stderr and "--max-conns" in d.stderr, d.tail()


# --idle-timeout -----------------------------------------------------------------------------------

def test_idle_timeout_closes_silent_connections_only(daemon):
    d = daemon("--idle-timeout", 2)
    silent, busy = d.client(), d.client()
    t0 = time.monotonic()
    # busy sends a request every 0.3 s for 2.7 s: never idle for 2 s
    for i in range(9):
        assert busy.call({"op": "hello", "id": i})["id"] == i
        time.sleep(0.3)
    rep = silent.recv(timeout=10)
    waited = time.monotonic() - t0
    silent.expect_error(rep, "idle_timeout")
    silent.assert_closed()
    assert waited >= 1.9, f"closed after {waited:.2f} s, before --idle-timeout 2"
    busy.assert_open()
    # a client waiting on a durable reply is not idle: ingest keeps it busy past the timeout
    busy.ok(model_req())
    for i in range(3):
        assert busy.call({"op": "observe", "model": "m", "x": [0.5, 0.5], "r": 1,
                          "terminal": True})["seq"] == i + 1
        time.sleep(0.5)
    busy.assert_open()


def test_idle_timeout_off_by_default(daemon):
    d = daemon()
    c = d.client()
    time.sleep(1.0)  # longer than the 250 ms tick that enforces timeouts
    c.assert_open()


# slow readers ---------------------------------------------------------------------------------

def test_client_that_never_reads_is_cut_off(daemon):
    d = daemon("--send-timeout", 1)
    c = d.client()
    rid = "r" * 200
    line = ('{"op":"hello","id":"%s"}\n' % rid).encode()
    reply_len = len(b'{"ok":true,"id":"%s","server":"worthd","version":"0.1.0","protocol":1}\n'
                    % rid.encode())
    # 40,000 requests would owe ~11 MB of replies; the client reads none of them
    lines = 40000
    c.sock.setblocking(False)
    sent, blob = 0, line * lines
    deadline = time.monotonic() + 10
    for _ in range(100000):
        if sent == len(blob) or time.monotonic() > deadline:
            break
        try:
            sent += c.sock.send(blob[sent:sent + 65536])
        except BlockingIOError:
            time.sleep(0.01)  # worthd has stopped reading: its reply queue is full
        except OSError as e:
            assert is_closed_error(e), e
            break
    assert sent < len(blob), "worthd read every request of a client that reads nothing"
    poll_until(lambda: "slow_reader" in d.stderr, 10, "the slow_reader log line")
    # the connection is gone: what can still be read ends in EOF or a reset, and is bounded
    c.sock.setblocking(True)
    c.sock.settimeout(5)
    got = 0
    for _ in range(100000):
        try:
            chunk = c.sock.recv(1 << 20)
        except ConnectionResetError:
            break
        if not chunk:
            break
        got += len(chunk)
    assert got < lines * reply_len, (got, lines * reply_len)
    assert got <= WRITE_HIGH + (4 << 20), f"{got} bytes of replies: the queue was not bounded"
    assert d.proc.poll() is None
    assert hello_works(d)


def test_slow_reader_that_reads_at_last_gets_every_reply(daemon):
    # Lines read before the queue filled are held, not dropped: a client that reads before
    # --send-timeout gets a reply to every request, in order.
    d = daemon("--send-timeout", 30)
    c = d.client()
    n = 30000
    rid = "q" * 100
    blob = b"".join(b'{"op":"hello","id":"%s%d"}\n' % (rid.encode(), i) for i in range(n))
    c.sock.setblocking(False)
    sent = seen = 0
    blocked = False  # set once worthd stops reading: only then does the client start to read
    buf = b""
    deadline = time.monotonic() + 30
    for _ in range(1000000):
        if seen == n or time.monotonic() > deadline:
            break
        if sent < len(blob):
            try:
                sent += c.sock.send(blob[sent:sent + 65536])
            except BlockingIOError:
                blocked = True
        if not (blocked or sent == len(blob)):
            continue
        try:
            chunk = c.sock.recv(1 << 20)
            assert chunk, f"worthd closed the connection after {seen} replies"
            buf += chunk
        except BlockingIOError:
            time.sleep(0.002)
        *done, buf = buf.split(b"\n")
        for ln in done:
            assert b'"id":"%s%d"' % (rid.encode(), seen) in ln, (seen, ln[:200])
            seen += 1
    assert seen == n, f"{seen} of {n} replies"


# --max-features and --max-model-mb ----------------------------------------------------------

def test_features_and_model_memory_limits(daemon):
    d = daemon("--max-features", 100, "--max-model-mb", 64)
    c = d.client()
    rbf = [{"basis": "rbf", "centers": 11, "width": 0.1}]  # 121 features
    err = c.err(model_req("a", max_features=101), "too_large")
    assert "--max-features" in err["message"], err
    c.err(model_req("b", features=rbf), "too_large")  # the default max_features is now 100
    # 100 features: within both limits, and with an rls_td (P is 100 x 100)
    ok = c.ok(model_req("c", features=[{"basis": "rbf", "centers": 10, "width": 0.1}],
                        estimators=[{"name": "rls", "kind": "rls_td"}]))
    assert ok["features"] == 100
    # memory: a replay buffer of 100,000 x (2 x 100 + 1) doubles is ~153 MiB > 64 MiB
    err = c.err(model_req("d", features=[{"basis": "rbf", "centers": 10, "width": 0.1}],
                          estimators=[{"name": "rp", "kind": "replay", "capacity": 100000}]),
                "too_large")
    assert "MiB" in err["message"] and "64" in err["message"], err
    # Monte Carlo buffers of every source at full size: 16 x 100,000 x 5 doubles = 61 MiB,
    # which with the queue is over 64 MiB; with 2 sources it fits
    mc = [{"name": "mc", "kind": "mc"}]
    c.err(model_req("e", features=[{"basis": "bias"}, {"basis": "raw"}, {"basis": "raw"}],
                    estimators=mc), "too_large")
    c.ok(model_req("e", features=[{"basis": "bias"}, {"basis": "raw"}, {"basis": "raw"}],
                   estimators=mc, max_sources=2))
    models = sorted(m["model"] for m in c.ok({"op": "model.list"})["models"])
    assert models == ["c", "e"], models


def test_huge_model_refused_before_allocating(daemon):
    # Sixteen RLS-TD estimators over 8,192 features would hold 16 P matrices of 512 MiB
    # each; before the limit worthd built them on its loop thread (minutes) or aborted.
    d = daemon()
    c = d.client()
    ests = [{"name": f"r{i}", "kind": "rls_td"} for i in range(16)]
    req = model_req("big", features=[{"basis": "tiles", "tilings": 8, "tiles": 8,
                                      "size": 8192}], max_features=8192, estimators=ests)
    t0 = time.monotonic()
    err = c.err(req, "too_large", timeout=5)
    assert time.monotonic() - t0 < 2, "refusal took longer than sizing should"
    assert "2048 MiB" in err["message"], err
    c.assert_open()
    assert c.ok({"op": "model.list"})["models"] == []


# EMFILE -------------------------------------------------------------------------------------

def cpu_seconds(pid):
    with open(f"/proc/{pid}/stat") as f:
        fields = f.read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def test_emfile_sheds_connections_without_a_crash_or_spin(tmp_path, sockdir):
    sock = os.path.join(str(sockdir), "emfile.sock")
    err_path = tmp_path / "worthd.stderr"
    nofile = 64

    def low_limit():
        resource.setrlimit(resource.RLIMIT_NOFILE, (nofile, nofile))

    with open(err_path, "wb") as err:
        proc = subprocess.Popen([daemon_path(), "--socket", sock, "--db",
                                 str(tmp_path / "w.db")], stdin=subprocess.DEVNULL,
                                stdout=subprocess.DEVNULL, stderr=err, cwd=tmp_path,
                                preexec_fn=low_limit)
    clients = []
    try:
        poll_until(lambda: proc.poll() is not None or os.path.exists(sock), 10, "socket")
        assert proc.poll() is None, err_path.read_text()
        served = shed = 0
        for i in range(3 * nofile):  # more than the process may hold
            try:
                c = Client(sock, timeout=2)
            except OSError:
                shed += 1
                continue
            clients.append(c)
            try:
                rep = c.call({"op": "hello", "id": i}, timeout=2)
                assert rep["id"] == i, rep
                served += 1
            except (Closed, OSError):
                shed += 1
        assert shed > 0, "the open-file limit was never reached"
        assert served >= nofile // 4, (served, shed)
        assert proc.poll() is None, "worthd died at EMFILE:\n" + err_path.read_text()
        # holding every descriptor, worthd must not spin on accept
        before = cpu_seconds(proc.pid)
        extra = []
        for _ in range(20):
            try:
                extra.append(Client(sock, timeout=1))
            except OSError:
                pass
        time.sleep(1.0)
        spent = cpu_seconds(proc.pid) - before
        assert spent < 0.5, f"worthd used {spent:.2f} s of CPU in 1 s while at its fd limit"
        for c in clients + extra:
            c.close()
        clients = []
        # the descriptors come back: worthd answers again
        poll_until(lambda: (lambda c: c)(_hello(sock)), 10, "an answer after the clients left")
        # libuv accepts and closes what it cannot hold (its reserve descriptor) without
        # telling worthd, which warned at start that this would happen
        text = err_path.read_text()
        assert f"open-file limit {nofile}" in text and "EMFILE" in text, text[-2000:]
    finally:
        for c in clients:
            c.close()
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=10)
    assert proc.returncode == 0, (proc.returncode, err_path.read_text()[-2000:])


def _hello(sock):
    try:
        c = Client(sock, timeout=2)
    except OSError:
        return False
    try:
        return c.call({"op": "hello"}).get("ok") is True
    except (OSError, Closed):
        return False
    finally:
        c.close()


# 1,000 concurrent connections -------------------------------------------------------------

LOAD_CONNS = 1000
LOAD_SECONDS = 20


def test_thousand_concurrent_loopback_connections(daemon, free_port):
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    need = LOAD_CONNS + 200
    if soft < need:
        if hard != resource.RLIM_INFINITY and hard < need:
            pytest.fail(f"RLIMIT_NOFILE hard limit {hard} < {need}: cannot run the load test")
        resource.setrlimit(resource.RLIMIT_NOFILE, (need, hard))
    d = daemon("--listen", f"127.0.0.1:{free_port}", "--allow-tcp-without-token",
               "--max-conns", LOAD_CONNS + 24, "--unix-slots", 16)
    wait_tcp(free_port).close()
    u = d.client()
    u.ok(model_req())
    t0 = time.monotonic()
    sel = selectors.DefaultSelector()
    socks = []
    try:
        for i in range(LOAD_CONNS):
            s = socket.create_connection(("127.0.0.1", free_port), timeout=5)
            socks.append(s)
        # every connection is open at once; now each sends one durable observe
        for i, s in enumerate(socks):
            s.sendall(b'{"op":"observe","model":"m","x":[0.5,0.5],"r":1,"terminal":true,'
                      b'"id":%d}\n' % i)
            s.setblocking(False)
            sel.register(s, selectors.EVENT_READ, [i, b""])
        replies = {}
        deadline = t0 + LOAD_SECONDS
        for _ in range(1000000):
            if len(replies) == LOAD_CONNS or time.monotonic() > deadline:
                break
            for key, _ in sel.select(timeout=0.5):
                i, buf = key.data
                chunk = key.fileobj.recv(4096)
                assert chunk, f"connection {i} closed before its reply"
                buf += chunk
                key.data[1] = buf
                if b"\n" in buf:
                    replies[i] = buf.split(b"\n", 1)[0]
                    sel.unregister(key.fileobj)
        elapsed = time.monotonic() - t0
        assert len(replies) == LOAD_CONNS, \
            f"{len(replies)} of {LOAD_CONNS} served within {LOAD_SECONDS} s"
        seqs = set()
        for i, line in replies.items():
            assert b'"ok":true' in line and b'"id":%d,' % i in line, line
            seqs.add(int(line.split(b'"seq":')[1].split(b",")[0]))
        assert seqs == set(range(1, LOAD_CONNS + 1)), "seqs are not 1..N, each once"
        assert u.wait_applied("m", LOAD_CONNS)["received"] == LOAD_CONNS
        print(f"{LOAD_CONNS} concurrent loopback connections served in {elapsed:.2f} s")
    finally:
        sel.close()
        for s in socks:
            s.close()
    u.assert_open()


# access -------------------------------------------------------------------------------------

def test_socket_directory_writable_by_all_refused(daemon, sockdir):
    bad = os.path.join(str(sockdir), "open")
    os.mkdir(bad)
    try:
        os.chmod(bad, 0o777)
        d = daemon(sock=os.path.join(bad, "w.sock"), ready=False, expect_rc=None)
        rc = d.wait_exit(10)
        assert rc == 1, f"worthd in a world-writable directory: exit {rc}"
        assert "sticky" in d.stderr, d.tail()
        assert not os.path.exists(os.path.join(bad, "w.sock"))
        # the same with the sticky bit (like /tmp) is accepted
        os.chmod(bad, 0o1777)
        d = daemon(sock=os.path.join(bad, "w2.sock"))
        d.client().assert_open()
        d.shutdown()
    finally:
        for name in os.listdir(bad):
            os.unlink(os.path.join(bad, name))
        os.rmdir(bad)


def test_socket_directory_of_another_user_refused(daemon, sockdir):
    if os.geteuid() != 0:
        pytest.skip("needs root to give a directory to another user")
    other = pwd.getpwnam("nobody").pw_uid
    bad = os.path.join(str(sockdir), "theirs")
    os.mkdir(bad, 0o755)
    try:
        os.chown(bad, other, -1)
        d = daemon(sock=os.path.join(bad, "w.sock"), ready=False, expect_rc=None)
        rc = d.wait_exit(10)
        assert rc == 1, f"worthd in another user's directory: exit {rc}"
        assert "belongs to user" in d.stderr, d.tail()
    finally:
        os.rmdir(bad)


def test_token_never_logged_nor_stored(daemon, tmp_path, free_port):
    tok = tmp_path / "token"
    tok.write_text(TOKEN + "\n")
    tok.chmod(0o600)
    d = daemon("--listen", f"127.0.0.1:{free_port}", "--token-file", tok, "--log-level", "debug")
    c = wait_tcp(free_port)
    c.err({"op": "auth", "token": TOKEN[:-1] + "X"}, "unauthorized")  # wrong, same length
    c.assert_closed()
    c = Client(("127.0.0.1", free_port))
    c.err({"op": "hello"}, "unauthorized")  # before auth: refused, connection stays open
    assert c.call({"op": "auth", "token": TOKEN}) == {"ok": True}
    c.ok(model_req())
    c.ok({"op": "checkpoint", "model": "m", "label": "after-auth"})
    # the token sent where it does not belong is not echoed or logged either
    c.err({"op": "frobnicate", "token": TOKEN}, "unknown_op")
    c.close()
    d.shutdown()
    assert "authentication failed" in d.stderr  # the failure is logged, the token is not
    assert TOKEN not in d.stderr and TOKEN[:12] not in d.stderr
    for name in os.listdir(tmp_path):
        if name.startswith("worthd.db"):
            with open(tmp_path / name, "rb") as f:
                assert TOKEN.encode() not in f.read(), f"token stored in {name}"


# options ------------------------------------------------------------------------------------

def test_help_lists_every_limit(tmp_path):
    p = subprocess.run([daemon_path(), "--help"], capture_output=True, timeout=5, cwd=tmp_path)
    assert p.returncode == 0
    for opt in ["--max-conns", "--idle-timeout", "--send-timeout", "--max-features",
                "--max-model-mb", "--max-line", "--max-batch", "--queue", "--max-models",
                "--db-max-mb"]:
        assert opt.encode() in p.stdout, opt


@pytest.mark.parametrize("args", [["--max-conns", "0"], ["--idle-timeout", "-1"],
                                  ["--send-timeout", "0"], ["--max-features", "0"],
                                  ["--max-features", "2000000"], ["--max-model-mb", "x"]])
def test_bad_limit_values_refused(tmp_path, args):
    p = subprocess.run([daemon_path(), "--socket", str(tmp_path / "s"), *args],
                       capture_output=True, timeout=5, cwd=tmp_path)
    assert p.returncode == 2, p
    assert args[0].encode() in p.stderr, p.stderr
