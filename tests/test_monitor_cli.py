"""meterlink status, stats and export through meterlink.cli.main on a database of a short accelerated run.

Reference level: ICNIRP 2020, Health Phys 118(5), Table 5, whole body, general public: the most
stringent level between 80 MHz and 4 GHz is that of >30-400 MHz, E = 27.7 V/m, S = 2 W/m^2.
Power convention: percent = 100 (E^2/Z0) / S_ref, Z0 from scipy.constants.
"""

from __future__ import annotations

import csv
import datetime
import io
import json
import sqlite3
import threading
import time
from pathlib import Path

import pytest
from scipy.constants import physical_constants

from meterlink.cli import SAFETY_LINE, main
from meterlink.station.monitor import Monitor
from meterlink.station.stationfile import parse_station
from meterlink.simulators.pty_meter import SimulatedMeter

Z0 = physical_constants["characteristic impedance of vacuum"][0]
STATION = """
format = "meterlink-station/1"
[station]
name = "Brannock Tor report station"
database = "report.db"
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
convention = "power"
interval_s = 10
windows_s = [360, 1800, 86400]
[[meter]]
name = "mast-foot"
port = "PORT"
certificate = "demo-probe"
[health]
drift_max_ppm = 1e9
max_gap_s = 35
"""


@pytest.fixture(scope="module")
def db(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("report")
    speed = 2000.0
    with SimulatedMeter("station", meter=1, seed=8, speed=speed) as sim:
        st = parse_station(STATION.replace("PORT", sim.port), tmp / "station.toml")
        mon = Monitor(st, time_scale=speed, backoff_max_s=0.5)
        th = threading.Thread(target=mon.run)
        th.start()
        conn = sqlite3.connect(st.database, timeout=10)
        deadline = time.monotonic() + 30
        try:
            while conn.execute("SELECT count(*) FROM mon_block WHERE complete=1").fetchone()[0] < 8:
                assert time.monotonic() < deadline and th.is_alive()
                th.join(0.1)
        finally:
            conn.close()
            mon.stop()
            th.join(30)
    return st.database


def _refs(db):
    c = sqlite3.connect(db)
    r = c.execute("SELECT e_ref_v_per_m, s_ref_w_per_m2 FROM mon_meter").fetchone()
    c.close()
    return r


def _blocks(db):
    c = sqlite3.connect(db)
    rows = c.execute("SELECT t_start_utc, e_rms_v_per_m, complete FROM mon_block WHERE band='total' "
                     "ORDER BY t_start_utc").fetchall()
    c.close()
    return rows


def test_reference_level_recorded(db):
    c = sqlite3.connect(db)
    e_ref, s_ref = c.execute("SELECT e_ref_v_per_m, s_ref_w_per_m2 FROM mon_meter").fetchone()
    # ICNIRP 2020 Table 5: S_ref = 2 W/m^2 up to 400 MHz and f/200 = 2 W/m^2 just above it. E: 27.7 V/m up
    # to 400 MHz, 1.375 f^0.5 = 27.5 V/m just above: the band's most restrictive E is found at that edge
    assert s_ref == pytest.approx(2.0, rel=1e-6)
    assert e_ref == pytest.approx(1.375 * 400 ** 0.5, rel=1e-6)


def test_export_csv(db, capsys):
    E_REF, S_REF = _refs(db)
    assert main(["export", "--db", str(db), "--format", "csv"]) == 0
    out = capsys.readouterr().out
    head = [ln[2:] for ln in out.splitlines() if ln.startswith("# ")]
    assert "limit set: icnirp-2020 public (whole-body reference levels)" in head
    assert any(h.startswith("convention: percent of the power-density reference level") for h in head)
    assert f"caution: {SAFETY_LINE}" in head
    rows = list(csv.DictReader(io.StringIO("\n".join(ln for ln in out.splitlines() if not ln.startswith("#")))))
    blocks = _blocks(db)
    # by default the export runs to the end of the data, though an accelerated run lies in the future
    assert len(rows) == len(blocks) and blocks[-1][0] > time.time() + 1800
    for r, (t0, e, ok) in zip(rows, blocks):
        assert r["complete"] == str(bool(ok))
        if e is not None:
            assert float(r["percent_of_reference"]) == pytest.approx(100 * e * e / Z0 / S_REF, rel=1e-3, abs=1e-4)


def test_export_json_to_file(db, tmp_path, capsys):
    out = tmp_path / "pub.json"
    assert main(["export", "--db", str(db), "--format", "json", "--out", str(out)]) == 0
    doc = json.loads(out.read_text())
    assert doc["caution"] == SAFETY_LINE and any(SAFETY_LINE in a for a in doc["about"])
    s = doc["summaries"]
    assert (s["standard"], s["tier"], s["convention"]) == ("icnirp-2020", "public", "power")
    assert len(doc["series_6min"]) == len(_blocks(db))


def test_stats_json_and_table(db, capsys):
    E_REF, S_REF = _refs(db)
    assert main(["stats", "--db", str(db), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["caution"] == SAFETY_LINE and doc["convention"] == "power"
    m, = doc["meters"]
    assert "icnirp-2020 public" in m["label"] and "S/S_ref" in m["label"]
    complete = [e for _, e, ok in _blocks(db) if ok and e is not None]
    n = sum(d.get("n_blocks", 0) for d in m["day"])
    assert n == len(complete)                       # every complete block, the future ones included
    top = max(d["max_pct"] for d in m["day"] if d.get("n_blocks"))
    # JSON numbers carry 5 significant digits (docs/formats.md)
    assert top == pytest.approx(100 * max(complete) ** 2 / Z0 / S_REF, rel=1e-4)
    assert main(["stats", "--db", str(db)]) == 0
    text = " ".join(capsys.readouterr().out.split())       # rich wraps long lines
    assert "power density (S/S_ref, S = E^2/Z0) reference level" in text and SAFETY_LINE in text


def test_status_uses_station_convention(db, capsys, monkeypatch):
    monkeypatch.setenv("COLUMNS", "250")                   # a wide terminal: rich keeps headers whole
    E_REF, S_REF = _refs(db)
    assert main(["status", "--db", str(db), "--json"]) == 0
    s = json.loads(capsys.readouterr().out)
    assert s["convention"] == "power" and s["pct_label"] == "% S ref" and s["state"] == "stopped"
    m, = s["meters"]
    # each JSON number to 5 significant digits (docs/formats.md)
    assert m["last_pct"] == pytest.approx(100 * m["last_e_v_per_m"] ** 2 / Z0 / S_REF, rel=3e-4)
    assert m["last_pct_field"] == pytest.approx(100 * m["last_e_v_per_m"] / E_REF, rel=2e-4)
    assert main(["status", "--db", str(db)]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert "% S ref" in text and "% E ref" not in text and SAFETY_LINE in text


@pytest.mark.parametrize("argv,msg", [
    (["status", "--db", "DIR/absent.db"], "no database at"),
    (["stats", "--db", "DB", "--from", "yesterday"], "--from 'yesterday': expected an ISO date"),
    (["stats", "--db", "DB", "--from", "2030-01-02", "--to", "2030-01-01"],
     "--to 2030-01-01 must be later than --from 2030-01-02"),
    (["export", "--db", "DB", "--from", "2099-01-01"], "--from 2099-01-01 is not before the end of the newest block"),
    (["export", "--db", "EMPTY"], "no monitoring station record"),
    (["export", "--db", "DB", "--out", "DIR/no/such/dir/x.csv"], "cannot write"),
])
def test_bad_input_is_one_line(db, tmp_path, capsys, argv, msg):
    empty = tmp_path / "empty.db"
    sqlite3.connect(empty).execute("CREATE TABLE t (x)").connection.close()
    argv = [a.replace("DIR", str(tmp_path)).replace("EMPTY", str(empty)).replace("DB", str(db)) for a in argv]
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and msg in err and "Traceback" not in err


@pytest.mark.parametrize("cmd", ["status", "stats", "export"])
def test_a_damaged_station_file_is_reported_as_damaged_not_as_missing_a_station(db, tmp_path, capsys, cmd):
    # garbage over the page of mon_station: before, this answered "no monitoring station record"
    src = sqlite3.connect(db)
    src.execute("pragma wal_checkpoint(truncate)")
    page = src.execute("select rootpage from sqlite_master where name = 'mon_station'").fetchone()[0]
    src.close()
    bad = tmp_path / "damaged.db"
    bad.write_bytes(Path(db).read_bytes())
    with open(bad, "r+b") as fh:
        fh.seek((page - 1) * 4096)
        fh.write(bytes(range(256)) * 16)
    assert main([cmd, "--db", str(bad)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "damaged" in err and str(bad) in err and "no monitoring station" not in err


def _stamp(t):
    return datetime.datetime.fromtimestamp(t, datetime.timezone.utc).strftime("%Y%m%dT%H%M%SZ")


def test_export_out_folder_as_written_in_the_readme(db, tmp_path, monkeypatch, capsys):
    # README, monitoring stations: "meterlink export --db station.db --format csv --out public/"
    monkeypatch.chdir(tmp_path)
    assert main(["export", "--db", str(db), "--format", "csv"]) == 0
    expected = capsys.readouterr().out
    assert main(["export", "--db", str(db), "--format", "csv", "--out", "public/"]) == 0
    printed = capsys.readouterr().out
    assert (tmp_path / "public").is_dir()
    files = list((tmp_path / "public").iterdir())
    blocks = _blocks(db)
    # the default span runs from the first block's start to the end of the newest 6-minute (360 s) block
    name = f"brannock-tor-report-station_6min_{_stamp(blocks[0][0])}_{_stamp(blocks[-1][0] + 360)}.csv"
    assert [f.name for f in files] == [name]
    assert files[0].read_text(encoding="utf-8") == expected
    assert printed.strip() == f"wrote {Path('public') / name}"


def test_export_out_existing_folder_and_plain_file(db, tmp_path, capsys):
    pub = tmp_path / "pub"
    pub.mkdir()
    assert main(["export", "--db", str(db), "--format", "json", "--out", str(pub)]) == 0
    f, = pub.iterdir()
    assert f.suffix == ".json" and f.name.startswith("brannock-tor-report-station_6min_")
    assert json.loads(f.read_text())["caution"] == SAFETY_LINE
    # a path that is neither an existing folder nor ends in / stays a file, as before
    plain = tmp_path / "series.csv"
    assert main(["export", "--db", str(db), "--out", str(plain)]) == 0
    assert plain.is_file() and f"# caution: {SAFETY_LINE}" in plain.read_text()


def test_export_out_folder_over_a_file_is_one_line(db, tmp_path, capsys):
    (tmp_path / "taken").write_text("not a folder")
    assert main(["export", "--db", str(db), "--out", str(tmp_path / "taken") + "/"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "cannot create the export folder" in err and "taken" in err
    assert (tmp_path / "taken").read_text() == "not a folder"


def test_status_and_stats_share_one_coverage_definition(db, capsys):
    """status' 24-hour coverage and stats' coverage are one definition (covered seconds / seconds of the window
    inside the record), computed by two code paths: publish.current_state and stats.period_stats."""
    import numpy as np

    from meterlink.station.publish import COVERAGE_NOTE, current_state
    from meterlink.station.stats import Reference, period_stats

    conn = sqlite3.connect(db)
    t, cov, ok, e, bs = map(np.array, zip(*conn.execute(
        "SELECT t_start_utc, covered_s, complete, e_rms_v_per_m, block_s FROM mon_block WHERE band='total' "
        "ORDER BY t_start_utc").fetchall()))
    now = float(t[-1] + bs[-1])                  # just after the last block: the window is the whole record
    m, = current_state(conn, now)["meters"]
    rows = period_stats(Reference("icnirp-2020", "public", 27.7, 2.0, "power"), t, e, cov, ok.astype(bool),
                        float(t[0]), now, "day")
    spans = [min(now, datetime.datetime.fromisoformat(r["period"]).replace(tzinfo=datetime.timezone.utc).timestamp()
                 + 86400.0) - max(float(t[0]), datetime.datetime.fromisoformat(r["period"]).replace(
                     tzinfo=datetime.timezone.utc).timestamp()) for r in rows]
    stats_cov = sum(r["coverage"] * s for r, s in zip(rows, spans)) / sum(spans)
    assert 0.5 < stats_cov <= 1.0                # a monitor that ran the whole time: mostly covered
    assert m["coverage_24h"] == pytest.approx(stats_cov, rel=1e-9)
    conn.close()
    assert main(["status", "--db", str(db)]) == 0
    out = " ".join(capsys.readouterr().out.split())
    assert "cov 24h = coverage: seconds covered" in out and COVERAGE_NOTE.split(":")[0] in out


def test_stats_table_fits_80_columns(db, capsys, monkeypatch):
    """The day, week and month tables keep every header whole on an 80-column terminal: the 24-hour
    running maximum is headed '24h %' (not '1440min %', which pushed the day table past 80 columns)."""
    monkeypatch.setenv("COLUMNS", "80")
    assert main(["stats", "--db", str(db)]) == 0
    out = capsys.readouterr().out
    heads = [ln for ln in out.splitlines() if ln.split()[:2] in (["day", "cover"], ["week", "cover"],
                                                               ["month", "cover"])]
    assert len(heads) == 3, out
    for ln in heads:
        assert "…" not in ln and len(ln.rstrip()) <= 80, ln
        assert ln.split()[-6:] == ["6min", "%", "30min", "%", "24h", "%"], ln
