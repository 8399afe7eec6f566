"""Time to compute a month's statistics from a year-long station database.

The database is generated synthetically: two meters, one year of 6-minute blocks (87,600 each)
with a daily cycle and noise, written through meterlink.station.derived as the monitor would, plus the
running-average summaries of three windows. Prints the time and peak memory of the month query.
"""

from __future__ import annotations

import sqlite3
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

import _common
from meterlink.station import derived
from meterlink.station.publish import statistics

T0 = 1_704_067_200.0  # 2024-01-01T00:00:00Z


def build(path: Path, rng) -> None:
    conn = sqlite3.connect(path)
    derived.ensure_schema(conn)
    conn.execute("INSERT INTO mon_station (id, name, standard, tier, convention, block_s, timezone, runs) "
                 "VALUES (1, 'Bench Hill (synthetic)', 'icnirp-2020', 'public', 'power', 360, 'UTC', 1)")
    conn.execute("CREATE TABLE IF NOT EXISTS events (id INTEGER PRIMARY KEY, session_id INT, t_utc REAL, kind TEXT, "
                 "severity TEXT, message TEXT, detail TEXT)")
    n = 365 * 240
    for meter in ("m1", "m2"):
        conn.execute("INSERT INTO mon_meter (station_id, meter, e_ref_v_per_m, s_ref_w_per_m2) VALUES (1,?,27.7,2.0)",
                     (meter,))
        t = T0 + 360.0 * np.arange(n)
        e = 3.0 + np.sin(2 * np.pi * t / 86400.0) + rng.normal(0, 0.2, n)
        blocks = []
        for ti, ei in zip(t, np.abs(e)):
            b = derived.Block(float(ti), 360.0, energy=float(ei * ei * 360.0), covered_s=360.0, n=36, e_max=float(ei))
            for w in (360.0, 1800.0, 86400.0):
                b.run_end[w] = (float(ei * ei), 1.0)
                b.run_max[w] = (float(ei), float(ti + 180))
            blocks.append(b)
        derived.save_blocks(conn, 1, meter, "total", blocks, 0.9)
    conn.commit()
    conn.close()


BASELINE_SQL = ("SELECT meter, CAST((t_start_utc - ?) / 86400 AS INT) AS day, sqrt(sum(energy) / sum(covered_s)), "
                "max(e_max_v_per_m), count(*) FROM mon_block WHERE station_id = 1 AND band = 'total' AND "
                "t_start_utc >= ? AND t_start_utc < ? GROUP BY meter, day")


def main(argv=None) -> dict:
    """Month statistics (meterlink.station.publish.statistics) vs one plain SQL aggregate of the same blocks by day."""
    args = _common.parser(__doc__).parse_args(argv)
    rng = np.random.default_rng(0)
    t0, t1 = T0 + 181 * 86400.0, T0 + 212 * 86400.0   # July 2024
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "year.db"
        t = time.perf_counter()
        build(path, rng)
        t_build = time.perf_counter() - t
        conn = sqlite3.connect(path)
        tracemalloc.start()
        t = time.perf_counter()
        doc = statistics(conn, t0, t1)
        dt = time.perf_counter() - t
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        t = time.perf_counter()
        base_rows = conn.execute(BASELINE_SQL, (t0, t0, t1)).fetchall()
        t_base = time.perf_counter() - t
        size_mb = path.stat().st_size / 1e6
    days = len(doc["meters"][0]["day"])
    assert len(base_rows) == 2 * days
    return _common.report(
        "stats", f"month statistics (2 meters, {days} days, weeks, month, profiles) from a year of 6-minute blocks "
        f"({size_mb:.0f} MB, built in {t_build:.0f} s): {dt * 1000:.0f} ms, peak traced {peak / 2**20:.1f} MiB",
        f"one plain SQL aggregate by meter and day over the same blocks {t_base * 1000:.1f} ms", dt / t_base,
        f"{dt / t_base:.1f}x the plain aggregate's time", "none set (report only)", None, args.json,
        stats_s=dt, baseline_s=t_base)


if __name__ == "__main__":
    main()
