"""Hostile names and device strings through real files: CSV export, status, sessions and the HTML report.

CSV rules checked: OWASP ASVS 5.0 requirement 1.2.10 (a field starting with '=', '+', '-', '@', tab
or NUL is prefixed with a single quote; quoting as RFC 4180 sections 2.6 and 2.7: fields with commas
or double quotes enclosed in double quotes, inner quotes doubled), and no line may be injected:
every line of the file is a '#' comment or one record. Terminal and HTML: no C0/C1 control
character other than newline and tab reaches the output (ECMA-48 5th ed., 5.2-5.3: ESC introduces
control sequences, C1 is 0x80-0x9F); each is shown as a visible escape instead.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import re
import sqlite3
import threading
import time

import pytest

from meterlink.cli import main
from meterlink.reports.templating import environment
from meterlink.station.monitor import Monitor
from meterlink.reports.render import escape as render_escape
from meterlink.safetext import clean_text, csv_cell
from meterlink.station.stationfile import parse_station
from meterlink.survey.report import write_report
from meterlink.survey.run import run_plan
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.simulators.scenario import load_scenario

CONTROL = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f]")        # every C0/C1 code but tab and newline

# TOML basic strings: \n, \u001b (ESC) and \u0000 (NUL) are escapes the parser turns into the characters
STATION = r'''
format = "meterlink-station/1"
[station]
name = "=HYPERLINK(\"http://example.invalid\")\nmeter,start_utc\n@evil\u001b[2J"
database = "hostile.db"
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["80 MHz", "4 GHz"]
interval_s = 10
windows_s = [360]
[[meter]]
name = "+cmd|' /C calc'!A0,\"x\""
port = "PORT"
certificate = "demo-probe"
[[meter]]
name = "-north\u001b]0;owned\u0007\u0000"
port = "PORT2"
certificate = "demo-probe"
[health]
drift_max_ppm = 1e9
max_gap_s = 35
'''


def test_clean_text_and_csv_cell_rules():
    assert clean_text("a\x1b[2J\x00b\x9b\u202ec\nd\te") == "a\\x1b[2J\\x00b\\x9b\\u202ec\\nd\\te"
    assert clean_text("x\ny\tz\rw", keep="\n\t") == "x\ny\tz\\rw"
    # a value printed by a report template: markup escaped, control characters shown
    assert environment().from_string("{{ v }}").render(v="<b>\x1b\x00</b>\n") == "&lt;b&gt;\\x1b\\x00&lt;/b&gt;\n"
    # OWASP ASVS 5.0 V1.2.10 triggers; numbers (a negative one too) stay numbers
    for s in ("=1+1", "+1", "-1", "@SUM(A1)", "\t=1", "\x00=1"):
        assert csv_cell(s).startswith("'"), s
    assert csv_cell("\r=1") == "'\\r=1" and csv_cell(-5.0) == -5.0 and csv_cell("north") == "north"
    # the terminal renderers: rich markup escaped and control characters shown, not sent
    assert render_escape("\x1b[1m[b]x\x00") == "\\x1b[1m\\[b]x\\x00"


@pytest.fixture(scope="module")
def hostile_db(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("hostile")
    speed = 2000.0
    with SimulatedMeter("station", meter=0, seed=3, speed=speed) as a, \
            SimulatedMeter("station", meter=1, seed=4, speed=speed) as b:
        st = parse_station(STATION.replace("PORT2", b.port).replace("PORT", a.port), tmp / "station.toml")
        assert "\n" in st.name and "\x1b" in st.meters[1].name        # the hostile text really is in there
        mon = Monitor(st, time_scale=speed, backoff_max_s=0.5)
        th = threading.Thread(target=mon.run)
        th.start()
        conn = sqlite3.connect(st.database, timeout=10)
        deadline = time.monotonic() + 40
        try:
            while conn.execute("SELECT count(DISTINCT meter) FROM mon_block WHERE complete=1").fetchone()[0] < 2:
                assert time.monotonic() < deadline and th.is_alive()
                th.join(0.1)
            with conn:   # a device fault text, as the link stores it in an event
                conn.execute("INSERT INTO events (t_utc, kind, severity, message) VALUES (?, 'device_fault', "
                             "'warning', ?)", (time.time() + 1e6, "fault \x1b[2J\x1b]0;x\x07\x00\x9b31m text"))
        finally:
            conn.close()
            mon.stop()
            th.join(30)
    return st, tmp


def test_export_csv_file_neutralised(hostile_db, capsys):
    st, tmp = hostile_db
    out = tmp / "public.csv"
    assert main(["export", "--db", str(st.database), "--format", "csv", "--out", str(out)]) == 0
    raw = out.read_bytes().decode("utf-8")
    assert not CONTROL.search(raw)
    lines = raw.split("\n")[:-1]
    comments = [ln for ln in lines if ln.startswith("# ")]
    body = [ln for ln in lines if not ln.startswith("# ")]
    # the station name's newlines did not make lines of their own: it sits, escaped, on its comment line
    assert comments[0] == "# station: " + clean_text(st.name)
    rows = list(csv.reader(io.StringIO("\n".join(body))))
    assert rows[0][0] == "meter" and all(len(r) == 8 for r in rows)
    conn = sqlite3.connect(st.database)
    n_blocks = conn.execute("SELECT count(*) FROM mon_block WHERE band='total'").fetchone()[0]
    conn.close()
    assert len(rows) == 1 + n_blocks == len(body)                     # one record per line, none injected
    meters = {r[0] for r in rows[1:]}
    assert meters == {"'" + clean_text(m.name) for m in st.meters}
    # RFC 4180 2.6-2.7: the cell with a comma and double quotes was enclosed, its quotes doubled
    assert '"\'+cmd|\' /C calc\'!A0,""x"""' in raw


def test_status_and_sessions_show_no_control_codes(hostile_db, capsys, monkeypatch):
    st, _ = hostile_db
    monkeypatch.setenv("COLUMNS", "400")          # one event a line, unwrapped
    assert main(["status", "--db", str(st.database)]) == 0
    text = capsys.readouterr().out
    assert not CONTROL.search(text)
    assert "fault \\x1b[2J\\x1b]0;x\\x07\\x00\\x9b31m text" in text        # shown, not acted on
    assert main(["sessions", "--db", str(st.database), "--events", "1"]) == 0
    assert not CONTROL.search(capsys.readouterr().out)


def test_survey_report_with_device_control_codes(tmp_path):
    sc = load_scenario("demo")
    model = "\x1b[31mRED\x00\x07<b>"            # ESC sequence, NUL, BEL and markup in the device's model
    sc = dataclasses.replace(sc, device={**sc.device, "model": model})
    plan = {"survey": {"title": "controls", "standard": "icnirp-2020", "tier": "public", "rule": "simple",
                       "certificate": "demo-probe", "settle_s": 1, "spot_s": 2},
            "site": {"name": "Brannock Tor"},
            "point": [{"label": "gate", "x_m": -60, "y_m": 40, "mode": "spot"}]}
    with SimulatedMeter(sc, seed=7, speed=100.0) as sim:
        sid = run_plan(sim.port, plan, tmp_path / "s.db", mover=sim.move_to)
    html = write_report(tmp_path / "s.db", sid, tmp_path / "out").read_text(encoding="utf-8")
    assert not CONTROL.search(html)
    assert "\\x1b[31mRED\\x00\\x07&lt;b&gt;" in html
    assert main(["sessions", "--db", str(tmp_path / "s.db")]) == 0
