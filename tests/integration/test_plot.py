"""`worth plot` and `worth watch` against a real worthd (tests only).

The value map must be a well-formed SVG (parsed with xml.etree) whose colour cells
span the requested ranges of the two plotted dimensions, with the other dimensions
held where --at says; the values in the cells must equal worthd's own `value`
answers; and the picture must render (Debian's rsvg-convert, to PNG). The history
plot draws one series per estimator from worthd's `history`. `watch --count`
prints refreshing stats and ends by itself.
"""
import json
import os
import shutil
import subprocess
import xml.etree.ElementTree as ET

import pytest

from test_cli import cli_path, ok, fails, run

SVG = "{http://www.w3.org/2000/svg}"
SPEC = {"model": "pl", "dims": 3, "gamma": 0.9, "ranges": [[0, 12], [0, 400], [-1, 1]],
        "features": [{"basis": "bias"}, {"basis": "rbf", "centers": 3, "width": 0.3}],
        "estimators": [{"name": "td", "kind": "td", "alpha": 0.1},
                       {"name": "rls", "kind": "rls_td"}]}


def make_model(d, tmp_path, n=400):
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps(SPEC))
    ok(run(d, "create", spec))
    rows = ["x0,x1,x2,r,xn0,xn1,xn2,terminal"]
    for i in range(n):
        a, b, c = (i * 7) % 12, (i * 37) % 400, ((i % 9) - 4) / 4
        rows.append(f"{a},{b},{c},{a / 12 - b / 400},{(a + 1) % 12},{b},{c},{int(i % 10 == 9)}")
    data = tmp_path / "d.csv"
    data.write_text("\n".join(rows) + "\n")
    ok(run(d, "feed", "pl", data))
    c = d.client()
    c.wait_applied("pl", n)
    return c


def test_value_map_is_a_well_formed_svg_spanning_the_ranges(daemon, tmp_path):
    d = daemon()
    c = make_model(d, tmp_path)
    out = tmp_path / "map.svg"
    p = ok(run(d, "plot", "pl", "--x", 0, "--y", 1, "--at", "0,0,0.5", "--grid", 20,
               "--out", out))
    assert "wrote" in p.stdout
    root = ET.parse(out).getroot()
    assert root.tag == SVG + "svg"
    cells = [e for e in root.iter(SVG + "rect") if e.get("class") == "cell"]
    assert len(cells) == 400
    xs = sorted({float(e.get("data-x")) for e in cells})
    ys = sorted({float(e.get("data-y")) for e in cells})
    # 20 cell centres across each declared range: first and last half a cell from the ends
    assert len(xs) == 20 and len(ys) == 20
    assert xs[0] == pytest.approx(0.3) and xs[-1] == pytest.approx(11.7)
    assert ys[0] == pytest.approx(10.0) and ys[-1] == pytest.approx(390.0)
    # geometry: the cells tile the plot area, larger x to the right, larger y upwards
    left = min(cells, key=lambda e: float(e.get("data-x")))
    right = max(cells, key=lambda e: float(e.get("data-x")))
    low = min(cells, key=lambda e: float(e.get("data-y")))
    high = max(cells, key=lambda e: float(e.get("data-y")))
    assert float(left.get("x")) < float(right.get("x"))
    assert float(low.get("y")) > float(high.get("y"))
    # each cell's value is worthd's value at that state (third dimension held at 0.5)
    for e in cells[::37]:
        v = c.ok({"op": "value", "model": "pl",
                  "x": [float(e.get("data-x")), float(e.get("data-y")), 0.5]})["value"]
        assert float(e.get("data-v")) == v
    fills = {e.get("fill") for e in cells}
    assert len(fills) > 5, "the map should not be one colour"
    # axes: ticks on both, labels in the declared ranges; a colour bar with its value range
    ticks_x = [e for e in root.iter(SVG + "line") if e.get("class") == "tick-x"]
    ticks_y = [e for e in root.iter(SVG + "line") if e.get("class") == "tick-y"]
    assert len(ticks_x) >= 3 and len(ticks_y) >= 3
    texts = [t.text for t in root.iter(SVG + "text")]
    assert "x[0]" in texts and "x[1]" in texts and "400" in texts
    bar = [g for g in root.iter(SVG + "g") if g.get("class") == "colourbar"]
    assert len(bar) == 1
    vals = [float(e.get("data-v")) for e in cells]
    assert float(bar[0].get("data-v-lo")) == min(vals)
    assert float(bar[0].get("data-v-hi")) == max(vals)
    # it renders (librsvg)
    png = tmp_path / "map.png"
    r = subprocess.run([shutil.which("rsvg-convert") or "/usr/bin/rsvg-convert", "-o", str(png),
                        str(out)], capture_output=True, timeout=60)
    assert r.returncode == 0, r.stderr
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert not [f for f in os.listdir(tmp_path) if ".tmp-" in f]


def test_value_map_of_one_estimator_and_errors(daemon, tmp_path):
    d = daemon()
    c = make_model(d, tmp_path, n=50)
    out = tmp_path / "rls.svg"
    ok(run(d, "plot", "pl", "--x", 2, "--y", 0, "--estimator", "rls", "--grid", 4, "--out", out))
    cells = [e for e in ET.parse(out).getroot().iter(SVG + "rect") if e.get("class") == "cell"]
    e = cells[5]
    mid = 200.0  # dimension 1 held at the middle of [0, 400]
    v = c.ok({"op": "value", "model": "pl", "estimator": "rls",
              "x": [float(e.get("data-y")), mid, float(e.get("data-x"))]})["value"]
    assert float(e.get("data-v")) == v
    fails(run(d, "plot", "pl", "--x", 0, "--y", 0, "--out", out), 2, "--x")
    fails(run(d, "plot", "pl", "--x", 0, "--y", 9, "--out", out), 2)
    fails(run(d, "plot", "pl", "--x", 0, "--y", 1), 2, "--out")
    fails(run(d, "plot", "pl", "--x", 0, "--y", 1, "--at", "1,2", "--out", out), 2, "--at")
    fails(run(d, "plot", "nope", "--x", 0, "--y", 1, "--out", out), 1, "no_such_model")
    fails(run(d, "plot", "pl", "--x", 0, "--y", 1, "--out", tmp_path / "no" / "x.svg"), 2)


def test_history_plot_has_a_series_per_estimator(daemon, tmp_path):
    d = daemon()
    make_model(d, tmp_path, n=300)
    out = tmp_path / "history.svg"
    ok(run(d, "plot", "pl", "--history", "--out", out))
    root = ET.parse(out).getroot()
    series = [e for e in root.iter(SVG + "polyline") if e.get("class") == "series"]
    assert [e.get("data-estimator") for e in series] == ["td", "rls"]
    assert all(e.get("points").strip() for e in series)
    r = subprocess.run(["/usr/bin/rsvg-convert", "-o", str(tmp_path / "h.png"), str(out)],
                       capture_output=True, timeout=60)
    assert r.returncode == 0, r.stderr


def test_watch_count_refreshes_and_ends(daemon, tmp_path):
    d = daemon()
    make_model(d, tmp_path, n=20)
    p = ok(run(d, "watch", "pl", "--count", 2, "--every", 0.1))
    assert p.stdout.count("worth watch pl") == 2
    assert "td" in p.stdout and "rls_td" in p.stdout and "received 20" in p.stdout
    fails(run(d, "watch", "pl", "--every", 0), 2, "--every")
    fails(run(d, "watch", "nope", "--count", 1), 1, "no_such_model")


def test_value_map_of_named_dimensions_shows_names_and_units(daemon, tmp_path):
    d = daemon()
    spec = {"model": "nm", "gamma": 0.9,
            "dims": [{"name": "level", "unit": "m", "range": [0, 12]},
                     {"name": "demand", "unit": "m3/h", "range": [0, 400]},
                     {"name": "valve", "range": [-1, 1]}],
            "reward_unit": "EUR",
            "features": [{"basis": "bias"}, {"basis": "rbf", "centers": 3, "width": 0.3}],
            "estimators": [{"name": "td", "kind": "td", "alpha": 0.1}]}
    f = tmp_path / "nm.json"
    f.write_text(json.dumps(spec))
    ok(run(d, "create", f))
    out = tmp_path / "named.svg"
    p = ok(run(d, "plot", "nm", "--x", "demand", "--y", "level", "--at", "valve=0.5",
               "--grid", 10, "--out", out))
    assert "V [EUR] by " in p.stdout and " over demand [m3/h] x level [m]" in p.stdout, p.stdout
    root = ET.parse(out).getroot()
    texts = [t.text for t in root.iter(SVG + "text")]
    # the dimension held fixed is named with its value, and both ends of the colour bar
    held = [t for t in root.iter(SVG + "text") if t.get("class") == "held"]
    assert held and held[0].text == "held: valve = 0.5", [h.text for h in held]
    ends = [t for t in root.iter(SVG + "text") if t.get("class") == "colourbar-end"]
    assert [t.text.split()[0] for t in ends] == ["min", "max"], [t.text for t in ends]
    bar = [e for e in root.iter(SVG + "g") if e.get("class") == "colourbar"][0]
    assert [float(t.get("data-v")) for t in ends] == [float(bar.get("data-v-lo")),
                                                       float(bar.get("data-v-hi"))]
    assert "demand [m3/h]" in texts and "level [m]" in texts and "V [EUR]" in texts, texts
    g = [e for e in root.iter(SVG + "g") if e.get("class") == "cells"][0]
    assert g.get("data-x-dim") == "1" and g.get("data-y-dim") == "0"
    cells = [e for e in root.iter(SVG + "rect") if e.get("class") == "cell"]
    assert len(cells) == 100
    # by index too, and --at by position
    ok(run(d, "plot", "nm", "--x", 1, "--y", 0, "--at", "0,0,0.5", "--grid", 10,
           "--out", tmp_path / "idx.svg"))
    assert ET.parse(tmp_path / "idx.svg").getroot() is not None
    fails(run(d, "plot", "nm", "--x", "flow", "--y", "level", "--out", out), 2,
          "level, demand, valve")
    fails(run(d, "plot", "nm", "--x", "demand", "--y", "level", "--at", "flow=1", "--out", out),
          2, 'no dimension "flow"')
    hist = tmp_path / "h.svg"
    ok(run(d, "plot", "nm", "--history", "--out", hist))
    texts = [t.text for t in ET.parse(hist).getroot().iter(SVG + "text")]
    assert any(t and t.endswith("[EUR]") for t in texts), texts


def test_history_plot_in_plant_time_with_two_panels_and_marks(daemon, tmp_path):
    """Samples over 12 plant-hours: the x axis reads dates, TD and realised errors have a
    panel each, the checkpoint and the rollback are marked at their plant time, and a
    window of ISO times narrows the picture."""
    import re
    from test_samples import T0, send_samples, station, stream
    d = daemon()
    c = d.client()
    c.ok(station())
    s = stream(720)
    send_samples(c, s[:400], chunk=100)
    c.wait_applied("st", 399)
    cp = c.ok({"op": "checkpoint", "model": "st"})
    send_samples(c, s[400:], chunk=100)
    c.wait_applied("st", 719)
    c.ok({"op": "rollback", "model": "st", "checkpoint": cp["checkpoint"], "replay": True})
    c.wait_applied("st")
    out = tmp_path / "h.svg"
    p = ok(run(d, "plot", "st", "--history", "--out", out))
    assert "(plant time)" in p.stdout, p.stdout
    root = ET.parse(out).getroot()
    kind = [e for e in root.iter(SVG + "text") if e.get("class") == "axis-kind"][0]
    assert kind.get("data-timed") == "1"
    xl = [e.text for e in root.iter(SVG + "text") if e.get("class") == "tick-x-label"]
    assert len(xl) >= 6 and all(re.fullmatch(r"\d\d-\d\d \d\d:\d\d", t) for t in xl), xl
    texts = [e.text or "" for e in root.iter(SVG + "text")]
    assert not any("e+" in t or "e-0" in t for t in texts), texts
    # one y axis per panel, each with its own ticks; the series of each panel
    yl = [e for e in root.iter(SVG + "line") if e.get("class") == "tick-y"]
    upper = [e for e in yl if float(e.get("y1")) < 325]  # the panels: y 70..290 and 360..580
    assert len(upper) >= 3 and len(yl) - len(upper) >= 3, [e.get("y1") for e in yl]
    td = [e for e in root.iter(SVG + "polyline") if e.get("class") == "series"]
    rr = [e for e in root.iter(SVG + "polyline") if e.get("class") == "series-realised"]
    assert [e.get("data-estimator") for e in td] == ["td", "rls"] == \
        [e.get("data-estimator") for e in rr]
    assert all(len(e.get("points").split()) >= 50 for e in td), "a row per 10 minutes"
    marks = [(e.get("data-kind"), float(e.get("data-x")), int(e.get("data-id")))
             for e in root.iter(SVG + "line") if (e.get("class") or "").startswith("mark")]
    listed = c.ok({"op": "checkpoints", "model": "st"})["checkpoints"]
    mine = [e for e in listed if e["checkpoint"] == cp["checkpoint"]][0]
    assert ("checkpoint", s[398]["t"], cp["checkpoint"]) in marks and \
        mine["plant_t"] == s[398]["t"], marks
    assert [m for m in marks if m[0] == "rollback"], marks
    r = subprocess.run(["/usr/bin/rsvg-convert", "-o", str(tmp_path / "h.png"), str(out)],
                       capture_output=True, timeout=60)
    assert r.returncode == 0, r.stderr
    # a window of plant time, in ISO-8601 with an offset: T0 + 2 h .. T0 + 4 h
    w = tmp_path / "w.svg"
    ok(run(d, "plot", "st", "--history", "--since", "2025-12-02T03:00:00+01:00",
           "--until", "2025-12-02T04:00:00Z", "--out", w))
    wroot = ET.parse(w).getroot()
    pts = [e for e in wroot.iter(SVG + "polyline") if e.get("class") == "series"][0]
    n = len(pts.get("points").split())
    assert 10 <= n <= 14, n  # two hours of ten-minute rows (the window is inclusive)
    fails(run(d, "plot", "st", "--history", "--since", "yesterday", "--out", w), 2, "--since")
    fails(run(d, "plot", "st", "--since", "2025-12-02T03:00:00Z", "--x", "level", "--y",
              "demand", "--out", w), 2, "--history")


def test_watch_banner_shows_the_drift_alarm_only_while_it_is_active(daemon):
    """A unit shift in the reward at step 4000 (seeded): watch's banner says DRIFT NOW while
    the alarm is active and no longer once it cleared (stats' drift.active)."""
    import numpy as np
    d = daemon()
    c = d.client()
    c.ok({"op": "model.create", "model": "shift", "dims": 1, "gamma": 0.9,
          "ranges": [[0, 4]], "features": [{"basis": "rbf", "centers": 5, "width": 0.05}],
          "estimators": [{"name": "td", "kind": "td", "alpha": 0.02}]})
    rng = np.random.default_rng(7)
    n, shift_at, mid = 12000, 4000, 4600
    t = np.arange(n)
    x, xn = (t % 5).astype(float), ((t + 1) % 5).astype(float)
    r = rng.normal(size=n) + (t >= shift_at) * 1.0
    rec = np.column_stack([x, r, xn, np.zeros(n)]).astype("<f8")

    def feed(a, b):
        c.send({"op": "observe.bulk", "model": "shift", "count": b - a})
        c.send_raw(rec[a:b].tobytes())
        assert c.recv(60)["ok"] is True
        return c.wait_applied("shift", b)["drift"]

    assert feed(0, shift_at)["active"] is False
    p = ok(run(d, "watch", "shift", "--count", 1))
    assert "DRIFT NOW" not in p.stdout, p.stdout
    dr = feed(shift_at, mid)
    assert dr["active"] is True and dr["alarms"] == 1, dr
    p = ok(run(d, "watch", "shift", "--count", 1))
    assert "<< DRIFT NOW (up)" in p.stdout, p.stdout
    dr = feed(mid, n)
    assert dr["active"] is False and dr["clears"] == 1, dr
    p = ok(run(d, "watch", "shift", "--count", 1))
    assert "DRIFT NOW" not in p.stdout and "drift alarms 1" in p.stdout, p.stdout
