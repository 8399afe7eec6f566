"""Time to compute a month's statistics from a year-long station database.

The database is generated synthetically: two meters, one year of 6-minute blocks (87,600 each)
with a daily cycle and noise, written through meterlink.derived as the monitor would, plus the
running-average summaries of three windows. Prints the time and peak memory of the month query.
"""

from __future__ import annotations

import resource
import sqlite3
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from meterlink import derived  # noqa: E402
from meterlink.publish import statistics  # noqa: E402

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


def main() -> None:
    rng = np.random.default_rng(0)
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "year.db"
        t = time.perf_counter()
        build(path, rng)
        print(f"built a year of 6-minute blocks for 2 meters in {time.perf_counter() - t:.1f} s "
              f"({path.stat().st_size / 1e6:.1f} MB)")
        conn = sqlite3.connect(path)
        tracemalloc.start()
        t = time.perf_counter()
        doc = statistics(conn, T0 + 181 * 86400.0, T0 + 212 * 86400.0)   # July 2024
        dt = time.perf_counter() - t
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        days = len(doc["meters"][0]["day"])
        print(f"month statistics (2 meters, {days} days, weeks, month, profiles): {dt * 1000:.0f} ms; "
              f"peak Python memory {peak / 1e6:.1f} MB; process max RSS "
              f"{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")


if __name__ == "__main__":
    main()
