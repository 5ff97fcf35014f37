"""Quarantine: one model whose stored rows are damaged must not stop start-up for the others.

The contract is schema/protocol.md ("Restart", "model.list", "model.get", "model.drop", the
`damaged` code in the error table, `quarantined` under "events", `worth_model_damaged` in the
metrics table).  Two models, a and b, are fed; worthd is stopped (SIGTERM) or killed (SIGKILL);
one row of a is damaged with Python's sqlite3 while worthd is down (the only time a test writes
the database); worthd starts again.  Then b answers exactly as before and keeps ingesting, and
every request naming a answers `damaged` with the offending row's seq, except model.list,
model.get, events (listed), model.drop (drops it) and model.create (model_exists).

A clean stop takes a checkpoint of everything learnt, so a row before it is never read again;
in that case the newest checkpoint is damaged too and recovery falls back to the older one
(labelled, at seq 60), whose replay reaches the damaged row at seq 90.  After kill -9 (with no
automatic checkpoints) the replay from the labelled checkpoint reaches it by itself.

Helpers come from conftest.py and test_durable.py; every loop is bounded in count and time.
"""
import json
import re
import sqlite3
import struct
import zlib

import pytest

import logdb
from test_durable import PROBES, feed, model_id, snapshot, spec, transitions
from test_events_metrics import events, scrape, series, wait_listening

BAD_SEQ = 90  # the damaged row of a: after its labelled checkpoint at 60, before its end at 120


def rw(path):
    """A read-write connection to worthd's database; only while worthd is not running."""
    return sqlite3.connect(path, timeout=10)


def without_not_null(db, table, column, change):
    """Runs change(db) while table's column is declared without NOT NULL (writable_schema), then
    puts the declaration back: the row then holds a NULL the schema forbids, as a damaged page
    may (SQLite checks NOT NULL when it writes a row, never when it reads one)."""
    (sql,) = db.execute("SELECT sql FROM sqlite_master WHERE type = 'table' AND name = ?",
                        (table,)).fetchone()
    loose, n = re.subn(rf"(\b{column}\s+\w+)\s+NOT NULL", r"\1", sql)
    assert n == 1, sql

    def set_schema(text):
        (version,) = db.execute("PRAGMA schema_version").fetchone()
        db.execute("PRAGMA writable_schema = ON")
        db.execute("UPDATE sqlite_master SET sql = ? WHERE type = 'table' AND name = ?",
                   (text, table))
        db.execute(f"PRAGMA schema_version = {version + 1}")  # connections read it again
        db.execute("PRAGMA writable_schema = OFF")
        db.commit()

    set_schema(loose)
    change(db)
    db.commit()
    set_schema(sql)
    assert db.execute("PRAGMA quick_check").fetchone()[0] != "ok"  # NULL in a NOT NULL column


def damage_row(path, model, seq, kind):
    """Damages transition seq of model in place, in its block of the log (logdb.py, the layout
    of daemon/store/logblk.h): kind names how."""
    db = rw(path)
    try:
        mid = model_id(db, model)
        first, data, rec = logdb.record(db, mid, seq)
        assert rec["terminal"] == 0, "the damaged row must be a non-terminal one"
        data, o, n = bytearray(data), rec["offset"], rec["length"]

        def crc_again():  # damage the CRC-32 does not catch: the record's own checks must
            data[o:o + 4] = struct.pack("<I", zlib.crc32(bytes(data[o + 4:o + n])))

        if kind == "x-flip":      # one bit of its last stored double: the CRC-32 fails
            data[o + n - 1] ^= 0x40
        elif kind == "crc":       # the CRC-32 itself
            data[o] ^= 0x01
        elif kind == "flags":     # a flag no layout defines
            data[o + 4] |= 0x80
        elif kind == "r-nan":     # a reward that is no number, with a CRC-32 that matches
            data[o + 5:o + 13] = struct.pack("<d", float("nan"))
            crc_again()
        elif kind == "terminal-next":  # terminal, yet its x_next is the next record's x
            data[o + 4] |= 0x01 | 0x10
            crc_again()
        elif kind == "truncated":  # the block ends half way through the record
            del data[o + n // 2:]
        else:
            raise AssertionError(kind)
        db.execute("UPDATE log_blocks SET data = ? WHERE model = ? AND first_seq = ?",
                   (bytes(data), mid, first))
        db.commit()
        print(f"damaged transition {seq} of {model} ({kind}) in the block from seq {first}")
    finally:
        db.close()


def damage_newest_checkpoint(path, model):
    """Zeroes the state of model's newest checkpoint: it then fails to load (magic, CRC)."""
    db = rw(path)
    try:
        mid = model_id(db, model)
        (cid, seq) = db.execute("SELECT id, seq FROM checkpoints WHERE model = ? AND invalid = 0"
                                " ORDER BY seq DESC, id DESC LIMIT 1", (mid,)).fetchone()
        db.execute("UPDATE checkpoints SET state = zeroblob(length(state)) WHERE id = ?", (cid,))
        db.commit()
        return seq
    finally:
        db.close()


def two_models(d):
    """a (checkpoint 'early' at 60, 120 transitions) and b (80 transitions), both learnt.
    Returns b's snapshot and stats."""
    c = d.client()
    for name in ("a", "b"):
        assert c.call(spec(name)) == {"ok": True, "model": name, "features": 12}
    trs = transitions(120, seed=41)
    assert all("x_next" in trs[i] for i in (BAD_SEQ - 1,)), "seq 90 must not be terminal"
    feed(c, "a", trs[:60], first=1)
    assert c.ok({"op": "checkpoint", "model": "a", "label": "early"})["seq"] == 60
    feed(c, "a", trs[60:], first=61)
    feed(c, "b", transitions(80, seed=42), first=1)
    c.wait_applied("a", 120)
    st = c.wait_applied("b", 80)
    return snapshot(c, "b"), st


def comparable(st):
    """stats without the wall-clock time of the last update (a restart learns anew)."""
    st = json.loads(json.dumps(st))
    for e in st["estimators"].values():
        e.pop("last_update", None)
    return st


def assert_damaged(c, req, seq=BAD_SEQ):
    err = c.err(req, "damaged")
    assert err["seq"] == seq, err
    assert "quarantined" in err["message"] and "model.drop" in err["message"], err
    if seq:
        assert f"transition {seq}" in err["message"], err
    return err


def check_requests_on_damaged(d, seq=BAD_SEQ):
    """Every request naming a answers damaged (seq), except list/get/events/create/drop."""
    c = d.client()
    x = PROBES[0]
    for req in ({"op": "value", "model": "a", "x": x},
                {"op": "value", "model": "a", "xs": [x, x]},
                {"op": "observe", "model": "a", "x": x, "r": 1.0, "x_next": x},
                {"op": "observe", "model": "a", "batch": [{"x": x, "r": 1.0, "terminal": True}]},
                {"op": "stats", "model": "a"},
                {"op": "history", "model": "a"},
                {"op": "checkpoint", "model": "a"},
                {"op": "checkpoints", "model": "a"},
                {"op": "rollback", "model": "a", "checkpoint": 1},
                {"op": "train", "model": "a", "estimator": "rp", "passes": 1}):
        err = assert_damaged(c, {**req, "id": 5}, seq)
        print(f"{req['op']}: {err['message']}")
    rep = c.call({"op": "value", "model": "a", "x": x, "id": "q"})
    assert rep["id"] == "q" and rep["error"]["code"] == "damaged", rep
    c.assert_open()
    # the name stays taken until the model is dropped
    c.err(spec("a"), "model_exists")
    # a bulk header naming it is refused, and the connection closed (the payload would follow)
    bulk = d.client()
    assert_damaged(bulk, {"op": "observe.bulk", "model": "a", "count": 1}, seq)
    bulk.assert_closed()
    # other names still answer as always
    c.err({"op": "stats", "model": "zz"}, "no_such_model")
    return c


def check_listing(c, seq, reason_has):
    models = {m["model"]: m for m in c.ok({"op": "model.list"})["models"]}
    assert set(models) == {"a", "b"}, models
    a = models["a"]
    assert set(a) == {"model", "state", "seq", "reason"}, a
    assert (a["state"], a["seq"]) == ("damaged", seq), a
    assert reason_has in a["reason"], a
    assert models["b"]["state"] == "ok" and models["b"]["applied"] >= 80, models["b"]
    got = c.ok({"op": "model.get", "model": "a"})
    assert {k: got[k] for k in a} == a, got
    assert c.ok({"op": "model.get", "model": "b"})["state"] == "ok"
    evs = events(c, model="a")
    q = [e for e in evs if e["kind"] == "quarantined"]
    assert len(q) == 1 and q[0]["model"] == "a", evs
    assert q[0]["detail"]["seq"] == seq and q[0]["detail"]["reason"] == a["reason"], q
    assert [e["kind"] for e in evs][:2] == ["create", "checkpoint"], evs
    return a


def check_b_goes_on(c, before, st_before):
    assert snapshot(c, "b") == before, "b's values changed across the restart"
    assert comparable(c.stats("b")) == comparable(st_before)
    assert feed(c, "b", transitions(30, seed=43), first=81) == 110
    c.wait_applied("b", 110)
    assert snapshot(c, "b") != before


def drop_and_create_again(d):
    """model.drop of the quarantined a; a restart is clean; a new a starts from seq 1."""
    c = d.client()
    assert c.call({"op": "model.drop", "model": "a"}) == {"ok": True, "persisted": True}
    c.err({"op": "value", "model": "a", "x": PROBES[0]}, "no_such_model")
    assert [m["model"] for m in c.ok({"op": "model.list"})["models"]] == ["b"]
    d.shutdown()
    db = sqlite3.connect(f"file:{d.db}?mode=ro", uri=True, timeout=10)
    try:
        rows = db.execute("SELECT dropped_at FROM models WHERE name = 'a'").fetchall()
        kinds = [k for (k,) in db.execute(
            "SELECT kind FROM events WHERE model = (SELECT id FROM models WHERE name = 'a')"
            " ORDER BY id")]
    finally:
        db.close()
    assert len(rows) == 1 and rows[0][0] is not None, rows
    assert kinds[-2:] == ["quarantined", "drop"], kinds
    d = d.restart()
    assert " error " not in d.stderr and "is quarantined" not in d.stderr, d.tail()
    c = d.client()
    assert [(m["model"], m["state"]) for m in c.ok({"op": "model.list"})["models"]] == \
        [("b", "ok")]
    assert c.call(spec("a")) == {"ok": True, "model": "a", "features": 12}
    assert c.call({"op": "observe", "model": "a", "x": [1, 1], "r": 1.0, "terminal": True}) \
        == {"ok": True, "seq": 1, "durable": True}
    c.wait_applied("a", 1)
    assert c.stats("b")["received"] == 110
    return d


KINDS = ["x-flip", "crc", "flags", "r-nan", "terminal-next", "truncated"]
CASES = [pytest.param(k, "stop", id=f"{k}-stop") for k in KINDS] + \
        [pytest.param(k, "kill9", id=f"{k}-kill9") for k in ("x-flip", "r-nan", "truncated")]


@pytest.mark.parametrize("kind,how", CASES)
def test_damaged_row_quarantines_its_model_only(daemon, kind, how):
    d = daemon("--checkpoint-every", "0")
    before, st_before = two_models(d)
    if how == "kill9":
        d.kill9()
    else:
        d.shutdown()
        assert damage_newest_checkpoint(d.db, "a") == 120
    damage_row(d.db, "a", BAD_SEQ, kind)

    d = d.restart()
    log = d.stderr
    assert re.search(rf"model a is quarantined .*transition {BAD_SEQ} is damaged", log), log
    assert "model.drop" in log and "model b" in log, log
    c = d.client()
    check_b_goes_on(c, before, st_before)
    check_requests_on_damaged(d)
    a = check_listing(c, BAD_SEQ, f"transition {BAD_SEQ} is damaged")
    print(f"{kind}: {a['reason']}")
    d.shutdown()  # exits 0 on SIGTERM with a model quarantined

    # still damaged at the next start (nothing was repaired); then dropped for good
    d = d.restart()
    c = d.client()
    assert_damaged(c, {"op": "value", "model": "a", "x": PROBES[0]})
    assert snapshot(c, "b") != before and c.stats("b")["received"] == 110
    drop_and_create_again(d)


@pytest.mark.parametrize("spec_text", [
    pytest.param('{"model":"a","dims":2,', id="not-json"),
    pytest.param(None, id="gamma-7"),
    pytest.param(b'{"model":"a"}', id="blob-not-text")])
def test_damaged_spec_quarantines_its_model_only(daemon, free_port, spec_text):
    d = daemon("--metrics", f"127.0.0.1:{free_port}")
    before, st_before = two_models(d)
    d.shutdown()
    db = rw(d.db)
    try:
        if spec_text is None:  # JSON, but a value spec_parse refuses
            (text,) = db.execute("SELECT spec FROM models WHERE name = 'a'").fetchone()
            sp = json.loads(text)
            sp["gamma"] = 7
            spec_text = json.dumps(sp)
        db.execute("UPDATE models SET spec = ? WHERE name = 'a' AND dropped_at IS NULL",
                   (spec_text,))
        db.commit()
    finally:
        db.close()
    d = d.restart()
    wait_listening(free_port)
    assert "model a is quarantined" in d.stderr, d.tail()
    c = d.client()
    check_b_goes_on(c, before, st_before)
    check_requests_on_damaged(d, seq=0)
    a = check_listing(c, 0, "its stored spec does not parse")
    print(a["reason"])
    _, _, samples = scrape(free_port)
    assert series(samples, "worth_model_damaged", model="a") == 1
    assert series(samples, "worth_model_damaged", model="b") == 0
    assert not [lb for n, lb, _ in samples if n == "worth_queue_depth" and lb["model"] == "a"]
    d = drop_and_create_again(d)
    wait_listening(free_port)
    _, _, samples = scrape(free_port)
    assert series(samples, "worth_model_damaged", model="a") == 0


def test_damage_before_the_newest_checkpoint_is_seen_by_a_replay(daemon):
    # Rows the newest checkpoint covers are not read at start: the model is served.  A
    # rollback with replay over the damaged row answers damaged, naming it.
    d = daemon()
    c = d.client()
    assert c.call(spec("a")) == {"ok": True, "model": "a", "features": 12}
    trs = transitions(120, seed=44)
    feed(c, "a", trs[:20], first=1)
    cp = c.ok({"op": "checkpoint", "model": "a", "label": "at-20"})
    feed(c, "a", trs[20:], first=21)
    c.wait_applied("a", 120)
    before = snapshot(c, "a")
    d.shutdown()
    damage_row(d.db, "a", 30, "x-flip")
    d = d.restart()
    assert " error " not in d.stderr and "is quarantined" not in d.stderr, d.tail()
    c = d.client()
    assert c.ok({"op": "model.get", "model": "a"})["state"] == "ok"
    assert snapshot(c, "a") == before
    err = c.err({"op": "rollback", "model": "a", "checkpoint": cp["checkpoint"], "replay": True,
                 "exclude": {"seq": [100, 101]}}, "damaged")
    assert "transition 30 is damaged: its record fails its CRC-32" in err["message"], err


def test_corrupt_page_of_one_model_quarantines_it(daemon):
    # A leaf page of the log's b-tree that holds only a's rows, zeroed: SQLite reports
    # SQLITE_CORRUPT while a's rows are replayed, and b's (on other pages) read as ever.
    d = daemon("--checkpoint-every", "0")
    c = d.client()
    for name in ("a", "b"):
        assert c.call(spec(name)) == {"ok": True, "model": name, "features": 12}
    feed(c, "a", transitions(3000, seed=45), batch=500, first=1)
    feed(c, "b", transitions(80, seed=46), first=1)
    c.wait_applied("a", 3000)
    c.wait_applied("b", 80)
    before = snapshot(c, "b")
    d.kill9()  # no checkpoint: the restart replays both logs
    db = rw(d.db)
    try:
        assert db.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()[0] == 0
        (page,) = db.execute("PRAGMA page_size").fetchone()
        # The log's blocks are larger than a page: each is a cell whose data runs on in a
        # chain of overflow pages.  The first page of a chain says where the next is; zeroed,
        # the chain ends before the data does, which SQLite reports as corrupt.
        chains = {}
        for pageno, path in db.execute(
                "SELECT pageno, path FROM dbstat WHERE name = 'log_blocks'"
                " AND pagetype = 'overflow' ORDER BY path"):
            chains.setdefault(path.split("+")[0], []).append(pageno)
        mid_a = model_id(db, "a")
        (a_blocks,) = db.execute("SELECT count(*) FROM log_blocks WHERE model = ?",
                                 (mid_a,)).fetchone()
    finally:
        db.close()
    # cells in rowid order, the order blocks were written: a's first, then b's
    a_chains = [p for p in list(chains.values())[:a_blocks] if len(p) >= 2]
    assert len(a_chains) >= 2, chains
    victim = a_chains[len(a_chains) // 2][0]  # inside a's 3000 transitions, far from b's 80
    with open(d.db, "r+b") as f:
        f.seek((victim - 1) * page)
        f.write(bytes(page))
    d = d.restart()
    assert re.search(r"model a is quarantined .*corrupt.*restore the database from a backup",
                     d.stderr), d.tail()
    c = d.client()
    assert snapshot(c, "b") == before
    err = assert_damaged(c, {"op": "value", "model": "a", "x": PROBES[0]}, seq=0)
    assert "corrupt" in err["message"], err
    a = {m["model"]: m for m in c.ok({"op": "model.list"})["models"]}["a"]
    assert (a["state"], a["seq"]) == ("damaged", 0) and "corrupt" in a["reason"], a
    assert c.call({"op": "model.drop", "model": "a"}) == {"ok": True, "persisted": True}
    d = d.restart()
    assert " error " not in d.stderr and "is quarantined" not in d.stderr, d.tail()
    assert snapshot(d.client(), "b") == before
