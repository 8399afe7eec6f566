"""Sustained ingest: decode AXES frames, calibrate and sum the axes, store the raw readings, against
a plain sqlite3 executemany of the same rows into a bare table in the same run (the issue's baseline).

The baseline gets the Store's own durability settings (WAL, synchronous=NORMAL), so the ratio is
what meterlink's work costs, not a pragma. A second figure adds what a monitoring station also does
per reading (6-minute blocks and running averages, saved), and a third inserts the same tuples into
the Store's schema with executemany alone (per-row foreign-key and NOT NULL checks, no span upkeep).
Each figure is the best of several interleaved rounds, because the machines this runs on are shared.
"""

from __future__ import annotations

import sqlite3
import tempfile
import time
from pathlib import Path

import numpy as np

import _common
from meterlink.physics import calibrate
from meterlink.station import derived
from meterlink.storage import spans
from meterlink.physics.certificate import load_certificate
from meterlink.device.protocol import AXES_FRAME_LEN, Axes, AxesBatch, FrameReader, encode_message
from meterlink.storage.store import READING_COLUMNS, Store

CHUNK = 5000  # frames per read: about 0.2 s of a 921600-baud link
INSERT = ("INSERT INTO readings (session_id, " + ", ".join(READING_COLUMNS) + ") VALUES (?,?,?,?,?,?,?,?,?,?)")


def ingest(path: Path, wire: bytes, cert, n: int, derive: bool) -> float:
    """The library's batched path: feed_batched -> calibrate_axes -> add_reading_arrays (-> push_many)."""
    store = Store(path)
    derived.ensure_schema(store.db.conn)
    sid = store.begin_session("bench")
    series = derived.Series(3.0) if derive else None
    reader = FrameReader()
    total_v_per_m = 0.0
    t = time.perf_counter()
    for k in range(0, len(wire), CHUNK * AXES_FRAME_LEN):
        for item in reader.feed_batched(wire[k:k + CHUNK * AXES_FRAME_LEN]):
            if not isinstance(item, AxesBatch):
                continue  # the bench stream holds AXES frames only
            t_utc = item.tick_ms / 1000
            res = calibrate.calibrate_axes(cert, item.raw, 94.3e6)  # linearise, frequency-correct, sum
            total_v_per_m += float(res.e_v_per_m.sum())
            store.add_reading_arrays(sid, 1, item.seq, item.tick_ms, t_utc, item.raw, item.flags, item.range_index)
            if series is not None:
                blocks, _ = series.push_many(t_utc, res.e_v_per_m)
                with store.db.atomic():
                    derived.save_blocks(store.db.conn, 1, "m", "total", blocks, 0.9)
    dt = time.perf_counter() - t
    assert store.count("readings", sid) == n and spans.check(store.db.conn) == []  # outside the timing
    assert np.isfinite(total_v_per_m)
    store.close()
    return dt


def plain(path: Path, tuples: list, store_schema: bool) -> float:
    """executemany of pre-built tuples, CHUNK rows per transaction."""
    if store_schema:
        Store(path).close()  # the Store's tables, foreign keys and all
        conn = sqlite3.connect(path)
        conn.execute("PRAGMA foreign_keys=ON")
        conn.execute("INSERT INTO sessions (kind, started_utc) VALUES ('bench', 0)")
        conn.commit()
    else:
        conn = sqlite3.connect(path)
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("CREATE TABLE readings (id INTEGER PRIMARY KEY, session_id INT, " +
                     ", ".join(f"{c} NUM" for c in READING_COLUMNS) + ")")
    conn.execute("PRAGMA synchronous=NORMAL")  # as the Store sets it
    t = time.perf_counter()
    for k in range(0, len(tuples), CHUNK):
        with conn:
            conn.executemany(INSERT, tuples[k:k + CHUNK])
    dt = time.perf_counter() - t
    assert conn.execute("SELECT count(*) FROM readings").fetchone()[0] == len(tuples)
    conn.close()
    return dt


def main(argv=None) -> dict:
    args = _common.parser(__doc__).parse_args(argv)
    n = 20_000 if args.quick else 100_000
    rounds = 3 if args.quick else 5
    rng = np.random.default_rng(0)
    counts = rng.integers(50_000, 800_000, size=(n, 3))
    wire = b"".join(encode_message(Axes(0, 0, *map(int, c)), i, i * 1000) for i, c in enumerate(counts))
    tuples = [(1, 1, i, i * 1000, i, int(c[0]), int(c[1]), int(c[2]), 0, 0) for i, c in enumerate(counts)]
    cert = load_certificate("demo-probe")
    times: dict[str, list[float]] = {"ours": [], "ours_derive": [], "bare": [], "schema": []}
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        ingest(d / "warm.db", wire[: len(wire) // 20], cert, n // 20, True)  # imports, interpolant caches
        runs = {"bare": lambda p: plain(p, tuples, store_schema=False),
                "ours": lambda p: ingest(p, wire, cert, n, derive=False),
                "schema": lambda p: plain(p, tuples, store_schema=True),
                "ours_derive": lambda p: ingest(p, wire, cert, n, derive=True)}
        names = list(runs)
        # interleaved, and in a rotating order, so a busy spell of the machine (or of its disk: no
        # file is deleted until the end) falls on each of them alike
        for r in range(rounds):
            for name in names[r % len(names):] + names[:r % len(names)]:
                times[name].append(runs[name](d / f"{name}{r}.db"))
    best = {k: min(v) for k, v in times.items()}
    speed = best["bare"] / best["ours"]  # ours as a fraction of the baseline's speed (the target)
    speed_derive = best["bare"] / best["ours_derive"]
    return _common.report(
        "ingest", f"decode+calibrate+sum+store {n:,} readings in {best['ours']:.3f} s "
                  f"({n / best['ours']:,.0f}/s); with station blocks and running averages "
                  f"{best['ours_derive']:.3f} s ({n / best['ours_derive']:,.0f}/s)",
        f"plain executemany, bare table {best['bare']:.3f} s ({n / best['bare']:,.0f}/s); same tuples into "
        f"the Store's schema {best['schema']:.3f} s; best of {rounds} rounds", speed,
        f"{speed:.2f}x the bare-table baseline's speed ({speed_derive:.2f}x with blocks and averages)",
        ">= 0.5x the speed of plain executemany into a bare table", speed >= 0.5, args.json, readings=n,
        ours_s=best["ours"], ours_derive_s=best["ours_derive"], bare_s=best["bare"], schema_s=best["schema"],
        ratio_with_derive=speed_derive, rounds={k: [round(x, 4) for x in v] for k, v in times.items()})


if __name__ == "__main__":
    main()
