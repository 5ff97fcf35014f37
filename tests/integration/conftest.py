"""Fixtures for the worthd integration tests (tests only).

The daemon under test is $WORTH_DAEMON.  Each test starts its own worthd on a Unix socket
inside pytest's tmp_path, with its database at <tmp>/worthd.db unless the test names another,
talks to it through Client (one JSON object a line, replies read with a timeout) and stops it
with SIGTERM at teardown, where its exit code is checked.  A test may restart a daemon on the
same socket and database (Daemon.restart) or kill it with SIGKILL (Daemon.kill9).  The
contract is schema/protocol.md (and schema/README.md for the database).  Every wait here is
bounded in time and in count, and the client only ever connects to the temporary Unix socket
or to a loopback address.
Run with Debian's /usr/bin/python3 (numpy 1.24, pytest 7.2).
"""
import errno
import json
import os
import signal
import socket
import subprocess
import tempfile
import time

import pytest

READY_TIMEOUT = 10.0   # seconds for worthd to accept on its socket
POLL = 0.01            # seconds between readiness and counter polls
STOP_TIMEOUT = 10.0    # seconds between SIGTERM and SIGKILL at teardown
RECV_TIMEOUT = 10.0    # default seconds to wait for one reply line
LOOPBACK = ("127.0.0.1", "::1", "localhost")


class Closed(Exception):
    """The peer ended the connection (EOF or reset) before a whole line arrived."""


class Client:
    """One connection to worthd: a Unix socket path or a loopback (host, port)."""

    def __init__(self, addr, timeout=RECV_TIMEOUT):
        self.timeout = timeout
        if isinstance(addr, tuple):
            host, port = addr
            assert host in LOOPBACK, f"tests connect to loopback only, not {host!r}"
            fam = socket.AF_INET6 if host == "::1" else socket.AF_INET
            self.sock = socket.socket(fam, socket.SOCK_STREAM)
        else:
            self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        self.sock.settimeout(timeout)
        try:
            self.sock.connect(addr)
        except BaseException:
            self.sock.close()
            raise
        self.buf = b""

    # writing

    def send_raw(self, data):
        self.sock.settimeout(self.timeout)
        self.sock.sendall(data)

    def send(self, obj):
        """Writes obj as one JSON line (no NaN/Infinity literals: those go through send_raw)."""
        self.send_raw(json.dumps(obj, separators=(",", ":"), allow_nan=False).encode() + b"\n")

    # reading

    def recv_line(self, timeout=None):
        """Returns the next line (bytes, without the newline); raises Closed or socket.timeout."""
        deadline = time.monotonic() + (self.timeout if timeout is None else timeout)
        for _ in range(1_000_000):
            i = self.buf.find(b"\n")
            if i >= 0:
                line, self.buf = self.buf[:i], self.buf[i + 1:]
                return line
            left = deadline - time.monotonic()
            if left <= 0:
                raise socket.timeout(f"no reply line within the timeout; have {self.buf[:200]!r}")
            self.sock.settimeout(left)
            try:
                chunk = self.sock.recv(65536)
            except ConnectionResetError as e:
                raise Closed(f"connection reset; partial {self.buf[:200]!r}") from e
            if not chunk:
                raise Closed(f"connection closed; partial {self.buf[:200]!r}")
            self.buf += chunk
        raise AssertionError("recv_line: too many reads for one line")

    def recv(self, timeout=None):
        """Reads one reply line and returns it parsed; it must be a JSON object."""
        line = self.recv_line(timeout)
        try:
            obj = json.loads(line)
        except ValueError as e:
            raise AssertionError(f"reply is not JSON: {line[:300]!r}") from e
        assert isinstance(obj, dict), f"reply is not a JSON object: {line[:300]!r}"
        return obj

    def call(self, obj, timeout=None):
        self.send(obj)
        return self.recv(timeout)

    # assertions built on the protocol

    def ok(self, obj, timeout=None):
        """call(obj); asserts success and returns the reply."""
        rep = self.call(obj, timeout)
        assert rep.get("ok") is True, f"{obj.get('op')} failed: {rep}"
        return rep

    def expect_error(self, rep, code):
        """Asserts rep is {"ok":false,"error":{"code":code,"message":"..."}}; returns error."""
        assert rep.get("ok") is False, f"expected error {code}, got {rep}"
        err = rep.get("error")
        assert isinstance(err, dict), rep
        assert err.get("code") == code, f"expected error {code}, got {rep}"
        assert isinstance(err.get("message"), str) and err["message"], rep
        return err

    def err(self, obj, code, timeout=None):
        """call(obj) (dict, or bytes sent raw); asserts error code; returns the error object."""
        if isinstance(obj, (bytes, bytearray)):
            self.send_raw(obj)
            rep = self.recv(timeout)
        else:
            rep = self.call(obj, timeout)
        return self.expect_error(rep, code)

    def assert_closed(self, timeout=None):
        """Asserts the peer closes (EOF or reset) within the timeout, sending nothing more."""
        try:
            line = self.recv_line(timeout)
        except Closed:
            return
        raise AssertionError(f"expected the connection closed, got another line {line[:300]!r}")

    def assert_open(self):
        """The connection still answers hello."""
        rep = self.call({"op": "hello"})
        assert rep.get("ok") is True and rep.get("server") == "worthd", rep

    def stats(self, model):
        return self.ok({"op": "stats", "model": model})

    def wait_applied(self, model, expect=None, timeout=10.0):
        """Polls stats (bounded) until applied == received (== expect if given); returns it."""
        deadline = time.monotonic() + timeout
        st = None
        for _ in range(int(timeout / POLL) + 10):
            st = self.stats(model)
            if st["applied"] == st["received"] and (expect is None or st["received"] == expect):
                return st
            if time.monotonic() > deadline:
                break
            time.sleep(POLL)
        raise AssertionError(f"model {model}: not applied within {timeout} s (expect {expect}): {st}")

    def close(self):
        self.sock.close()


class Daemon:
    """A running worthd: .sock (path), .proc, .stderr (text so far), .client()."""

    def __init__(self, argv, sock, workdir, expect_rc, db=None, respawn=None, user=None, env=None):
        self.argv, self.sock, self.expect_rc = argv, str(sock), expect_rc
        self.env = env  # variables added to the environment worthd runs in
        self.user = user  # a uid to run as (Popen user=/group=), for tests of file modes
        self.db = None if db is None else str(db)
        self.respawn = respawn  # set by the daemon fixture: starts the same argv again
        self.err_path = os.path.join(workdir, "worthd.stderr")
        self.out_path = os.path.join(workdir, "worthd.stdout")
        with open(self.err_path, "wb") as err, open(self.out_path, "wb") as out:
            as_user = {} if user is None else {"user": user, "group": user, "extra_groups": []}
            environ = None if env is None else {**os.environ, **env}
            self.proc = subprocess.Popen(argv, stdin=subprocess.DEVNULL, stdout=out, stderr=err,
                                         cwd=workdir, env=environ, **as_user)
        self.clients = []

    @property
    def stderr(self):
        with open(self.err_path, "rb") as f:
            return f.read().decode(errors="replace")

    @property
    def stdout(self):
        with open(self.out_path, "rb") as f:
            return f.read().decode(errors="replace")

    def tail(self, n=40):
        return "\n".join(self.stderr.splitlines()[-n:])

    def wait_ready(self, timeout=READY_TIMEOUT):
        """Polls every 10 ms (bounded) until the Unix socket accepts a connection."""
        deadline = time.monotonic() + timeout
        for _ in range(int(timeout / POLL) + 10):
            rc = self.proc.poll()
            if rc is not None:
                raise AssertionError(f"worthd exited {rc} before it was ready:\n{self.tail()}")
            s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
            try:
                s.settimeout(1.0)
                s.connect(self.sock)
                return
            except OSError:
                pass
            finally:
                s.close()
            if time.monotonic() > deadline:
                break
            time.sleep(POLL)
        raise AssertionError(f"worthd not accepting on {self.sock} within {timeout} s:\n"
                             f"{self.tail()}")

    def wait_exit(self, timeout):
        """Returns the exit code, or None when still running after timeout seconds."""
        try:
            return self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            return None

    def client(self, addr=None, timeout=RECV_TIMEOUT):
        c = Client(self.sock if addr is None else addr, timeout)
        self.clients.append(c)
        return c

    def stop(self, sig=signal.SIGTERM, timeout=STOP_TIMEOUT):
        """Signals worthd (if running), waits up to timeout, then kills it; returns (rc, killed)."""
        killed = False
        if self.proc.poll() is None:
            self.proc.send_signal(sig)
            try:
                self.proc.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                killed = True
                self.proc.kill()
                self.proc.wait(timeout=timeout)
        return self.proc.returncode, killed

    def close_clients(self):
        for c in self.clients:
            try:
                c.close()
            except OSError:
                pass

    def kill9(self, timeout=STOP_TIMEOUT):
        """SIGKILLs worthd (a crash), waits (bounded) until it is gone; expects rc -9 at
        teardown."""
        self.close_clients()
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
        try:
            self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            raise AssertionError(f"worthd still running {timeout} s after SIGKILL")
        self.expect_rc = -signal.SIGKILL
        return self.proc.returncode

    def shutdown(self, sig=signal.SIGTERM, timeout=STOP_TIMEOUT):
        """A clean stop: signals worthd, asserts it exits 0 within timeout; returns stderr."""
        self.close_clients()
        rc, killed = self.stop(sig, timeout)
        assert not killed, f"worthd still running {timeout} s after {sig!r}:\n{self.tail()}"
        assert rc == 0, f"worthd exited {rc} after {sig!r}:\n{self.tail()}"
        return self.stderr

    def restart(self, expect_rc=0, ready=True, ready_timeout=None):
        """Stops this worthd cleanly if it still runs (SIGTERM, exit 0), then starts a new
        one with the same arguments: same socket, same database.  Returns the new Daemon."""
        assert self.respawn is not None, "restart needs a daemon started by the fixture"
        if self.proc.poll() is None:
            self.shutdown()
        else:
            self.close_clients()
        return self.respawn(self, expect_rc=expect_rc, ready=ready, ready_timeout=ready_timeout)


def daemon_path():
    exe = os.environ.get("WORTH_DAEMON")
    assert exe, "set WORTH_DAEMON to the path of the worthd executable"
    assert os.access(exe, os.X_OK), f"WORTH_DAEMON={exe} is not an executable"
    return exe


@pytest.fixture
def sockdir(tmp_path):
    """A directory for sockets: tmp_path, or a short one when tmp_path is too long for sun_path."""
    if len(str(tmp_path)) < 80:
        yield tmp_path
        return
    d = tempfile.mkdtemp(prefix="worth-")
    yield d
    for name in os.listdir(d):
        os.unlink(os.path.join(d, name))
    os.rmdir(d)


@pytest.fixture
def daemon(tmp_path, sockdir):
    """Factory: daemon(*args, sock=None, db=None, expect_rc=0, ready=True, user=None, env=None)
    -> Daemon (env: variables added to worthd's environment).

    Starts worthd --socket <sock> --db <db> *args: sock defaults to a new name in sockdir,
    db to <tmp>/worthd.db (shared by the daemons of one test, so that a second daemon started
    without db= runs on the same database; pass db= for an independent one).  When args hold
    their own --db, none is added.  With ready, waits (bounded) until the socket accepts.
    Daemon.restart() starts the same argv again (as the same user: user= is a uid whose
    worthd must reach sock and db, so not inside tmp_path, which is private to root).  At teardown sends SIGTERM, waits 10 s,
    kills, and asserts the exit code is expect_rc (None: not checked; -9 after kill9) and
    that nothing went to stdout.
    """
    started = []
    exe = daemon_path()

    def spawn(argv, sock, db, expect_rc, ready, ready_timeout, user=None, env=None):
        workdir = tmp_path / f"d{len(started)}"
        workdir.mkdir()
        d = Daemon(argv, sock, str(workdir), expect_rc, db=db, respawn=respawn, user=user,
                   env=env)
        started.append(d)
        if ready:
            d.wait_ready(ready_timeout or READY_TIMEOUT)
        return d

    def respawn(old, expect_rc=0, ready=True, ready_timeout=None):
        return spawn(old.argv, old.sock, old.db, expect_rc, ready, ready_timeout, old.user,
                     old.env)

    def start(*args, sock=None, db=None, expect_rc=0, ready=True, ready_timeout=None, user=None,
              env=None):
        sock = str(sock or os.path.join(str(sockdir), f"worthd{len(started) or ''}.sock"))
        args = [str(a) for a in args]
        if "--db" in args:
            db = args[args.index("--db") + 1]
        else:
            db = str(db or tmp_path / "worthd.db")
            args = ["--db", db] + args
        return spawn([exe, "--socket", sock, *args], sock, db, expect_rc, ready, ready_timeout,
                     user, env)

    yield start

    problems = []
    for d in reversed(started):
        d.close_clients()
        rc, killed = d.stop()
        mine = []
        if killed:
            mine.append(f"{d.argv}: still running {STOP_TIMEOUT} s after SIGTERM; killed")
        elif d.expect_rc is not None and rc != d.expect_rc:
            mine.append(f"{d.argv}: exit code {rc}, expected {d.expect_rc}")
        if d.stdout:
            mine.append(f"{d.argv}: wrote to stdout: {d.stdout[:300]!r}")
        if mine:
            problems += mine + [f"stderr tail:\n{d.tail()}"]
    assert not problems, "\n".join(problems)


@pytest.fixture
def free_port():
    """A loopback TCP port that was free a moment ago (bind to port 0, read it, close)."""
    s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    try:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]
    finally:
        s.close()


def is_closed_error(e):
    """True for the errors a writer sees when the peer has gone."""
    return isinstance(e, (Closed, BrokenPipeError, ConnectionResetError)) or (
        isinstance(e, OSError) and e.errno in (errno.EPIPE, errno.ECONNRESET))
