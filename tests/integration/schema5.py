"""A database written by worthd of schema 5 (the log a row per transition), and the history of
requests that wrote it, shared by the script that made the fixture and test_migrate.py.

data/schema5.db was made by the worthd of commit d27364e (schema 5, before the log moved into
blocks) with:

    WORTH_DAEMON=<that worthd> WORTH_MAKE_FIXTURE=1 /usr/bin/python3 -m pytest -q -s schema5.py

which runs history() on a fresh database with --checkpoint-every 0, records the answers in
data/schema5.json, kills worthd with SIGKILL (so its restart must replay the log) and folds the
WAL into the file.  The data are made up (test_durable.transitions).
"""
import json
import os
import shutil
import sqlite3

from test_durable import PROBES, T0, feed, read_train, snapshot, spec, transitions

HERE = os.path.dirname(os.path.abspath(__file__))
FIXTURE = os.path.join(HERE, "data", "schema5.db")
ANSWERS = os.path.join(HERE, "data", "schema5.json")


def history(c):
    """Two models: m with t, a labelled checkpoint, a training and a rollback that re-learns
    with a window of t excluded; n without t and without checkpoints.  Returns m's checkpoint."""
    c.ok(spec("m"))
    c.ok(spec("n"))
    trs = transitions(600, seed=61, with_t=True)
    feed(c, "m", trs[:300], first=1)
    cp = c.ok({"op": "checkpoint", "model": "m", "label": "at-300"})["checkpoint"]
    feed(c, "m", trs[300:450], first=301)
    c.send({"op": "train", "model": "m", "estimator": "rp", "passes": 2})
    assert read_train(c, 2)["passes"] == 2
    feed(c, "m", trs[450:], first=451)
    c.wait_applied("m", 600)
    lo, hi = T0 + 60.0 * 380, T0 + 60.0 * 420
    c.ok({"op": "rollback", "model": "m", "checkpoint": cp, "replay": True,
          "exclude": {"t": [lo, hi]}}, timeout=60)
    feed(c, "m", transitions(100, seed=62, with_t=True, first=601), first=601)
    feed(c, "n", transitions(400, seed=63), first=1)
    c.wait_applied("m")
    c.wait_applied("n", 400)
    return cp


def answers(c):
    return {name: snapshot(c, name, PROBES) for name in ("m", "n")}


def test_make_fixture(daemon, tmp_path):
    if not os.environ.get("WORTH_MAKE_FIXTURE"):
        return  # only when asked: this file is not one of the suite's tests
    d = daemon("--checkpoint-every", "0", "--log-level", "warn")
    c = d.client()
    cp = history(c)
    out = {"checkpoint": cp, "answers": answers(c),
           "applied": {n: c.stats(n)["applied"] for n in ("m", "n")}}
    d.kill9()
    db = sqlite3.connect(d.db)
    assert db.execute("PRAGMA user_version").fetchone()[0] == 5
    db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    db.close()
    shutil.copyfile(d.db, FIXTURE)
    with open(ANSWERS, "w") as f:
        json.dump(out, f, indent=1)
    print(f"wrote {FIXTURE} ({os.path.getsize(FIXTURE)} bytes) and {ANSWERS}")
