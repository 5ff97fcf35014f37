"""The demo and the README's two commands (tests only).

demo/run is run exactly as the README writes it (from the repository root), with
its output folder moved to a temporary one through $DEMO_DIR: it must exit 0,
write two SVGs that parse, see the stuck sensor with the frozen check within 10
minutes, date the drift alarm's onset within 5% of the fault's length, and re-learn
the days after the fault in the rollback (test_drift_demo.py holds the same to the
log and the events). The README's other command, tests/run, is the one
.ci/run executes (running it from inside itself would never end): the test checks
that both commands stand in the README exactly so, and that .ci/run calls it.
"""
import os
import re
import subprocess
import xml.etree.ElementTree as ET

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def readme_commands():
    text = open(os.path.join(ROOT, "README.md"), encoding="utf-8").read()
    section = text.split("## Two commands", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```sh\n(.*?)\n```", section, re.S)


def test_readme_names_the_two_commands():
    assert readme_commands() == ["demo/run", "tests/run"]
    ci = open(os.path.join(ROOT, ".ci", "run"), encoding="utf-8").read()
    assert "tests/run" in ci
    assert os.access(os.path.join(ROOT, "demo", "run"), os.X_OK)
    assert os.access(os.path.join(ROOT, "tests", "run"), os.X_OK)


def test_demo_run_as_written(tmp_path):
    cmd = readme_commands()[0]
    env = dict(os.environ, DEMO_DIR=str(tmp_path / "demo"))
    env.pop("WORTH_SOCKET", None)
    p = subprocess.run(cmd, shell=True, cwd=ROOT, env=env, capture_output=True, text=True,
                       timeout=600)
    out = p.stdout
    assert p.returncode == 0, f"{out[-3000:]}\n{p.stderr[-3000:]}"
    m = re.search(r"drift alarms before the fault: (\d+) in \d+ sound days .*since it began: (\d+)",
                  out)
    assert m and int(m.group(1)) == 0 and int(m.group(2)) >= 1, out
    m = re.search(r"the frozen-input check on demand fired (\d+) min after the fault began", out)
    assert m and int(m.group(1)) <= 10, out
    m = re.search(r"dates the change [+-]\d+ min from its start \(([\d.]+)% of the fault's", out)
    assert m and float(m.group(1)) <= 5.0, out
    assert re.search(r"the \d+ transitions after the fault were learnt again: yes", out), out
    assert "worthd stopped cleanly" in out
    # The headline is a healthy estimator, and the sd beside it is its own: only rls_td has
    # one, so for any other headline none is shown (no other estimator's sd is borrowed).
    head = re.search(r"\* headline: (\w+); auto: ok", out)
    assert head, out
    name = head.group(1)
    health = dict(re.findall(r"^   (\w+) +-?[\d.]+ +[\d.]+  (\w+)$", out, re.M))
    assert health.get(name) == "ok", (name, health, out)
    rows = re.findall(r"^(?:night, full|morning peak, half|evening, near reserve) .* (\w+) +"
                      r"(-?[\d.]+) +(-|[\d.]+)$", out, re.M)
    assert len(rows) >= 3, out
    for h, value, sd in rows[:3]:  # the table after the first two weeks
        assert h == name, (rows, name)
        assert (sd == "-") == (name != "rls"), (rows, name)
    row = next(ln for ln in out.splitlines() if ln.split()[:2] == [name, "*"])
    assert row.split()[-1] == "ok", row
    for name in ("value-map.svg", "history.svg"):
        path = tmp_path / "demo" / name
        root = ET.parse(path).getroot()
        assert root.tag == "{http://www.w3.org/2000/svg}svg"
    cells = [e for e in ET.parse(tmp_path / "demo" / "value-map.svg").getroot().iter()
             if e.get("class") == "cell"]
    assert len(cells) == 48 * 48
    # the pictures speak the plant's names and units, and the history is in plant time
    svg = "{http://www.w3.org/2000/svg}"
    vm = [e.text for e in ET.parse(tmp_path / "demo" / "value-map.svg").getroot().iter(svg + "text")]
    assert "level [m]" in vm and "V [EUR]" in vm, vm
    assert any(t and t.startswith("held: demand = 250 m3/h") for t in vm), vm
    hroot = ET.parse(tmp_path / "demo" / "history.svg").getroot()
    ht = [e.text for e in hroot.iter(svg + "text")]
    assert "RMS TD error [EUR]" in ht and "realised-return RMS error [EUR]" in ht, ht
    assert [e.get("data-timed") for e in hroot.iter(svg + "text")
            if e.get("class") == "axis-kind"] == ["1"]
    assert any((e.get("class") or "") == "mark mark-rollback" for e in hroot.iter(svg + "line"))
    # the drift alarm is a recorded event in the demo's database
    import sqlite3
    db = sqlite3.connect(f"file:{tmp_path / 'demo' / 'worthd.db'}?mode=ro", uri=True)
    try:
        kinds = [k for (k,) in db.execute("SELECT kind FROM events")]
    finally:
        db.close()
    assert "drift" in kinds and "rollback" in kinds, kinds
