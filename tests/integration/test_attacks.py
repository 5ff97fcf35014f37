"""What an adversarial pass over worthd found, each as a test that failed before the fix.

The numbers are those of the reliability and security issue: 2 (loopback TCP without a token;
see also test_ingest.py), 3 (silent or trickling peers holding every slot), 5 (memory held by
unfinished bulks and partial lines), 6 (one huge value request stalling every connection), 8
(signals that killed worthd), 13 (one request mixing weights of different moments) and 14 (small
ones).  The backup, quarantine, divergence and training items have files of their own
(test_backup_safety.py, test_quarantine.py, test_divergence.py, test_cancel.py).

Every server binds a Unix socket in a temporary directory or 127.0.0.1; every loop is bounded
in count and in time.  Run with Debian's /usr/bin/python3 (numpy, pytest 7.2).
"""
import os
import resource
import shutil
import signal
import socket
import struct
import threading
import time

import pytest

from conftest import Client, is_closed_error
from test_limits import poll_until

TOKEN = "attacks-token-51c0ffee"


def model_req(name="m", dims=2, features=None, estimators=None, **kw):
    req = {"op": "model.create", "model": name, "dims": dims, "gamma": 0.9,
           "ranges": [[0, 1]] * dims,
           "features": features or [{"basis": "bias"}, {"basis": "raw"}],
           "estimators": estimators or [{"name": "td", "kind": "td", "alpha": 0.1}]}
    req.update(kw)
    return req


def token_file(tmp_path):
    p = tmp_path / "token"
    p.write_text(TOKEN + "\n")
    os.chmod(p, 0o600)
    return p


def raise_nofile(need):
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if soft < need:
        assert hard == resource.RLIM_INFINITY or hard >= need, \
            f"RLIMIT_NOFILE hard limit {hard} < {need}: cannot run this test"
        resource.setrlimit(resource.RLIMIT_NOFILE, (need, hard))


def tcp_connect(port):
    s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    s.settimeout(5)
    s.connect(("127.0.0.1", port))
    return s


def read_some(s, timeout):
    """Everything the peer sends until it closes or timeout passes: (bytes, closed)."""
    got = b""
    deadline = time.monotonic() + timeout
    for _ in range(int(timeout / 0.01) + 10):
        left = deadline - time.monotonic()
        if left <= 0:
            return got, False
        s.settimeout(min(0.2, left))
        try:
            chunk = s.recv(65536)
        except socket.timeout:
            continue
        except (ConnectionResetError, BrokenPipeError):
            return got, True
        if not chunk:
            return got, True
        got += chunk
    return got, False


def rss_kib(pid):
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
    raise AssertionError("no VmRSS")


# 3. silent and trickling peers -----------------------------------------------------------------

SILENT = 1100


def test_silent_tcp_peers_leave_slots_for_the_unix_socket(daemon, tmp_path, free_port):
    """1,100 TCP peers connect and say nothing.  Before: they took every one of the 1,024
    slots and the local Unix client was locked out.  Now at most --max-unauthenticated of
    them wait (the rest are refused at once), the Unix client is served, and the waiting ones
    are closed with auth_timeout when their deadline passes."""
    raise_nofile(SILENT + 200)
    d = daemon("--listen", f"127.0.0.1:{free_port}", "--token-file", token_file(tmp_path),
               "--auth-timeout", 3)
    peers = []
    try:
        t0 = time.monotonic()
        for _ in range(SILENT):
            try:
                peers.append(tcp_connect(free_port))
            except OSError:
                break  # the listen backlog is full: worthd sheds; enough peers are open
        assert len(peers) >= 1024, f"only {len(peers)} TCP peers could connect"
        u = d.client(timeout=5)
        u.assert_open()  # the local client is served while the TCP peers sit there
        u.ok(model_req())
        # the waiting ones: refused at once, or closed at their deadline with auth_timeout
        refused = timed_out = 0
        for s in peers:
            got, closed = read_some(s, 6 - min(5.5, time.monotonic() - t0))
            assert closed, f"a silent TCP peer is still open {time.monotonic() - t0:.1f} s on"
            if b'"too_many_connections"' in got:
                refused += 1
            elif b'"auth_timeout"' in got:
                timed_out += 1
        print(f"{len(peers)} silent peers: {refused} refused at once, {timed_out} closed at "
              f"the 3 s deadline")
        assert timed_out <= 64 + 2, timed_out  # --max-unauthenticated 64 (+ the probes' slots)
        assert refused + timed_out >= len(peers) - 5, (refused, timed_out)
        assert "--max-unauthenticated" in d.stderr and "auth-timeout" in d.stderr, d.tail()
        # once the silent ones are gone, an authenticating TCP client gets in
        good = Client(("127.0.0.1", free_port), timeout=5)
        try:
            assert good.call({"op": "auth", "token": TOKEN}) == {"ok": True}
            good.assert_open()
        finally:
            good.close()
    finally:
        for s in peers:
            s.close()


def test_tcp_auth_deadline_is_not_extended_by_trickling(daemon, tmp_path, free_port):
    """One byte every 0.5 s, never a whole request: closed at the --auth-timeout deadline."""
    d = daemon("--listen", f"127.0.0.1:{free_port}", "--token-file", token_file(tmp_path),
               "--auth-timeout", 2)
    s = poll_until(lambda: _try(tcp_connect, free_port), 5, "TCP accepting")
    t0 = time.monotonic()
    got, closed = b"", False
    for i in range(20):  # 10 s at most
        try:
            s.sendall(b"{"[:1] if i == 0 else b" ")
        except OSError as e:
            assert is_closed_error(e), e
            closed = True
            break
        chunk, closed = read_some(s, 0.5)
        got += chunk
        if closed:
            break
    took = time.monotonic() - t0
    s.close()
    assert closed and b'"auth_timeout"' in got, (got, took)
    assert 1.8 <= took <= 4.0, f"closed after {took:.2f} s; the deadline is 2 s"
    d.client().assert_open()


def _try(fn, *a):
    try:
        return fn(*a)
    except OSError:
        return None


def test_idle_timeout_is_not_defeated_by_one_byte_at_a_time(daemon):
    """Before: one byte every 1.5 s kept a connection open under --idle-timeout 2 forever."""
    d = daemon("--idle-timeout", 2)
    c = d.client()
    t0 = time.monotonic()
    closed = False
    got = b""
    for _ in range(16):  # 8 s at most
        try:
            c.send_raw(b" ")
        except OSError as e:
            assert is_closed_error(e), e
            closed = True
            break
        chunk, closed = read_some(c.sock, 0.5)
        got += chunk
        if closed:
            break
    took = time.monotonic() - t0
    assert closed and b'"idle_timeout"' in got, (got, took)
    assert 1.8 <= took <= 4.5, f"closed after {took:.2f} s under --idle-timeout 2"


# 5. a daemon-wide memory cap on connection buffers ---------------------------------------------

CONNS = 1000
BUDGET_MB = 32
CHUNK = 256 << 10


def test_unfinished_bulks_and_partial_lines_stay_under_the_budget(daemon):
    """1,000 connections: 500 announce a 3 MB bulk and send 256 KiB of it, 500 send 256 KiB of
    a line and no newline.  Before: every payload was allocated whole at its header and every
    partial line kept (hundreds of MiB).  Now worthd's memory grows by at most --max-buffer-mb
    (32 here) plus slack: payloads are reserved against the budget and allocated as they
    arrive, and what does not fit is refused with over_budget (a bulk's payload is skipped, the
    connection goes on; a line that cannot be held closes the connection)."""
    raise_nofile(CONNS + 200)
    # ASan keeps freed memory in quarantine (256 MiB by default); a small one keeps RSS honest
    d = daemon("--max-buffer-mb", BUDGET_MB, "--max-conns", CONNS + 50,
               env={"ASAN_OPTIONS": os.environ.get("ASAN_OPTIONS", "") +
                    ":quarantine_size_mb=4:malloc_context_size=2"})
    u = d.client(timeout=30)
    u.ok(model_req())
    count = 65536  # records of 2 * 2 + 2 doubles: 3 MiB of payload
    head = b'{"op":"observe.bulk","model":"m","count":%d}\n' % count
    blob = b"\0" * CHUNK
    socks = []
    for i in range(CONNS):
        s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        s.settimeout(10)
        for _ in range(500):  # the listen backlog may be full for a moment: EAGAIN
            try:
                s.connect(d.sock)
                break
            except BlockingIOError:
                time.sleep(0.01)
        else:
            raise AssertionError(f"connection {i} could not connect within 5 s")
        socks.append(s)
    time.sleep(0.3)
    base = rss_kib(d.proc.pid)
    over = 0
    t0 = time.monotonic()
    try:
        for i, s in enumerate(socks):
            try:
                s.sendall((head if i % 2 == 0 else b'{"op":"hello","id":"') + blob)
            except OSError as e:
                assert is_closed_error(e) or isinstance(e, socket.timeout), e
        time.sleep(0.5)
        peak = rss_kib(d.proc.pid)
        for s in socks:  # every reply is in by now: one non-blocking read each
            s.setblocking(False)
            try:
                over += b'"over_budget"' in s.recv(65536)
            except (BlockingIOError, ConnectionResetError):
                pass
        grew_mb = (peak - base) / 1024
        print(f"{CONNS} connections, {CONNS * CHUNK >> 20} MiB sent in {time.monotonic() - t0:.1f}"
              f" s: RSS {base // 1024} -> {peak // 1024} MiB (+{grew_mb:.1f}); {over} told "
              f"over_budget")
        assert grew_mb <= BUDGET_MB + 24, f"RSS grew by {grew_mb:.1f} MiB, budget {BUDGET_MB}"
        assert over >= CONNS // 2, f"only {over} connections were told over_budget"
        u.assert_open()
        assert d.proc.poll() is None
    finally:
        for s in socks:
            s.close()
    # the budget is given back: new connections are served and ingest works
    v = poll_until(lambda: _try(d.client), 5, "a new connection")
    v.assert_open()
    recs = struct.pack("<6d", 0.5, 0.5, 1.0, 0.5, 0.5, 0.0)
    v.send_raw(b'{"op":"observe.bulk","model":"m","count":1}\n' + recs)
    assert v.recv() == {"ok": True, "seq": 1, "count": 1, "durable": True}


def test_bulk_refused_for_the_budget_skips_its_payload(daemon):
    """A bulk whose payload the budget cannot hold is answered over_budget at once; its bytes
    are dropped as they come and the next request on the connection is served."""
    d = daemon("--max-buffer-mb", 1)
    c = d.client(timeout=20)
    c.ok(model_req())
    count = 30000  # 1.4 MB of payload: more than the whole budget
    c.send_raw(b'{"op":"observe.bulk","model":"m","count":%d,"id":"big"}\n' % count)
    err = c.expect_error(c.recv(), "over_budget")
    assert "skipped" in err["message"], err
    c.send_raw(b"\x01" * (count * 6 * 8))  # the payload: dropped, never a line
    assert c.call({"op": "hello", "id": "after"})["id"] == "after"
    st = c.stats("m")
    assert st["received"] == 0, st


# 6. one huge value request must not stall every connection -------------------------------------

def test_huge_value_request_is_bounded_and_the_loop_keeps_answering(daemon):
    """A model of 1,024 features with an rls_td estimator (its sd costs 1,024^2 per state).
    Before: 20,000 states in one request held the loop for tens of seconds.  Now a request
    over --max-query-work is refused at once with the number of states allowed, and one at
    the limit leaves another connection's hello answered within 300 ms."""
    d = daemon("--max-line", 8 << 20)
    c = d.client(timeout=30)
    feats = [{"basis": "rbf", "centers": 32, "width": 0.05}]  # 32^2 = 1024 features
    c.ok(model_req(features=feats, estimators=[{"name": "td", "kind": "td"},
                                               {"name": "rls", "kind": "rls_td"}]))
    probe = d.client(timeout=30)
    lat = []
    stop = threading.Event()

    def ping():
        for i in range(10000):
            if stop.is_set():
                return
            t = time.monotonic()
            assert probe.call({"op": "hello", "id": i}, timeout=30)["id"] == i
            lat.append(time.monotonic() - t)
            time.sleep(0.01)

    th = threading.Thread(target=ping)
    th.start()
    try:
        time.sleep(0.2)
        xs = [[0.25, 0.75]] * 20000
        t = time.monotonic()
        err = c.err({"op": "value", "model": "m", "xs": xs}, "too_large", timeout=60)
        refused_in = time.monotonic() - t
        assert "--max-query-work" in err["message"] and "at most" in err["message"], err
        most = int(err["message"].split("at most ")[1].split()[0])
        assert 1 <= most < 20000, err
        t = time.monotonic()
        rep = c.ok({"op": "value", "model": "m", "xs": xs[:most]}, timeout=60)
        answered_in = time.monotonic() - t
        assert len(rep["values"]) == most
        time.sleep(0.2)
    finally:
        stop.set()
        th.join(30)
    worst = max(lat)
    print(f"refused 20000 states in {refused_in * 1e3:.1f} ms; answered {most} in "
          f"{answered_in * 1e3:.1f} ms; hello worst {worst * 1e3:.1f} ms over {len(lat)}")
    assert refused_in < 1.0
    assert worst < 0.3, f"another connection waited {worst:.2f} s for hello"


# 8. signals ---------------------------------------------------------------------------------

@pytest.mark.parametrize("sig", [signal.SIGHUP, signal.SIGUSR1, signal.SIGUSR2, signal.SIGALRM])
def test_signals_do_not_kill(daemon, sig):
    d = daemon()
    c = d.client()
    c.ok(model_req())
    assert c.call({"op": "observe", "model": "m", "x": [0.5, 0.5], "r": 1,
                   "terminal": True})["seq"] == 1
    for _ in range(3):
        d.proc.send_signal(sig)
        time.sleep(0.1)
    assert d.proc.poll() is None, f"worthd died of {sig!r}"
    c.assert_open()
    assert c.stats("m")["received"] == 1
    if sig == signal.SIGUSR1:
        poll_until(lambda: "status:" in d.stderr, 5, "the USR1 status line")
        assert "1 model" in d.stderr, d.tail()
    if sig == signal.SIGHUP:
        poll_until(lambda: "SIGHUP" in d.stderr, 5, "the HUP line")


def test_sigquit_stops_cleanly(daemon):
    d = daemon()
    c = d.client()
    c.ok(model_req())
    c.call({"op": "observe", "model": "m", "x": [0.5, 0.5], "r": 1, "terminal": True})
    err = d.shutdown(signal.SIGQUIT)
    assert "SIGQUIT: stopping" in err, err
    d = d.restart()
    assert d.client().stats("m")["received"] == 1


# 13. one request, one snapshot ---------------------------------------------------------------

def test_repeated_states_in_one_request_give_identical_values(daemon):
    """Before: the same state repeated in one request came back with several values while
    the model learnt, all under one seq.  Now every state of a request is answered from one
    snapshot.  A feeder keeps the learner busy (at most 2,000 transitions behind) while 20
    requests of 2,000 copies of one state are answered."""
    d = daemon()
    c = d.client(timeout=60)
    c.ok(model_req(features=[{"basis": "rbf", "centers": 12, "width": 0.1}],
                   estimators=[{"name": "td", "kind": "td", "alpha": 0.05},
                               {"name": "rls", "kind": "rls_td"}]))
    feeder = d.client(timeout=60)
    stop = threading.Event()
    errors = []

    def feed():
        rec = struct.pack("<6d", 0.2, 0.7, 1.0, 0.7, 0.2, 0.0)
        try:
            for i in range(5000):
                if stop.is_set():
                    return
                feeder.send_raw(b'{"op":"observe.bulk","model":"m","count":200}\n' + rec * 200)
                assert feeder.recv()["ok"] is True
                for _ in range(2000):  # stay at most 2,000 transitions ahead of the learner
                    st = feeder.stats("m")
                    if st["received"] - st["applied"] <= 2000 or stop.is_set():
                        break
                    time.sleep(0.005)
        except Exception as e:  # reported by the main thread
            errors.append(e)

    th = threading.Thread(target=feed)
    th.start()
    try:
        distinct, seqs = [], []
        for k in range(20):
            rep = c.ok({"op": "value", "model": "m", "xs": [[0.2, 0.7]] * 2000}, timeout=60)
            distinct.append(len(set(rep["values"])))
            seqs.append(rep["seq"])
    finally:
        stop.set()
        th.join(60)
    assert not errors, errors
    c.wait_applied("m", timeout=60)
    assert len(set(seqs)) > 3, f"the model hardly learnt during the queries: seqs {seqs}"
    assert distinct == [1] * 20, f"distinct values per request: {distinct}"


# 14. small ones -----------------------------------------------------------------------------

def test_unknown_fields_refused_by_every_op(daemon):
    d = daemon()
    c = d.client()
    c.ok(model_req())
    reqs = [{"op": "hello"}, {"op": "model.list"}, {"op": "model.get", "model": "m"},
            {"op": "stats", "model": "m"}, {"op": "history", "model": "m"},
            {"op": "checkpoints", "model": "m"}, {"op": "value", "model": "m", "x": [0, 0]},
            {"op": "train", "model": "m", "estimator": "td"},
            {"op": "model.drop", "model": "m"}, {"op": "auth", "token": "x"}]
    for r in reqs:
        err = c.err(dict(r, colour="blue"), "bad_request")
        assert "colour" in err["message"], (r, err)
    c.assert_open()
    assert [m["model"] for m in c.ok({"op": "model.list"})["models"]] == ["m"]


@pytest.mark.parametrize("window,code", [([1.5, 3], "bad_param"), ([1, 1e300], "bad_param"),
                                         ([0, 3], "bad_param"), ([-5, 3], "bad_param"),
                                         ([3, 1], "bad_param"), ([1, 3], None)])
def test_exclude_seq_windows_are_whole_seqs(daemon, window, code):
    d = daemon("--checkpoint-every", 0)
    c = d.client()
    c.ok(model_req())
    cp = c.ok({"op": "checkpoint", "model": "m"})["checkpoint"]
    for i in range(4):
        c.ok({"op": "observe", "model": "m", "x": [0.5, 0.5], "r": 1, "terminal": True})
    req = {"op": "rollback", "model": "m", "checkpoint": cp, "replay": True,
           "exclude": {"seq": window}}
    c.wait_applied("m", 4)
    if code:
        c.err(req, code)
        assert c.wait_applied("m", 4)["applied"] == 4
    else:
        rep = c.ok(req)
        assert (rep["undone"], rep["replayed"]) == (3, 1), rep


def test_trailing_cr_does_not_count_toward_max_line(daemon):
    d = daemon("--max-line", 256)
    c = d.client()
    pad = 256 - len('{"op":"hello","id":""}')
    line = ('{"op":"hello","id":"%s"}' % ("x" * pad)).encode()
    assert len(line) == 256
    c.send_raw(line + b"\r\n")
    assert c.recv()["ok"] is True
    c.send_raw(line + b"x\r\n")
    c.expect_error(c.recv(), "line_too_long")


def test_bulk_terminal_record_may_carry_any_x_next(daemon):
    d = daemon()
    c = d.client()
    c.ok(model_req())
    nan = float("nan")
    recs = struct.pack("<6d", 0.5, 0.5, 1.0, nan, float("inf"), 1.0)
    c.send_raw(b'{"op":"observe.bulk","model":"m","count":1}\n' + recs)
    assert c.recv() == {"ok": True, "seq": 1, "count": 1, "durable": True}
    # a non-terminal record still needs a finite x_next
    recs = struct.pack("<6d", 0.5, 0.5, 1.0, nan, 0.5, 0.0)
    c.send_raw(b'{"op":"observe.bulk","model":"m","count":1}\n' + recs)
    c.expect_error(c.recv(), "bad_number")


def test_drop_that_cannot_be_stored_says_so(daemon, tmp_path):
    """The database file is replaced under worthd (so worthd refuses every write): a drop then
    happens in memory only, and the reply says so instead of a bare ok."""
    d = daemon()
    c = d.client()
    c.ok(model_req())
    moved = tmp_path / "moved.db"
    shutil.move(d.db, moved)
    with open(d.db, "wb") as f:
        f.write(b"not the database")
    rep = c.ok({"op": "model.drop", "model": "m"})
    assert rep["persisted"] is False and "comes back" in rep["warning"], rep
    assert c.ok({"op": "model.list"})["models"] == []
    d.kill9()
    os.unlink(d.db)
    for suffix in ("-wal", "-shm"):
        if os.path.exists(str(moved) + suffix):
            shutil.move(str(moved) + suffix, d.db + suffix)
    shutil.move(moved, d.db)
    d = d.restart()
    assert [m["model"] for m in d.client().ok({"op": "model.list"})["models"]] == ["m"]
