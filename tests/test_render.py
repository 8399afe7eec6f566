"""Pure rendering: the field chart and the assessment panel, rendered to text without a terminal."""

import numpy as np
from rich.console import Console

from meterlink.physics.assessment import assess_field
from meterlink.storage.processing import FieldSeries
from meterlink.reports.render import assessment_dict, assessment_renderable, field_trace


def text_of(renderable, width=100) -> str:
    import io

    con = Console(width=width, record=True, file=io.StringIO())
    con.print(renderable)
    return con.export_text()


def test_trace_fills_rows_in_proportion_to_the_level_and_marks_excess():
    t = np.arange(120.0)
    e = np.r_[np.full(60, 13.75), np.full(60, 30.0)]       # 50 % of 27.5 V/m, then 109 %
    lines = text_of(field_trace(t, e, 27.5, width=20, rows=4)).splitlines()
    body = [ln.split("┤")[-1].split("│")[-1] for ln in lines[:4]]
    assert body[0][:10].strip() == "" and set(body[0][10:20]) == {"▲"}      # top row: only the excess
    assert set(body[3][:10]) == {"█"} and set(body[2][:10]) == {"█"}        # 50 % fills two of four rows
    assert body[1][:10].strip() == ""
    assert "percent of 27.5 V/m" in lines[-1]


def test_assessment_panel_shows_both_terms_the_verdict_and_the_cautions():
    n = 2400
    e = np.full(n, 13.85)       # half of 27.7 V/m, ICNIRP 2020 Table 5 public, 30-400 MHz
    s = FieldSeries(1, 1, "cert <b>x</b>", np.arange(n), 1.8e9 + np.arange(n, dtype=float), e, np.zeros((n, 3)),
                    e / 376.73, e * e / 376.73, np.full(n, 1.0), np.zeros(n, np.int64), ())
    a = assess_field(s, "icnirp-2020", "public", "guarded", freq_hz=100e6)
    out = " ".join(text_of(assessment_renderable(a), 120).split())
    assert "50.0 % of the field level" in out and "25.0 % of the power-density level" in out
    assert "COMPLIANT" in out and "energised antennas" in out
    assert "cert <b>x</b>" in out      # shown literally, never interpreted as markup
    d = assessment_dict(a)
    assert d["percent_of_field_level"] == 50.0 or abs(d["percent_of_field_level"] - 50.0) < 1e-9
    assert d["outcome"] == "compliant"


def _series(e, u_db=1.0):
    n = e.size
    return FieldSeries(1, 1, "cert", np.arange(n), 1.8e9 + np.arange(n, dtype=float), e, np.zeros((n, 3)),
                       e / 376.73, e * e / 376.73, np.full(n, u_db), np.zeros(n, np.int64), ())


def test_conditional_outcomes_and_not_assessable_in_text_and_json():
    # ICNIRP 2020 Table 5 public, 30-400 MHz: 27.7 V/m over 30 min. 95 % of it with U = 1 dB
    # (x 1.122): within U below the limit, "conditional pass" (ILAC-G8:09/2019 4.2.3); 105 %:
    # "conditional fail". A 10-min record is no 30-min average: "not assessable", value only.
    a = assess_field(_series(np.full(2400, 0.95 * 27.7)), "icnirp-2020", "public", "guarded", freq_hz=100e6)
    out = " ".join(text_of(assessment_renderable(a), 120).split())
    assert "CONDITIONAL PASS" in out and "Conditional pass under the guarded-acceptance rule" in out
    d = assessment_dict(a)
    assert d["outcome"] == "conditional pass" and d["conformity_statement_made"] and d["not_assessable_reason"] is None
    a = assess_field(_series(np.full(2400, 1.05 * 27.7)), "icnirp-2020", "public", "guarded", freq_hz=100e6)
    assert "CONDITIONAL FAIL" in " ".join(text_of(assessment_renderable(a), 120).split())
    assert assessment_dict(a)["outcome"] == "conditional fail"
    a = assess_field(_series(np.full(600, 5.0)), "icnirp-2020", "public", "guarded", freq_hz=100e6)
    out = " ".join(text_of(assessment_renderable(a), 120).split())
    assert "NOT ASSESSABLE" in out and "partial mean" in out and " COMPLIANT " not in out
    d = assessment_dict(a)
    assert d["outcome"] == "not assessable" and not d["conformity_statement_made"]
    assert "incomplete" in d["not_assessable_reason"] and d["value_label"].startswith("partial mean")


# --- meterlink render: the report that matches what the database holds --------------------------------

STATION = """
format = "meterlink-station/1"
[station]
name = "Hollin <script>x</script> station"
database = "st.db"
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
convention = "power"
interval_s = 10
windows_s = [360]
[[meter]]
name = "roof-east"
port = "PORT"
certificate = "demo-probe"
[health]
drift_max_ppm = 1e9
max_gap_s = 35
"""


def test_render_a_station_database_gives_the_station_page(tmp_path, capsys):
    import json
    import sqlite3
    import threading
    import time

    from meterlink.cli import SAFETY_LINE, main
    from meterlink.simulators.pty_meter import SimulatedMeter
    from meterlink.station.monitor import Monitor
    from meterlink.station.stationfile import parse_station

    speed = 2000.0
    with SimulatedMeter("station", meter=1, seed=4, speed=speed) as sim:
        st = parse_station(STATION.replace("PORT", sim.port), tmp_path / "station.toml")
        mon = Monitor(st, time_scale=speed, backoff_max_s=0.5)
        th = threading.Thread(target=mon.run)
        th.start()
        conn = sqlite3.connect(st.database, timeout=10)
        deadline = time.monotonic() + 30
        try:
            while conn.execute("SELECT count(*) FROM mon_block WHERE complete=1").fetchone()[0] < 3:
                assert time.monotonic() < deadline and th.is_alive()
                th.join(0.1)
        finally:
            conn.close()
            mon.stop()
            th.join(30)
    assert main(["render", str(st.database), "--out", str(tmp_path / "pub"), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["kind"] == "station" and out["files"] == [str(tmp_path / "pub" / "station.html")]
    page = (tmp_path / "pub" / "station.html").read_text()
    assert "<script>x" not in page and "Hollin &lt;script&gt;x&lt;/script&gt; station" in page
    assert SAFETY_LINE in page and "roof-east" in page and "icnirp-2020 public" in page
    # the page shows the numbers the stats command computes from the same blocks
    assert main(["stats", "--db", str(st.database), "--json"]) == 0
    stats = json.loads(capsys.readouterr().out)
    day = stats["meters"][0]["day"][0]
    assert f"<td>{day['period']}</td>" in page
    for key in ("max_pct", "median_pct", "p95_pct"):
        assert f'<td class="n">{day[key]:.3g}</td>' in page


def test_render_errors_are_one_line(tmp_path, capsys):
    from meterlink.cli import main
    from meterlink.storage.store import Store

    with Store(tmp_path / "empty.db"):
        pass
    assert main(["render", str(tmp_path / "empty.db"), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "holds 0 sessions" in err[0] and "--session" in err[0]
    assert main(["render", str(tmp_path / "empty.db"), "--session", "3", "--out", str(tmp_path / "o")]) == 2
    assert "no session 3" in capsys.readouterr().err
    assert main(["render", str(tmp_path / "empty.db"), "--session", "x"]) == 2
    assert "not a whole number" in capsys.readouterr().err
    assert main(["render", str(tmp_path / "none.db")]) == 2
    assert "does not exist" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


def test_render_a_lab_folder_reproduces_the_issued_certificate_page(tmp_path, capsys):
    # the page comes from the readings analysed again; it is accepted only when that analysis gives the
    # issued certificate.toml byte for byte, and then equals the page 'meterlink lab import' wrote
    from meterlink.cli import main
    from test_lab_cli import _readings

    _readings(tmp_path)
    issued = tmp_path / "issued"
    assert main(["lab", "import", str(tmp_path / "hand.csv"), "--session", str(tmp_path / "session.toml"),
                 "--out", str(issued), "--register", str(tmp_path / "reg.tsv"), "--json"]) == 0
    capsys.readouterr()
    assert main(["render", str(issued), "--lab-session", str(tmp_path / "session.toml"), "--out",
                 str(tmp_path / "again")]) == 0
    assert "lab certificate" in capsys.readouterr().out
    again = (tmp_path / "again" / "certificate.html").read_text()
    assert again == (issued / "certificate.html").read_text() and "A &lt;b&gt;Tester&lt;/b&gt; &amp; co" in again
    # another session (the demo one) does not reproduce the certificate: refused, one line
    assert main(["render", str(issued), "--out", str(tmp_path / "wrong")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "do not reproduce the issued certificate LAB-CLI-1" in err[0]
    assert not (tmp_path / "wrong").exists()
    # never written into an issued certificate's folder
    assert main(["render", str(issued), "--lab-session", str(tmp_path / "session.toml"), "--out", str(issued)]) == 2
    assert "holds an issued certificate" in capsys.readouterr().err
