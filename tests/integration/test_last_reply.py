"""A connection that ends is closed only after its last reply (schema/protocol.md, Framing).

The protocol says line_too_long, a truncated bulk and a failed auth are answered and the
connection closed "after that reply", and a client that stops sending gets every reply before
the daemon closes.  Durable acks wait for the writer's commit, so a reply to an observe can
still be pending when the connection is to close; these tests pipeline such an observe in the
same write as the request that ends the connection, and check that both replies arrive, in
order, before EOF.  (The fuzz target found the case; tests/reliability/fuzz.md.)
"""
import socket

import numpy as np

CREATE = {"op": "model.create", "model": "m", "dims": 1, "gamma": 0.9, "ranges": [[0, 1]],
          "features": [{"basis": "bias"}], "estimators": [{"name": "td", "kind": "td",
                                                           "alpha": 0.1}]}
OBSERVE = b'{"op":"observe","model":"m","x":[0.5],"r":1,"x_next":[0.25],"id":7}\n'


def start(daemon, *args):
    d = daemon("--max-line", "1000", *args)
    c = d.client()
    c.ok(CREATE)
    return d, c


def test_line_too_long_after_a_durable_observe(daemon):
    _, c = start(daemon)
    c.send_raw(OBSERVE + b"x" * 2000 + b"\n")
    ack = c.recv()
    assert ack == {"ok": True, "id": 7, "seq": 1, "durable": True}, ack
    c.expect_error(c.recv(), "line_too_long")
    c.assert_closed()


def test_eof_after_a_durable_observe(daemon):
    _, c = start(daemon)
    c.send_raw(OBSERVE + b'{"op":"hello","id":8}\n')
    c.sock.shutdown(socket.SHUT_WR)
    ack = c.recv()
    assert ack == {"ok": True, "id": 7, "seq": 1, "durable": True}, ack
    assert c.recv()["id"] == 8
    c.assert_closed()


def test_truncated_bulk_after_a_durable_observe(daemon):
    d, c = start(daemon)
    rec = np.array([0.5, 1.0, 0.25, 0.0], "<f8").tobytes()
    c.send_raw(OBSERVE + b'{"op":"observe.bulk","model":"m","count":2}\n' + rec)
    c.sock.shutdown(socket.SHUT_WR)
    assert c.recv()["seq"] == 1
    c.expect_error(c.recv(), "truncated")
    c.assert_closed()
    # The observe was durable; the half bulk was not applied.
    assert d.client().stats("m")["received"] == 1
