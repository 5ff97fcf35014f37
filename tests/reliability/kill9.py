#!/usr/bin/python3
"""kill -9 trials against worthd: `kill9.py [--trials 100] [--seed S] [--daemon PATH]`.

Runs the trials of tests/integration/crashtrials.py (what one trial checks is written there):
worthd is SIGKILLed under a load of three connections, lock-step and pipelined, at seeded
moments, restarted on the same database each time, and checked: every acknowledged transition
in the log, requests in flight logged whole or not at all, and the recovered values and
checkpointed state bit-identical to a reference that learnt the log uninterrupted.  Prints one
line per trial and a summary (trials, acknowledged transitions, losses, seconds); exits 0
only when every check held.  Everything happens in a temporary directory (removed unless
--keep); worthd listens only on Unix sockets there.  Run with Debian's /usr/bin/python3.
"""
import argparse
import os
import pathlib
import shutil
import sys
import tempfile

HERE = pathlib.Path(__file__).resolve().parent
ROOT = HERE.parent.parent
sys.path.insert(0, str(ROOT / "tests" / "integration"))

from conftest import Daemon  # noqa: E402
import crashtrials  # noqa: E402
from test_faults import CRASH_SEED  # noqa: E402


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--trials", type=int, default=100)
    ap.add_argument("--seed", type=int, default=CRASH_SEED)
    ap.add_argument("--daemon", default=os.environ.get("WORTH_DAEMON",
                                                      str(ROOT / "build/daemon/worthd")))
    ap.add_argument("--keep", action="store_true", help="keep the temporary directory")
    a = ap.parse_args()
    a.daemon = os.path.abspath(a.daemon)  # worthd runs in its own working directory
    if not os.access(a.daemon, os.X_OK):
        sys.exit(f"kill9: {a.daemon} is not an executable (build first: ninja -C build)")
    work = pathlib.Path(tempfile.mkdtemp(prefix="worth-kill9-"))
    started = []

    def start(*args, db, ready=True):
        """A worthd on db; the same socket for the same database (as a restart would)."""
        sock = str(work / (pathlib.Path(db).stem + ".sock"))
        wd = work / f"d{len(started)}"
        wd.mkdir()
        d = Daemon([a.daemon, "--socket", sock, "--db", str(db), *map(str, args)], sock,
                   str(wd), 0, db=str(db))
        started.append(d)
        if ready:
            d.wait_ready()
        return d

    ok = False
    try:
        fig = crashtrials.run_trials(start, work, a.trials, a.seed)
        print(crashtrials.summary(fig))
        print(f"reproduce: tests/reliability/kill9.py --trials {a.trials} --seed {a.seed} "
              f"--daemon {a.daemon}")
        ok = fig["losses"] == 0
    finally:
        bad = []
        for d in started:
            rc, killed = d.stop()
            if killed or rc not in (0, -9):
                bad.append(f"{d.argv[0]} {d.argv[-4:]}: exit {rc}{' (killed)' if killed else ''}"
                           f"\n{d.tail(10)}")
        for b in bad:
            print(f"kill9: worthd did not stop cleanly: {b}", file=sys.stderr)
        ok = ok and not bad
        if a.keep or not ok:
            print(f"kill9: files kept in {work}", file=sys.stderr)
        else:
            shutil.rmtree(work, ignore_errors=True)
    sys.exit(0 if ok else 1)


if __name__ == "__main__":
    main()
