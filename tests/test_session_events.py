"""The recorded-session report's events table: repeated events grouped by kind with count, first and
last time and the latest message; no raw JSON on the page. Rendered from a real recording."""

from __future__ import annotations

import re

from meterlink.cli import main
from meterlink.reports.session_report import event_summary
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.storage.recorder import Recorder
from meterlink.storage.store import Store


def test_event_summary_groups_and_orders_by_severity():
    evs = [{"kind": "assessment", "severity": "info", "t_utc": 1.8e9 + i, "message": f"run {i}"} for i in range(51)]
    evs += [{"kind": "seq_gap", "severity": "warning", "t_utc": 1.8e9 + 5, "message": "3 readings lost"}]
    rows = event_summary(evs)
    assert rows[0][:3] == ["seq_gap", "warning", 1] and rows[0][4] == ""
    assert rows[1][:3] == ["assessment", "info", 51] and rows[1][5] == "run 50"
    assert rows[1][3] == "2027-01-15 08:00:00 UTC" and rows[1][4] == "2027-01-15 08:00:50 UTC"   # 1.8e9 s (POSIX)


def test_the_session_report_shows_one_row_per_kind_and_no_json(tmp_path, capsys):
    db = tmp_path / "r.db"
    with SimulatedMeter("demo", sensor="probe", seed=12, speed=100.0) as sim, Store(db) as store:
        Recorder(store, sim.port, interval_ms=1000, duration_s=30.0, host_timeout_s=30.0, freq_hz=101.8e6).run()
    for _ in range(4):
        assert main(["assess", "--db", str(db), "--standard", "icnirp-2020", "--tier", "public", "--json"]) == 0
    capsys.readouterr()
    assert main(["render", str(db), "--out", str(tmp_path / "rep")]) == 0
    html = (tmp_path / "rep" / "report.html").read_text(encoding="utf-8")
    body = html[html.index("<body>"):]
    events = body[body.index("<h2>Events</h2>"):body.index("<h2>Cautions</h2>")]
    assert events.count("<td>assessment</td>") == 1
    assert re.search(r"<td>assessment</td><td>info</td><td class=\"n\">4</td>", events)
    assert "{&#34;" not in body and '{"' not in body and "as JSON" not in body
