"""A database of schema 5 (the log a row per transition) opens under this worthd, migrates to
schema 6 (the log in blocks) and recovers bit for bit; afterwards the old rows and the new
blocks are one log for recovery, rollback and a restart after kill -9.

data/schema5.db and data/schema5.json were written by the worthd of schema 5 (schema5.py says
how); the reference for everything after the migration is a fresh worthd of this build fed the
same requests on its own database.  Values are compared as parsed JSON numbers with ==.
"""
import json
import shutil
import sqlite3

import logdb
from schema5 import ANSWERS, FIXTURE, answers, history
from test_durable import T0, feed, model_id, transitions

with open(ANSWERS) as f:
    OLD = json.load(f)


def tables(path):
    db = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        names = {r[0] for r in db.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        return db.execute("PRAGMA user_version").fetchone()[0], names
    finally:
        db.close()


def close(a, b):
    """a and b (answers) agree to 1e-9 relative, structure and None alike."""
    if isinstance(a, (list, tuple)):
        return len(a) == len(b) and all(close(x, y) for x, y in zip(a, b))
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(close(a[k], b[k]) for k in a)
    if isinstance(a, float) and isinstance(b, float):
        return abs(a - b) <= 1e-9 * max(1.0, abs(a), abs(b))
    return a == b


EXACT = [True]  # False for a build whose floating point is not the fixture's (see the test)
# Both daemons run RLS-TD's kernels as schema 5's builds ran them (learn/rlsk.h: "compat"), so
# the arithmetic is the fixture's and what is compared is the log's migration and replay.
PIN = {"WORTH_RLS_KERNEL": "compat"}


def same_answers(c, want):
    got = json.loads(json.dumps(answers(c)))  # tuples as lists, as in the fixture's JSON
    if EXACT[0]:
        assert got == want, "values differ"
    else:
        assert close(got, want), "values differ beyond 1e-9 relative"


def test_schema5_database_migrates_and_recovers_bit_identically(daemon, tmp_path):
    path = tmp_path / "old.db"
    shutil.copyfile(FIXTURE, path)
    version, names = tables(path)
    assert version == 5 and "transitions" in names and "log_blocks" not in names, names

    # A fresh database written by this worthd, blocks only, fed the same requests.  A build
    # whose floating point is the fixture's (release and debugoptimized builds on x86-64)
    # learns the very bits schema 5's worthd did, and then every comparison below is exact;
    # a sanitizer build (-O1, instrumented) rounds some sums differently, and then they are
    # held to 1e-9 relative: its own replays are still bit for bit its own.
    fresh = daemon("--checkpoint-every", "0", db=str(tmp_path / "fresh.db"), env=PIN)
    f = fresh.client()
    assert history(f) == OLD["checkpoint"]
    EXACT[0] = json.loads(json.dumps(answers(f))) == OLD["answers"]
    print("this build learns schema 5's worthd's bits:", EXACT[0])
    same_answers(f, OLD["answers"])

    old = daemon("--checkpoint-every", "0", db=str(path), env=PIN)
    assert "applied schema migration 6" in old.stderr, old.tail()
    assert tables(path)[0] == 6
    c = old.client()
    same_answers(c, OLD["answers"])  # recovered from schema 5's rows, as schema 5 had them
    assert {n: c.stats(n)["applied"] for n in ("m", "n")} == OLD["applied"]

    # both go on: new transitions (blocks on the migrated database after its rows)
    for cl in (c, f):
        feed(cl, "m", transitions(150, seed=64, with_t=True, first=701), first=701)
        feed(cl, "n", transitions(120, seed=65), first=401)
        cl.wait_applied("m", None)
        cl.wait_applied("n", 520)
    ref = json.loads(json.dumps(answers(f)))
    same_answers(c, ref)
    db = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        mid = model_id(db, "m")
        (rows,) = db.execute("SELECT count(*) FROM transitions WHERE model = ?",
                             (mid,)).fetchone()
        (first_block,) = db.execute("SELECT MIN(first_seq) FROM log_blocks WHERE model = ?",
                                    (mid,)).fetchone()
        assert rows == 700 and first_block == 701, (rows, first_block)
        assert [r[0] for r in logdb.rows(db, mid)] == list(range(1, 851))
    finally:
        db.close()

    # kill -9: the restart replays schema 5's rows (after m's checkpoint) and then the blocks
    for d in (old, fresh):
        d.kill9()
    old, fresh = old.restart(), fresh.restart()
    c, f = old.client(), fresh.client()
    same_answers(f, ref)
    same_answers(c, ref)

    # a rollback whose window of seq spans the old rows and the new blocks, on both
    for cl in (c, f):
        cl.ok({"op": "rollback", "model": "m", "checkpoint": OLD["checkpoint"],
                     "replay": True, "exclude": {"seq": [650, 760]}}, timeout=60)
        cl.wait_applied("m", None)
    ref2 = json.loads(json.dumps(answers(f)))
    assert ref2 != ref
    same_answers(c, ref2)
    db = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        mid = model_id(db, "m")
        undone = set(logdb.undone_seqs(db, mid))
        # the earlier rollback's window of t (seqs 380-420) and this one's 650-760
        assert set(range(650, 761)) <= undone and set(range(380, 421)) <= undone, sorted(undone)
        (ranges,) = db.execute("SELECT count(*) FROM log_undone WHERE model = ?",
                               (mid,)).fetchone()
        assert ranges >= 1
    finally:
        db.close()
    # and once more after kill -9: the marks in both layouts hold
    for d in (old, fresh):
        d.kill9()
    old, fresh = old.restart(), fresh.restart()
    same_answers(old.client(), ref2)
    same_answers(fresh.client(), ref2)
