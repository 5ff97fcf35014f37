"""The `worth` command-line client end to end, against a real worthd (tests only).

$WORTH_CLI is the client under test, $WORTH_DAEMON the daemon (conftest.py's fixture starts it
on a temp socket and database).  Checks every command in its table and --json forms, the
documented exit codes (0 ok, 1 server error, 2 usage or bad input, 3 cannot connect), the
feed of a 100,000-row CSV with malformed rows under --on-error skip and stop, JSON lines,
and the help text of every command.  Each CLI run is bounded by a timeout.
"""
import json
import os
import random
import re
import subprocess

import pytest

from conftest import Client  # noqa: F401  (the fixtures come from conftest.py)

CLI_TIMEOUT = 60.0
COMMANDS = ["models", "create", "drop", "show", "feed", "value", "checkpoint", "checkpoints",
            "rollback", "backup", "train", "stats", "events", "watch", "plot", "help"]


def cli_path():
    exe = os.environ.get("WORTH_CLI")
    assert exe, "set WORTH_CLI to the path of the worth executable"
    assert os.access(exe, os.X_OK), f"WORTH_CLI={exe} is not an executable"
    return exe


def run(d, *args, stdin=None, cwd=None, env_socket=True):
    """Runs worth with WORTH_SOCKET set to d's socket (d may be None); returns CompletedProcess."""
    env = dict(os.environ)
    env.pop("WORTH_SOCKET", None)
    if d is not None and env_socket:
        env["WORTH_SOCKET"] = d.sock
    return subprocess.run([cli_path(), *[str(a) for a in args]], input=stdin, env=env, cwd=cwd,
                          capture_output=True, text=True, timeout=CLI_TIMEOUT)


def ok(p):
    assert p.returncode == 0, f"rc {p.returncode}\nstdout: {p.stdout[:2000]}\nstderr: {p.stderr}"
    return p


def fails(p, rc, *needles):
    assert p.returncode == rc, (f"expected rc {rc}, got {p.returncode}\nstdout: {p.stdout[:2000]}"
                                f"\nstderr: {p.stderr[:2000]}")
    lines = p.stderr.strip().splitlines()
    assert lines, "no message on stderr"
    for n in needles:
        assert n in p.stderr, f"{n!r} not in stderr: {p.stderr[:2000]}"
    assert "Segmentation" not in p.stderr and "Assertion" not in p.stderr
    return p


def one_json(p):
    lines = p.stdout.strip().splitlines()
    assert len(lines) == 1, f"expected one line, got {p.stdout[:2000]!r}"
    obj = json.loads(lines[0])
    assert isinstance(obj, dict)
    return obj


def spec(name="m", dims=2, estimators=None, **kw):
    s = {"model": name, "dims": dims, "gamma": 0.9, "ranges": [[0, 1]] * dims,
         "features": [{"basis": "bias"}, {"basis": "raw"}],
         "estimators": estimators or [{"name": "td", "kind": "td", "alpha": 0.1},
                                      {"name": "rls", "kind": "rls_td"},
                                      {"name": "rep", "kind": "replay", "capacity": 1000}]}
    s.update(kw)
    return s


def create(d, tmp_path, **kw):
    s = spec(**kw)
    f = tmp_path / f"{s['model']}.spec.json"
    f.write_text(json.dumps(s, indent=1))
    return ok(run(d, "create", f))


def write_csv(path, n, bad=(), seed=1, header="x0,x1,r,xn0,xn1,terminal"):
    """n data rows (D = 2); rows whose index is in bad get a non-numeric x1.  Returns the
    file line numbers of the bad rows (the header is line 1)."""
    rnd = random.Random(seed)
    lines = [header]
    for i in range(n):
        v = [f"{rnd.random():.5f}" for _ in range(5)]
        if i in bad:
            v[1] = "oops"
        lines.append(",".join(v + [str(int(rnd.random() < 0.01))]))
    path.write_text("\n".join(lines) + "\n")
    return [i + 2 for i in sorted(bad)]


# help ---------------------------------------------------------------------------------------


def test_help_global_and_every_command():
    for args in (["--help"], ["help"]):
        p = ok(run(None, *args))
        for c in COMMANDS:
            assert f"  {c}" in p.stdout, (c, p.stdout)
        for code in ("0  success", "1  worthd answered", "2  usage", "3  cannot connect"):
            assert code in p.stdout
    for c in COMMANDS:
        a = ok(run(None, "help", c)).stdout
        b = ok(run(None, c, "--help")).stdout
        assert a == b
        assert a.startswith(f"usage: worth {c}"), a
        assert "example" in a, a
    feed = ok(run(None, "help", "feed")).stdout
    for needle in ("x0 .. x{D-1}", "xn0", "terminal", "source", "--x COL", "--x-next",
                   "--r COL", "--terminal COL", "--on-error", "FILE:LINE: column C"):
        assert needle in feed, needle
    fails(run(None, "help", "nosuch"), 2, "no command")
    fails(run(None), 2)
    fails(run(None, "nosuch"), 2, "unknown command")
    fails(run(None, "--bogus", "models"), 2, "unknown option")


# models, create, show, drop ----------------------------------------------------------------


def test_create_models_show_drop_and_json(daemon, tmp_path):
    d = daemon()
    assert "no models" in ok(run(d, "models")).stdout
    p = create(d, tmp_path)
    assert "created model m with 3 features" in p.stdout
    f = tmp_path / "m.spec.json"
    fails(run(d, "create", f), 1, "worth: model_exists:")
    rep = one_json(fails(run(d, "--json", "create", f), 1, "model_exists"))
    assert rep["ok"] is False and rep["error"]["code"] == "model_exists"
    s2 = tmp_path / "m2.json"
    s2.write_text(json.dumps(spec("m2")))
    assert one_json(ok(run(d, "--json", "create", s2))) == {"ok": True, "model": "m2",
                                                           "features": 3}
    out = ok(run(d, "models")).stdout.splitlines()
    assert out[0].split() == ["MODEL", "DIMS", "FEATURES", "APPLIED", "ESTIMATORS"]
    assert out[1].split() == ["m", "2", "3", "0", "td,rls,rep"]
    c = d.client()
    assert one_json(ok(run(d, "--json", "models"))) == c.ok({"op": "model.list"})
    show = ok(run(d, "show", "m")).stdout
    for needle in ("dims", "gamma", "ranges", "[0, 1] [0, 1]", "bias", "raw", "rls_td",
                   "alpha=0.1"):
        assert needle in show, (needle, show)
    assert one_json(ok(run(d, "show", "m", "--json"))) == c.ok({"op": "model.get",
                                                                "model": "m"})
    assert "dropped model m2" in ok(run(d, "drop", "m2")).stdout
    rep = one_json(fails(run(d, "--json", "drop", "m2"), 1, "worth: no_such_model:"))
    assert rep["error"]["code"] == "no_such_model"
    assert one_json(ok(run(d, "--json", "drop", "m"))) == {"ok": True, "persisted": True}
    fails(run(d, "show", "m"), 1, "worth: no_such_model:")


def test_create_bad_spec_files(daemon, tmp_path):
    d = daemon()
    fails(run(d, "create", tmp_path / "missing.json"), 2, "missing.json", "cannot read")
    bad = tmp_path / "bad.json"
    bad.write_text('{"model": "m",\n  "dims": 2,,\n}')
    fails(run(d, "create", bad), 2, "bad.json:2:")
    arr = tmp_path / "arr.json"
    arr.write_text("[1, 2]")
    fails(run(d, "create", arr), 2, "must be a JSON object")
    s = tmp_path / "s.json"
    s.write_text(json.dumps(spec(dims=0)))
    fails(run(d, "create", s), 1, "worth: bad_param:")
    fails(run(d, "create"), 2, "missing arguments")


# feed ---------------------------------------------------------------------------------------


def test_feed_100k_rows_skip_then_stop(daemon, tmp_path):
    d = daemon()
    create(d, tmp_path)
    create(d, tmp_path, name="m2")
    big = tmp_path / "big.csv"
    bad_lines = write_csv(big, 100_000, bad={41, 50_000, 99_990})
    p = ok(run(d, "feed", "m", big, "--on-error", "skip"))
    assert "fed 99997 rows in" in p.stdout and "rows/s), 3 skipped" in p.stdout, p.stdout
    reported = [ln for ln in p.stderr.splitlines() if ln.startswith(f"{big}:")]
    assert len(reported) == 3, p.stderr
    for ln, want in zip(reported, bad_lines):
        assert ln.startswith(f"{big}:{want}: column x1: "), (ln, want)
    c = d.client()
    st = c.wait_applied("m")
    assert st["received"] == 99_997 and st["applied"] == 99_997, st

    p = fails(run(d, "feed", "m2", big), 2, f"{big}:{bad_lines[0]}: column x1:",
              f"{bad_lines[0] - 2} rows fed before the error")
    assert len([ln for ln in p.stderr.splitlines() if ln.startswith(f"{big}:")]) == 1
    st = c.wait_applied("m2")
    assert st["applied"] == bad_lines[0] - 2, st


def test_feed_json_summary_mapping_and_batches(daemon, tmp_path):
    d = daemon()
    create(d, tmp_path)
    f = tmp_path / "named.csv"
    # Mapped columns, in another order, with source, t and dt (observe batches), extra column.
    f.write_text("note,level,flow,reward,level2,flow2,done,source,t,dt\n"
                 "a,0.1,0.2,1.5,0.2,0.3,0,pump-1,100,60\n"
                 "b,0.2,0.3,-1,,,true,pump-2,160,60\n"
                 "c,0.3,0.4,0.5,0.4,0.5,false,,,\n")
    p = ok(run(d, "--json", "feed", "m", f, "--x", "level,flow", "--x-next", "level2,flow2",
               "--r", "reward", "--terminal", "done"))
    rep = one_json(p)
    assert rep["ok"] is True and rep["fed"] == 3 and rep["skipped"] == 0 and rep["seq"] == 3
    assert rep["form"] == "transitions" and rep["ignored_columns"] == ["note"], rep
    assert rep["no_t"] == 1 and rep["logged"] == 0, rep
    assert "columns not read: note" in p.stderr and "1 rows carry no t" in p.stderr, p.stderr
    st = d.client().wait_applied("m", 3)
    assert st["sources"] >= 2, st
    fails(run(d, "feed", "m", f, "--x", "level"), 2, "--x names 1 columns")
    fails(run(d, "feed", "m", f, "--x", "level,nope", "--x-next", "level2,flow2", "--r",
              "reward"), 2, f"{f}:1:", "nope")
    # No x0/xn0 but a time column: read as a wide sample file, which lacks dimension x0.
    fails(run(d, "feed", "m", f), 2, f"{f}:1: no column for dimension x0")
    fails(run(d, "feed", "m", tmp_path / "absent.csv"), 2, "absent.csv: cannot open")
    fails(run(d, "feed", "nosuch", f), 1, "worth: no_such_model:")
    fails(run(d, "feed", "m", f, "--on-error", "maybe"), 2, "--on-error")
    # Malformed cells: each names file, line and column.
    g = tmp_path / "cells.csv"
    g.write_text("x0,x1,r,xn0,xn1,terminal\n0.1,0.2,1,0.2,0.3,0\n0.1,0.2,1,0.2,0.3,2\n"
                 "0.1,,1,0.2,0.3,0\n0.1,0.2,1e999,0.2,0.3,0\n0.1,0.2,1,0.2\n")
    p = ok(run(d, "feed", "m", g, "--on-error", "skip"))
    assert "fed 1 rows" in p.stdout and "4 skipped" in p.stdout
    for needle in (f"{g}:3: column terminal:", f"{g}:4: column x1: empty", f"{g}:5: column r:",
                   f"{g}:6: column xn1: missing"):
        assert needle in p.stderr, (needle, p.stderr)
    # 3-dimensional rows for a 2-dimensional model: the header lacks nothing, rows are read
    # by name, so a wrong dimension shows as a missing xn1 column here.
    h = tmp_path / "d3.csv"
    h.write_text("x0,x1,x2,r,xn0,xn2\n1,2,3,4,5,6\n")
    fails(run(d, "feed", "m", h), 2, f"{h}:1: the header has no column xn1")
    e = tmp_path / "empty.csv"
    e.write_text("")
    fails(run(d, "feed", "m", e), 2, "no header")


def test_feed_json_lines_and_stdin(daemon, tmp_path):
    d = daemon()
    create(d, tmp_path)
    rows = [{"x": [0.1, 0.2], "r": 1, "x_next": [0.2, 0.3]},
            {"x": [0.2, 0.3], "r": 0.5, "terminal": True},
            {"x": [0.2, 0.3], "r": 0.5, "x_next": [0.4, 0.4], "source": "s1", "t": 7, "dt": 1},
            {"x": [0.1, 0.2, 0.3], "r": 1, "x_next": [0.2, 0.3]},
            {"x": [0.3, 0.3], "r": "NaN", "x_next": [0.2, 0.3]},
            {"x": [0.3, 0.3], "r": 2, "x_next": [0.2, 0.3]}]
    f = tmp_path / "t.jsonl"
    f.write_text("\n".join(json.dumps(r) for r in rows) + "\n\nnot json\n")
    p = fails(run(d, "feed", "m", f), 2, f"{f}:4: field x: has 3 values, the model has 2",
              "3 rows fed before the error")
    # Fed again: the 3 rows fed before are already logged (their pseq: the line numbers).
    p = ok(run(d, "feed", "m", f, "--on-error", "skip"))
    assert "fed 4 rows" in p.stdout and "3 skipped" in p.stdout, p.stdout
    assert "3 rows already logged" in p.stdout, p.stdout
    assert f"{f}:5: field r:" in p.stderr and f"{f}:8: not valid JSON" in p.stderr
    st = d.client().wait_applied("m", 4)
    assert st["applied"] == 4
    # --no-resume learns them again.
    p = ok(run(d, "feed", "m", f, "--on-error", "skip", "--no-resume"))
    assert "fed 4 rows" in p.stdout and "already logged" not in p.stdout, p.stdout
    assert d.client().wait_applied("m", 8)["applied"] == 8
    # From standard input, detected by its first character (not resumed unless asked).
    good = "\n".join(json.dumps(r) for r in rows[:3]) + "\n"
    p = ok(run(d, "feed", "m", "-", stdin=good))
    assert "fed 3 rows" in p.stdout
    csv_in = "x0,x1,r,xn0,xn1\n0.1,0.2,1,0.3,0.4\n"
    assert "fed 1 rows" in ok(run(d, "feed", "m", "-", stdin=csv_in)).stdout
    assert d.client().wait_applied("m", 12)["applied"] == 12
    p = ok(run(d, "feed", "m", "-", "--resume", stdin=csv_in))
    assert "1 rows already logged" in p.stdout, p.stdout


def test_feed_row_refused_by_worthd_is_mapped_to_its_line(daemon, tmp_path):
    d = daemon()
    create(d, tmp_path, max_sources=1)
    f = tmp_path / "src.csv"
    f.write_text("x0,x1,r,xn0,xn1,source\n0.1,0.1,1,0.2,0.2,a\n0.1,0.1,1,0.2,0.2,b\n"
                 "0.1,0.1,1,0.2,0.2,a\n")
    p = ok(run(d, "feed", "m", f, "--on-error", "skip"))
    assert "fed 2 rows" in p.stdout and "1 skipped" in p.stdout
    assert f"{f}:3: worthd refused the row: too_many_sources" in p.stderr, p.stderr
    p = fails(run(d, "feed", "m", f, "--no-resume"), 1,
              f"{f}:3: worthd refused the row: too_many_sources", "1 rows fed before the error")
    assert d.client().wait_applied("m", 3)["applied"] == 3
    rep = one_json(fails(run(d, "--json", "feed", "m", f, "--no-resume"), 1))
    assert rep["error"] == {"code": "too_many_sources", "line": 3,
                            "message": rep["error"]["message"]}, rep


# value --------------------------------------------------------------------------------------


def test_value_table_file_and_json(daemon, tmp_path):
    d = daemon()
    create(d, tmp_path)
    big = tmp_path / "v.csv"
    write_csv(big, 2000)
    ok(run(d, "feed", "m", big))
    c = d.client()
    c.wait_applied("m", 2000)
    p = ok(run(d, "value", "m", "0.5", "0.25"))
    lines = p.stdout.splitlines()
    assert lines[0].split() == ["ESTIMATOR", "VALUE", "SD", "95%", "INTERVAL", "HEALTH"], p.stdout
    names = [ln.split()[0] for ln in lines[1:4]]
    assert names == ["td", "rls", "rep"], p.stdout
    want = c.ok({"op": "value", "model": "m", "x": [0.5, 0.25]})

    def cells(name):  # value, sd, ... of an estimator's row, the headline's * left out
        row = next(ln for ln in lines[1:4] if ln.split()[0] == name).split()[1:]
        return row[1:] if row[0] == "*" else row

    assert float(cells("td")[0]) == pytest.approx(want["estimators"]["td"], rel=1e-5)
    # the headline is marked and explained; each row shows its own health and sd
    head = want["primary"]["name"]
    row = next(ln for ln in lines[1:4] if ln.split()[0] == head).split()
    assert row[1] == "*" and row[-1] == want["primary"]["state"], p.stdout
    assert f"* headline: {head}; {want['primary']['reason']}" in p.stdout, p.stdout
    assert float(cells("rls")[1]) == pytest.approx(want["health"]["rls"]["sd"], rel=1e-5)
    assert cells("td")[1] == "-", p.stdout  # td has no sd of its own: none is borrowed
    assert "spread: " in p.stdout and "(seq 2000)" in p.stdout, p.stdout
    assert one_json(ok(run(d, "--json", "value", "m", "0.5", "0.25"))) == want
    rep = one_json(ok(run(d, "--json", "value", "m", "0.5", "0.25", "--estimator", "rls")))
    assert rep["value"] == want["estimators"]["rls"]
    # A negative first value after "--".
    ok(run(d, "value", "m", "--", "-0.5", "0.25"))
    states = tmp_path / "states.csv"
    states.write_text("x1,x0\n0.25,0.5\n0.75,0.1\n")
    p = ok(run(d, "value", "m", "--file", states))
    rows = p.stdout.splitlines()
    assert rows[0].split() == ["x0", "x1", "VALUE"] and len(rows) == 3, p.stdout
    assert rows[1].split()[:2] == ["0.5", "0.25"]
    assert float(rows[1].split()[2]) == pytest.approx(want["value"], rel=1e-5)
    pos = tmp_path / "pos.csv"
    pos.write_text("0.5,0.25\n0.1,0.75\n")
    rep = one_json(ok(run(d, "--json", "value", "m", "--file", pos)))
    assert rep["values"][0] == want["value"] and len(rep["values"]) == 2
    badf = tmp_path / "badstates.csv"
    badf.write_text("x0,x1\n0.5,zz\n")
    fails(run(d, "value", "m", "--file", badf), 2, f"{badf}:2: column 2:")
    fails(run(d, "value", "m", "0.5"), 2, "has 2 dims, got 1")
    fails(run(d, "value", "m", "0.5", "abc"), 2, "not a finite number")
    fails(run(d, "value", "m"), 2)
    fails(run(d, "value", "nosuch", "1", "2"), 1, "worth: no_such_model:")
    fails(run(d, "value", "m", "1", "2", "--estimator", "zz"), 1, "worth: bad_param:")


# checkpoints, rollback, backup --------------------------------------------------------------


def test_checkpoint_rollback_backup(daemon, tmp_path):
    d = daemon()
    create(d, tmp_path)
    f = tmp_path / "a.csv"
    write_csv(f, 100)
    ok(run(d, "feed", "m", f))
    p = ok(run(d, "checkpoint", "m", "--label", "first"))
    assert "checkpoint" in p.stdout and "at seq 100" in p.stdout, p.stdout
    cid = int(p.stdout.split()[1])
    rep = one_json(ok(run(d, "--json", "checkpoint", "m")))
    assert rep["ok"] is True and rep["seq"] == 100
    ok(run(d, "feed", "m", f, "--no-resume"))
    table = ok(run(d, "checkpoints", "m")).stdout.splitlines()
    assert table[0].split() == ["CHECKPOINT", "SEQ", "CREATED", "SIZE", "LABEL"]
    assert table[-1].split()[0] == str(cid) and table[-1].split()[-1] == "first", table
    rep = one_json(ok(run(d, "--json", "checkpoints", "m")))
    assert [x["checkpoint"] for x in rep["checkpoints"]][-1] == cid
    p = ok(run(d, "rollback", "m", cid, "--exclude-seq", "150:159"))
    assert f"to checkpoint {cid}: 10 undone, 90 replayed" in p.stdout, p.stdout
    rep = one_json(ok(run(d, "--json", "rollback", "m", cid)))
    assert rep["ok"] is True and rep["checkpoint"] == cid
    fails(run(d, "rollback", "m", "999"), 1, "worth: no_such_checkpoint:")
    fails(run(d, "rollback", "m", "x"), 2, "checkpoint ID")
    fails(run(d, "rollback", "m", cid, "--exclude-seq", "9:1"), 2, "--exclude-seq")
    fails(run(d, "rollback", "m", cid, "--exclude-seq", "1:2", "--exclude-time", "1:2"), 2)
    fails(run(d, "checkpoint", "nosuch"), 1, "no_such_model")
    # backups go into worthd's --backup-dir (by default "backups" beside its database)
    bk = os.path.realpath(tmp_path / "backups")
    p = ok(run(d, "backup", "copy.db"))
    assert (tmp_path / "backups" / "copy.db").stat().st_size > 0, os.listdir(bk)
    assert f"backup written to {bk}/copy.db (" in p.stdout and "bytes" in p.stdout, p.stdout
    rep = one_json(ok(run(d, "--json", "backup", "copy2.db")))
    assert rep["ok"] is True and rep["bytes"] > 0 and rep["name"] == "copy2.db", rep
    assert rep["path"] == f"{bk}/copy2.db", rep
    p = ok(run(d, "backup"))
    m = re.search(r"backup written to (\S+/(worthd-\d{8}T\d{6}Z\.db)) \(\d+ bytes\)", p.stdout)
    assert m and os.path.dirname(m.group(1)) == bk, p.stdout
    assert os.path.exists(m.group(1))
    fails(run(d, "backup", "no/dir.db"), 1, "worth: bad_param:")
    fails(run(d, "backup", tmp_path / "abs.db"), 1, "worth: bad_param:")
    fails(run(d, "backup", "a.db", "b.db"), 2)
    assert sorted(os.listdir(bk)) == sorted(["copy.db", "copy2.db", m.group(2)]), os.listdir(bk)


# train, stats -------------------------------------------------------------------------------


def test_train_and_stats(daemon, tmp_path):
    d = daemon()
    create(d, tmp_path)
    f = tmp_path / "a.csv"
    write_csv(f, 500)
    ok(run(d, "feed", "m", f))
    p = ok(run(d, "train", "m", "--passes", "3"))
    lines = p.stdout.splitlines()
    assert [ln.split(":")[0] for ln in lines[:3]] == ["pass 1/3", "pass 2/3", "pass 3/3"], p.stdout
    assert "change" in lines[0]
    assert lines[3].startswith("rep converged after") or \
        lines[3].startswith("rep did not converge after"), lines
    rep = one_json(ok(run(d, "--json", "train", "m", "--passes", "2", "--estimator", "rep")))
    assert rep["ok"] is True and rep["passes"] >= 1 and isinstance(rep["converged"], bool)
    fails(run(d, "train", "m", "--estimator", "td"), 1, "worth: unsupported:")
    fails(run(d, "train", "m", "--passes", "0"), 2, "--passes")
    create(d, tmp_path, name="plain", estimators=[{"name": "td", "kind": "td"}])
    fails(run(d, "train", "plain"), 2, "no replay or lstd")
    st = ok(run(d, "stats", "m")).stdout
    assert "applied" in st and "500" in st
    hdr = [ln for ln in st.splitlines() if ln.startswith("ESTIMATOR")]
    assert hdr and "UPDATES" in hdr[0] and "TD_RMS" in hdr[0], st
    for name in ("td ", "rls ", "rep "):
        assert any(ln.startswith(name) for ln in st.splitlines()), (name, st)
    rep = one_json(ok(run(d, "--json", "stats", "m")))
    assert rep["applied"] == 500 and set(rep["estimators"]) == {"td", "rls", "rep"}
    rep = one_json(fails(run(d, "--json", "stats", "nosuch"), 1, "worth: no_such_model:"))
    assert rep["ok"] is False


# connection ---------------------------------------------------------------------------------


def test_cannot_connect_exits_3(tmp_path, free_port):
    fails(run(None, "--socket", tmp_path / "none.sock", "models"), 3, "cannot connect")
    fails(run(None, "--connect", f"127.0.0.1:{free_port}", "models"), 3, "cannot connect")
    fails(run(None, "--connect", "nohost", "models"), 2, "HOST:PORT")
    # $WORTH_SOCKET is the default; ./worthd.sock otherwise.
    fails(run(None, "models", cwd=tmp_path), 3, "./worthd.sock")


def test_tcp_with_token(daemon, tmp_path, free_port):
    tok = tmp_path / "token"
    tok.write_text("s3cret-token\n")
    tok.chmod(0o600)
    d = daemon("--listen", f"127.0.0.1:{free_port}", "--token-file", tok)
    addr = f"127.0.0.1:{free_port}"
    assert "no models" in ok(run(None, "--connect", addr, "--token-file", tok, "models")).stdout
    fails(run(None, "--connect", addr, "models"), 1, "unauthorized")
    wrong = tmp_path / "wrong"
    wrong.write_text("not-the-token\n")
    fails(run(None, "--connect", addr, "--token-file", wrong, "models"), 1, "unauthorized")
    fails(run(None, "--connect", addr, "--token-file", tmp_path / "nofile", "models"), 2,
          "--token-file")
    assert d.proc.poll() is None


# names and units ----------------------------------------------------------------------------

NAMED = {"model": "st", "gamma": 0.9,
         "dims": [{"name": "level", "unit": "m", "range": [0, 12]},
                  {"name": "demand", "unit": "m3/h", "range": [0, 400]}],
         "reward_unit": "EUR", "period_s": 60,
         "features": [{"basis": "bias"}, {"basis": "raw"}],
         "estimators": [{"name": "td", "kind": "td", "alpha": 0.1},
                        {"name": "rls", "kind": "rls_td"}]}


def test_named_dimensions_in_value_show_stats_and_watch(daemon, tmp_path):
    d = daemon()
    f = tmp_path / "st.json"
    f.write_text(json.dumps(NAMED))
    ok(run(d, "create", f))
    data = tmp_path / "t.csv"
    data.write_text("x0,x1,r,xn0,xn1,t\n1,100,-1,2,120,1796126400\n2,120,-1,3,150,1796126460\n"
                    "3,150,-2,4,90,1796126520\n4,90,-1,5,60,1796126400\n")
    p = ok(run(d, "feed", "st", data))
    assert "t goes backwards 1 times (first at line 5)" in p.stderr, p.stderr
    c = d.client()
    c.wait_applied("st", 4)
    want = c.ok({"op": "value", "model": "st", "x": [4.2, 180]})
    p = ok(run(d, "value", "st", "demand=180", "level=4.2"))
    lines = p.stdout.splitlines()
    assert lines[0] == "state: level = 4.2 m, demand = 180 m3/h", p.stdout
    assert lines[1].split() == ["ESTIMATOR", "VALUE", "[EUR]", "SD", "[EUR]", "95%", "INTERVAL",
                                "[EUR]", "HEALTH"], p.stdout
    assert lines[2].split()[1] == "*", p.stdout  # the only estimator is the headline
    assert float(lines[2].split()[2]) == pytest.approx(want["value"], rel=1e-5)
    assert p.stdout == ok(run(d, "value", "st", "4.2", "180")).stdout
    assert one_json(ok(run(d, "--json", "value", "st", "level=4.2", "demand=180"))) == want
    fails(run(d, "value", "st", "level=4.2"), 2, "missing demand=X")
    fails(run(d, "value", "st", "level=4.2", "demand=1", "flow=3"), 2,
          'no dimension "flow"', "level, demand")
    fails(run(d, "value", "st", "level=4.2", "180"), 2, "not both")
    fails(run(d, "value", "st", "level=x", "demand=1"), 2, "not a finite number")
    fails(run(d, "value", "st", "level=1", "level=2"), 2, "given twice")
    states = tmp_path / "states.csv"
    states.write_text("demand [m3/h],level\n180,4.2\n")
    rows = ok(run(d, "value", "st", "--file", states)).stdout.splitlines()
    assert rows[0].split() == ["level", "[m]", "demand", "[m3/h]", "VALUE", "[EUR]"], rows
    assert float(rows[1].split()[2]) == pytest.approx(want["value"], rel=1e-5)
    show = ok(run(d, "show", "st")).stdout
    for needle in ("reward_unit   EUR", "period_s      60", "DIM  NAME    UNIT  RANGE",
                   "0  level   m     [0, 12]", "1  demand  m3/h  [0, 400]", "ranges"):
        assert needle in show, (needle, show)
    assert len([ln for ln in show.splitlines() if ln.startswith("dims ")]) == 1, show
    st = ok(run(d, "stats", "st")).stdout
    assert "TD_RMS [EUR]" in st and "BIAS [EUR]" in st and " EUR" in st, st
    # health beside each estimator, the reasons below, coverage in its own table
    assert "HEALTH" in st and "COVERAGE" in st and "HALF95 [EUR]" in st, st
    assert "primary.name" in st and "td warming: 0 of 50 realised returns" in st, st
    w = ok(run(d, "watch", "st", "--count", "1")).stdout
    assert "dims: level [m], demand [m3/h]" in w and "td_rms [EUR]" in w, w
    assert "health" in w and "in_95%" in w and "td *" in w and "warming" in w, w
    assert ok(run(d, "models")).stdout.splitlines()[1].split()[:2] == ["st", "2"]


def test_iso_times_for_rollback_and_events(daemon, tmp_path):
    d = daemon()
    create(d, tmp_path)
    rows = ["x0,x1,r,xn0,xn1,t"]
    for i in range(20):  # one a minute from 2026-12-01T12:00:00Z
        rows.append(f"0.1,0.2,1,0.2,0.3,{1796126400 + 60 * i}")
    f = tmp_path / "t.csv"
    f.write_text("\n".join(rows) + "\n")
    ok(run(d, "feed", "m", f))
    d.client().wait_applied("m", 20)
    cid = int(ok(run(d, "checkpoint", "m")).stdout.split()[1])
    ok(run(d, "feed", "m", f, "--no-resume"))
    d.client().wait_applied("m", 40)
    # 12:05..12:09 in CET (+01:00): t 1796126700 .. 1796126940, five transitions
    p = ok(run(d, "rollback", "m", cid, "--exclude-time",
               "2026-12-01T13:05:00+01:00/2026-12-01T12:09:00Z"))
    assert "5 undone, 15 replayed" in p.stdout, p.stdout
    p = ok(run(d, "rollback", "m", cid, "--exclude-time", "1796126700:1796126940"))
    assert "15 replayed" in p.stdout, p.stdout
    fails(run(d, "rollback", "m", cid, "--exclude-time", "2026-12-01T13:05:00/2026-12-01T14:00Z"),
          2, "no time zone")
    fails(run(d, "rollback", "m", cid, "--exclude-time", "2026-12-01T13:05Z:2026-12-01T14:00Z"),
          2, "T0/T1")
    fails(run(d, "rollback", "m", cid, "--exclude-time", "2026-12-02T00:00Z/2026-12-01T00:00Z"),
          2, "after the end")
    ev = one_json(ok(run(d, "--json", "events", "m", "--since", "1970-01-01T00:00:00Z")))
    assert [e["kind"] for e in ev["events"]][:2] == ["create", "checkpoint"], ev
    ev2 = one_json(ok(run(d, "--json", "events", "m", "--since", "2100-01-01T00:00:00+01:00")))
    assert ev2["events"] == []
    fails(run(d, "events", "m", "--since", "2026-02-30T00:00Z"), 2, "February has no day 30")
