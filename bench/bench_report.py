"""Report generation on long records: a station's year of 6-minute blocks published as CSV, and the
HTML report of a recorded day of 1 Hz readings, each against a plain SQL select + csv dump of the
same rows in the same run.

The station database is the synthetic year of bench_stats (two meters, 87,600 blocks each). The
recorded day is 86,400 raw readings made from the demo certificate's own detector law, so the
report calibrates, assesses, plots and writes real values.
"""

from __future__ import annotations

import csv
import io
import sqlite3
import tempfile
import time
from pathlib import Path

import numpy as np

import _common
import bench_stats
from meterlink.physics.calibrate import expected_counts
from meterlink.physics.certificate import load_certificate
from meterlink.cli import SAFETY_LINE
from meterlink.station.publish import series_rows, to_csv
from meterlink.reports.session_report import write_session_report
from meterlink.storage.store import Store


def plain_dump(conn, sql, params=()) -> float:
    """Baseline: select the rows and write them with csv.writer to memory."""
    t = time.perf_counter()
    buf = io.StringIO()
    w = csv.writer(buf)
    for row in conn.execute(sql, params):
        w.writerow(row)
    return time.perf_counter() - t


def build_day(path: Path, n: int) -> int:
    """A recorded session of n readings at 1 Hz whose counts follow the demo probe's detector law."""
    cert = load_certificate("demo-probe")
    t = 1_790_000_000.0 + np.arange(n, dtype=float)
    e_axis = (4.0 + 2.0 * np.sin(2 * np.pi * np.arange(n) / 86400.0)) / np.sqrt(3.0)
    counts = np.stack([np.round(expected_counts(ax, e_axis)) for ax in cert.axes], axis=1).astype(np.int64)
    with Store(path) as store:
        dev = store.device_id("BENCH-1", "B-0001", cert.serial, cert.certificate_number, 1, "1.0.0", "1.0")
        sid = store.begin_session("record", "bench", dev, 1000, freq_hz=101.8e6)
        rows = [{"boot": 1, "seq": i, "tick_ms": i * 1000, "t_utc": float(t[i]), "raw_x": int(c[0]),
                 "raw_y": int(c[1]), "raw_z": int(c[2]), "flags": 0, "range_index": 0} for i, c in enumerate(counts)]
        for k in range(0, n, 20000):
            store.add_readings(sid, rows[k:k + 20000])
        store.add_event(sid, "assessment", "info", "bench", outcome="-", standard="icnirp-2020", tier="public",
                        rule="guarded")
    return sid


def main(argv=None) -> dict:
    """Station year published as CSV, and a recorded day's HTML report, vs plain select + csv dump."""
    args = _common.parser(__doc__).parse_args(argv)
    n_day = 8_640 if args.quick else 86_400
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        year = d / "year.db"
        bench_stats.build(year, np.random.default_rng(0))
        conn = sqlite3.connect(year)
        t0, t1 = bench_stats.T0, bench_stats.T0 + 366 * 86400.0
        t = time.perf_counter()
        st, rows = series_rows(conn, t0, t1)
        text = to_csv(st, rows, SAFETY_LINE)
        t_pub = time.perf_counter() - t
        b_pub = plain_dump(conn, "SELECT meter, t_start_utc, energy, covered_s, e_max_v_per_m FROM mon_block "
                                 "WHERE station_id = 1 AND band = 'total' ORDER BY meter, t_start_utc")
        conn.close()
        day = d / "day.db"
        sid = build_day(day, n_day)
        t = time.perf_counter()
        write_session_report(day, sid, d / "rep")
        t_rep = time.perf_counter() - t
        conn = sqlite3.connect(day)
        b_rep = plain_dump(conn, "SELECT id, t_utc, raw_x, raw_y, raw_z FROM readings WHERE session_id = ? ORDER BY t_utc",
                           (sid,))
        conn.close()
    figure = (f"publish a year of 6-minute blocks (2 meters, {len(rows)} rows, {len(text) / 1e6:.1f} MB CSV): "
              f"{t_pub:.2f} s; HTML report of a recorded session of {n_day} readings (calibrate, assess, plot): "
              f"{t_rep:.2f} s")
    baseline = (f"plain SQL select + csv dump of the same rows: {b_pub:.2f} s (blocks), {b_rep:.2f} s (readings)")
    ratio = max(t_pub / b_pub, t_rep / b_rep)
    return _common.report("report", figure, baseline, ratio,
                          f"{t_pub / b_pub:.1f}x (publish), {t_rep / b_rep:.1f}x (session report) the plain dump's time",
                          "none set (report only)", None, args.json, publish_s=t_pub, report_s=t_rep,
                          publish_baseline_s=b_pub, report_baseline_s=b_rep)


if __name__ == "__main__":
    main()
