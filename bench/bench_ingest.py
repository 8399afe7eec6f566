"""Sustained ingest: decode frames, calibrate, derive (blocks + running averages), store, against a
plain sqlite3 executemany of the same rows into a bare table in the same run (the issue's
baseline). A second figure inserts into the Store's own schema (same indexes), to show what
the indexes alone cost."""

from __future__ import annotations

import sqlite3
import tempfile
import time
from pathlib import Path

import numpy as np

import _common
from meterlink import calibrate, derived
from meterlink.certificate import load_certificate
from meterlink.protocol import AXES_FRAME_LEN, Axes, AxesBatch, FrameReader, encode_message
from meterlink.storage import READING_COLUMNS, Store

CHUNK = 5000
INSERT = ("INSERT INTO readings (session_id, " + ", ".join(READING_COLUMNS) + ") VALUES (?,?,?,?,?,?,?,?,?,?)")


def full_path(d: Path, wire: bytes, cert, n: int) -> float:
    """The library's batched path: feed_batched -> calibrate_axes -> Series.push_many -> add_reading_arrays."""
    store = Store(d / "ml.db")
    derived.ensure_schema(store.db.conn)
    sid = store.begin_session("bench")
    series = derived.Series(3.0)
    t = time.perf_counter()
    reader = FrameReader()
    for k in range(0, len(wire), CHUNK * AXES_FRAME_LEN):
        for item in reader.feed_batched(wire[k:k + CHUNK * AXES_FRAME_LEN]):
            if not isinstance(item, AxesBatch):
                continue  # the bench stream holds AXES frames only
            t_utc = item.tick_ms / 1000
            res = calibrate.calibrate_axes(cert, item.raw, 94.3e6)
            blocks, _ = series.push_many(t_utc, res.e_v_per_m)
            with store.db.atomic():
                store.add_reading_arrays(sid, 1, item.seq, item.tick_ms, t_utc, item.raw, item.flags,
                                         item.range_index)
                derived.save_blocks(store.db.conn, 1, "m", "total", blocks, 0.9)
    dt = time.perf_counter() - t
    assert store.count("readings", sid) == n
    store.close()
    return dt


def plain(path: Path, tuples: list, same_schema: bool) -> float:
    if same_schema:
        Store(path).close()  # the Store's schema, indexes and all
        conn = sqlite3.connect(path)
        conn.execute("PRAGMA synchronous=NORMAL")
        conn.execute("INSERT INTO sessions (kind, started_utc) VALUES ('bench', 0)")
        conn.commit()
    else:
        conn = sqlite3.connect(path)
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("CREATE TABLE readings (id INTEGER PRIMARY KEY, session_id INT, " +
                     ", ".join(f"{c} NUM" for c in READING_COLUMNS) + ")")
    t = time.perf_counter()
    for k in range(0, len(tuples), CHUNK):
        with conn:
            conn.executemany(INSERT, tuples[k:k + CHUNK])
    dt = time.perf_counter() - t
    conn.close()
    return dt


def main(argv=None) -> dict:
    args = _common.parser(__doc__).parse_args(argv)
    n = 20_000 if args.quick else 100_000
    rng = np.random.default_rng(0)
    counts = rng.integers(50_000, 800_000, size=(n, 3))
    wire = b"".join(encode_message(Axes(0, 0, *map(int, c)), i, i * 1000) for i, c in enumerate(counts))
    tuples = [(1, 1, i, i * 1000, i, int(c[0]), int(c[1]), int(c[2]), 0, 0) for i, c in enumerate(counts)]
    cert = load_certificate("demo-probe")
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        full_path(d, wire[: len(wire) // 20], cert, n // 20)  # warm-up: imports, interpolant caches
        (d / "ml.db").unlink()
        full = full_path(d, wire, cert, n)
        bare = plain(d / "plain.db", tuples, same_schema=False)
        same = plain(d / "same.db", tuples, same_schema=True)
    speed = bare / full  # ours as a fraction of the baseline's speed (the target)
    speed_same = same / full
    return _common.report(
        "ingest", f"decode+calibrate+derive+store {n:,} readings in {full:.2f} s ({n / full:,.0f}/s)",
        f"plain executemany, bare table {bare:.2f} s ({n / bare:,.0f}/s); into the Store schema {same:.2f} s "
        f"({n / same:,.0f}/s)", speed,
        f"{speed:.2f}x the bare-table baseline's speed ({full / bare:.1f}x its time); "
        f"{speed_same:.2f}x the same-schema insert's speed ({full / same:.1f}x its time)",
        ">= 0.5x the speed of plain executemany into a bare table", speed >= 0.5, args.json, readings=n,
        full_s=full, bare_s=bare, same_schema_s=same, ratio_same_schema=speed_same)


if __name__ == "__main__":
    main()
