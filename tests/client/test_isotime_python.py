"""client/cli/isotime against Python's datetime on the same strings (tests only).

The reference is Python's own ISO-8601 reader, datetime.datetime.fromisoformat (Python 3.11,
Debian's /usr/bin/python3), and datetime.timestamp() for the instant; the zone rules of the
DST change days come from zoneinfo.ZoneInfo("Europe/Berlin") (Debian's tzdata).  $ISOTIME_DRIVE
is tests/client/isotime_drive: a line in, "OK <seconds %.17g>" or "ERR <message>" out.

Four groups: strings both accept, which must give the same double (==); the DST change days of
Europe/Berlin written with their offsets, minute by minute; strings both refuse; and strings
Python accepts that worth refuses on purpose, each with the reason.
"""
import os
import random
import subprocess
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo


def drive(strings):
    exe = os.environ.get("ISOTIME_DRIVE")
    assert exe and os.access(exe, os.X_OK), "set ISOTIME_DRIVE to tests/client/isotime_drive"
    p = subprocess.run([exe], input="".join(s + "\n" for s in strings), capture_output=True,
                       text=True, timeout=60)
    assert p.returncode == 0, p.stderr
    out = p.stdout.splitlines()
    assert len(out) == len(strings)
    return out


def python_seconds(s):
    """Python's datetime: the instant of s as a float, None when it refuses or gives a naive time."""
    try:
        d = datetime.fromisoformat(s)
    except ValueError:
        return None
    return d.timestamp() if d.tzinfo is not None else None


def check_same(strings):
    for s, got in zip(strings, drive(strings)):
        want = python_seconds(s)  # Python's datetime.fromisoformat(s).timestamp()
        assert want is not None, f"Python refuses {s!r}"
        assert got.startswith("OK "), f"{s!r}: {got}"
        assert float(got[3:]) == want, f"{s!r}: worth {got[3:]}, Python {want!r}"


def spell_offset(minutes, style):
    sign = "-" if minutes < 0 else "+"
    h, m = divmod(abs(minutes), 60)
    if style == 0:
        return f"{sign}{h:02d}:{m:02d}"
    if style == 1:
        return f"{sign}{h:02d}{m:02d}"
    return f"{sign}{h:02d}" if m == 0 else f"{sign}{h:02d}:{m:02d}"


def test_random_instants_with_offsets_and_fractions_equal_python():
    rnd = random.Random(15)
    strings = []
    lo = datetime(1990, 1, 1, tzinfo=timezone.utc).timestamp()
    hi = datetime(2100, 1, 1, tzinfo=timezone.utc).timestamp()
    for i in range(4000):
        t = rnd.randrange(int(lo), int(hi))
        off = rnd.choice([0, 60, 120, -300, 330, 345, -570, 840, -720, 1439, -1439])
        local = datetime.fromtimestamp(t, timezone.utc) + timedelta(minutes=off)
        sep = rnd.choice("T ")
        s = local.strftime(f"%Y-%m-%d{sep}%H:%M")
        if rnd.random() < 0.8:
            s += local.strftime(":%S")
            if rnd.random() < 0.6:
                ndig = rnd.randrange(1, 10)
                s += rnd.choice(".,") + "".join(rnd.choice("0123456789") for _ in range(ndig))
        if off == 0 and rnd.random() < 0.5:
            s += "Z"
        else:
            s += spell_offset(off, rnd.randrange(3))
        strings.append(s)
    check_same(strings)


def test_calendar_edges_equal_python():
    strings = ["1970-01-01T00:00:00Z", "1969-12-31T23:59:59Z", "2000-02-29T12:00:00Z",
               "2024-02-29T23:59:59.999999Z", "2100-02-28T23:59:59Z", "2100-03-01T00:00:00Z",
               "1990-01-01T00:00:00+14:00", "2099-12-31T23:59:59-12:00",
               "2026-12-31T23:59:59.5+00:00", "2026-01-01T00:00:00-00:00",
               "2026-06-30T23:59:59,000001+05:45"]
    check_same(strings)


def test_dst_change_days_in_berlin_written_with_their_offsets():
    berlin = ZoneInfo("Europe/Berlin")
    for day in ("2026-03-29", "2026-10-25", "2027-03-28", "2027-10-31"):
        start = datetime.fromisoformat(day + "T00:00:00+00:00") - timedelta(hours=3)
        strings, instants = [], []
        for minute in range(0, 30 * 60, 7):
            u = start + timedelta(minutes=minute)
            local = u.astimezone(berlin)  # zoneinfo picks +01:00 or +02:00 for this instant
            strings.append(local.isoformat())
            strings.append(local.strftime("%Y-%m-%d %H:%M:%S%z"))  # +0100 spelling
            instants += [u.timestamp()] * 2
        check_same(strings)
        got = [float(line[3:]) for line in drive(strings)]
        assert got == instants
        offs = {s[-6:] for s in strings[::2]}
        assert offs == {"+01:00", "+02:00"}, offs
    # the repeated hour of the autumn change: same wall clock, an hour apart
    a, b = drive(["2026-10-25T02:30:00+02:00", "2026-10-25T02:30:00+01:00"])
    assert float(b[3:]) - float(a[3:]) == 3600.0


def test_both_refuse():
    strings = ["2026-13-01T00:00:00Z", "2026-00-10T00:00:00Z", "2026-02-29T00:00:00Z",
               "2026-02-30T00:00:00Z", "2026-04-31T00:00:00Z", "2100-02-29T00:00:00Z",
               "2026-12-01T24:00:00Z", "2026-12-01T25:00:00Z", "2026-12-01T12:60:00Z",
               "2026-12-31T23:59:60Z", "2026-12-01T12:00:00+24:00", "2026-12-01T12:00:00-25:00",
               "2026-12-01T1:00:00Z", "+2026-12-01T12:00:00Z", "2026-12-01T12:00:00z",
               "2026-335T12:00:00Z", "tomorrow", ""]
    for s, got in zip(strings, drive(strings)):
        try:
            datetime.fromisoformat(s)  # Python's datetime refuses each of these too
            python_refuses = False
        except ValueError:
            python_refuses = True
        assert python_refuses, f"Python accepts {s!r}"
        assert got.startswith("ERR "), f"{s!r}: {got}"


# Python accepts these; worth refuses them on purpose (the reason beside each).
DELIBERATE = {
    "2026-12-01T12:00:00": "no zone: a local time repeats an hour when the clocks go back",
    "2026-12-01": "a date alone is no sample time, and has no zone",
    "2026-12-01T12Z": "an hour alone: a truncated export column more likely than a time",
    "20261201T120000Z": "basic form: digits only, easily a number of another kind",
    "2026-12-01x12:00:00Z": "any separator: only T or a space",
    "2026-12-01T12:00:00.Z": "a decimal point without digits",
    "2026-12-01T12:00:00 Z": "a blank before the zone",
    "2026-12-01T12:00:00+01:00:30": "an offset with seconds",
    "2026-W48-1T12:00:00Z": "a week date",
}


def test_worth_refuses_on_purpose_what_python_accepts():
    strings = list(DELIBERATE)
    for s, got in zip(strings, drive(strings)):
        datetime.fromisoformat(s)  # Python's datetime accepts it (raises if that changes)
        assert got.startswith("ERR "), f"{s!r} ({DELIBERATE[s]}): {got}"
    msgs = dict(zip(strings, drive(strings)))
    assert "no time zone" in msgs["2026-12-01T12:00:00"]
    assert "basic form" in msgs["20261201T120000Z"]
