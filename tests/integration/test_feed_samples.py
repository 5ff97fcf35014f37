"""`worth feed` of a plant historian's exports against a real worthd (tests only).

$WORTH_CLI is the client under test, $WORTH_DAEMON the daemon.  The same samples are written
as a wide file (one row a sample, ISO-8601 times with offsets), a long file (time, tag,
value rows, another spelling of the same instants, the tags of a time in any order) and the
transitions worthd must pair from them, hand-paired here by the rule of schema/protocol.md
("Samples": reward "next", the transition A -> B carries B's r, t is A's and dt B's less A's);
the three models must answer bit-identical values (==, every estimator) at several states.  A
2-hour outage makes no transition across it; a feed killed (client, or worthd with SIGKILL)
and run again ends identical to one clean feed; every bad input answers its stable code and
loses nothing acknowledged before it.  Every CLI run and every wait is bounded.
"""
import json
import os
import random
import signal
import subprocess
import time
from datetime import datetime, timedelta, timezone

import pytest

from test_cli import cli_path, fails, ok, one_json, run

T0 = datetime(2026, 3, 28, 22, 0, tzinfo=timezone.utc)  # across the spring DST change in CET
PERIOD = 60
BERLIN_OFFSETS = (timedelta(hours=1), timedelta(hours=2))
STATES = [{"level": 4.2, "demand": 180, "pressure": 2.5},
          {"level": 0.5, "demand": 20, "pressure": 1.0},
          {"level": 11.0, "demand": 390, "pressure": 5.9},
          {"level": 13.0, "demand": -5, "pressure": 3.0}]  # out of range: clipped in all


def spec(name, **kw):
    s = {"model": name, "gamma": 0.95,
         "dims": [{"name": "level", "unit": "m", "range": [0, 12]},
                  {"name": "demand", "unit": "m3/h", "range": [0, 400]},
                  {"name": "pressure", "unit": "bar", "range": [0, 6]}],
         "reward_unit": "EUR", "period_s": PERIOD,
         "samples": {"reward": "next", "max_gap_periods": 3},
         "features": [{"basis": "bias"}, {"basis": "rbf", "centers": 3, "width": 0.3}],
         "estimators": [{"name": "td", "kind": "td", "alpha": 0.05},
                        {"name": "tdn", "kind": "td_n", "n": 3, "alpha": 0.05},
                        {"name": "rls", "kind": "rls_td", "forget": 0.999},
                        {"name": "mc", "kind": "mc", "horizon": 20, "alpha": 0.02}]}
    s.update(kw)
    return s


def create(d, tmp_path, name, **kw):
    f = tmp_path / f"{name}.json"
    f.write_text(json.dumps(spec(name, **kw)))
    ok(run(d, "create", f))


def make_samples(n, sources=("pump-1", "pump-2"), seed=15, outage_at=None):
    """n samples per source, interleaved in time order: dicts with source, t (datetime), x, r.
    outage_at: index after which each source is silent for 2 hours."""
    rnd = random.Random(seed)
    out = []
    for i in range(n):
        for k, s in enumerate(sources):
            t = T0 + timedelta(seconds=PERIOD * i + 7 * k)
            if outage_at is not None and i > outage_at:
                t += timedelta(hours=2)
            x = [round(rnd.uniform(0, 12), 6), round(rnd.uniform(0, 400), 4),
                 round(rnd.uniform(0, 6), 6)]
            out.append({"source": s, "t": t, "x": x, "r": round(rnd.uniform(-3, 1), 6),
                        "q": "good"})
    return out


def iso_berlin(t):
    """t in Europe/Berlin's offset of that instant (CET +01:00 or CEST +02:00, EU rule 2026)."""
    change = datetime(2026, 3, 29, 1, 0, tzinfo=timezone.utc)
    off = BERLIN_OFFSETS[1] if t >= change else BERLIN_OFFSETS[0]
    return t.astimezone(timezone(off)).isoformat()


def write_wide(path, samples, time_fmt=iso_berlin, sep=",", dec=".", header=None, extra=True):
    cols = header or ["time", "source", "level [m]", "demand", "pressure [bar]", "r", "quality",
                      "note"]
    lines = [sep.join(cols)]
    for s in samples:
        num = [repr(v).replace(".", dec) for v in s["x"] + [s["r"]]]
        row = [time_fmt(s["t"]), s["source"], num[0], num[1], num[2], num[3], s["q"], "n"]
        lines.append(sep.join(row if extra else row[:len(cols)]))
    path.write_text("\n".join(lines) + "\n")


def write_long(path, samples, seed=3):
    """time, tag, value, source, quality; the tags of each sample in a random order, times in
    UTC (Z) rather than the wide file's local offsets."""
    rnd = random.Random(seed)
    lines = ["time,tag,value,source,quality"]
    for s in samples:
        t = s["t"].astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
        rows = [(name, repr(v)) for name, v in zip(("level", "demand", "pressure"), s["x"])]
        rows.append(("r", repr(s["r"])))
        rnd.shuffle(rows)
        for tag, v in rows:
            lines.append(f"{t},{tag},{v},{s['source']},{s['q']}")
    path.write_text("\n".join(lines) + "\n")


def hand_paired(samples, max_gap=3 * PERIOD):
    """The transitions worthd pairs from samples (schema/protocol.md, "Samples"), in the order
    it makes them: at the arrival of each sample after the first of its chain."""
    last, out = {}, []
    for s in samples:
        if s["q"] != "good":
            continue
        a = last.get(s["source"])
        ts = s["t"].timestamp()
        if a is not None and ts - a["t"].timestamp() <= max_gap:
            out.append({"x": a["x"], "r": s["r"], "xn": s["x"], "source": s["source"],
                        "t": a["t"].timestamp(), "dt": ts - a["t"].timestamp()})
        last[s["source"]] = s
    return out


def write_transitions(path, trans):
    lines = ["x0,x1,x2,r,xn0,xn1,xn2,source,t,dt"]
    for tr in trans:
        lines.append(",".join([repr(v) for v in tr["x"]] + [repr(tr["r"])] +
                              [repr(v) for v in tr["xn"]] +
                              [tr["source"], repr(tr["t"]), repr(tr["dt"])]))
    path.write_text("\n".join(lines) + "\n")


def values(c, model):
    out = []
    for x in STATES:
        rep = c.ok({"op": "value", "model": model, "x": [x["level"], x["demand"], x["pressure"]]})
        out.append(rep["estimators"])
    return out


def summary(p):
    return one_json(p)


# the same data in three forms ----------------------------------------------------------------


def test_wide_long_and_hand_paired_give_identical_weights(daemon, tmp_path):
    d = daemon()
    for m in ("wide", "long", "trans"):
        create(d, tmp_path, m)
    smp = make_samples(300)
    wide, lng, tr = tmp_path / "wide.csv", tmp_path / "long.csv", tmp_path / "trans.csv"
    write_wide(wide, smp)
    write_long(lng, smp)
    pairs = hand_paired(smp)
    assert len(pairs) == 2 * 299
    write_transitions(tr, pairs)
    sw = summary(ok(run(d, "--json", "feed", "wide", wide)))
    assert sw["form"] == "wide" and sw["fed"] == 600 and sw["paired"] == 598, sw
    assert sw["logged"] == 0 and sw["gaps"] == 0 and sw["ignored_columns"] == ["note"], sw
    sl = summary(ok(run(d, "--json", "feed", "long", lng)))
    assert sl["form"] == "long" and sl["fed"] == 600 and sl["paired"] == 598, sl
    assert sl["rows"] == 4 * 600, sl
    st = summary(ok(run(d, "--json", "feed", "trans", tr)))
    assert st["form"] == "transitions" and st["fed"] == 598, st
    c = d.client()
    for m in ("wide", "long", "trans"):
        assert c.wait_applied(m, 598)["received"] == 598
    vw, vl, vt = values(c, "wide"), values(c, "long"), values(c, "trans")
    assert vw == vl, (vw, vl)  # bit-identical: == on the doubles JSON carries (17 digits)
    assert vw == vt, (vw, vt)
    sw_st, st_st = c.stats("wide"), c.stats("trans")
    assert sw_st["clipped"] == st_st["clipped"]
    for e in ("td", "tdn", "rls", "mc"):
        assert sw_st["estimators"][e]["updates"] == st_st["estimators"][e]["updates"]
    # The human summary says what was paired and what was not read.
    p = ok(run(d, "feed", "wide", wide))
    assert "fed 600 rows" in p.stdout and "600 already logged" in p.stdout, p.stdout
    assert "columns not read: note" in p.stderr, p.stderr
    assert values(c, "wide") == vw  # the resend changed nothing


def test_epoch_ms_seconds_and_decimal_comma_read_the_same(daemon, tmp_path):
    d = daemon()
    for m in ("iso", "ms", "s", "eu"):
        create(d, tmp_path, m)
    smp = make_samples(80, sources=("a",))
    files = {"iso": (iso_berlin, ",", "."),
             "ms": (lambda t: str(int(t.timestamp() * 1000)), ",", "."),
             "s": (lambda t: str(int(t.timestamp())), ",", "."),
             "eu": (lambda t: t.astimezone(timezone(timedelta(hours=1))).strftime(
                 "%Y-%m-%d %H:%M:%S+0100"), ";", ",")}
    for m, (fmt, sep, dec) in files.items():
        f = tmp_path / f"{m}.csv"
        write_wide(f, smp, time_fmt=fmt, sep=sep, dec=dec)
        args = ["--delimiter", ";", "--decimal-comma"] if m == "eu" else []
        assert summary(ok(run(d, "--json", "feed", m, f, *args)))["paired"] == 79
    c = d.client()
    ref = None
    for m in files:
        c.wait_applied(m, 79)
        v = values(c, m)
        assert ref is None or v == ref, m
        ref = v
    # declared units: ms read as ms; seconds declared for a simulation clock starting at 0
    create(d, tmp_path, "sim")
    f = tmp_path / "sim.csv"
    write_wide(f, smp, time_fmt=lambda t: str(int(t.timestamp() - T0.timestamp())))
    fails(run(d, "feed", "sim", f), 2, "implausible_time", f"{f}:2:")
    assert summary(ok(run(d, "--json", "feed", "sim", f, "--time-format", "s")))["paired"] == 79
    f2 = tmp_path / "ms2.csv"
    write_wide(f2, smp, time_fmt=lambda t: str(int(t.timestamp() * 1000)))
    fails(run(d, "feed", "iso", f2, "--time-format", "iso"), 2, "bad_time")


# gaps, quality -------------------------------------------------------------------------------


def test_outage_of_two_hours_makes_no_transition_across_it(daemon, tmp_path):
    d = daemon()
    create(d, tmp_path, "m")
    create(d, tmp_path, "ref")
    smp = make_samples(100, sources=("a",), outage_at=49)
    f = tmp_path / "outage.csv"
    write_wide(f, smp)
    s = summary(ok(run(d, "--json", "feed", "m", f)))
    assert s["fed"] == 100 and s["gaps"] == 1 and s["paired"] == 98, s
    pairs = hand_paired(smp)
    assert len(pairs) == 98 and all(p["dt"] == PERIOD for p in pairs)
    tr = tmp_path / "ref.csv"
    write_transitions(tr, pairs)
    ok(run(d, "feed", "ref", tr))
    c = d.client()
    assert c.wait_applied("m", 98)["received"] == 98
    c.wait_applied("ref", 98)
    assert values(c, "m") == values(c, "ref")
    p = ok(run(d, "feed", "m", f))
    assert "0 transitions paired, 0 gaps" in p.stdout and "100 already logged" in p.stdout


def test_bad_quality_rows_are_left_out_and_counted(daemon, tmp_path):
    d = daemon()
    for m in ("wide", "long", "ref"):
        create(d, tmp_path, m)
    smp = make_samples(60, sources=("a",))
    for i in (10, 11, 30):
        smp[i]["q"] = "BAD"
    wide, lng = tmp_path / "w.csv", tmp_path / "l.csv"
    write_wide(wide, smp)
    write_long(lng, smp)
    s = summary(ok(run(d, "--json", "feed", "wide", wide)))
    assert s["bad_quality"] == 3 and s["fed"] == 57, s
    s = summary(ok(run(d, "--json", "feed", "long", lng)))
    assert s["bad_quality"] == 12 and s["bad_samples"] == 3 and s["fed"] == 57, s
    tr = tmp_path / "t.csv"
    write_transitions(tr, hand_paired(smp))
    ok(run(d, "feed", "ref", tr))
    c = d.client()
    n = len(hand_paired(smp))
    for m in ("wide", "long", "ref"):
        c.wait_applied(m, n)
    assert values(c, "wide") == values(c, "long") == values(c, "ref")
    # Declared flags: 192 good, anything else bad.
    create(d, tmp_path, "opc")
    for i, s_ in enumerate(smp):
        s_["q"] = "192" if i % 7 else "0"
    f = tmp_path / "opc.csv"
    write_wide(f, smp)
    s = summary(ok(run(d, "--json", "feed", "opc", f, "--good", "192", "--bad", "*")))
    assert s["bad_quality"] == 9 and s["fed"] == 51, s


# resume and idempotence --------------------------------------------------------------------


def big_wide(tmp_path, n=3000):
    smp = make_samples(n, sources=("a", "b"))
    f = tmp_path / "big.csv"
    write_wide(f, smp)
    return f, smp


def start_feed(d, *args):
    env = dict(os.environ, WORTH_SOCKET=d.sock)
    return subprocess.Popen([cli_path(), *[str(a) for a in args]], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def wait_received(c, model, at_least, proc, timeout=30.0):
    """Polls (bounded) until the model holds at_least transitions or the feed ended."""
    deadline = time.monotonic() + timeout
    for _ in range(int(timeout / 0.005) + 10):
        try:
            if c.stats(model)["received"] >= at_least:
                return True
        except Exception:
            return False
        if proc.poll() is not None or time.monotonic() > deadline:
            return False
        time.sleep(0.005)
    return False


def settled(c, model, timeout=10.0):
    """received once it stops changing (a request in flight when its client died is applied
    or dropped whole): two polls 200 ms apart that agree, bounded."""
    last = c.stats(model)["received"]
    for _ in range(int(timeout / 0.2)):
        time.sleep(0.2)
        now = c.stats(model)["received"]
        if now == last:
            return now
        last = now
    raise AssertionError(f"{model}: received still changing after {timeout} s")


def test_resend_from_start_after_killing_the_client_adds_nothing_twice(daemon, tmp_path):
    d = daemon()
    create(d, tmp_path, "m")
    create(d, tmp_path, "clean")
    f, smp = big_wide(tmp_path)
    total = 2 * (3000 - 1)
    ok(run(d, "feed", "clean", f))
    c = d.client()
    c.wait_applied("clean", total)
    # Small frames make the feed long enough to be killed in the middle of it.
    proc = start_feed(d, "feed", "m", f, "--frame", "8")
    mid = wait_received(c, "m", total // 4, proc)
    proc.kill()
    proc.wait(timeout=30)
    got = settled(c, "m")
    assert mid and 0 < got < total, (mid, got)
    s = summary(ok(run(d, "--json", "feed", "m", f)))
    assert s["fed"] == 6000 and s["logged"] > 0 and s["paired"] == total - got, (s, got)
    st, sc = c.wait_applied("m", total), c.stats("clean")
    assert st["received"] == sc["received"] == total
    assert st["clipped"] == sc["clipped"]
    assert values(c, "m") == values(c, "clean")
    # Twice more: nothing changes.
    s = summary(ok(run(d, "--json", "feed", "m", f)))
    assert s["logged"] == 6000 and s["paired"] == 0, s
    assert c.stats("m")["received"] == total


def test_transition_file_resend_is_skipped_by_pseq(daemon, tmp_path):
    d = daemon()
    create(d, tmp_path, "m")
    create(d, tmp_path, "clean")
    smp = make_samples(2000, sources=("a", "b"))
    tr = tmp_path / "t.csv"
    write_transitions(tr, hand_paired(smp))
    plain = tmp_path / "plain.csv"  # no source, t, dt: the bulk path, pseq in the header
    lines = tr.read_text().splitlines()
    plain.write_text("\n".join([",".join(ln.split(",")[:7]) for ln in lines]) + "\n")
    total = 2 * 1999
    for f in (tr, plain):
        ok(run(d, "feed", "clean", f, "--no-resume"))
    c = d.client()
    c.wait_applied("clean", 2 * total)
    proc = start_feed(d, "feed", "m", tr)
    wait_received(c, "m", total // 4, proc)
    proc.kill()
    proc.wait(timeout=30)
    settled(c, "m")
    s = summary(ok(run(d, "--json", "feed", "m", tr)))
    assert s["fed"] == total, s
    assert c.wait_applied("m", total)["received"] == total
    p = ok(run(d, "feed", "m", tr))
    assert f"{total} rows already logged" in p.stdout and "--no-resume" in p.stderr, p
    # the bulk path: one pseq in each bulk's header for its rows
    assert summary(ok(run(d, "--json", "feed", "m", plain)))["logged"] == 0
    assert summary(ok(run(d, "--json", "feed", "m", plain)))["logged"] == total
    assert c.wait_applied("m", 2 * total)["received"] == 2 * total
    assert values(c, "m") == values(c, "clean")
    # --no-resume learns it again; standard input is resumed only when asked
    assert summary(ok(run(d, "--json", "feed", "m", plain, "--no-resume")))["logged"] == 0
    text = plain.read_text()
    assert summary(ok(run(d, "--json", "feed", "m", "-", "--resume", stdin=text)))["logged"] == \
        total
    assert summary(ok(run(d, "--json", "feed", "m", "-", stdin=text)))["logged"] == 0
    assert c.wait_applied("m", 4 * total)["received"] == 4 * total


def test_kill9_of_worthd_mid_feed_then_feed_again_equals_one_clean_feed(daemon, tmp_path):
    d = daemon()
    ref = daemon(db=tmp_path / "ref.db")
    create(d, tmp_path, "m")
    create(ref, tmp_path, "m")
    f, smp = big_wide(tmp_path)
    total = 2 * (3000 - 1)
    ok(run(ref, "feed", "m", f))
    rc = ref.client()
    rc.wait_applied("m", total)
    c = d.client()
    proc = start_feed(d, "feed", "m", f, "--frame", "8")
    assert wait_received(c, "m", total // 3, proc)
    d.kill9()
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == 3, (proc.returncode, err)
    d2 = d.restart()
    c2 = d2.client()
    got = c2.stats("m")["received"]
    assert 0 < got < total
    s = summary(ok(run(d2, "--json", "feed", "m", f)))
    assert s["logged"] > 0 and s["paired"] == total - got, (s, got)
    assert c2.wait_applied("m", total)["received"] == total
    assert values(c2, "m") == values(rc, "m")
    # and across a clean restart too
    d3 = d2.restart()
    assert values(d3.client(), "m") == values(rc, "m")


# bad input: a stable code each, nothing acknowledged lost -----------------------------------


BAD_CASES = {
    # name: (mutation of the wide rows after the 20 good ones, code, args)
    "time_backwards": (lambda rows: rows.insert(20, rows[10]), "time_backwards", []),
    "duplicate_time": (lambda rows: rows.insert(20, rows[19]), "duplicate_time", []),
    "mixed_time_units": (lambda rows: rows.__setitem__(
        20, ["1806000000"] + rows[20][1:]), "mixed_time_units", []),
    "bad_quality": (lambda rows: rows[20].__setitem__(6, "maybe"), "bad_quality", []),
    "bad_time": (lambda rows: rows[20].__setitem__(0, "2026-03-29T02:30:00"), "bad_time", []),
    "bad_value": (lambda rows: rows[20].__setitem__(3, "4.2.1"), "bad_value", []),
}


@pytest.mark.parametrize("case", sorted(BAD_CASES))
def test_each_bad_input_has_its_code_and_loses_nothing_before_it(daemon, tmp_path, case):
    mutate, code, args = BAD_CASES[case]
    d = daemon()
    create(d, tmp_path, "m")
    smp = make_samples(40, sources=("a",))
    f = tmp_path / "good.csv"
    write_wide(f, smp)
    lines = f.read_text().splitlines()
    rows = [ln.split(",") for ln in lines[1:]]
    mutate(rows)
    bad = tmp_path / f"{case}.csv"
    bad.write_text("\n".join([lines[0]] + [",".join(r) for r in rows]) + "\n")
    p = fails(run(d, "feed", "m", bad, *args), 2, f"{bad}:22: {code}:",
              "20 rows fed before the error")
    rep = one_json(fails(run(d, "--json", "feed", "m", bad, *args), 2))
    assert rep["ok"] is False and rep["error"]["code"] == code and rep["error"]["line"] == 22
    assert rep["logged"] == 20, rep  # the second run: the 20 are already logged
    c = d.client()
    assert c.wait_applied("m", 19)["received"] == 19  # the 20 samples before it, paired
    # under skip the bad row is reported and left out, the rest is fed
    p = ok(run(d, "feed", "m", bad, "--on-error", "skip", *args))
    assert f"{bad}:22: {code}:" in p.stderr and "(row skipped)" in p.stderr
    assert c.wait_applied("m")["received"] >= 38


def test_long_file_errors_name_the_tag(daemon, tmp_path):
    d = daemon()
    create(d, tmp_path, "m")
    smp = make_samples(10, sources=("a",))
    f = tmp_path / "l.csv"
    write_long(f, smp)
    lines = f.read_text().splitlines()
    # sample 6 (rows 1 + 4*5 .. 4*6) loses its demand reading
    drop = next(i for i in range(21, 25) if ",demand," in lines[i])
    missing = tmp_path / "missing.csv"
    missing.write_text("\n".join(lines[:drop] + lines[drop + 1:]) + "\n")
    p = fails(run(d, "feed", "m", missing), 2, "missing_tag", "dimension demand",
              "2026-03-28T22:05:00Z", "5 rows fed before the error")
    c = d.client()
    assert c.wait_applied("m", 4)["received"] == 4
    unknown = tmp_path / "unknown.csv"
    unknown.write_text("\n".join(lines[:9] + ["2026-03-28T22:02:00Z,FT999,1.5,a,good"] +
                                 lines[9:]) + "\n")
    fails(run(d, "feed", "m", unknown), 2, f"{unknown}:10: unknown_tag:", "FT999",
          "--ignore-tags")
    s = summary(ok(run(d, "--json", "feed", "m", unknown, "--ignore-tags", "FT999")))
    assert s["ignored_columns"] == ["FT999"] and s["fed"] == 10, s
    # mapped tags: the historian's names for the dimensions
    create(d, tmp_path, "mapped")
    create(d, tmp_path, "plain")
    renamed = tmp_path / "renamed.csv"
    renamed.write_text(f.read_text().replace(",level,", ",LT101,").replace(",demand,", ",FT205,"))
    ok(run(d, "feed", "mapped", renamed, "--map", "LT101=level,FT205=demand"))
    ok(run(d, "feed", "plain", f))
    c.wait_applied("mapped", 9)
    c.wait_applied("plain", 9)
    assert values(c, "mapped") == values(c, "plain")
    # time order per source
    backwards = tmp_path / "back.csv"
    backwards.write_text("\n".join(lines[:13] + lines[5:9] + lines[13:]) + "\n")
    fails(run(d, "feed", "plain", backwards), 2, "time_backwards", "time order")


def test_header_errors_are_usage_errors(daemon, tmp_path):
    d = daemon()
    create(d, tmp_path, "m")
    f = tmp_path / "h.csv"
    f.write_text("time,level,demand,r\n2026-03-28T22:00:00Z,1,2,3\n")
    fails(run(d, "feed", "m", f), 2, "no column for dimension pressure", "--map")
    f.write_text("time,level [cm],demand,pressure,r\n")
    fails(run(d, "feed", "m", f), 2, "level [cm]", "in cm")
    f.write_text("when,level,demand,pressure,r\n")
    fails(run(d, "feed", "m", f), 2, "cannot tell the file's form")
    assert summary(ok(run(d, "--json", "feed", "m", f, "--time", "when")))["fed"] == 0
    f.write_text("time;level;demand;pressure;r\n")
    fails(run(d, "feed", "m", f), 2, "--delimiter ';'")
    f.write_text("time,level,demand,pressure,reward\n2026-03-28T22:00:00Z,1,2,3,4\n")
    fails(run(d, "feed", "m", f, "--no-resume"), 2, "--no-resume applies to transitions")
    fails(run(d, "feed", "m", f, "--decimal-comma"), 2, "--delimiter")
    fails(run(d, "feed", "m", f, "--time-format", "hours"), 2, "--time-format")
    assert summary(ok(run(d, "--json", "feed", "m", f)))["fed"] == 1
