"""The period report of a monitoring station: rendered for real from a station database written by
the monitor on the simulated meter, checked against what `meterlink stats` computes from the same
blocks (one definition of coverage), with the gaps, alarms, events and the certificate in force."""

from __future__ import annotations

import datetime as dt
import json
import sqlite3
import threading
import time

import numpy as np
import pytest

from meterlink.cautions import SAFETY_LINE
from meterlink.cli import main
from meterlink.station.period_report import envelope, gaps, period_bounds
from test_pdf import check_pdf
from test_render import STATION


@pytest.fixture(scope="module")
def station(tmp_path_factory):
    from meterlink.simulators.pty_meter import SimulatedMeter
    from meterlink.station.monitor import Monitor
    from meterlink.station.stationfile import parse_station

    tmp = tmp_path_factory.mktemp("period")
    speed = 2000.0
    with SimulatedMeter("station", meter=1, seed=6, speed=speed) as sim:
        st = parse_station(STATION.replace("PORT", sim.port), tmp / "station.toml")
        mon = Monitor(st, time_scale=speed, backoff_max_s=0.5)
        th = threading.Thread(target=mon.run)
        th.start()
        conn = sqlite3.connect(st.database, timeout=10)
        deadline = time.monotonic() + 60
        try:
            while True:
                try:
                    if conn.execute("SELECT count(*) FROM mon_block WHERE complete=1").fetchone()[0] >= 12:
                        break
                except sqlite3.OperationalError:     # tables not created yet
                    pass
                assert time.monotonic() < deadline and th.is_alive()
                th.join(0.1)
        finally:
            conn.close()
            mon.stop()
            th.join(30)
    conn = sqlite3.connect(st.database)
    t_first = conn.execute("SELECT min(t_start_utc) FROM mon_block").fetchone()[0]
    conn.close()
    month = dt.datetime.fromtimestamp(t_first, dt.timezone.utc).strftime("%Y-%m")
    return tmp, st.database, month


def test_period_bounds_of_a_month_and_a_quarter():
    # calendar: November has 30 days; the fourth quarter is October to December
    t0, t1, label = period_bounds("2026-11")
    assert (label, (t1 - t0) / 86400) == ("2026-11", 30)
    assert dt.datetime.fromtimestamp(t0, dt.timezone.utc) == dt.datetime(2026, 11, 1, tzinfo=dt.timezone.utc)
    t0, t1, label = period_bounds("2026-Q4")
    assert label == "2026-Q4" and (t1 - t0) / 86400 == 31 + 30 + 31
    assert dt.datetime.fromtimestamp(t1, dt.timezone.utc) == dt.datetime(2027, 1, 1, tzinfo=dt.timezone.utc)


def test_gaps_and_envelope():
    # blocks of 360 s at 0, 360, 1080 (720 missing) and an incomplete one at 1440, in [0, 2160)
    assert gaps([0, 360, 1080, 1440], [1, 1, 1, 0], 0, 2160, 360) == [(720, 1080), (1440, 2160)]
    assert gaps([], [], 0, 100, 360) == [(0, 100)]
    rng = np.random.default_rng(1)
    v = rng.lognormal(size=20_000)
    v[rng.integers(0, v.size, 50)] = np.nan
    t = np.arange(v.size) * 360.0
    tm, lo, hi = envelope(t, v, bins=500)
    assert tm.size == 500 and np.nanmax(hi) == np.nanmax(v) and np.nanmin(lo) == np.nanmin(v)   # extremes kept
    assert np.all(lo[np.isfinite(lo)] <= hi[np.isfinite(lo)])


def test_the_period_report_html_and_pdf(station, capsys):
    tmp, db, month = station
    out = tmp / "rep"
    assert main(["render", str(db), "--period", month, "--format", "pdf", "--out", str(out), "--json"]) == 0
    files = json.loads(capsys.readouterr().out)["files"]
    assert files == [str(out / f"station-{month}.html"), str(out / f"station-{month}.pdf")]
    html = (out / f"station-{month}.html").read_text(encoding="utf-8")
    for section in ('id="summary"', 'id="meter-1"', "<h3>Days</h3>", "<h3>Gaps</h3>", 'id="alarms"', 'id="health"'):
        assert section in html
    assert html.count("data:image/png;base64,") == 2                  # daily maxima and the 6-minute series
    assert "<script>x" not in html and "Hollin &lt;script&gt;x&lt;/script&gt; station" in html
    assert "<td>demo-probe</td>" in html                                # the certificate in force
    # the same numbers as `stats` over the same month (one definition of coverage)
    t0, t1, _ = period_bounds(month)
    iso = [dt.datetime.fromtimestamp(t, dt.timezone.utc).strftime("%Y-%m-%d") for t in (t0, t1)]
    assert main(["stats", "--db", str(db), "--from", iso[0], "--to", iso[1], "--json"]) == 0
    stats = json.loads(capsys.readouterr().out)["meters"][0]
    mo = stats["month"][0]
    # stats --json writes 5 significant digits: a value may sit on the other side of a .1f rounding edge
    near = lambda v, fmt: {format(v * (1 + d), fmt) for d in (-1e-5, 0.0, 1e-5)}  # noqa: E731
    assert any(f'<td class="n">{c}</td>' in html for c in near(100 * mo["coverage"], ".1f"))
    for day in stats["day"]:
        if day.get("max_pct") is not None:
            assert any(f'<td>{day["period"]}</td><td class="n">{c}</td>' in html
                       for c in near(100 * day["coverage"], ".1f"))
            assert any(f'<td class="n">{c}</td>' in html for c in near(day["max_pct"], ".3g"))
    # the monitor ran for hours of a month: the time before it started is listed as a gap
    start = dt.datetime.fromtimestamp(t0, dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    assert f"<td>{start}</td>" in html
    assert SAFETY_LINE in html
    pages = check_pdf(out / f"station-{month}.pdf", html, f"report for {month}")
    assert pages >= 2


def test_a_quarter_with_months_without_data(station, capsys):
    tmp, db, month = station
    year, mon = (int(x) for x in month.split("-"))
    quarter = f"{year}-Q{(mon + 2) // 3}"
    assert main(["render", str(db), "--period", quarter, "--out", str(tmp / "q")]) == 0
    html = (tmp / "q" / f"station-{quarter}.html").read_text(encoding="utf-8")
    t0, t1, _ = period_bounds(quarter)
    assert round((t1 - t0) / 86400) in (90, 91, 92) and html.count("<td>%d-" % year) >= 90   # every day listed
    capsys.readouterr()


def test_bad_period_and_period_on_a_survey_are_one_line(station, tmp_path, capsys):
    _, db, _ = station
    for period in ("2026-13", "Nov 2026", "2026-Q5"):
        assert main(["render", str(db), "--period", period, "--out", str(tmp_path / "x")]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "--period" in err[0] and "YYYY-MM" in err[0]
    assert not (tmp_path / "x").exists()


def test_previous_period_across_year_ends():
    from meterlink.station.period_report import previous_period

    t = lambda *a: dt.datetime(*a, tzinfo=dt.timezone.utc).timestamp()   # noqa: E731
    assert previous_period(t(2026, 12, 3), "month") == "2026-11"
    assert previous_period(t(2027, 1, 1, 0, 5), "month") == "2026-12"
    assert previous_period(t(2026, 12, 3), "quarter") == "2026-Q3"
    assert previous_period(t(2027, 2, 10), "quarter") == "2026-Q4"
    # the station's zone decides: 2027-01-01 00:30 in Berlin is still 2026-12-31 23:30 UTC
    assert previous_period(t(2026, 12, 31, 23, 30), "month", "Europe/Berlin") == "2026-12"


def test_the_daemon_writes_each_finished_period_once(station):
    from meterlink.station import period_report
    from meterlink.station.stationfile import parse_station

    tmp, db, month = station
    st = parse_station(STATION.replace("PORT", "/dev/null") + '[reports]\nperiod = "month"\nfolder = "published"\n',
                       tmp / "station.toml")
    assert st.database == db and st.reports.folder == tmp / "published"
    _, t1, _ = period_bounds(month)
    events = []
    period_report._next_check.clear()
    # during the month: nothing finished yet with data (the month before has none)
    assert period_report.housekeeping(st, t1 - 3600, lambda *e: events.append(e)) is None
    assert not (tmp / "published").exists() and events == []
    period_report._next_check.clear()
    path = period_report.housekeeping(st, t1 + 86400, lambda *e: events.append(e))
    assert path == tmp / "published" / f"station-{month}.html" and path.is_file()
    assert events == [("period_report", "info", f"period report {month} written: {path}")]
    assert SAFETY_LINE in path.read_text(encoding="utf-8")
    mtime = path.stat().st_mtime_ns
    period_report._next_check.clear()
    assert period_report.housekeeping(st, t1 + 2 * 86400, lambda *e: events.append(e)) is None
    assert path.stat().st_mtime_ns == mtime and len(events) == 1           # written once


def test_a_bad_reports_table_is_one_line(tmp_path):
    from meterlink.station.stationfile import StationFileError, parse_station

    with pytest.raises(StationFileError, match=r"reports\.period: expected 'month' or 'quarter', got 'weekly'"):
        parse_station(STATION.replace("PORT", "/dev/null") + '[reports]\nperiod = "weekly"\n', tmp_path / "s.toml")


def test_status_fits_an_80_column_terminal_without_cutting_names_or_times(station):
    import os
    import subprocess
    import sys

    _, db, _ = station
    env = {**os.environ, "COLUMNS": "80"}
    p = subprocess.run([sys.executable, "-m", "meterlink", "status", "--db", str(db)], capture_output=True,
                       text=True, env=env, timeout=60)
    assert p.returncode == 0, p.stderr
    lines = p.stdout.splitlines()
    assert lines and max(len(x) for x in lines) <= 80
    conn = sqlite3.connect(db)
    last_seen = conn.execute("SELECT last_seen_utc FROM mon_meter").fetchone()[0]
    conn.close()
    stamp = dt.datetime.fromtimestamp(last_seen, dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    whole = [x for x in lines if "roof-east" in x]
    assert len(whole) == 2 and stamp in whole[0]                    # the name and the time on one line each
    assert any("cert due" in x for x in lines) and "(" in whole[1]  # the certificate's due date with days left


def _status_lines(db, columns):
    import os
    import subprocess
    import sys

    p = subprocess.run([sys.executable, "-m", "meterlink", "status", "--db", str(db)], capture_output=True, text=True,
                       env={**os.environ, "COLUMNS": str(columns)}, timeout=60)
    assert p.returncode == 0, p.stderr
    return p.stdout.splitlines()


LONG_NAME = "Brannock-Tor-north-mast-roof-east-sector-A"


@pytest.fixture(scope="module")
def long_named(station, tmp_path_factory):
    """The station's file with its meter renamed to a long hyphenated name (a real SQLite copy)."""
    _, db, _ = station
    copy = tmp_path_factory.mktemp("longname") / "st.db"
    src = sqlite3.connect(db)
    dst = sqlite3.connect(copy)
    src.backup(dst)
    src.close()
    dst.execute("UPDATE mon_meter SET meter = ?", (LONG_NAME,))
    dst.commit()
    dst.close()
    return copy


def test_status_at_80_columns_breaks_a_long_name_between_its_parts_never_inside_one(long_named):
    lines = _status_lines(long_named, 80)
    assert max(len(x) for x in lines) <= 80
    # the name's lines, first cell of each row block: rejoined they give the whole name in both tables
    heads = [i for i, x in enumerate(lines) if x.startswith("meter ")]
    assert len(heads) == 2
    for h in heads:
        cells = []
        for x in lines[h + 1:]:
            cell = x.split("  ")[0].strip()
            if not cell or not (LONG_NAME.startswith("".join(cells) + cell)):
                break
            cells.append(cell)
        assert "".join(cells) == LONG_NAME, cells
        assert len(cells) > 1 and all(c.endswith("-") for c in cells[:-1])   # broken after a hyphen each time
        assert not any("\u2026" in c for c in cells)                          # so nothing needed cutting


def test_status_on_a_wide_terminal_keeps_the_long_name_on_one_line(long_named):
    lines = _status_lines(long_named, 200)
    assert max(len(x) for x in lines) <= 200
    assert sum(LONG_NAME in x for x in lines) == 1


def test_status_marks_a_cut_in_a_name_without_break_opportunities(long_named, tmp_path):
    import shutil

    db = tmp_path / "st.db"
    shutil.copy(long_named, db)
    conn = sqlite3.connect(db)
    conn.execute("UPDATE mon_meter SET meter = ?", ("X" * 40,))
    conn.commit()
    conn.close()
    lines = _status_lines(db, 80)
    assert max(len(x) for x in lines) <= 80
    cut = [x.split("  ")[0] for x in lines if x.startswith("X")]
    assert cut and all(c.endswith("\u2026") for c in cut[:2])           # a visible mark where it was cut
    assert "".join(c.rstrip("\u2026") for c in cut[: len(cut) // 2]) == "X" * 40
