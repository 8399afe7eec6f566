"""Sustained ingest: decode frames, calibrate, derive (blocks + running averages), store,
against a plain sqlite3 executemany of the same rows in the same run. Prints the ratio."""

from __future__ import annotations

import resource
import sqlite3
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from meterlink import calibrate, derived  # noqa: E402
from meterlink.certificate import load_certificate  # noqa: E402
from meterlink.protocol import Axes, FrameReader, encode_message, parse_payload  # noqa: E402
from meterlink.storage import READING_COLUMNS, Store  # noqa: E402

N = 100_000


def main() -> None:
    rng = np.random.default_rng(0)
    counts = rng.integers(50_000, 800_000, size=(N, 3))
    wire = b"".join(encode_message(Axes(0, 0, *map(int, c)), i, i * 1000) for i, c in enumerate(counts))
    cert = load_certificate("demo-probe")
    with tempfile.TemporaryDirectory() as d:
        # full path
        store = Store(Path(d) / "ml.db")
        derived.ensure_schema(store.db.conn)
        sid = store.begin_session("bench")
        series = derived.Series(3.0)
        t = time.perf_counter()
        reader = FrameReader()
        rows = []
        for fr in reader.feed(wire):
            a = parse_payload(fr)
            rows.append({"boot": 1, "seq": fr.seq, "tick_ms": fr.tick_ms, "t_utc": fr.tick_ms / 1000, "raw_x": a.x,
                         "raw_y": a.y, "raw_z": a.z, "flags": a.flags, "range_index": a.range_index})
        for k in range(0, N, 5000):
            chunk = rows[k:k + 5000]
            raw = np.array([[r["raw_x"], r["raw_y"], r["raw_z"]] for r in chunk])
            res = calibrate.calibrate_axes(cert, raw, 94.3e6)
            out = []
            for r, e in zip(chunk, res.e_v_per_m):
                b, _ = series.push(r["t_utc"], float(e))
                out += b
            with store.db.atomic():
                store.write_batch(sid, readings=chunk)
                derived.save_blocks(store.db.conn, 1, "m", "total", out, 0.9)
        full = time.perf_counter() - t
        store.close()
        # baseline: plain executemany of the same rows
        conn = sqlite3.connect(Path(d) / "plain.db")
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("CREATE TABLE readings (id INTEGER PRIMARY KEY, session_id INT, " +
                     ", ".join(f"{c} NUM" for c in READING_COLUMNS) + ")")
        tuples = [(1, *(r[c] for c in READING_COLUMNS)) for r in rows]
        t = time.perf_counter()
        for k in range(0, N, 5000):
            with conn:
                conn.executemany("INSERT INTO readings (session_id, " + ", ".join(READING_COLUMNS) +
                                 ") VALUES (?,?,?,?,?,?,?,?,?,?)", tuples[k:k + 5000])
        plain = time.perf_counter() - t
    print(f"{N} readings: decode+calibrate+derive+store {full:.2f} s ({N / full:,.0f}/s); "
          f"plain executemany {plain:.2f} s ({N / plain:,.0f}/s); ratio {full / plain:.1f}x; "
          f"max RSS {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")


if __name__ == "__main__":
    main()
