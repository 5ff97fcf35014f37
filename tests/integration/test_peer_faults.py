"""Peers that go away at the wrong moment: a client that disconnects in the middle of a bulk
payload (FIN or RST, after the header alone, inside a record, one byte short), while another
client streams; and clients that send many requests and close without reading their replies,
so that worthd writes to a closed socket (EPIPE: SIGPIPE would kill a daemon that does not
ignore it).

The contract is schema/protocol.md ("observe.bulk": "If the connection ends before all records
arrive, nothing of the bulk is applied") and DESIGN.md ("ignore SIGPIPE yourself").  After
each fault worthd must be running, answer on a new connection, log exactly the transitions it
acknowledged (read back with Python's sqlite3 after a kill -9) and exit 0 on SIGTERM at the
fixture's teardown.  Every loop is bounded in count and time.
"""
import socket
import struct
import threading
import time

import numpy as np
import pytest

from conftest import Client, is_closed_error
from test_durable import log_rows, row_to_tr
from test_faults import MODEL, Stream, create_model, records, send_request

MARK = 424242.0  # the reward of every record of an interrupted bulk: must never be logged


def cut_bulk(d, n, keep_bytes, how, tcp=None):
    """Opens a connection, sends an observe.bulk header for n records whose rewards are MARK,
    then keep_bytes of the payload, then ends the connection: "fin" (shutdown(SHUT_WR), then
    read the reply: truncated), "close" (plain close) or "rst" (SO_LINGER 0: a reset)."""
    p = Client(tcp or d.sock)
    rec = np.tile([1.0, 0.0, MARK, 2.0, 1.0, 0.0], (n, 1)).astype("<f8").tobytes()
    p.send({"op": "observe.bulk", "model": MODEL, "count": n})
    p.send_raw(rec[:keep_bytes])
    if how == "fin":
        p.sock.shutdown(socket.SHUT_WR)
        p.expect_error(p.recv(), "truncated")
        p.assert_closed()
    elif how == "rst":
        p.sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
    p.close()


@pytest.mark.parametrize("how", ["fin", "close", "rst"])
def test_disconnect_mid_bulk_under_load(daemon, free_port, how):
    """A producer streams durable requests while other connections, Unix and loopback TCP,
    end in the middle of bulk payloads (header only, inside a record, one byte short, of a
    frame larger than a socket buffer).  Nothing of a cut bulk is logged or learnt, the
    producer never notices, worthd goes on."""
    d = daemon("--listen", f"127.0.0.1:{free_port}", "--allow-tcp-without-token",
               "--checkpoint-every", 0)
    c = d.client(timeout=30)
    create_model(c)
    stream = Stream(5100)
    acked, ended = [], []
    stop = threading.Event()

    def produce():
        p = Client(d.sock, timeout=15)
        try:
            deadline = time.monotonic() + 30
            for _ in range(100_000):
                if stop.is_set() or time.monotonic() > deadline:
                    ended.append("stopped")
                    return
                kind, req, rec, trs = stream.next_request()
                send_request(p, kind, req, rec)
                rep = p.recv()
                if rep.get("ok") is not True:
                    ended.append(rep)
                    return
                acked.extend(trs)
        except Exception as e:
            ended.append(("closed" if is_closed_error(e) else "error", repr(e)))
        finally:
            p.close()

    t = threading.Thread(target=produce, daemon=True)
    t.start()
    rec_bytes = 48  # D = 2: 2 * 2 + 2 doubles
    cuts = [(10, 0), (10, 5 * rec_bytes + 20), (10, 10 * rec_bytes - 1), (20000, 600_000)]
    for k in range(3):
        for n, keep in cuts:
            cut_bulk(d, n, keep, how, tcp=("127.0.0.1", free_port) if k == 1 else None)
    time.sleep(0.2)
    stop.set()
    t.join(30)
    assert not t.is_alive(), "producer hung"
    assert ended == ["stopped"], f"the producer was disturbed: {ended}"
    assert len(acked) > 0
    # worthd goes on: a new connection, a complete bulk
    c2 = d.client()
    last = [stream.one(None, None) for _ in range(5)]
    c2.send({"op": "observe.bulk", "model": MODEL, "count": 5})
    c2.send_raw(records(last))
    rep = c2.recv()
    assert rep == {"ok": True, "seq": len(acked) + 5, "count": 5, "durable": True}, rep
    acked += last
    st = c2.wait_applied(MODEL, len(acked), timeout=30)
    assert st["estimators"]["td"]["updates"] == len(acked), st
    d.kill9()
    rows = log_rows(d.db, MODEL)
    assert not [r["seq"] for r in rows if r["r"] == MARK], "records of a cut bulk were logged"
    assert [row_to_tr(r) for r in rows] == acked, "the log is not the acknowledged transitions"
    print(f"{how}: {len(cuts) * 3} bulks cut, {len(acked)} transitions acknowledged and logged")


def sigpipe_ignored(pid):
    """Whether the process ignores SIGPIPE (bit 13 of SigIgn in /proc/PID/status)."""
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("SigIgn:"):
                return bool(int(line.split()[1], 16) >> (13 - 1) & 1)
    raise AssertionError("no SigIgn line")


def test_writes_to_closed_sockets(daemon, free_port):
    """24 clients, Unix and TCP, each send 150 value queries of 200 states (some 1 MB of
    replies, more than the socket buffers hold) and close at once, without reading; half of
    them reset the connection.  worthd writes into closed sockets (EPIPE) and must not die of
    SIGPIPE: it stays up, answers, and learns on."""
    d = daemon("--listen", f"127.0.0.1:{free_port}", "--allow-tcp-without-token")
    assert sigpipe_ignored(d.proc.pid), "worthd does not ignore SIGPIPE"
    c = d.client(timeout=30)
    create_model(c)
    stream = Stream(5200)
    xs = np.random.default_rng(5200).uniform([0, -5], [10, 5], (200, 2)).tolist()
    q = (b'{"op":"value","model":"f","xs":' + str(xs).replace(" ", "").encode() + b"}\n") * 150
    n_acked = 0
    for k in range(24):
        p = Client(("127.0.0.1", free_port) if k % 2 else d.sock)
        try:
            p.send_raw(q)
        except OSError as e:  # worthd may stop reading while its replies back up
            assert is_closed_error(e) or isinstance(e, socket.timeout), repr(e)
        if k % 4 < 2:
            p.sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
        p.close()
        # between the clients, ingest goes on
        tr = stream.one(None, None)
        rep = c.call({"op": "observe", "model": MODEL, **tr})
        n_acked += 1
        assert rep == {"ok": True, "seq": n_acked, "durable": True}, (k, rep)
        assert d.proc.poll() is None, f"worthd exited after client {k}: {d.proc.returncode}"
    time.sleep(0.3)  # let worthd reach the closed sockets
    assert d.proc.poll() is None, f"worthd exited: {d.proc.returncode}\n{d.tail()}"
    c.assert_open()
    d.client().assert_open()
    assert c.wait_applied(MODEL, n_acked)["estimators"]["td"]["updates"] == n_acked
