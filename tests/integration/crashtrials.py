"""kill -9 trials: the code behind test_faults.test_kill9_at_random_moments (a few trials, in
tests/run) and tests/reliability/kill9.py (100 trials, run by tests/reliability/run).

One trial, on the same database every time: start worthd (it recovers from its newest
checkpoint and the log after it); check that it has learnt exactly the log so far, that its
values at the probe states equal (==, every estimator, and sd) those of a reference worthd that
was never interrupted and learnt the same transitions in seq order, and that a checkpoint taken
now holds the same serialised state, byte for byte, as one the reference takes; then let three
producers stream durable requests (single observes, batches and bulk frames from seeded
generators; one waits for each reply, one keeps 4 requests in flight, one 16) and SIGKILL
worthd at a moment drawn from the seeded schedule (in one trial of ten, while it is still
starting).  After the kill, with worthd gone, the log is read back with Python's sqlite3: every
transition whose request was acknowledged must be there, at the seq the reply gave, as sent
("losses" counts those that are not); every other logged row must belong to a request that was
in flight, whole and in its connection's order; the log must have no gaps and nothing rolled
back.  The contract is schema/protocol.md ("observe: durability", "Restart").

Seeds fix the streams, the windows and the kill moments; the machine's timing decides how far
each trial gets, so the counts vary from run to run while every check is exact.  Every loop is
bounded in count and time.
"""
import sqlite3
import threading
import time

import numpy as np

from conftest import Client, is_closed_error
from test_durable import log_rows, row_to_tr, snapshot
from test_faults import MODEL, Reference, Stream, create_model, send_request

WINDOWS = (1, 4, 16)         # requests each producer keeps in flight
PRODUCE_MAX_S = 10.0         # a producer's bound; the kill ends it long before
KILL_AFTER_S = (0.03, 0.6)   # the kill moment, drawn uniformly, after the producers start
STARTUP_KILL_P = 0.1         # the share of trials killed while worthd starts (recovers)
CHECKPOINT_EVERY = 97        # worthd's automatic checkpoints, so recoveries start from them


class Producer:
    """One connection streaming durable requests with `window` of them in flight."""

    def __init__(self, sock, stream, window):
        self.sock, self.stream, self.window = sock, stream, window
        self.sent = []   # [(kind, transitions)] in send order
        self.acks = []   # [(seq, count)] of the replies, in order
        self.end = None
        self.thread = threading.Thread(target=self.run, daemon=True)

    def run(self):
        try:
            p = Client(self.sock, timeout=15)
        except OSError as e:
            self.end = ("connect", repr(e))
            return
        deadline = time.monotonic() + PRODUCE_MAX_S
        try:
            for _ in range(1_000_000):
                if time.monotonic() > deadline:
                    self.end = ("limit",)
                    return
                while len(self.sent) - len(self.acks) < self.window:
                    kind, req, rec, trs = self.stream.next_request()
                    self.sent.append((kind, trs))
                    send_request(p, kind, req, rec)
                rep = p.recv()
                kind, trs = self.sent[len(self.acks)]
                last = self.acks[-1][0] if self.acks else 0
                ok = (rep.get("ok") is True and rep.get("durable") is True
                      and isinstance(rep.get("seq"), int) and rep["seq"] > last
                      and set(rep) == ({"ok", "seq", "durable"} if kind == "observe"
                                       else {"ok", "seq", "count", "durable"})
                      and rep.get("count", 1) == len(trs))
                if not ok:
                    self.end = ("reply", kind, rep)
                    return
                self.acks.append((rep["seq"], len(trs)))
        except Exception as e:
            self.end = ("closed", repr(e)) if is_closed_error(e) else ("error", repr(e))
        finally:
            p.close()


def check_new_rows(rows, first, producers):
    """Checks the rows a trial added (seq >= first) against what the producers sent and had
    acknowledged.  Returns (losses, problems, in-flight requests found logged)."""
    problems, losses = [], 0
    seqs = [r["seq"] for r in rows]
    if seqs != list(range(first, first + len(rows))):
        problems.append(f"the log's new seqs are not {first}.. without gaps: "
                        f"{seqs[:3]}..{seqs[-3:]}")
    if any(r["rolled_back"] for r in rows):
        problems.append("rows marked rolled back")
    by_seq = {r["seq"]: row_to_tr(r) for r in rows}
    covered = set()
    for pi, p in enumerate(producers):
        for (seq, n), (_, trs) in zip(p.acks, p.sent):
            for k, tr in enumerate(trs):
                s = seq - n + 1 + k
                covered.add(s)
                if by_seq.get(s) != tr:
                    losses += 1
    # The rest: requests in flight, each whole, each connection's in its send order.
    nxt = [len(p.acks) for p in producers]
    inflight_logged = 0
    pos = first
    end = first + len(rows)
    for _ in range(len(rows) + 1):
        while pos < end and pos in covered:
            pos += 1
        if pos >= end:
            break
        for pi, p in enumerate(producers):
            if nxt[pi] < len(p.sent):
                trs = p.sent[nxt[pi]][1]
                if [by_seq.get(pos + k) for k in range(len(trs))] == trs:
                    nxt[pi] += 1
                    inflight_logged += 1
                    covered.update(range(pos, pos + len(trs)))
                    pos += len(trs)
                    break
        else:
            problems.append(f"row {pos} is neither acknowledged nor the start of the next "
                            f"request in flight of any connection (a partial request?)")
            break
    return losses, problems, inflight_logged


def killed(d, trial):
    """SIGKILLs d, which must still have been running, with no sanitizer report so far."""
    rc = d.kill9()
    assert rc == -9, f"trial {trial}: worthd had exited ({rc}) before the kill:\n{d.tail()}"
    assert "Sanitizer" not in d.stderr and "runtime error:" not in d.stderr, \
        f"trial {trial}: a sanitizer report:\n{d.tail(60)}"


def checkpoint_state(db_path, checkpoint_id):
    db = sqlite3.connect(f"file:{db_path}?mode=ro", uri=True, timeout=10)
    try:
        row = db.execute("SELECT seq, state FROM checkpoints WHERE id = ?",
                         (checkpoint_id,)).fetchone()
    finally:
        db.close()
    assert row is not None, f"checkpoint {checkpoint_id} not in {db_path}"
    return row


def run_trials(start, workdir, trials, seed, say=print):
    """Runs `trials` kill -9 trials.  start(*args, db=, ready=) starts a worthd (socket chosen
    by start, the same for the same db) and returns a conftest.Daemon.  Returns a dict of
    figures; raises AssertionError at the first failed check (with the trial's figures)."""
    t0 = time.monotonic()
    rng = np.random.default_rng(seed)
    ref = Reference(start, workdir)
    db = str(workdir / "crash.db")
    args = ("--checkpoint-every", CHECKPOINT_EVERY, "--keep", 3)
    logged = []
    fig = {"trials": 0, "acked": 0, "losses": 0, "inflight_logged": 0, "startup_kills": 0,
           "from_checkpoint": 0, "compared": 0, "kinds": set(), "seconds": 0.0}
    for trial in range(trials + 1):
        last = trial == trials  # the final start: check, then stop cleanly
        startup_kill = not last and trial > 0 and rng.random() < STARTUP_KILL_P
        d = start(*args, db=db, ready=not startup_kill)
        if startup_kill:
            time.sleep(float(rng.uniform(0.0, 0.05)))
            killed(d, trial)
            fig["startup_kills"] += 1
            fig["trials"] += 1
            say(f"trial {trial}: killed while starting")
            continue
        c = d.client(timeout=30)
        if trial == 0:
            create_model(c)
        st = c.stats(MODEL)
        assert (st["received"], st["applied"], st["queue"]) == (len(logged), len(logged), 0), \
            f"trial {trial}: worthd recovered {st}, the log holds {len(logged)}"
        if "restored checkpoint" in d.stderr:
            fig["from_checkpoint"] += 1
        got = snapshot(c, MODEL)
        want = ref.feed(logged)
        assert got == want, f"trial {trial}: values after recovery differ from the " \
            f"uninterrupted reference fed the same {len(logged)} transitions"
        if logged:
            mine = c.ok({"op": "checkpoint", "model": MODEL, "label": f"t{trial}"}, timeout=30)
            theirs = ref.c.ok({"op": "checkpoint", "model": MODEL}, timeout=30)
            assert mine["seq"] == theirs["seq"] == len(logged), (mine, theirs)
            a = checkpoint_state(db, mine["checkpoint"])
            b = checkpoint_state(ref.d.db, theirs["checkpoint"])
            assert a == b, f"trial {trial}: the recovered state differs from the " \
                f"reference's ({len(a[1])} and {len(b[1])} bytes)"
        fig["compared"] += 1
        c.close()
        if last:
            d.shutdown()
            break
        producers = [Producer(d.sock, Stream(seed * 1000 + trial * 10 + k), w)
                     for k, w in enumerate(WINDOWS)]
        for p in producers:
            p.thread.start()
        time.sleep(float(rng.uniform(*KILL_AFTER_S)))
        killed(d, trial)
        for p in producers:
            p.thread.join(20)
            assert not p.thread.is_alive(), f"trial {trial}: a producer hung after the kill"
            assert p.end and p.end[0] == "closed", f"trial {trial}: a producer ended {p.end}"
        rows = log_rows(db, MODEL, after=len(logged))
        losses, problems, inflight = check_new_rows(rows, len(logged) + 1, producers)
        acked = sum(n for p in producers for _, n in p.acks)
        fig["trials"] += 1
        fig["acked"] += acked
        fig["losses"] += losses
        fig["inflight_logged"] += inflight
        for p in producers:
            fig["kinds"].update(kind for kind, _ in p.sent[:len(p.acks)])
        say(f"trial {trial}: acknowledged {acked} transitions in "
            f"{sum(len(p.acks) for p in producers)} requests, logged {len(rows)} "
            f"({inflight} requests in flight logged whole), losses {losses}")
        assert losses == 0 and not problems, \
            f"trial {trial}: {losses} acknowledged transitions lost; {problems}"
        logged += [row_to_tr(r) for r in rows]
    # once more, the whole log against everything accumulated
    assert [row_to_tr(r) for r in log_rows(db, MODEL)] == logged, "the log changed"
    fig["logged"] = len(logged)
    fig["seconds"] = time.monotonic() - t0
    fig["kinds"] = sorted(fig["kinds"])
    return fig


def summary(fig):
    return (f"{fig['trials']} kill -9 trials ({fig['startup_kills']} during start-up): "
            f"{fig['acked']} transitions acknowledged, {fig['logged']} logged, "
            f"{fig['losses']} lost; {fig['inflight_logged']} requests in flight logged whole; "
            f"{fig['compared']} recoveries bit-identical to the reference "
            f"({fig['from_checkpoint']} from a checkpoint); {fig['seconds']:.1f} s")
