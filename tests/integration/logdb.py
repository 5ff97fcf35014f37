"""The transition log as worthd stores it, read straight from its SQLite file.

Since schema 006 (schema/006_blocks.sql) a model's log is the rows of the transitions table
written before that migration, then blocks in log_blocks: a row per run of consecutive
transitions, each record with its CRC-32 (the layout: daemon/store/logblk.h).  A rollback
marks rows in transitions.rolled_back and blocks' transitions in log_undone.  rows() gives
both back in the shape of the old table, so a test reads the log the same way whatever the
layout on disk.
"""
import json
import struct
import zlib

TERMINAL, HAS_T, HAS_DT, HAS_SOURCE, XN_NEXT = 0x01, 0x02, 0x04, 0x08, 0x10


def model_dims(db, mid):
    (spec,) = db.execute("SELECT spec FROM models WHERE id = ?", (mid,)).fetchone()
    dims = json.loads(spec)["dims"]
    return len(dims) if isinstance(dims, list) else int(dims)


def decode_block(data, first, last, dims):
    """The records of one block as dicts (x, x_next as bytes of dims float64); each record's
    CRC is checked (AssertionError when one fails)."""
    out, p, vb = [], 0, 8 * dims
    for i in range(last - first + 1):
        crc, flags = struct.unpack_from("<IB", data, p)
        q = p + 5
        (r,) = struct.unpack_from("<d", data, q)
        q += 8
        t = dt = None
        if flags & HAS_T:
            (t,) = struct.unpack_from("<d", data, q)
            q += 8
        if flags & HAS_DT:
            (dt,) = struct.unpack_from("<d", data, q)
            q += 8
        source = ""
        if flags & HAS_SOURCE:
            n = data[q]
            source = data[q + 1:q + 1 + n].decode()
            q += 1 + n
        x = bytes(data[q:q + vb])
        q += vb
        xn = None
        if not flags & TERMINAL and not flags & XN_NEXT:
            xn = bytes(data[q:q + vb])
            q += vb
        assert zlib.crc32(bytes(data[p + 4:q])) == crc, f"record {first + i} fails its CRC"
        out.append({"seq": first + i, "t": t, "source": source, "x": x, "r": r, "x_next": xn,
                    "terminal": 1 if flags & TERMINAL else 0, "dt": dt, "xn_next": bool(flags & XN_NEXT),
                    "offset": p, "length": q - p})
        p = q
    assert p == len(data), "bytes after the block's last record"
    for a, b in zip(out, out[1:]):
        if a["xn_next"]:
            a["x_next"] = b["x"]
    return out


def undone(db, mid):
    return db.execute("SELECT lo, hi, rollback FROM log_undone WHERE model = ? ORDER BY lo",
                      (mid,)).fetchall()


def rows(db, mid, after=0):
    """The model's log after seq `after`, in seq order, as tuples
    (seq, t, source, x, r, x_next, terminal, dt, rolled_back) like the transitions table's."""
    out = list(db.execute("SELECT seq, t, source, x, r, x_next, terminal, dt, rolled_back "
                          "FROM transitions WHERE model = ? AND seq > ? ORDER BY seq",
                          (mid, after)).fetchall())
    blocks = db.execute("SELECT first_seq, last_seq, data FROM log_blocks WHERE model = ?"
                        " AND last_seq > ? ORDER BY first_seq", (mid, after)).fetchall()
    if not blocks:
        return out
    dims = model_dims(db, mid)
    marks = undone(db, mid)
    for first, last, data in blocks:
        for rec in decode_block(data, first, last, dims):
            if rec["seq"] <= after:
                continue
            rb = next((ev for lo, hi, ev in marks if lo <= rec["seq"] <= hi), 0)
            out.append((rec["seq"], rec["t"], rec["source"], rec["x"], rec["r"], rec["x_next"],
                        rec["terminal"], rec["dt"], rb))
    return out


def count(db, mid=None):
    """How many transitions are logged (of model mid, or of every model)."""
    if mid is None:
        (a,) = db.execute("SELECT count(*) FROM transitions").fetchone()
        (b,) = db.execute("SELECT COALESCE(SUM(last_seq - first_seq + 1), 0) FROM log_blocks"
                          ).fetchone()
    else:
        (a,) = db.execute("SELECT count(*) FROM transitions WHERE model = ?", (mid,)).fetchone()
        (b,) = db.execute("SELECT COALESCE(SUM(last_seq - first_seq + 1), 0) FROM log_blocks"
                          " WHERE model = ?", (mid,)).fetchone()
    return a + b


def record(db, mid, seq):
    """(first_seq, the block's data, the record of seq as decode_block gives it)."""
    first, last, data = db.execute(
        "SELECT first_seq, last_seq, data FROM log_blocks WHERE model = ? AND first_seq <= ?"
        " AND last_seq >= ?", (mid, seq, seq)).fetchone()
    recs = decode_block(data, first, last, model_dims(db, mid))
    return first, bytes(data), recs[seq - first]


def count_max(db, mid=None):
    """(how many transitions are logged, the largest seq), of model mid or of every model."""
    where, args = ("WHERE model = ?", (mid,)) if mid is not None else ("", ())
    a, ma = db.execute(f"SELECT count(*), max(seq) FROM transitions {where}", args).fetchone()
    b, mb = db.execute("SELECT COALESCE(SUM(last_seq - first_seq + 1), 0), max(last_seq)"
                       f" FROM log_blocks {where}", args).fetchone()
    highs = [m for m in (ma, mb) if m is not None]
    return a + b, max(highs) if highs else None


def seqs(db, mid):
    """Every logged seq of model mid, in order (from the rows and the blocks' ranges)."""
    out = [r[0] for r in db.execute("SELECT seq FROM transitions WHERE model = ? ORDER BY seq",
                                    (mid,))]
    for first, last in db.execute("SELECT first_seq, last_seq FROM log_blocks WHERE model = ?"
                                  " ORDER BY first_seq", (mid,)):
        out.extend(range(first, last + 1))
    return out


def undone_seqs(db, mid):
    """The seqs of model mid a rollback undid, in order."""
    out = [r[0] for r in db.execute("SELECT seq FROM transitions WHERE model = ? AND"
                                    " rolled_back != 0 ORDER BY seq", (mid,))]
    for lo, hi, _ in undone(db, mid):
        out.extend(range(lo, hi + 1))
    return out


def undone_count(db, mid):
    (a,) = db.execute("SELECT count(*) FROM transitions WHERE model = ? AND rolled_back != 0",
                      (mid,)).fetchone()
    (b,) = db.execute("SELECT COALESCE(SUM(hi - lo + 1), 0) FROM log_undone WHERE model = ?",
                      (mid,)).fetchone()
    return a + b


def rollback_ids(db, mid):
    """The ids of the rollback events that undid some of model mid's transitions."""
    ids = {r[0] for r in db.execute("SELECT DISTINCT rolled_back FROM transitions WHERE"
                                    " model = ? AND rolled_back != 0", (mid,))}
    return ids | {ev for _, _, ev in undone(db, mid)}
