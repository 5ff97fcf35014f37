#!/usr/bin/python3
"""Writes the fuzz target's seed corpus from the request examples of schema/protocol.md.

Usage: seeds.py PROTOCOL_MD OUT_DIR

Every request line shown with "> " in protocol.md (continuation lines joined) becomes a seed
on its own, and again after the model.create example, extended with one estimator of every
kind, so that the requests on a model find one.  One seed runs the whole session in order.
Bulk seeds follow the "observe.bulk" example with real payloads of 2-dimensional records
(x0, x1, r, x_next0, x_next1, terminal as little-endian doubles): complete, cut short by EOF,
with a NaN and with a terminal flag of 2.  Fails when protocol.md yields fewer requests than
it had when this was written, so a change of its format is noticed.
"""
import hashlib
import json
import os
import struct
import sys

MIN_REQUESTS = 20  # protocol.md held 21 request examples when this was written


def requests(md):
    """The example request lines of protocol.md, each one JSON text."""
    out, cur, in_code = [], None, False
    for line in open(md, encoding="utf-8"):
        line = line.rstrip("\n")
        if line.startswith("```"):
            in_code = not in_code
            if cur:
                out.append(cur)
            cur = None
            continue
        if not in_code:
            continue
        if line.startswith("> "):
            if cur:
                out.append(cur)
            body = line[2:]
            cur = None if body.startswith("<") else body  # "<1000 records ...>" is prose
        elif line.startswith("   ") and cur is not None:
            cur += line.strip()
        else:
            if cur:
                out.append(cur)
            cur = None
    good = []
    for r in out:
        try:
            if isinstance(json.loads(r), dict):
                good.append(r)
        except ValueError:
            pass
    return good


def record(x, r, xn, term):
    return struct.pack("<6d", x[0], x[1], r, xn[0], xn[1], term)


def main():
    md, out_dir = sys.argv[1], sys.argv[2]
    reqs = requests(md)
    if len(reqs) < MIN_REQUESTS:
        sys.exit(f"seeds.py: only {len(reqs)} requests found in {md}; expected {MIN_REQUESTS}+")
    create = next(json.loads(r) for r in reqs if json.loads(r)["op"] == "model.create")
    # One estimator of every kind of protocol.md's table, so train, rollback and stats meet them.
    create["estimators"] += [
        {"name": "tdn", "kind": "td_n", "n": 3}, {"name": "tdl", "kind": "td_lambda"},
        {"name": "mc", "kind": "mc", "horizon": 20}, {"name": "lstd", "kind": "lstd"},
        {"name": "replay", "kind": "replay", "capacity": 100, "batch": 8}]
    session_create = json.dumps(create, separators=(",", ":"))

    seeds = {}

    def add(name, data):
        seeds[name] = data if isinstance(data, bytes) else data.encode()

    for i, r in enumerate(reqs):
        op = json.loads(r)["op"].replace(".", "_")
        add(f"req{i:02d}_{op}", r + "\n")
        if json.loads(r)["op"] not in ("model.create", "observe.bulk"):
            add(f"after_create{i:02d}_{op}", session_create + "\n" + r + "\n")
    add("session", session_create + "\n" + "\n".join(
        r for r in reqs if json.loads(r)["op"] not in ("model.create", "observe.bulk")) + "\n")

    name = create["model"]
    recs = [record((4.2, 180), -1.5, (4.3, 175), 0), record((4.3, 175), -1.2, (4.4, 170), 0),
            record((4.4, 170), 0.5, (0, 0), 1)]
    header = json.dumps({"op": "observe.bulk", "model": name, "count": 3, "id": 9},
                        separators=(",", ":"))
    add("bulk_complete", (session_create + "\n" + header + "\n").encode() + b"".join(recs) +
        b'{"op":"stats","model":"' + name.encode() + b'"}\n')
    add("bulk_truncated", (session_create + "\n" + header + "\n").encode() + recs[0] + recs[1][:20])
    add("bulk_nan", (session_create + "\n" + header + "\n").encode() + recs[0] +
        struct.pack("<6d", 1, float("nan"), 0, 1, 1, 0) + recs[2])
    add("bulk_terminal_2", (session_create + "\n" + header + "\n").encode() + recs[0] + recs[1] +
        record((1, 1), 0, (1, 1), 2))
    add("bulk_ack_applied", (session_create + "\n" + header[:-1] + ',"ack":"applied"}\n').encode()
        + b"".join(recs))
    # Two full batches in a row: the second waits (parks) for queue space.
    batch = json.dumps({"op": "observe", "model": name, "batch": [
        {"x": [4.2, 180], "r": -1.5, "x_next": [4.3, 175]}] * 8}, separators=(",", ":"))
    add("batches_park", session_create + "\n" + batch + "\n" + batch + "\n" + batch + "\n")
    add("crlf_and_blank", session_create + "\r\n\r\n  \n" + '{"op":"hello","id":"a"}\r\n')

    os.makedirs(out_dir, exist_ok=True)
    for n, data in seeds.items():
        digest = hashlib.sha1(data).hexdigest()[:12]
        with open(os.path.join(out_dir, f"{n}-{digest}"), "wb") as f:
            f.write(data)
    print(f"seeds.py: {len(seeds)} seeds from {len(reqs)} requests of {md}")


if __name__ == "__main__":
    main()
