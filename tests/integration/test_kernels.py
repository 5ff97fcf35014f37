"""RLS-TD's kernels (daemon/learn/rlsk.h) through worthd: the variant in use is named at start,
WORTH_RLS_KERNEL pins one (a name this CPU cannot run is refused with exit 2, before anything
is opened), a pinned variant recovers bit for bit after kill -9, and two variants learn the same
values to within rounding (they add in another order, so not bit for bit)."""
import re

from test_durable import PROBES, assert_learnt, create, feed, snapshot, transitions

KERNEL_LINE = re.compile(r"RLS-TD kernels: (portable|compat|avx512)\)")


def close(a, b, rel=1e-9):
    if isinstance(a, (list, tuple)):
        return len(a) == len(b) and all(close(x, y, rel) for x, y in zip(a, b))
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(close(a[k], b[k], rel) for k in a)
    if isinstance(a, float) and isinstance(b, float):
        return abs(a - b) <= rel * max(1.0, abs(a), abs(b))
    return a == b


def learn(daemon, tmp_path, tag, env):
    d = daemon(db=tmp_path / f"{tag}.db", env=env)
    c = d.client()
    create(c)
    assert feed(c, "m", transitions(600, seed=11), first=1) == 600
    c.wait_applied("m", 600)
    return d, c, snapshot(c, "m", PROBES)


def test_unknown_kernel_is_refused(daemon, tmp_path):
    d = daemon(db=tmp_path / "x.db", env={"WORTH_RLS_KERNEL": "sse9"}, expect_rc=2, ready=False)
    assert d.wait_exit(10) == 2, d.tail()
    assert "WORTH_RLS_KERNEL=sse9" in d.stderr and "unset it" in d.stderr, d.stderr
    assert not (tmp_path / "x.db").exists(), "refused before the database was opened"


def test_pinned_kernel_recovers_bit_for_bit(daemon, tmp_path):
    d, c, before = learn(daemon, tmp_path, "pinned", {"WORTH_RLS_KERNEL": "portable"})
    assert_learnt(before)
    assert KERNEL_LINE.search(d.stderr).group(1) == "portable", d.stderr
    d.kill9()
    d2 = d.restart()
    assert snapshot(d2.client(), "m", PROBES) == before, "values differ after kill -9"


def test_variants_agree_to_rounding(daemon, tmp_path):
    d, _, chosen = learn(daemon, tmp_path, "chosen", None)
    name = KERNEL_LINE.search(d.stderr).group(1)
    _, _, portable = learn(daemon, tmp_path, "portable", {"WORTH_RLS_KERNEL": "portable"})
    assert_learnt(chosen)
    assert close(chosen, portable), (name, chosen, portable)
