"""The one-pass statistics and the streamed exports against straightforward reference computations.

The references here are written plainly (a boolean mask per period, ``datetime.fromtimestamp`` per
block, ``np.percentile`` with numpy's default "linear" method, which is Hyndman & Fan (1996)
definition 7, and the standard library's json/csv writers over whole lists) on a small random station
database in a real SQLite file. Time zones with daylight-saving changes (Europe/Berlin) and with a
30-minute change (Australia/Lord_Howe) make the local hour and the period edges non-trivial.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
import math
import sqlite3
from zoneinfo import ZoneInfo

import numpy as np
import pytest

from meterlink.reports.digits import tidy
from meterlink.physics.units import Z0_OHM
from meterlink.station import derived

from meterlink.station.publish import (SERIES_COLUMNS, _iso_list, iter_series, series_rows, statistics,
                                       station_info, to_csv, to_json, write_csv, write_json, write_series_csv,
                                       write_series_json)

T0 = 1_711_000_000.0       # 2024-03-21, ten days before the spring change in Europe and Lord Howe's autumn one
WINDOWS = (360.0, 1800.0, 86400.0)


def _build(path, tz: str, convention: str, days: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    conn = sqlite3.connect(path)
    derived.ensure_schema(conn)
    conn.execute("INSERT INTO mon_station (id, name, standard, tier, convention, block_s, timezone, runs) "
                 "VALUES (1, 'random check', 'icnirp-2020', 'public', ?, 360, ?, 1)", (convention, tz))
    for meter in ("a", "b"):
        conn.execute("INSERT INTO mon_meter (station_id, meter, e_ref_v_per_m, s_ref_w_per_m2) VALUES (1,?,27.7,2.0)",
                     (meter,))
        t = T0 + 360.0 * np.arange(days * 240) + 37.0
        t = t[rng.random(t.size) > 0.15]                       # gaps
        blocks = []
        for ti in t:
            e = abs(rng.normal(3.0, 1.5))
            cov = 360.0 if rng.random() > 0.2 else float(rng.uniform(0.0, 360.0))
            b = derived.Block(float(ti), 360.0, energy=e * e * cov, covered_s=cov, n=36, e_max=e * 1.2)
            b.n_over = int(rng.random() < 0.03)
            for w in WINDOWS:
                if rng.random() > 0.1:
                    b.run_end[w] = (e * e, 1.0)
                    b.run_max[w] = (None if rng.random() < 0.1 else e * 1.1, float(ti) + 60.0)
            blocks.append(b)
        derived.save_blocks(conn, 1, meter, "total", blocks, 0.9)
    conn.commit()
    conn.close()


def _ref_summary(conv: str, e_ref: float, s_ref: float, e: np.ndarray) -> dict:
    if e.size == 0:
        return {"n_blocks": 0}
    q = e if conv == "field" else e * e / Z0_OHM
    out = {"n_blocks": e.size}
    for name, v in (("max", q.max()), ("min", q.min()), ("median", np.percentile(q, 50)),
                    ("p95", np.percentile(q, 95))):
        ev = v if conv == "field" else math.sqrt(v * Z0_OHM)
        out[f"{name}_e_v_per_m"] = ev
        out[f"{name}_pct"] = 100 * ev / e_ref if conv == "field" else 100 * (ev * ev / Z0_OHM) / s_ref
    return out


def _ref_periods(tz, t0, t1, period):
    """Period starts by plain calendar stepping in local time."""
    d = dt.datetime.fromtimestamp(t0, tz).replace(hour=0, minute=0, second=0, microsecond=0)
    if period == "week":
        d -= dt.timedelta(days=d.weekday())
    if period == "month":
        d = d.replace(day=1)
    while d.timestamp() < t1:
        if period == "day":
            n = (d + dt.timedelta(days=1)).replace(tzinfo=tz)
        elif period == "week":
            n = (d + dt.timedelta(days=7)).replace(tzinfo=tz)
        else:
            n = d.replace(year=d.year + (d.month == 12), month=d.month % 12 + 1)
        yield d, max(d.timestamp(), t0), min(n.timestamp(), t1)
        d = n


def _reference(conn, t0, t1) -> list[dict]:
    st, meters = station_info(conn)
    tz = ZoneInfo(st["timezone"])
    conv = st["convention"]
    out = []
    for m in meters:
        rows = conn.execute("SELECT t_start_utc, e_rms_v_per_m, covered_s, complete, n_overrange FROM mon_block "
                            "WHERE meter=? ORDER BY t_start_utc", (m["meter"],)).fetchall()
        t = np.array([r[0] for r in rows])
        e = np.array([math.nan if r[1] is None else r[1] for r in rows])
        cov = np.array([r[2] for r in rows])
        ok = np.array([bool(r[3]) for r in rows]) & np.isfinite(e)
        run = conn.execute("SELECT window_s, t_start_utc, e_max_v_per_m FROM mon_running WHERE meter=?",
                           (m["meter"],)).fetchall()
        entry = {"n_overrange_blocks": sum(1 for r in rows if r[4] and t0 <= r[0] < t1)}
        for period in ("day", "week", "month"):
            got = []
            for _, a, b in _ref_periods(tz, t0, t1, period):
                sel = (t >= a) & (t < b)
                row = {"start_utc": a, "end_utc": b, "coverage": cov[sel].sum() / (b - a)}
                row.update(_ref_summary(conv, m["e_ref_v_per_m"], m["s_ref_w_per_m2"], e[sel & ok]))
                for w in WINDOWS:
                    vals = [r[2] for r in run if r[0] == w and a <= r[1] < b and r[2] is not None]
                    row[f"running_{w:g}s_max_e_v_per_m"] = max(vals) if vals else None
                got.append(row)
            entry[period] = got
        inside = ok & (t >= t0) & (t < t1)
        local = [dt.datetime.fromtimestamp(x, tz) for x in t[inside]]
        ei = e[inside]
        hour = np.array([d.hour for d in local])
        entry["hour_n"] = [int(np.sum(hour == h)) for h in range(24)]
        entry["hour_mean"] = [math.sqrt(np.mean(ei[hour == h] ** 2)) if np.any(hour == h) else None
                              for h in range(24)]
        entry["weekend_n"] = sum(1 for d in local if d.weekday() >= 5)
        out.append(entry)
    return out


def _close(a, b) -> bool:
    if a is None or b is None:
        return a is b
    return a == pytest.approx(b, rel=1e-12, abs=1e-12)


@pytest.mark.parametrize("tz, convention, days, seed", [("Europe/Berlin", "power", 45, 1),
                                                          ("Australia/Lord_Howe", "field", 40, 2),
                                                          ("UTC", "power", 9, 3)])
def test_one_pass_statistics_equal_the_plain_computation(tmp_path, tz, convention, days, seed):
    path = tmp_path / "station.db"
    _build(path, tz, convention, days, seed)
    conn = sqlite3.connect(path)
    t0, t1 = T0 + 2 * 86400.0 + 1234.0, T0 + (days - 3) * 86400.0   # a span cutting periods at both ends
    doc = statistics(conn, t0, t1)
    ref = _reference(conn, t0, t1)
    assert [m["meter"] for m in doc["meters"]] == ["a", "b"]
    for got, want in zip(doc["meters"], ref):
        assert got["n_overrange_blocks"] == want["n_overrange_blocks"]
        for period in ("day", "week", "month"):
            assert len(got[period]) == len(want[period]) > 0
            for g, w in zip(got[period], want[period]):
                for k, v in w.items():
                    assert _close(g.get(k), v), (period, g["period"], k, g.get(k), v)
        assert [h["n_blocks"] for h in got["hour_of_day"]] == want["hour_n"]
        for h, v in zip(got["hour_of_day"], want["hour_mean"]):
            assert _close(h["mean_e_v_per_m"], v)
        assert got["weekday_weekend"]["weekend"]["n_blocks"] == want["weekend_n"]
    conn.close()


def test_streamed_exports_equal_the_whole_document_writers(tmp_path):
    path = tmp_path / "station.db"
    _build(path, "Europe/Berlin", "power", 6, 4)
    conn = sqlite3.connect(path)
    st, meters = station_info(conn)
    t0, t1 = T0, T0 + 6 * 86400.0
    rows = list(iter_series(conn, t0, t1))
    assert len(rows) == conn.execute("SELECT count(*) FROM mon_block").fetchone()[0] > 1000
    doc = {"about": ["x"], "caution": "c", "summaries": statistics(conn, t0, t1)}
    buf = io.StringIO()
    write_json(buf, doc, "series_6min", iter_series(conn, t0, t1))
    # the whole-document writer's text (numbers as meterlink.reports.digits writes them)
    assert buf.getvalue() == json.dumps(tidy({**doc, "series_6min": rows}), indent=2)
    fast = io.StringIO()
    write_series_json(fast, doc, "series_6min", conn, t0, t1, st, meters)
    assert fast.getvalue() == buf.getvalue()
    assert json.loads(buf.getvalue())["series_6min"] == rows
    empty = io.StringIO()
    write_json(empty, doc, "series_6min", iter([]))
    assert empty.getvalue() == to_json({**doc, "series_6min": []})
    none = io.StringIO()
    write_series_json(none, doc, "series_6min", conn, t1, t1 + 1.0, st, meters)   # a span without blocks
    assert none.getvalue() == empty.getvalue()
    plain = io.StringIO()
    w = csv.DictWriter(plain, fieldnames=SERIES_COLUMNS, lineterminator="\n")
    w.writeheader()
    w.writerows(rows)
    for write in (lambda b: write_csv(b, st, iter_series(conn, t0, t1), "c"),
                  lambda b: write_series_csv(b, conn, t0, t1, st, meters, "c")):
        buf = io.StringIO()
        write(buf)
        assert buf.getvalue() == to_csv(*series_rows(conn, t0, t1), "c")
        assert "".join(line for line in buf.getvalue().splitlines(keepends=True) if not line.startswith("#")) \
            == plain.getvalue()
    conn.close()


def test_the_series_rows_equal_a_plain_computation_per_block(tmp_path):
    """Each exported row against the plain way: datetime per block for the times, E^2/Z0 over S_ref for the
    percent of the power-density reference level, 5 significant digits per value ('%.5g', docs/formats.md),
    NULL field as empty/None."""
    path = tmp_path / "station.db"
    _build(path, "UTC", "power", 3, 7)
    conn = sqlite3.connect(path)
    conn.execute("UPDATE mon_block SET e_rms_v_per_m = NULL WHERE rowid % 97 = 0")     # some blocks without a value
    st, meters = station_info(conn)
    s_ref = {m["meter"]: m["s_ref_w_per_m2"] for m in meters}
    want = []
    for meter, t, b, e, cov, complete, over in conn.execute(
            "SELECT meter, t_start_utc, block_s, e_rms_v_per_m, covered_s, complete, n_overrange FROM mon_block "
            "WHERE band = 'total' ORDER BY meter, t_start_utc"):
        fmt = lambda x: dt.datetime.fromtimestamp(x, dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")  # noqa: E731
        g5 = lambda x: float(f"{x:.5g}")  # noqa: E731
        want.append({"meter": meter, "start_utc": fmt(t), "end_utc": fmt(t + b),
                     "e_rms_v_per_m": None if e is None else g5(e),
                     "percent_of_reference": None if e is None else g5(100.0 * (e * e / Z0_OHM) / s_ref[meter]),
                     "coverage": g5(min(cov / b, 1.0)), "complete": bool(complete),
                     "overrange_lower_bound": bool(over)})
    assert any(r["e_rms_v_per_m"] is None for r in want) and len(want) > 1000
    t0, t1 = T0, T0 + 4 * 86400.0
    assert list(iter_series(conn, t0, t1)) == want
    buf = io.StringIO()
    write_series_json(buf, {"caution": "c"}, "series_6min", conn, t0, t1, st, meters)
    assert json.loads(buf.getvalue())["series_6min"] == want
    conn.close()


def test_iso_list_writes_the_text_of_datetime_per_time():
    t = np.concatenate([1_711_000_000.0 + 360.0 * np.arange(2000), [0.0, 86399.0, 951_782_400.0, 253_402_300_799.0],
                        [1_711_000_000.5]])                             # a fraction: the per-value path
    fmt = lambda x: dt.datetime.fromtimestamp(x, dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")  # noqa: E731
    assert _iso_list(t[:-1]) == [fmt(x) for x in t[:-1].tolist()]
    assert _iso_list(t) == [fmt(x) for x in t.tolist()]
