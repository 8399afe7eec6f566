"""`meterlink stats --json` and `meterlink export` (CSV, JSON) over a year-long station database, each
against a plain SQL baseline in the same run, and how their time grows from a month to a year.

The database is synthetic: two meters, one year of 6-minute blocks (87,600 each, a daily cycle and
noise) with the running-average summaries of three windows, rows as meterlink.station.derived writes
them. The commands run in this process through their own ``run(args)`` with output to a file.
Baselines: stats - SQL aggregates (count, sum of covered seconds, max, min, energy mean) grouped by
day, week and month per meter; export CSV - one select of the same rows (ISO times, percent and coverage
in SQL) + round() per value + csv.writer; export JSON - the same rows as dicts + json.dumps (compact, in one piece:
the C encoder), plus the stats baseline (the JSON holds summaries). Each baseline writes the export's rows (checked
once per run: "same rows as the export").
Each figure is the median of several runs (spread min-max), the month, the year and the baseline taken
in turn; every run writes a fresh file (none is deleted until the end: deletions slowed what followed on
the test machine's disk); tracemalloc is off while timing; memory is the peak RSS (VmHWM) of a separate run.
"""

from __future__ import annotations

import argparse
import contextlib
import csv
import itertools
import json
import math
import sqlite3
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

import _common
from meterlink.physics.units import Z0_OHM
from meterlink.station import derived

T0 = 1_704_067_200.0  # 2024-01-01T00:00:00Z
WINDOWS = (360.0, 1800.0, 86400.0)
MONTH = (T0 + 181 * 86400.0, T0 + 212 * 86400.0)   # July 2024
YEAR = (T0, T0 + 365 * 86400.0)


def build(path: Path, rng, days: int = 365) -> None:
    """Two meters of 6-minute blocks over ``days`` days, complete, with running-average summaries."""
    conn = sqlite3.connect(path)
    derived.ensure_schema(conn)
    conn.execute("INSERT INTO mon_station (id, name, standard, tier, convention, block_s, timezone, runs) "
                 "VALUES (1, 'Bench Hill (synthetic)', 'icnirp-2020', 'public', 'power', 360, 'UTC', 1)")
    conn.execute("CREATE TABLE IF NOT EXISTS events (id INTEGER PRIMARY KEY, session_id INT, t_utc REAL, kind TEXT, "
                 "severity TEXT, message TEXT, detail TEXT)")
    n = days * 240
    for meter in ("m1", "m2"):
        conn.execute("INSERT INTO mon_meter (station_id, meter, e_ref_v_per_m, s_ref_w_per_m2) VALUES (1,?,27.7,2.0)",
                     (meter,))
        t = T0 + 360.0 * np.arange(n)
        e = np.abs(3.0 + np.sin(2 * np.pi * t / 86400.0) + rng.normal(0, 0.2, n))
        conn.executemany("INSERT INTO mon_block VALUES (1,?, 'total', ?, 360.0, ?, 360.0, 36, ?, ?, 1, 0)",
                         zip([meter] * n, t.tolist(), (e * e * 360.0).tolist(), e.tolist(), e.tolist()))
        for w in WINDOWS:
            conn.executemany("INSERT INTO mon_running VALUES (1, ?, 'total', ?, ?, ?, 1.0, ?, ?)",
                             zip([meter] * n, [w] * n, t.tolist(), e.tolist(), e.tolist(), (t + 180).tolist()))
    conn.commit()
    conn.close()


AGG_SQL = ("SELECT meter, strftime(?, t_start_utc, 'unixepoch') AS p, count(*), sum(covered_s), max(e_rms_v_per_m), "
           "min(e_rms_v_per_m), sqrt(sum(energy) / sum(covered_s)) FROM mon_block WHERE station_id = 1 AND "
           "band = 'total' AND t_start_utc >= ? AND t_start_utc < ? GROUP BY meter, p")
# The export's rows in plain SQL: ISO times by strftime, percent of the power-density reference level with the
# same IEEE operations as the export (100 * (E^2 / Z0) / S_ref; Z0 bound as a parameter, not parsed from text),
# coverage capped at 1; the rounding (5 significant digits) in Python, as SQLite has no such rounding
# in the last digit of a few values. The baselines so write the same rows as the export.
SERIES_SQL = ("SELECT b.meter, strftime('%Y-%m-%dT%H:%M:%SZ', b.t_start_utc, 'unixepoch'), "
              "strftime('%Y-%m-%dT%H:%M:%SZ', b.t_start_utc + b.block_s, 'unixepoch'), b.e_rms_v_per_m, "
              "100.0 * (b.e_rms_v_per_m * b.e_rms_v_per_m / ?) / m.s_ref_w_per_m2, min(b.covered_s / b.block_s, 1.0), "
              "b.complete, b.n_overrange FROM mon_block b JOIN mon_meter m ON m.station_id = b.station_id AND "
              "m.meter = b.meter WHERE b.station_id = 1 AND b.meter = ? AND b.band = 'total' AND b.t_start_utc >= ? "
              "AND b.t_start_utc < ? ORDER BY b.t_start_utc")      # one primary-key range per meter, as the export
SERIES_COLS = ("meter", "start_utc", "end_utc", "e_rms_v_per_m", "percent_of_reference", "coverage", "complete",
               "overrange_lower_bound")


def _sig5(x: float) -> float:
    return x if x == 0 else float(f"{x:.5g}")


def base_rows(conn, t0, t1):
    """The export's series rows (tuples), the plain way: one select, rounding per value in Python."""
    for (meter,) in conn.execute("SELECT meter FROM mon_meter WHERE station_id = 1 ORDER BY meter").fetchall():
        for m, a, b, e, p, c, ok, over in conn.execute(SERIES_SQL, (Z0_OHM, meter, t0, t1)):
                # 5 significant digits, as every writer rounds (meterlink.reports.digits, docs/formats.md)
                yield (m, a, b, None if e is None else _sig5(e), None if p is None else _sig5(p), _sig5(c),
                       bool(ok), bool(over))


def base_stats(conn, t0, t1) -> list:
    return [conn.execute(AGG_SQL, (fmt, t0, t1)).fetchall() for fmt in ("%Y-%m-%d", "%Y-%W", "%Y-%m")]


def base_csv(conn, t0, t1, out: Path) -> None:
    with open(out, "w", newline="") as f:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(SERIES_COLS)
        w.writerows(base_rows(conn, t0, t1))


def base_json(conn, t0, t1, out: Path) -> None:
    """The same row dicts through json.dumps, compact, in one piece: the C encoder (json.dump to a file, or an
    indent, takes the pure-Python encoder, several times slower) and a smaller text than the export's indented one."""
    agg = base_stats(conn, t0, t1)
    doc = {"summaries": agg, "series_6min": [dict(zip(SERIES_COLS, r)) for r in base_rows(conn, t0, t1)]}
    with open(out, "w") as f:
        f.write(json.dumps(doc))


def same_output(fmt: str, ours: Path, base: Path) -> bool:
    """Whether the export and its baseline hold the same series: CSV data lines byte for byte (the export's
    '#' lines aside), JSON the same row values."""
    if fmt == "csv":
        with open(ours) as a, open(base) as b:
            return [ln for ln in a if not ln.startswith("#")] == b.readlines()
    with open(ours) as a, open(base) as b:
        return json.load(a)["series_6min"] == json.load(b)["series_6min"]


def ours_stats(db: Path, t0, t1, out: Path) -> None:
    from meterlink.commands import stats
    with open(out, "w") as f, contextlib.redirect_stdout(f):
        stats.run(_args(db, t0, t1, json=True))


def ours_export(fmt: str):
    def run(db: Path, t0, t1, out: Path) -> None:
        from meterlink.commands import export
        export.run(_args(db, t0, t1, format=fmt, out=str(out)))
    return run


def _args(db, t0, t1, **kw) -> argparse.Namespace:
    iso = lambda t: __import__("datetime").datetime.fromtimestamp(t, __import__("datetime").timezone.utc).isoformat()  # noqa: E731
    return argparse.Namespace(db=str(db), t_from=iso(t0), t_to=iso(t1), **kw)


def main(argv=None) -> list[dict]:
    ap = _common.parser(__doc__)
    ap.add_argument("--repeat", type=int, default=None, help="runs per figure (default 5; 3 with --quick)")
    args = ap.parse_args(argv)
    repeat = args.repeat or (3 if args.quick else 5)
    days = 120 if args.quick else 365
    year = (T0, T0 + days * 86400.0)
    month = MONTH if not args.quick else (T0 + 31 * 86400.0, T0 + 62 * 86400.0)
    _common.print_machine()
    out = []
    with tempfile.TemporaryDirectory() as d:
        db = Path(d) / "station.db"
        build(db, np.random.default_rng(0), days)
        conn = sqlite3.connect(db)
        size_mb = db.stat().st_size / 1e6
        runs = itertools.count()
        dest = lambda: Path(d) / f"out{next(runs)}"  # noqa: E731 - a fresh file per run: no deletion in between
        targets = [("stats", "meterlink stats --json", ours_stats, "SQL aggregates by day, week and month",
                    lambda a, b: base_stats(conn, a, b)),
                   ("export_csv", "meterlink export --format csv", ours_export("csv"), "select + round() + csv.writer of the same rows",
                    lambda a, b: base_csv(conn, a, b, dest())),
                   ("export_json", "meterlink export --format json", ours_export("json"),
                    "select + round() + json.dumps of the same rows (+ the SQL aggregates)", lambda a, b: base_json(conn, a, b, dest()))]
        same = {}
        for fmt in ("csv", "json"):
            ours_f, base_f = Path(d) / f"same.{fmt}", Path(d) / f"same-base.{fmt}"
            ours_export(fmt)(db, *year, ours_f)
            (base_csv if fmt == "csv" else base_json)(conn, *year, base_f)
            same[f"export_{fmt}"] = same_output(fmt, ours_f, base_f)
        for name, what, fn, base_what, base in targets:
            # the month, the year and the year's baseline in turn, so that drifting load hits all alike
            r = _common.rotated({"month": lambda: fn(db, *month, dest()), "year": lambda: fn(db, *year, dest()),
                                 "base": lambda: base(*year)}, repeat)
            ours_r, base_r = r["year"], r["base"]
            ratio = ours_r["median"] / base_r["median"]
            out.append(_common.report(
                name, f"{what} over a year ({days} days, 2 meters, {2 * days * 240:,} blocks, "
                f"{size_mb:.0f} MB): {_common.timing_text(ours_r)}",
                f"{base_what}: {_common.timing_text(base_r)}"
                + ("" if name not in same else f"; same rows as the export: {'yes' if same[name] else 'NO'}"),
                ratio, f"{ratio:.2f}x the baseline",
                "<= 1.5x the SQL baseline (a year)", ratio <= 1.5 if days >= 365 else None, args.json,
                peak_mb=peak_of(name, db, *year),
                seconds=ours_r["median"], baseline_s=base_r["median"], runs=ours_r["runs"],
                baseline_runs=base_r["runs"], **({"same_output": same[name]} if name in same else {})))
            n_m, n_y = (month[1] - month[0]), (year[1] - year[0])
            expo = math.log(r["year"]["median"] / r["month"]["median"]) / math.log(n_y / n_m)
            out.append(_common.report(
                f"{name}_scale", f"{what}: a month {_common.timing_text(r['month'])}, "
                f"{'a year' if days >= 365 else f'{days} days'} {_common.timing_text(r['year'])}",
                "time ~ span^exponent (1 = linear)", expo, f"exponent {expo:.2f}", "exponent <= 1.1",
                expo <= 1.1, args.json, exponent=expo, month_runs=r["month"]["runs"]))
        for f in Path(d).glob("out*"):
            f.unlink()
        conn.close()
    return out


def memory_only(name: str, db: str, t0: float, t1: float) -> None:
    """One run of a target in a fresh process, for its peak RSS (timed runs keep tracemalloc off); prints the
    process's own VmHWM: a child's ru_maxrss starts from the parent's peak at the fork (Linux keeps the larger
    across exec), which here is the year's arrays built by the parent."""
    fn = {"stats": ours_stats, "export_csv": ours_export("csv"), "export_json": ours_export("json")}[name]
    with tempfile.TemporaryDirectory() as d:
        fn(Path(db), t0, t1, Path(d) / "out")
    with open("/proc/self/status") as f:
        print("RSS_MIB", int(next(ln for ln in f if ln.startswith("VmHWM")).split()[1]) / 1024)


def peak_of(name: str, db: Path, t0: float, t1: float) -> float:
    """Peak RSS (MiB) of one run of a target in its own process (memory_only)."""
    p = subprocess.run([sys.executable, __file__, "--memory-only", name, str(db), str(t0), str(t1)],
                       capture_output=True, text=True, check=True)
    return float(next(ln.split()[1] for ln in p.stdout.splitlines() if ln.startswith("RSS_MIB")))


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--memory-only":
        memory_only(sys.argv[2], sys.argv[3], float(sys.argv[4]), float(sys.argv[5]))
    else:
        main()
