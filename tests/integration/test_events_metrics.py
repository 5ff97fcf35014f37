"""The events request, on_drift checkpoints and the Prometheus metrics listener (tests only).

The contract is schema/protocol.md: "events", "Metrics over HTTP", "stats" (diagnostics) and
model.create's `diagnostics`.  Each test starts its own worthd (conftest.daemon) with its
database in tmp_path; restarts reuse the same socket and database (Daemon.restart).  The
metrics listener is reached on 127.0.0.1 only, with http.client and with raw sockets; the
exposition format (text, version 0.0.4) is checked line by line against its grammar:

    # HELP <name> <docstring>          docstring escapes \\\\ and \\n
    # TYPE <name> counter|gauge|histogram|summary|untyped
    # <any other comment>
    <name>[{<label>="<value>",...[,]}] <value> [<timestamp>]

with names [a-zA-Z_:][a-zA-Z0-9_:]*, label names [a-zA-Z_][a-zA-Z0-9_]*, label values with
the escapes \\\\, \\" and \\n only, values as Go's strconv.ParseFloat reads them (including
+Inf, -Inf and NaN), timestamps as integers; blanks or tabs between tokens, blank lines
ignored, the last line ending in a line feed.  A family's TYPE and HELP come at most once,
before its first sample, and its samples are contiguous (as Prometheus's parser demands).
Every loop and every socket wait is bounded in count and in time.
"""
import http.client
import math
import re
import resource
import socket
import time

import numpy as np
import pytest

HTTP_TIMEOUT = 10.0   # seconds for any one HTTP exchange
QUIET = 0.3           # seconds without bytes that count as "nothing more is coming"
T_SHIFT = 4000        # the step from which the drift stream's reward is shifted by +1 sd
N_DRIFT = 6000


# helpers: models and streams -----------------------------------------------------------------

def small_spec(name, diagnostics=None):
    """1-D, bias + raw on [0, 1]; td and rls_td (two estimators)."""
    q = {"op": "model.create", "model": name, "dims": 1, "gamma": 0.9, "ranges": [[0, 1]],
         "features": [{"basis": "bias"}, {"basis": "raw"}],
         "estimators": [{"name": "td", "kind": "td", "alpha": 0.1},
                        {"name": "rls", "kind": "rls_td", "forget": 0.999, "delta": 100}]}
    if diagnostics is not None:
        q["diagnostics"] = diagnostics
    return q


def small_transitions(n, seed):
    """n transitions for small_spec(): a walk on [0, 1], every 10th terminal."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 1, size=n + 1)
    r = rng.normal(size=n)
    out = []
    for i in range(n):
        tr = {"x": [float(x[i])], "r": float(r[i])}
        if i % 10 == 9:
            tr["terminal"] = True
        else:
            tr["x_next"] = [float(x[i + 1])]
        out.append(tr)
    return out


def feed(c, model, trs, batch=25):
    """observe batches, one at a time; asserts each reply; returns the last seq."""
    last = None
    for i in range(0, len(trs), batch):
        rep = c.ok({"op": "observe", "model": model, "batch": trs[i:i + batch]}, timeout=30)
        assert rep["count"] == len(trs[i:i + batch]) and rep["durable"] is True, rep
        last = rep["seq"]
    return last


def drift_spec(name, on_drift=None):
    """test_diag's drift stream model: 5-state cycle, rbf 5 x 0.05 on [0, 4], td 0.02."""
    q = {"op": "model.create", "model": name, "dims": 1, "gamma": 0.9,
         "ranges": [[0, 4]], "features": [{"basis": "rbf", "centers": 5, "width": 0.05}],
         "estimators": [{"name": "td", "kind": "td", "alpha": 0.02}]}
    if on_drift is not None:
        q["diagnostics"] = {"on_drift": on_drift}
    return q


def drift_records(n=N_DRIFT, shift_at=T_SHIFT, seed=7):
    """Bulk records (x, r, x_next, terminal): N(0, 1) rewards, +1 from step shift_at on."""
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    x, xn = (t % 5).astype(float), ((t + 1) % 5).astype(float)
    r = rng.normal(size=n) + (t >= shift_at) * 1.0
    return np.column_stack([x, r, xn, np.zeros(n)]).astype("<f8")


def bulk(c, model, rec, chunk=500):
    """Sends rec in observe.bulk requests of chunk records; returns the last seq."""
    last = None
    for k in range(0, len(rec), chunk):
        part = rec[k:k + chunk]
        c.send({"op": "observe.bulk", "model": model, "count": len(part)})
        c.send_raw(part.tobytes())
        rep = c.recv(60)
        assert rep.get("ok") is True and rep["count"] == len(part), rep
        last = rep["seq"]
    return last


def values(c, model, probes):
    return [c.ok({"op": "value", "model": model, "x": x})["estimators"] for x in probes]


def events(c, **q):
    """The events request; asserts the reply's shape and every event's fields."""
    rep = c.ok({"op": "events", **q})
    assert set(rep) == {"ok", "events"}, rep
    evs = rep["events"]
    assert isinstance(evs, list), rep
    for e in evs:
        check_event(e)
    ids = [e["event"] for e in evs]
    assert ids == sorted(ids) and len(set(ids)) == len(ids), f"not oldest first: {evs}"
    ats = [e["at"] for e in evs]
    assert ats == sorted(ats), f"times not in order: {evs}"
    return evs


def check_event(e):
    assert isinstance(e, dict), e
    assert {"event", "at", "kind", "detail"} <= set(e) <= {"event", "at", "kind", "model",
                                                          "detail"}, e
    assert isinstance(e["event"], int) and not isinstance(e["event"], bool) and e["event"] > 0, e
    assert isinstance(e["at"], (int, float)) and not isinstance(e["at"], bool), e
    assert abs(e["at"] - time.time()) < 600, f"event time is not now-ish: {e}"
    assert e["kind"] in ("create", "checkpoint", "rollback", "drift", "recovered", "quarantined",
                         "drop", "start", "stop", "commit_failed", "audit", "retention",
                         "purge", "drift_cleared", "input_frozen", "input_frozen_cleared",
                         "input_out_of_range", "input_out_of_range_cleared", "source_silent",
                         "source_silent_cleared", "diverged"), e
    assert isinstance(e["detail"], dict), e
    if e["kind"] == "audit":
        assert {"op", "by", "role"} <= set(e["detail"]), e
    elif e["kind"] in ("start", "stop"):
        assert e.get("model") is None, f"daemon-wide event with a model: {e}"
    else:
        assert isinstance(e.get("model"), str) and e["model"], e


def model_events(evs):
    return [e for e in evs if e.get("model") is not None]


def daemon_wide(evs):
    """The daemon's own events, without the audit events of requests (test_ops.py has those)."""
    return [e for e in evs if e.get("model") is None and e["kind"] != "audit"]


def checkpoints(c, model):
    return c.ok({"op": "checkpoints", "model": model})["checkpoints"]


# events --------------------------------------------------------------------------------------

def test_events_create_checkpoint_rollback(daemon):
    d = daemon()
    c = d.client()
    t_begin = time.time()
    assert c.call(small_spec("m")) == {"ok": True, "model": "m", "features": 2}
    time.sleep(0.2)  # the create event's time and the later ones differ by at least this
    feed(c, "m", small_transitions(40, seed=1))
    cp = c.ok({"op": "checkpoint", "model": "m", "label": "ev"})
    assert cp["seq"] == 40, cp
    feed(c, "m", small_transitions(10, seed=2))
    c.wait_applied("m", 50)
    rb = c.ok({"op": "rollback", "model": "m", "checkpoint": cp["checkpoint"]})
    assert rb["undone"] == 10, rb
    t_end = time.time()

    evs = events(c, model="m")
    assert [e["kind"] for e in evs] == ["create", "checkpoint", "rollback"], evs
    assert all(e["model"] == "m" for e in evs), evs
    for e in evs:
        assert t_begin - 1 <= e["at"] <= t_end + 1, (e, t_begin, t_end)
    create, ckpt, rollb = evs
    assert ckpt["detail"] == {"checkpoint": cp["checkpoint"], "seq": 40, "automatic": False}, ckpt
    # the rollback's figures are not spelt out in protocol.md: whatever it names must agree
    if "checkpoint" in rollb["detail"]:
        assert rollb["detail"]["checkpoint"] == cp["checkpoint"], rollb
    if "seq" in rollb["detail"]:
        assert rollb["detail"]["seq"] == 40, rollb
    if "undone" in rollb["detail"]:
        assert rollb["detail"]["undone"] == 10, rollb
    assert ckpt["at"] - create["at"] >= 0.1, evs

    # since: by time; a since between the create and the checkpoint leaves those after it
    mid = (create["at"] + ckpt["at"]) / 2
    assert events(c, model="m", since=mid) == evs[1:]
    assert events(c, model="m", since=0) == evs
    assert events(c, model="m", since=rollb["at"] + 1) == []
    assert events(c, model="m", since=time.time() + 3600) == []
    # limit: the oldest `limit` of them
    assert events(c, model="m", limit=1) == evs[:1]
    assert events(c, model="m", limit=2) == evs[:2]
    assert events(c, model="m", limit=2, since=mid) == evs[1:3]
    assert events(c, model="m", limit=100000) == evs

    # without model: the daemon-wide start (this daemon's), with no model
    allev = events(c)
    dw = daemon_wide(allev)
    assert [e["kind"] for e in dw] == ["start"], allev
    assert dw[0]["at"] <= create["at"], allev
    for e in model_events(allev):  # if model events are listed too, they are these
        assert e in evs, (e, evs)

    # a second model's events are its own
    assert c.ok(small_spec("n"))["ok"] is True
    evn = events(c, model="n")
    assert [e["kind"] for e in evn] == ["create"] and evn[0]["model"] == "n", evn
    assert events(c, model="m") == evs

    # restart: the events are rows of the database
    d2 = d.restart()
    c = d2.client()
    after = events(c, model="m")
    assert after[:3] == evs, f"events changed across a restart:\n{evs}\n{after}"
    new = after[3:]
    assert "recovered" in [e["kind"] for e in new], after
    assert all(e["at"] >= rollb["at"] for e in new), after
    for e in new:
        if e["kind"] == "checkpoint":  # the shutdown checkpoint, if one was taken
            assert e["detail"].get("automatic") is True, e
    assert events(c, model="n")[:1] == evn, events(c, model="n")
    dw2 = daemon_wide(events(c))
    assert [e["kind"] for e in dw2] == ["start", "stop", "start"], dw2
    assert dw2[0] == dw[0], (dw, dw2)
    assert dw2[1]["at"] <= dw2[2]["at"], dw2
    assert events(c, model="m", since=mid) == after[1:]


def test_events_errors(daemon):
    d = daemon()
    c = d.client()
    assert c.call(small_spec("m"))["ok"] is True
    c.err({"op": "events", "model": "nope"}, "no_such_model")
    c.err({"op": "events", "model": "nope", "since": 0}, "no_such_model")
    c.err({"op": "events", "model": "m", "since": "yesterday"}, "bad_number")
    c.err({"op": "events", "model": "m", "since": "0"}, "bad_number")
    c.err({"op": "events", "since": "NaN"}, "bad_number")
    c.err({"op": "events", "model": "m", "since": None}, "bad_number")
    c.err(b'{"op":"events","model":"m","since":1e400}\n', "bad_number")
    c.err({"op": "events", "model": "m", "limit": 0}, "bad_param")
    c.err({"op": "events", "model": "m", "limit": 100001}, "bad_param")
    c.err({"op": "events", "limit": 0}, "bad_param")
    c.err({"op": "events", "limit": 1000000000}, "bad_param")
    c.err({"op": "events", "model": "m", "limit": -1}, "bad_param")
    # the connection stays open after each, and good requests still answer
    c.assert_open()
    assert len(events(c, model="m", limit=100000)) == 1
    assert [e["kind"] for e in events(c, model="m", limit=1)] == ["create"]


# on_drift ------------------------------------------------------------------------------------

def drift_event(c, model):
    evs = [e for e in events(c, model=model) if e["kind"] == "drift"]
    assert evs, f"model {model}: no drift event: {events(c, model=model)}"
    return evs


def test_on_drift_checkpoint(daemon, tmp_path):
    d = daemon("--checkpoint-every", 500)
    c = d.client()
    assert c.ok(drift_spec("with", "checkpoint"))["ok"] is True
    assert c.ok(drift_spec("without"))["ok"] is True
    assert c.ok(drift_spec("none", "none"))["ok"] is True
    spec = c.ok({"op": "model.get", "model": "with"})["spec"]
    assert spec["diagnostics"]["on_drift"] == "checkpoint", spec
    # a value other than "none" or "checkpoint", or of another type, is refused
    bad = drift_spec("bad", "rollback")
    rep = c.call(bad)
    assert rep.get("ok") is False and rep["error"]["code"] in ("bad_param", "bad_request"), rep
    bad["diagnostics"]["on_drift"] = 5
    rep = c.call(bad)
    assert rep.get("ok") is False and rep["error"]["code"] in ("bad_param", "bad_request"), rep

    rec = drift_records()
    for name in ("with", "without", "none"):
        assert bulk(c, name, rec[:T_SHIFT]) == T_SHIFT
        st = c.wait_applied(name, T_SHIFT, timeout=30)
        assert st["drift"]["alarms"] == 0 and st["drift"]["armed"] is True, st
    # before the shift: no drift, no pre-drift checkpoint
    assert all(e["label"] is None for e in checkpoints(c, "with")), checkpoints(c, "with")
    for name in ("with", "without", "none"):
        assert bulk(c, name, rec[T_SHIFT:]) == N_DRIFT
        st = c.wait_applied(name, N_DRIFT, timeout=30)
        assert st["drift"]["alarms"] >= 1, st

    # the model with on_drift: the event names a pre-drift checkpoint from before the onset
    ev = drift_event(c, "with")[0]
    det = ev["detail"]
    assert {"seq", "onset_seq", "step", "onset_step", "alarms", "pre_drift_checkpoint"} <= \
        set(det), ev
    assert det["alarms"] == 1, ev
    assert T_SHIFT < det["seq"] <= N_DRIFT and det["onset_seq"] <= det["seq"], ev
    # the onset is estimated (the CUSUM's last zero): near the first shifted transition
    assert abs(det["onset_seq"] - (T_SHIFT + 1)) <= 20, ev
    assert det["step"] == det["seq"] and det["onset_step"] == det["onset_seq"], ev  # no rollback
    pre_id = det["pre_drift_checkpoint"]
    assert isinstance(pre_id, int) and not isinstance(pre_id, bool), ev
    listed = checkpoints(c, "with")
    pre = [e for e in listed if e["label"] == "pre-drift"]
    assert pre, f"no checkpoint labelled pre-drift: {listed}"
    assert pre_id in [e["checkpoint"] for e in pre], (ev, listed)
    cp = next(e for e in pre if e["checkpoint"] == pre_id)
    assert cp["seq"] <= det["onset_seq"], (cp, ev)
    # automatic checkpoints come every 500 transitions: the newest before the onset is near
    assert det["onset_seq"] - cp["seq"] <= 500 and cp["seq"] % 500 == 0, (cp, ev)

    # rolling back to it restores the state learnt from the first cp["seq"] transitions
    probes = [[float(s)] for s in range(5)]
    drifted = values(c, "with", probes)
    rep = c.ok({"op": "rollback", "model": "with", "checkpoint": pre_id}, timeout=30)
    assert rep["checkpoint"] == pre_id and rep["seq"] == cp["seq"], rep
    assert rep["undone"] == N_DRIFT - cp["seq"], rep
    st = c.stats("with")
    assert (st["received"], st["applied"], st["queue"]) == (N_DRIFT, N_DRIFT, 0), st
    restored = values(c, "with", probes)
    assert restored != drifted, "the rollback changed nothing"
    assert [e["kind"] for e in events(c, model="with")][-1] == "rollback"
    assert checkpoints(c, "with")[0]["checkpoint"] == pre_id
    f = daemon(db=tmp_path / "fresh.db")
    fc = f.client()
    assert fc.ok(drift_spec("with", "checkpoint"))["ok"] is True
    if cp["seq"]:
        bulk(fc, "with", rec[:cp["seq"]])
        fc.wait_applied("with", cp["seq"], timeout=30)
    assert restored == values(fc, "with", probes), \
        "the pre-drift checkpoint does not hold the state after its seq's transitions"
    f.shutdown()

    # without on_drift (absent or "none"): the same alarm, no pre-drift checkpoint
    for name in ("without", "none"):
        for ev in drift_event(c, name):
            assert ev["detail"].get("pre_drift_checkpoint") is None, ev
        assert all(e["label"] != "pre-drift" for e in checkpoints(c, name)), \
            checkpoints(c, name)
        assert len([e for e in events(c, model=name) if e["kind"] == "checkpoint"
                    and not e["detail"].get("automatic")]) == 0, events(c, model=name)

    # the pre-drift checkpoint and the events survive a restart
    before = events(c, model="with")
    c = d.restart().client()
    assert events(c, model="with")[:len(before)] == before
    assert pre_id in [e["checkpoint"] for e in checkpoints(c, "with")
                      if e["label"] == "pre-drift"]
    assert values(c, "with", probes) == restored


def test_on_drift_without_an_earlier_checkpoint(daemon):
    """on_drift with no checkpoint before the onset (automatic ones off): the alarm is still
    recorded, names no pre-drift checkpoint, and no pre-drift checkpoint appears."""
    d = daemon("--checkpoint-every", 0)
    c = d.client()
    assert c.ok(drift_spec("with", "checkpoint"))["ok"] is True
    bulk(c, "with", drift_records())
    st = c.wait_applied("with", N_DRIFT, timeout=30)
    assert st["drift"]["alarms"] >= 1, st
    for ev in drift_event(c, "with"):
        assert ev["detail"].get("pre_drift_checkpoint") is None, ev
    assert checkpoints(c, "with") == []
    c.assert_open()


# metrics: the exposition format --------------------------------------------------------------

NAME = r"[a-zA-Z_:][a-zA-Z0-9_:]*"
LABEL = r"[a-zA-Z_][a-zA-Z0-9_]*"
LVALUE = r'"(?:[^"\\\n]|\\[\\"n])*"'
B = r"[ \t]"
GOFLOAT = (r"[+-]?(?:(?:\d[\d]*\.?\d*|\.\d+)(?:[eE][+-]?\d+)?"
           r"|0[xX](?:[0-9a-fA-F]+\.?[0-9a-fA-F]*|\.[0-9a-fA-F]+)[pP][+-]?\d+"
           r"|[iI][nN][fF](?:[iI][nN][iI][tT][yY])?)"
           r"|[nN][aA][nN]")
LABELS = rf"\{{{B}*(?:{LABEL}{B}*={B}*{LVALUE}{B}*(?:,{B}*{LABEL}{B}*={B}*{LVALUE}{B}*)*,?{B}*)?\}}"
SAMPLE_RE = re.compile(rf"{B}*(?P<name>{NAME}){B}*(?P<labels>{LABELS})?{B}*"
                       rf"(?<=[ \t}}])(?P<value>{GOFLOAT})(?:{B}+(?P<ts>-?\d+))?{B}*")
PAIR_RE = re.compile(rf"({LABEL}){B}*={B}*({LVALUE})")
HELP_RE = re.compile(rf"{B}*#{B}+HELP{B}+(?P<name>{NAME})(?:{B}+(?P<doc>.*))?")
TYPE_RE = re.compile(rf"{B}*#{B}+TYPE{B}+(?P<name>{NAME}){B}+"
                     rf"(?P<type>counter|gauge|histogram|summary|untyped){B}*")
DOC_RE = re.compile(r"(?:[^\\\n]|\\[\\n])*")


def unescape(v):
    out, i = [], 0
    for _ in range(len(v) + 1):
        if i >= len(v):
            break
        if v[i] == "\\":
            out.append({"\\": "\\", '"': '"', "n": "\n"}[v[i + 1]])
            i += 2
        else:
            out.append(v[i])
            i += 1
    return "".join(out)


def family_of(name, types):
    """The metric family a sample name belongs to (histogram and summary suffixes)."""
    for suffix in ("_bucket", "_sum", "_count"):
        if name.endswith(suffix):
            base = name[:-len(suffix)]
            if types.get(base) in ("histogram", "summary") and (
                    suffix != "_bucket" or types[base] == "histogram"):
                return base
    return name


def parse_exposition(body):
    """Parses a text exposition (bytes); asserts the grammar and the family rules.
    Returns (types, helps, samples): samples a list of (name, {label: value}, float)."""
    text = body.decode("utf-8")  # must be UTF-8
    assert text == "" or text.endswith("\n"), f"the last line has no line feed: {text[-80:]!r}"
    assert "\r" not in text, "carriage return in the exposition"
    types, helps, samples = {}, {}, []
    seen_families, current = set(), None
    seen_series = set()
    for lineno, line in enumerate(text.split("\n")[:-1], 1):
        where = f"line {lineno}: {line[:200]!r}"
        if line.strip(" \t") == "":
            continue
        if line.lstrip(" \t").startswith("#"):
            m = HELP_RE.fullmatch(line)
            if m:
                doc = m.group("doc") or ""
                assert DOC_RE.fullmatch(doc), f"bad escape in HELP: {where}"
                assert m.group("name") not in helps, f"second HELP: {where}"
                assert m.group("name") not in seen_families, f"HELP after samples: {where}"
                helps[m.group("name")] = doc
                continue
            rest = line.lstrip(" \t")[1:].lstrip(" \t")
            if rest.startswith("TYPE") and rest[4:5] in (" ", "\t"):
                m = TYPE_RE.fullmatch(line)
                assert m, f"malformed TYPE line: {where}"
                assert m.group("name") not in types, f"second TYPE: {where}"
                assert m.group("name") not in seen_families, f"TYPE after samples: {where}"
                types[m.group("name")] = m.group("type")
                continue
            assert not (rest.startswith("HELP") and rest[4:5] in (" ", "\t")), \
                f"malformed HELP line: {where}"
            continue  # any other comment
        m = SAMPLE_RE.fullmatch(line)
        assert m, f"not a sample line: {where}"
        labels = {}
        if m.group("labels"):
            for k, v in PAIR_RE.findall(m.group("labels")):
                assert k not in labels, f"label {k} twice: {where}"
                labels[k] = unescape(v[1:-1])
        v = m.group("value")
        value = float.fromhex(v) if "x" in v.lower() else float(v)
        name = m.group("name")
        fam = family_of(name, types)
        if fam != current:
            assert fam not in seen_families, f"family {fam} is not contiguous: {where}"
            seen_families.add(fam)
            current = fam
        series = (name, tuple(sorted(labels.items())))
        assert series not in seen_series, f"sample repeated: {where}"
        seen_series.add(series)
        samples.append((name, labels, value))
    return types, helps, samples


def test_exposition_parser_self_check():
    """The parser above accepts the format's own example and refuses broken lines."""
    good = (b'# HELP http_requests_total The total number of HTTP requests.\n'
            b'# TYPE http_requests_total counter\n'
            b'http_requests_total{method="post",code="200"} 1027 1395066363000\n'
            b'http_requests_total{method="post",code="400"}    3 1395066363000\n'
            b'\n'
            b'# Escaping in label values:\n'
            b'msdos_file_access_time_seconds{path="C:\\\\DIR\\\\FILE.TXT",error="Cannot find '
            b'file:\\n\\"FILE.TXT\\""} 1.458255915e9\n'
            b'metric_without_timestamp_and_labels 12.47\n'
            b'something_weird{problem="division by zero"} +Inf -3982045\n'
            b'# TYPE h histogram\n'
            b'h_bucket{le="0.05"} 24054\n'
            b'h_bucket{le="+Inf"} 144320\n'
            b'h_sum 53423\n'
            b'h_count 144320\n'
            b'nan_gauge NaN\n'
            b'neg -Inf\n')
    types, _, samples = parse_exposition(good)
    assert types == {"http_requests_total": "counter", "h": "histogram"}
    assert samples[2][1] == {"path": "C:\\DIR\\FILE.TXT", "error": 'Cannot find file:\n"FILE.TXT"'}
    assert math.isnan(samples[-2][2]) and samples[-1][2] == -math.inf
    for bad in [b"x 1", b"1x 2\n", b'x{a="b} 1\n', b'x{1a="b"} 1\n', b'x{a="\\t"} 1\n',
                b"x one\n", b"x 1 2.5\n", b"# TYPE x countr\n", b"x 1\ny 2\nx{a=\"b\"} 3\n",
                b"# TYPE x gauge\n# TYPE x gauge\n", b"x{a=\"1\",a=\"2\"} 1\n", b"x1\n",
                b"x 1\nx 2\n", b"x 0x10\n"]:
        with pytest.raises(AssertionError):
            parse_exposition(bad)


# metrics: HTTP helpers ----------------------------------------------------------------------

def http_request(port, method="GET", path="/metrics", body=None, headers=None):
    """One request through http.client; returns (status, headers (lower-case), body)."""
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=HTTP_TIMEOUT)
    try:
        conn.request(method, path, body=body, headers=headers or {})
        resp = conn.getresponse()
        data = resp.read()
        return resp.status, {k.lower(): v for k, v in resp.getheaders()}, data
    finally:
        conn.close()


def raw_exchange(port, data, byte_by_byte=False, head=False, until_close=False,
                 timeout=HTTP_TIMEOUT):
    """Sends data on a new loopback connection (one byte a write when byte_by_byte), then
    reads the response: until EOF, or until Content-Length bytes of body have arrived, or
    (head) until the headers are complete and QUIET seconds pass without more; with
    until_close, until EOF (or the timeout) whatever the headers say.
    Returns (status, headers, body, closed): closed is True when the peer ended the
    connection (EOF or reset) within the time."""
    s = socket.create_connection(("127.0.0.1", port), timeout=timeout)
    try:
        s.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        if byte_by_byte:
            for i in range(len(data)):
                s.sendall(data[i:i + 1])
                time.sleep(0.002)
        else:
            s.sendall(data)
        return read_response(s, head=head, until_close=until_close, timeout=timeout)
    finally:
        s.close()


def read_response(s, head=False, until_close=False, timeout=HTTP_TIMEOUT):
    deadline = time.monotonic() + timeout
    buf, closed = b"", False
    status, headers, body_at = None, None, None
    for _ in range(100000):
        if body_at is None and b"\r\n\r\n" in buf:
            body_at = buf.index(b"\r\n\r\n") + 4
            status, headers = parse_head(buf[:body_at - 4])
        if body_at is not None and not head and not until_close and \
                "content-length" in headers and \
                len(buf) - body_at >= int(headers["content-length"]):
            break
        left = deadline - time.monotonic()
        if left <= 0:
            break
        s.settimeout(min(left, QUIET) if (head and body_at is not None) else left)
        try:
            chunk = s.recv(65536)
        except socket.timeout:
            if head and body_at is not None:
                break  # QUIET seconds with nothing after a HEAD response's headers
            continue
        except ConnectionResetError:
            closed = True
            break
        if not chunk:
            closed = True
            break
        buf += chunk
    if body_at is None and b"\r\n\r\n" in buf:
        body_at = buf.index(b"\r\n\r\n") + 4
        status, headers = parse_head(buf[:body_at - 4])
    assert body_at is not None, f"no complete response head within {timeout} s: {buf[:300]!r}"
    return status, headers, buf[body_at:], closed


def parse_head(head):
    lines = head.split(b"\r\n")
    m = re.fullmatch(rb"HTTP/1\.[01] (\d{3})(?: [^\r\n]*)?", lines[0])
    assert m, f"bad status line {lines[0][:200]!r}"
    headers = {}
    for ln in lines[1:]:
        k, sep, v = ln.partition(b":")
        assert sep and re.fullmatch(rb"[!#$%&'*+.^_`|~0-9A-Za-z-]+", k), f"bad header {ln!r}"
        headers[k.decode().lower()] = v.strip(b" \t").decode("latin-1")
    return int(m.group(1)), headers


def wait_listening(port, timeout=10.0):
    deadline = time.monotonic() + timeout
    for _ in range(int(timeout / 0.01) + 10):
        try:
            socket.create_connection(("127.0.0.1", port), timeout=1.0).close()
            return
        except OSError:
            if time.monotonic() > deadline:
                break
            time.sleep(0.01)
    raise AssertionError(f"nothing listening on 127.0.0.1:{port} within {timeout} s")


def scrape(port):
    """GET /metrics; asserts 200 and the content type; returns the parsed exposition."""
    status, headers, body = http_request(port)
    assert status == 200, (status, body[:300])
    ct = headers.get("content-type", "")
    assert ct.startswith("text/plain; version=0.0.4"), ct
    return parse_exposition(body)


def metrics_daemon(daemon, port, *args):
    d = daemon("--metrics", f"127.0.0.1:{port}", *args)
    wait_listening(port)
    return d


DOCUMENTED = {  # name: (type, label names)
    "worth_transitions_received_total": ("counter", {"model"}),
    "worth_transitions_applied_total": ("counter", {"model"}),
    "worth_queue_depth": ("gauge", {"model"}),
    "worth_td_error_rms": ("gauge", {"model", "estimator"}),
    "worth_realised_return_rms": ("gauge", {"model", "estimator"}),
    "worth_estimator_ok": ("gauge", {"model", "estimator"}),
    "worth_headline": ("gauge", {"model", "estimator"}),
    "worth_drift_alarms_total": ("counter", {"model"}),
    "worth_checkpoints": ("gauge", {"model"}),
    "worth_checkpoint_age_seconds": ("gauge", {"model"}),
    "worth_model_damaged": ("gauge", {"model"}),
    "worth_commit_seconds": ("histogram", set()),
}


def series(samples, name, **labels):
    """The value of the one sample name{labels} (exact label set)."""
    got = [v for n, lb, v in samples if n == name and lb == labels]
    assert len(got) == 1, f"{name}{labels}: {len(got)} samples; have " \
        f"{[(n, lb) for n, lb, _ in samples if n == name]}"
    return got[0]


def close(a, b):
    return math.isclose(a, b, rel_tol=1e-6, abs_tol=1e-9)


def check_histogram(samples, name):
    """Buckets in increasing le ending in +Inf, non-decreasing; count == +Inf bucket.
    Returns (count, sum)."""
    buckets = [(lb, v) for n, lb, v in samples if n == name + "_bucket"]
    assert buckets, f"no {name}_bucket lines"
    assert all(set(lb) == {"le"} for lb, _ in buckets), buckets
    les = [float(lb["le"].replace("Inf", "inf")) for lb, _ in buckets]
    assert buckets[-1][0]["le"] == "+Inf", f"last bucket is not le=\"+Inf\": {buckets}"
    assert les == sorted(les) and len(set(les)) == len(les), les
    counts = [v for _, v in buckets]
    assert counts == sorted(counts), f"buckets decrease: {buckets}"
    assert all(v >= 0 and v == int(v) for v in counts), buckets
    count = series(samples, name + "_count")
    total = series(samples, name + "_sum")
    assert count == counts[-1], (count, buckets)
    assert total >= 0 and (count > 0 or total == 0), (count, total)
    return count, total


def check_model_metrics(c, samples, model, estimators, cp_time):
    st = c.stats(model)
    assert series(samples, "worth_transitions_received_total", model=model) == st["received"]
    assert series(samples, "worth_transitions_applied_total", model=model) == st["applied"]
    assert series(samples, "worth_queue_depth", model=model) == st["queue"]
    assert series(samples, "worth_drift_alarms_total", model=model) == st["drift"]["alarms"]
    assert series(samples, "worth_checkpoints", model=model) == len(checkpoints(c, model))
    if cp_time is not None:
        age = series(samples, "worth_checkpoint_age_seconds", model=model)
        assert 0 <= age <= time.time() - cp_time + 5, (age, cp_time)
    else:  # no checkpoint yet: no age, or one that is not a finite figure of an actual one
        ages = [v for n, lb, v in samples
                if n == "worth_checkpoint_age_seconds" and lb == {"model": model}]
        assert len(ages) <= 1, ages
    for est in estimators:
        e = st["estimators"][est]
        assert close(series(samples, "worth_td_error_rms", model=model, estimator=est),
                     e["td_rms"]), (est, e)
        rr = series(samples, "worth_realised_return_rms", model=model, estimator=est)
        want = e["realised"]["rms_window"]
        if want is None:
            assert math.isnan(rr), (est, rr, e)
        else:
            assert close(rr, want), (est, rr, e)
        ok = series(samples, "worth_estimator_ok", model=model, estimator=est)
        assert ok == (1 if e["health"] == "ok" else 0), (est, ok, e)
        head = series(samples, "worth_headline", model=model, estimator=est)
        assert head == (1 if st["primary"]["name"] == est else 0), (est, head, st["primary"])
    got = {lb["estimator"] for n, lb, _ in samples
           if n == "worth_td_error_rms" and lb.get("model") == model}
    assert got == set(estimators), got


# metrics: tests ------------------------------------------------------------------------------

def test_metrics_content(daemon, free_port):
    d = metrics_daemon(daemon, free_port)
    c = d.client()
    assert c.call(small_spec("m"))["ok"] is True
    one = {"op": "model.create", "model": "other.model-1", "dims": 1, "gamma": 0.5,
           "ranges": [[0, 1]], "features": [{"basis": "bias"}],
           "estimators": [{"name": "only", "kind": "td"}]}
    assert c.call(one)["ok"] is True
    # before any transition: the models are listed, the histogram is well-formed
    types, _, samples = scrape(free_port)
    assert series(samples, "worth_transitions_received_total", model="m") == 0
    check_histogram(samples, "worth_commit_seconds")

    feed(c, "m", small_transitions(300, seed=3))
    cp_time = time.time()
    c.ok({"op": "checkpoint", "model": "m", "label": "metrics"})
    feed(c, "m", small_transitions(100, seed=4))
    feed(c, "other.model-1", [{"x": [0.5], "r": 1.0, "terminal": True}] * 20)
    c.wait_applied("m", 400)
    c.wait_applied("other.model-1", 20)
    st = c.stats("m")
    assert st["estimators"]["td"]["realised"]["n"] > 0, st  # premise: returns were compared

    types, helps, samples = scrape(free_port)
    for name, (typ, labels) in DOCUMENTED.items():
        assert types.get(name) == typ, f"{name}: TYPE {types.get(name)}, documented {typ}"
        fam = [(n, lb) for n, lb, _ in samples if family_of(n, types) == name]
        assert fam, f"{name}: no samples"
        for n, lb in fam:
            if typ == "histogram" and n == name + "_bucket":
                assert set(lb) == labels | {"le"}, (n, lb)
            else:
                assert set(lb) == labels, f"{n}: labels {sorted(lb)}, documented {sorted(labels)}"
    for name in ("worth_transitions_received_total", "worth_checkpoints"):
        assert {lb["model"] for n, lb, _ in samples if n == name} >= {"m", "other.model-1"}
    check_model_metrics(c, samples, "m", ["td", "rls"], cp_time)
    check_model_metrics(c, samples, "other.model-1", ["only"], None)
    n1, s1 = check_histogram(samples, "worth_commit_seconds")
    assert n1 > 0, "commits were made but worth_commit_seconds counts none"

    # more ingest: counters follow stats, the histogram counts more commits
    feed(c, "m", small_transitions(50, seed=5), batch=5)
    c.wait_applied("m", 450)
    types, _, samples = scrape(free_port)
    check_model_metrics(c, samples, "m", ["td", "rls"], cp_time)
    n2, s2 = check_histogram(samples, "worth_commit_seconds")
    assert n2 >= n1 + 10 and s2 >= s1, (n1, n2, s1, s2)

    # a raw-socket GET: the same document, HTTP/1.x framing
    status, headers, body, _ = raw_exchange(
        free_port, b"GET /metrics HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n")
    assert status == 200, (status, body[:300])
    assert headers.get("content-type", "").startswith("text/plain; version=0.0.4"), headers
    if "content-length" in headers:
        assert int(headers["content-length"]) == len(body), (headers, len(body))
    types, _, samples = parse_exposition(body)
    assert series(samples, "worth_transitions_received_total", model="m") == 450
    # HTTP/1.0 too
    status, headers, body, _ = raw_exchange(free_port, b"GET /metrics HTTP/1.0\r\n\r\n")
    assert status == 200, (status, body[:300])
    parse_exposition(body)

    # a dropped model is no longer reported
    assert c.call({"op": "model.drop", "model": "other.model-1"}) == {"ok": True, "persisted": True}
    _, _, samples = scrape(free_port)
    assert all(lb.get("model") != "other.model-1" for _, lb, _ in samples), samples


def test_metrics_methods_and_paths(daemon, free_port):
    d = metrics_daemon(daemon, free_port)
    c = d.client()
    assert c.call(small_spec("m"))["ok"] is True
    status, headers, body = http_request(free_port, "HEAD")
    assert status == 200 and body == b"", (status, body[:200])
    assert headers.get("content-type", "").startswith("text/plain; version=0.0.4"), headers
    # on the wire: a HEAD response carries no body at all
    status, headers, body, _ = raw_exchange(
        free_port, b"HEAD /metrics HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n",
        head=True)
    assert status == 200 and body == b"", (status, headers, body[:200])
    for path in ("/other", "/", "/metrics/x", "/metricsx"):
        status, _, _ = http_request(free_port, "GET", path)
        assert status == 404, (path, status)
    for method in ("POST", "PUT", "DELETE"):
        status, _, _ = http_request(free_port, method, "/metrics", body=b"",
                                    headers={"Content-Length": "0"})
        assert status == 405, (method, status)
    scrape(free_port)
    c.assert_open()


MALFORMED = {
    "garbage": b"\x16\x03\x01\x00\xa5\x01\x00\x00\xa1\x03\x03\xff\xfe garbage\x80\r\n\r\n",
    "version_9_9": b"GET /metrics HTTP/9.9\r\nHost: 127.0.0.1\r\n\r\n",
    "no_version": b"GET /metrics\r\nHost: 127.0.0.1\r\n\r\n",
    "long_header": b"GET /metrics HTTP/1.1\r\nHost: 127.0.0.1\r\nX-Pad: " + b"a" * 9000 +
                   b"\r\n\r\n",
    "100_headers": b"GET /metrics HTTP/1.1\r\nHost: 127.0.0.1\r\n" +
                   b"".join(b"X-H%d: v\r\n" % i for i in range(100)) + b"\r\n",
    "nul_byte": b"GET /met\x00rics HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n",
}


def assert_alive(d, port):
    assert d.proc.poll() is None, f"worthd exited {d.proc.returncode}:\n{d.tail()}"
    c = d.client()
    c.assert_open()
    c.close()
    scrape(port)


@pytest.mark.parametrize("case", sorted(MALFORMED))
def test_metrics_malformed_request(daemon, free_port, case):
    """Each malformed request: a 400, then the end of the connection; worthd stays up."""
    d = metrics_daemon(daemon, free_port)
    status, headers, body, closed = raw_exchange(free_port, MALFORMED[case], until_close=True)
    assert status == 400, (case, status, headers, body[:200])
    assert closed, f"{case}: connection still open {HTTP_TIMEOUT} s after the 400"
    assert_alive(d, free_port)
    # and once more on the same daemon, after a good scrape
    status, _, _, closed = raw_exchange(free_port, MALFORMED[case], until_close=True)
    assert status == 400 and closed, (case, status)
    assert_alive(d, free_port)


def test_metrics_byte_by_byte(daemon, free_port):
    d = metrics_daemon(daemon, free_port)
    status, headers, body, _ = raw_exchange(
        free_port, b"GET /metrics HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n",
        byte_by_byte=True)
    assert status == 200, (status, body[:300])
    assert headers.get("content-type", "").startswith("text/plain; version=0.0.4"), headers
    parse_exposition(body)
    assert_alive(d, free_port)


def test_metrics_idle_and_half_clients(daemon, free_port):
    d = metrics_daemon(daemon, free_port)
    c = d.client()
    assert c.call(small_spec("m"))["ok"] is True
    idle = [socket.create_connection(("127.0.0.1", free_port), timeout=HTTP_TIMEOUT)
            for _ in range(3)]
    try:
        # half a request, then nothing: the daemon must not wait on it
        idle[1].sendall(b"GET /metr")
        idle[2].sendall(b"GET /metrics HTTP/1.1\r\nHost: 127.0.0.1\r\n")
        t0 = time.monotonic()
        _, _, samples = scrape(free_port)
        assert time.monotonic() - t0 < 5, "a scrape waited on idle clients"
        assert series(samples, "worth_transitions_received_total", model="m") == 0
        # ingest goes on meanwhile ("the listener never affects ingest")
        feed(c, "m", small_transitions(100, seed=6))
        c.wait_applied("m", 100)
        _, _, samples = scrape(free_port)
        assert series(samples, "worth_transitions_applied_total", model="m") == 100
    finally:
        for s in idle:
            s.close()
    # half a request and then the end of the connection
    for part in (b"GET /metr", b"GET /metrics HTTP/1.1\r\nHost: 127.0.0.1\r\n", b"G"):
        s = socket.create_connection(("127.0.0.1", free_port), timeout=HTTP_TIMEOUT)
        s.sendall(part)
        s.close()
    s = socket.create_connection(("127.0.0.1", free_port), timeout=HTTP_TIMEOUT)
    s.sendall(b"GET /metrics HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n")
    s.shutdown(socket.SHUT_RDWR)  # a client that asks and leaves before the answer
    s.close()
    assert_alive(d, free_port)
    feed(c, "m", small_transitions(10, seed=7))
    c.wait_applied("m", 110)


def test_metrics_many_scrapes_while_ingesting(daemon, free_port):
    d = metrics_daemon(daemon, free_port)
    c = d.client()
    assert c.call(small_spec("m"))["ok"] is True
    trs = small_transitions(400, seed=8)
    last = 0
    for k in range(0, 400, 40):
        feed(c, "m", trs[k:k + 40], batch=10)
        _, _, samples = scrape(free_port)
        got = series(samples, "worth_transitions_received_total", model="m")
        assert last <= got <= k + 40, (last, got, k)
        last = got
    c.wait_applied("m", 400)
    _, _, samples = scrape(free_port)
    assert series(samples, "worth_transitions_received_total", model="m") == 400
    assert series(samples, "worth_transitions_applied_total", model="m") == 400
    assert series(samples, "worth_queue_depth", model="m") == 0


def test_metrics_non_loopback_without_token_refused(daemon, free_port):
    d = daemon("--metrics", f"0.0.0.0:{free_port}", expect_rc=None, ready=False)
    rc = d.wait_exit(10)
    assert rc is not None, "worthd started with --metrics 0.0.0.0 and no --token-file"
    assert rc != 0, f"worthd exited 0:\n{d.tail()}"
    assert d.stderr.strip(), "refused without a word on stderr"
    # it never accepted on its socket
    s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    try:
        s.settimeout(1.0)
        with pytest.raises(OSError):
            s.connect(d.sock)
    finally:
        s.close()
    # a daemon that refused to start did not start: the database records no start (nor stop)
    # of it; the next daemon on the same database lists only its own start
    ok = daemon()
    dw = daemon_wide(events(ok.client()))
    assert [e["kind"] for e in dw] == ["start"], \
        f"the refused start left daemon-wide events behind: {dw}"


def test_metrics_bad_address_refused(daemon, free_port):
    # numeric addresses only: nothing here may make worthd resolve a name
    for arg in ("127.0.0.1", "127.0.0.1:", "127.0.0.1:99999", "127.0.0.1:port", ":"):
        d = daemon("--metrics", arg, expect_rc=None, ready=False)
        rc = d.wait_exit(10)
        assert rc is not None and rc != 0, (arg, rc, d.tail())


def test_metrics_connection_flood_does_not_block_ingest(daemon, free_port):
    """"The listener never affects ingest": many idle metrics connections (more than worthd
    has file descriptors, with its limit lowered to 128 for this test) must not keep new
    clients off the Unix socket, nor stop ingest on an open connection."""
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    resource.setrlimit(resource.RLIMIT_NOFILE, (min(128, hard), hard))
    try:
        d = daemon("--metrics", f"127.0.0.1:{free_port}")  # inherits the lower limit
    finally:
        resource.setrlimit(resource.RLIMIT_NOFILE, (soft, hard))
    wait_listening(free_port)
    c = d.client()
    assert c.call(small_spec("m"))["ok"] is True
    idle = []
    try:
        for _ in range(200):
            idle.append(socket.create_connection(("127.0.0.1", free_port),
                                                 timeout=HTTP_TIMEOUT))
        time.sleep(0.3)  # let worthd accept what it can
        feed(c, "m", small_transitions(50, seed=9))
        c.wait_applied("m", 50)
        late = d.client()  # a new client while the idle connections are held
        late.assert_open()
        feed(late, "m", small_transitions(50, seed=10))
        late.wait_applied("m", 100)
    finally:
        for s in idle:
            s.close()
    assert_alive(d, free_port)
