"""The adversarial catalogue: bad input of every kind against one running worthd.

A table of rows (name, bytes sent, expected reply codes, connection state afterwards), each its
own test case, all against one daemon started for this module.  Every row checks the stable
error code of each reply (schema/protocol.md, "Error codes"), whether the connection stays open
or is closed as documented there, and then that the daemon is still running and a fresh
connection is served.  The last case checks that no bad input left anything behind: no
transition accepted into model m, no model created, nothing odd in the log.

Rows cover: framing (truncated and overlong lines, deep nesting, text after the object),
bytes (NUL, control bytes, invalid UTF-8, binary garbage), numbers (overflow, NaN and infinity
spelt every way, integers beyond 2^53), duplicate keys, wrong types in every field, empty
arrays, dimensions 0 and over the limit, unknown bases and kinds, parameter edge values, bulk
counts that lie, and requests before auth on a guarded TCP listener.
The daemon listens on a Unix socket in a temporary directory and on 127.0.0.1.
Run with Debian's /usr/bin/python3 (pytest 7.2).
"""
import json
import os
import shutil
import socket
import struct
import tempfile
import time

import pytest

from conftest import Client, Closed, Daemon, daemon_path

MAX_LINE = 65536
MAX_BATCH = 10
TOKEN = "adversarial-token-0c9d"
OPEN, CLOSED = "open", "closed"


def j(obj):
    return json.dumps(obj, separators=(",", ":")).encode() + b"\n"


def create(name="fresh", **kw):
    req = {"op": "model.create", "model": name, "dims": 2, "gamma": 0.9,
           "ranges": [[0, 1], [0, 1]], "features": [{"basis": "bias"}, {"basis": "raw"}],
           "estimators": [{"name": "td", "kind": "td"}]}
    req.update(kw)
    return j(req)


def est(**kw):
    e = {"name": "e", "kind": "td"}
    e.update(kw)
    return create(estimators=[e])


def basis(**kw):
    return create(features=[kw])


def obs(**kw):
    req = {"op": "observe", "model": "m", "x": [0.5, 0.5], "r": 1.0, "x_next": [0.5, 0.5]}
    req.update(kw)
    return j(req)


def obs_raw(field, text):
    """An observe line whose field holds raw JSON text (for what json.dumps will not write)."""
    base = {"x": b"[0.5,0.5]", "r": b"1", "x_next": b"[0.5,0.5]"}
    base[field] = text
    return (b'{"op":"observe","model":"m","x":' + base["x"] + b',"r":' + base["r"] +
            b',"x_next":' + base["x_next"] + b"}\n")


def bulk_head(model="b", count=1, **kw):
    req = {"op": "observe.bulk", "model": model, "count": count}
    req.update(kw)
    return j(req)


def rec(x=(0.5, 0.5), r=1.0, xn=(0.5, 0.5), term=0.0):
    return struct.pack("<6d", *x, r, *xn, term)


GARBAGE = bytes(b for b in range(256) if b != 0x0A) * 3  # every byte but the newline

# (name, bytes, expected codes in reply order ("ok" for a success), connection state after,
#  how: "unix", "tcp" (guarded by the token), or "eof" (the client half-closes after sending))
ROWS = [
    # framing
    ("garbage_text", b"this is not json\n", ["bad_json"], OPEN, "unix"),
    ("truncated_object", b'{"op":"hello","id":1\n', ["bad_json"], OPEN, "unix"),
    ("truncated_in_string", b'{"op":"hel\n', ["bad_json"], OPEN, "unix"),
    ("truncated_at_eof", b'{"op":"hello"', ["bad_json"], CLOSED, "eof"),
    ("overlong_line", b'{"op":"hello","id":"' + b"x" * MAX_LINE + b'"}\n',
     ["line_too_long"], CLOSED, "unix"),
    ("overlong_line_no_newline", b"y" * (MAX_LINE + 10), ["line_too_long"], CLOSED, "unix"),
    ("deep_nesting_arrays", b"[" * 5000 + b"]" * 5000 + b"\n", ["bad_json"], OPEN, "unix"),
    ("deep_nesting_objects", b'{"a":' * 3000 + b"1" + b"}" * 3000 + b"\n", ["bad_json"], OPEN,
     "unix"),
    ("deep_nesting_in_field", b'{"op":"hello","x":' + b"[" * 2000 + b"]" * 2000 + b"}\n",
     ["bad_json"], OPEN, "unix"),
    ("top_level_array", b'[{"op":"hello"}]\n', ["bad_json"], OPEN, "unix"),
    ("top_level_string", b'"hello"\n', ["bad_json"], OPEN, "unix"),
    ("top_level_number", b"42\n", ["bad_json"], OPEN, "unix"),
    ("empty_object", b"{}\n", ["bad_request"], OPEN, "unix"),
    ("text_after_object", b'{"op":"hello"} trailing\n', ["bad_json"], OPEN, "unix"),
    ("two_objects_one_line", b'{"op":"hello"}{"op":"hello"}\n', ["bad_json"], OPEN, "unix"),
    ("utf16_text", '{"op":"hello"}'.encode("utf-16-le") + b"\n", ["bad_json"], OPEN, "unix"),
    # bytes (valid UTF-8 as RFC 3629 section 3 defines it: no overlong forms, no surrogates
    # U+D800..U+DFFF, nothing above U+10FFFF; JSON strings escape control bytes, RFC 8259 s. 7)
    ("nul_byte_after_object", b'{"op":"hello"}\x00\n', ["bad_json"], OPEN, "unix"),
    ("nul_byte_in_string", b'{"op":"hel\x00lo"}\n', ["bad_json"], OPEN, "unix"),
    ("control_byte_in_name", create("ab\x01cd").replace(b"\\u0001", b"\x01"), ["bad_json"],
     OPEN, "unix"),
    ("escaped_nul_in_name", create("ab\u0000cd"), ["bad_request"], OPEN, "unix"),
    ("invalid_utf8_byte", b'{"op":"\xff\xfe"}\n', ["bad_json"], OPEN, "unix"),
    ("overlong_utf8", b'{"op":"model.get","model":"\xc0\xaf"}\n', ["bad_json"], OPEN, "unix"),
    ("utf8_surrogate", b'{"op":"model.get","model":"\xed\xa0\x80"}\n', ["bad_json"], OPEN,
     "unix"),
    ("utf8_cut_short", b'{"op":"model.get","model":"\xe2\x82"}\n', ["bad_json"], OPEN, "unix"),
    ("utf8_above_10ffff", b'{"op":"model.get","model":"\xf4\x90\x80\x80"}\n', ["bad_json"],
     OPEN, "unix"),
    ("binary_garbage", GARBAGE + b"\n", ["bad_json"], OPEN, "unix"),
    # numbers
    ("r_overflow", obs_raw("r", b"1e400"), ["bad_number"], OPEN, "unix"),
    ("r_negative_overflow", obs_raw("r", b"-1e400"), ["bad_number"], OPEN, "unix"),
    # finite, but its square would overflow a double (protocol.md: |r| <= 1e12)
    ("r_1e308", obs_raw("r", b"1e308"), ["bad_number"], OPEN, "unix"),
    ("r_just_over_bound", obs_raw("r", b"-1.0000001e12"), ["bad_number"], OPEN, "unix"),
    ("x_huge_exponent", obs_raw("x", b"[1e999999,0.5]"), ["bad_number"], OPEN, "unix"),
    ("r_nan_literal", obs_raw("r", b"NaN"), ["bad_json"], OPEN, "unix"),
    ("r_infinity_literal", obs_raw("r", b"Infinity"), ["bad_json"], OPEN, "unix"),
    ("r_minus_inf_literal", obs_raw("r", b"-inf"), ["bad_json"], OPEN, "unix"),
    ("r_nan_string", obs(r="NaN"), ["bad_number"], OPEN, "unix"),
    ("r_nan_lowercase_string", obs(r="nan"), ["bad_number"], OPEN, "unix"),
    ("x_inf_string", obs(x=["inf", 0.5]), ["bad_number"], OPEN, "unix"),
    ("x_next_minus_infinity_string", obs(x_next=[0.5, "-Infinity"]), ["bad_number"], OPEN,
     "unix"),
    ("r_null", obs(r=None), ["bad_number"], OPEN, "unix"),
    ("hex_number", obs_raw("r", b"0x10"), ["bad_json"], OPEN, "unix"),
    ("gamma_overflow", create().replace(b'"gamma":0.9', b'"gamma":1e400'), ["bad_number"], OPEN,
     "unix"),
    ("dt_overflow", obs_raw("r", b"1,\"dt\":1e400"), ["bad_number"], OPEN, "unix"),
    ("id_overflow", b'{"op":"hello","id":1e400}\n', ["bad_number"], OPEN, "unix"),
    ("id_beyond_2p53", b'{"op":"hello","id":9007199254740993}\n', ["bad_param"], OPEN, "unix"),
    ("id_1e300", b'{"op":"hello","id":1e300}\n', ["bad_param"], OPEN, "unix"),
    ("checkpoint_id_1e20", j({"op": "rollback", "model": "m", "checkpoint": 1e20}),
     ["bad_param"], OPEN, "unix"),
    ("events_limit_1e20", j({"op": "events", "limit": 1e20}), ["bad_param"], OPEN, "unix"),
    # duplicate keys
    ("duplicate_op", b'{"op":"hello","op":"model.list"}\n', ["bad_request"], OPEN, "unix"),
    ("duplicate_r", obs_raw("r", b'1,"r":2'), ["bad_request"], OPEN, "unix"),
    ("duplicate_in_basis",
     create().replace(b'{"basis":"raw"}', b'{"basis":"rbf","centers":3,"centers":4,"width":0.1}'),
     ["bad_request"], OPEN, "unix"),
    ("duplicate_in_estimator",
     create().replace(b'"kind":"td"}', b'"kind":"td","alpha":0.1,"alpha":0.2}'),
     ["bad_request"], OPEN, "unix"),
    # wrong types, field by field
    ("op_number", j({"op": 5}), ["bad_request"], OPEN, "unix"),
    ("op_null", j({"op": None}), ["bad_request"], OPEN, "unix"),
    ("model_number", obs(model=7), ["bad_request"], OPEN, "unix"),
    ("x_string", obs(x="0.5,0.5"), ["bad_request"], OPEN, "unix"),
    ("x_object", obs(x={"a": 0.5}), ["bad_request"], OPEN, "unix"),
    ("x_nested", obs(x=[[0.5], [0.5]]), ["bad_number"], OPEN, "unix"),
    ("r_numeric_string", obs(r="1"), ["bad_number"], OPEN, "unix"),
    ("r_bool", obs(r=True), ["bad_number"], OPEN, "unix"),
    ("terminal_string", obs(terminal="yes"), ["bad_request"], OPEN, "unix"),
    ("terminal_number", obs(terminal=1), ["bad_request"], OPEN, "unix"),
    ("source_number", obs(source=3), ["bad_request"], OPEN, "unix"),
    ("dt_string", obs(dt="1"), ["bad_number"], OPEN, "unix"),
    ("batch_object", j({"op": "observe", "model": "m", "batch": {"x": [0.5, 0.5]}}),
     ["bad_request"], OPEN, "unix"),
    ("batch_element_number", j({"op": "observe", "model": "m", "batch": [1, 2]}),
     ["bad_request"], OPEN, "unix"),
    ("dims_string", create(dims="2"), ["bad_number"], OPEN, "unix"),
    ("dims_fraction", create(dims=2.5), ["bad_param"], OPEN, "unix"),
    ("gamma_string", create(gamma="0.9"), ["bad_number"], OPEN, "unix"),
    ("ranges_object", create(ranges={"lo": 0}), ["bad_request"], OPEN, "unix"),
    ("range_three_numbers", create(ranges=[[0, 1, 2], [0, 1]]), ["bad_request"], OPEN, "unix"),
    ("features_object", create(features={"basis": "bias"}), ["bad_request"], OPEN, "unix"),
    ("estimators_string", create(estimators="td"), ["bad_request"], OPEN, "unix"),
    ("kind_number", est(kind=3), ["bad_request"], OPEN, "unix"),
    ("alpha_string", est(alpha="0.1"), ["bad_number"], OPEN, "unix"),
    ("value_x_bool", j({"op": "value", "model": "m", "x": True}), ["bad_request"], OPEN,
     "unix"),
    ("train_passes_string", j({"op": "train", "model": "m", "estimator": "rp", "passes": "3"}),
     ["bad_request"], OPEN, "unix"),
    ("checkpoint_label_number", j({"op": "checkpoint", "model": "m", "label": 5}),
     ["bad_request"], OPEN, "unix"),
    ("id_object", j({"op": "hello", "id": {"a": 1}}), ["bad_request"], OPEN, "unix"),
    # empty arrays
    ("x_empty", obs(x=[]), ["bad_dimension"], OPEN, "unix"),
    ("batch_empty", j({"op": "observe", "model": "m", "batch": []}), ["bad_request"], OPEN,
     "unix"),
    ("xs_empty", j({"op": "value", "model": "m", "xs": []}), ["bad_request"], OPEN, "unix"),
    ("features_empty", create(features=[]), ["bad_param"], OPEN, "unix"),
    ("estimators_empty", create(estimators=[]), ["bad_param"], OPEN, "unix"),
    ("ranges_empty", create(ranges=[]), ["bad_dimension"], OPEN, "unix"),
    # dimensions
    ("dims_0", create(dims=0, ranges=[]), ["bad_param"], OPEN, "unix"),
    ("dims_negative", create(dims=-1, ranges=[]), ["bad_param"], OPEN, "unix"),
    ("dims_65", create(dims=65, ranges=[[0, 1]] * 65, features=[{"basis": "bias"}]),
     ["too_large"], OPEN, "unix"),
    ("dims_1e20", create(dims=1e20), ["too_large"], OPEN, "unix"),
    ("x_too_long", obs(x=[0.5, 0.5, 0.5]), ["bad_dimension"], OPEN, "unix"),
    ("features_over_limit", basis(basis="rbf", centers=65, width=0.1), ["too_large"], OPEN,
     "unix"),
    # unknown names
    ("basis_unknown", basis(basis="wavelet"), ["bad_param"], OPEN, "unix"),
    ("basis_missing", basis(centers=3), ["bad_request"], OPEN, "unix"),
    ("kind_unknown", est(kind="sarsa"), ["bad_param"], OPEN, "unix"),
    ("op_unknown", j({"op": "frobnicate"}), ["unknown_op"], OPEN, "unix"),
    ("op_empty", j({"op": ""}), ["unknown_op"], OPEN, "unix"),
    ("op_10k_bytes", j({"op": "o" * 10000}), ["unknown_op"], OPEN, "unix"),
    ("model_unknown", obs(model="nope"), ["no_such_model"], OPEN, "unix"),
    # parameter edges
    ("gamma_just_over_1", create(gamma=1.0000000001), ["bad_param"], OPEN, "unix"),
    ("gamma_negative_tiny", create(gamma=-1e-300), ["bad_param"], OPEN, "unix"),
    ("alpha_0", est(alpha=0), ["bad_param"], OPEN, "unix"),
    ("alpha_negative", est(alpha=-0.1), ["bad_param"], OPEN, "unix"),
    ("forget_0", est(kind="rls_td", forget=0), ["bad_param"], OPEN, "unix"),
    ("forget_over_1", est(kind="rls_td", forget=1.000001), ["bad_param"], OPEN, "unix"),
    ("delta_0", est(kind="rls_td", delta=0), ["bad_param"], OPEN, "unix"),
    ("lambda_negative", est(kind="td_lambda", **{"lambda": -0.1}), ["bad_param"], OPEN, "unix"),
    ("td_n_0", est(kind="td_n", n=0), ["bad_param"], OPEN, "unix"),
    ("replay_capacity_0", est(kind="replay", capacity=0), ["bad_param"], OPEN, "unix"),
    ("replay_batch_over_capacity", est(kind="replay", capacity=8, batch=9), ["bad_param"],
     OPEN, "unix"),
    ("replay_capacity_huge", est(kind="replay", capacity=100000000), ["too_large"], OPEN,
     "unix"),
    ("rbf_width_0", basis(basis="rbf", centers=3, width=0), ["bad_param"], OPEN, "unix"),
    ("poly_degree_256", basis(basis="poly", degree=256), ["bad_param"], OPEN, "unix"),
    ("tiles_size_0", basis(basis="tiles", tilings=2, tiles=4, size=0), ["bad_param"], OPEN,
     "unix"),
    ("max_sources_1025", create(max_sources=1025), ["bad_param"], OPEN, "unix"),
    ("dt_negative", obs(dt=-1), ["bad_param"], OPEN, "unix"),
    ("batch_over_max_batch", j({"op": "observe", "model": "m", "batch": [
        {"x": [0.5, 0.5], "r": 1, "terminal": True}] * (MAX_BATCH + 1)}), ["too_large"], OPEN,
     "unix"),
    # bulk counts that lie (errors in a bulk header close the connection: the payload that
    # follows cannot be told from requests)
    ("bulk_count_0", bulk_head(count=0), ["bad_param"], CLOSED, "unix"),
    ("bulk_count_negative", bulk_head(count=-1), ["bad_param"], CLOSED, "unix"),
    ("bulk_count_fraction", bulk_head(count=1.5), ["bad_param"], CLOSED, "unix"),
    ("bulk_count_string", bulk_head(count="1"), ["bad_request"], CLOSED, "unix"),
    ("bulk_count_1e20", bulk_head(count=1e20), ["too_large"], CLOSED, "unix"),
    ("bulk_count_over_max_batch", bulk_head(count=MAX_BATCH + 1), ["too_large"], CLOSED,
     "unix"),
    ("bulk_unknown_model", bulk_head(model="nope") + rec(), ["no_such_model"], CLOSED, "unix"),
    ("bulk_count_more_than_sent", bulk_head(count=3) + rec() + rec()[:20], ["truncated"],
     CLOSED, "eof"),
    ("bulk_count_fewer_than_sent", bulk_head(count=1) + rec() + rec() + b"\n", ["ok", "bad_json"],
     OPEN, "unix"),
    ("bulk_nan_record", bulk_head(count=2) + rec() + rec(r=float("nan")), ["bad_number"], OPEN,
     "unix"),
    ("bulk_inf_record", bulk_head(count=1) + rec(x=(float("-inf"), 0.5)), ["bad_number"], OPEN,
     "unix"),
    ("bulk_r_1e308", bulk_head(count=1) + rec(r=1e308), ["bad_number"], OPEN, "unix"),
    ("bulk_terminal_2", bulk_head(count=1) + rec(term=2.0), ["bad_param"], OPEN, "unix"),
    # before auth, on the guarded TCP listener
    ("tcp_hello_before_auth", j({"op": "hello"}), ["unauthorized"], OPEN, "tcp"),
    ("tcp_observe_before_auth", obs(), ["unauthorized"], OPEN, "tcp"),
    ("tcp_bulk_before_auth", bulk_head() + rec() + b"\n", ["unauthorized", "bad_json"], OPEN,
     "tcp"),
    ("tcp_auth_wrong_token", j({"op": "auth", "token": "wrong-token"}), ["unauthorized"],
     CLOSED, "tcp"),
    ("tcp_auth_token_prefix", j({"op": "auth", "token": TOKEN[:-1]}), ["unauthorized"], CLOSED,
     "tcp"),
    ("tcp_auth_token_longer", j({"op": "auth", "token": TOKEN + "0"}), ["unauthorized"], CLOSED,
     "tcp"),
    ("tcp_auth_token_number", j({"op": "auth", "token": 12345678}), ["unauthorized"], CLOSED,
     "tcp"),
    ("tcp_auth_no_token", j({"op": "auth"}), ["unauthorized"], CLOSED, "tcp"),
    ("tcp_auth_empty_token", j({"op": "auth", "token": ""}), ["unauthorized"], CLOSED, "tcp"),
    ("tcp_garbage_before_auth", GARBAGE + b"\n", ["bad_json"], OPEN, "tcp"),
]


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    """One worthd for the whole catalogue: Unix socket, and 127.0.0.1 guarded by a token."""
    tmp = tmp_path_factory.mktemp("adversarial")
    sockdir = tempfile.mkdtemp(prefix="worth-adv-")
    tok = tmp / "token"
    tok.write_text(TOKEN)
    tok.chmod(0o600)
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    sock = os.path.join(sockdir, "w.sock")
    d = Daemon([daemon_path(), "--socket", sock, "--db", str(tmp / "worthd.db"),
                "--max-line", str(MAX_LINE), "--max-batch", str(MAX_BATCH),
                "--listen", f"127.0.0.1:{port}", "--token-file", str(tok)], sock, str(tmp), 0)
    try:
        d.wait_ready()
        deadline = time.monotonic() + 10
        for _ in range(1000):
            try:
                Client(("127.0.0.1", port)).close()
                break
            except OSError:
                assert time.monotonic() < deadline, "TCP listener not up"
                time.sleep(0.01)
        c = d.client()
        for name in ("m", "b"):
            rep = c.call({"op": "model.create", "model": name, "dims": 2, "gamma": 0.9,
                          "ranges": [[0, 1], [0, 1]],
                          "features": [{"basis": "bias"}, {"basis": "raw"}],
                          "estimators": [{"name": "td", "kind": "td"},
                                         {"name": "rp", "kind": "replay"}]})
            assert rep.get("ok") is True, rep
        c.close()
        yield d, port
        d.shutdown()
    finally:
        if d.proc.poll() is None:
            d.stop()
        shutil.rmtree(sockdir, ignore_errors=True)


def codes_of(c, n):
    out = []
    for _ in range(n):
        rep = c.recv(timeout=10)
        if rep.get("ok") is True:
            out.append("ok")
        else:
            err = rep.get("error")
            assert isinstance(err, dict) and isinstance(err.get("message"), str) and \
                err["message"], rep
            out.append(err.get("code"))
    return out


def test_catalogue_is_large_enough():
    assert len(ROWS) >= 50
    assert len({r[0] for r in ROWS}) == len(ROWS), "row names repeat"


@pytest.mark.parametrize("data,expect,state,how", [r[1:] for r in ROWS],
                         ids=[r[0] for r in ROWS])
def test_bad_input(shared, data, expect, state, how):
    d, port = shared
    c = d.client(("127.0.0.1", port) if how == "tcp" else None)
    try:
        c.send_raw(data)
        if how == "eof":
            c.sock.shutdown(socket.SHUT_WR)
        assert codes_of(c, len(expect)) == expect
        if state == OPEN:
            if how == "tcp":  # still refused, still open
                c.err({"op": "hello"}, "unauthorized")
            else:
                c.assert_open()
        else:
            c.assert_closed()
    finally:
        c.close()
    assert d.proc.poll() is None, f"worthd died:\n{d.tail()}"
    fresh = d.client()
    fresh.assert_open()
    fresh.close()


def test_catalogue_left_nothing_behind(shared):
    d, _ = shared
    c = d.client()
    st = c.wait_applied("m")
    assert st["received"] == 0, st  # no bad input was ever accepted as a transition
    assert c.wait_applied("b")["received"] == 1  # bulk_count_fewer_than_sent: its one record
    names = sorted(m["model"] for m in c.ok({"op": "model.list"})["models"])
    assert names == ["b", "m"], names
    c.close()
    log = d.stderr
    for bad in ("internal", "CHECK", "AddressSanitizer", "runtime error"):
        assert bad not in log, f"{bad!r} in worthd's log:\n{d.tail()}"
