"""Every place a reference level is shown also shows what it was checked against: ``assess`` (text
and JSON), the recorded-session report and the survey report, over the simulated meter on a pty.

Levels come from 47 CFR 1.1310 Table 1 (B) (checked: read in the e-CFR text; 30-300 MHz
general population E = 27.5 V/m) and from tables not yet checked, which must say so in neutral
words ("not yet checked against the primary text") and never in developer notes.
"""

from __future__ import annotations

import json
import re

import pytest

from meterlink.cli import main
from meterlink.physics.limits import NOT_CHECKED
from meterlink.storage.recorder import Recorder
from meterlink.storage.store import Store
from meterlink.survey.report import write_report
from meterlink.survey.run import run_plan
from meterlink.simulators.pty_meter import SimulatedMeter

FORBIDDEN = ("from memory", "shared reference", "reference-levels", "verified")


def _flat(text: str) -> str:
    return " ".join(text.split())


def _clean(text: str) -> bool:
    return not [w for w in FORBIDDEN if w in text.lower()]


@pytest.fixture(scope="module")
def recorded_db(tmp_path_factory):
    db = tmp_path_factory.mktemp("check") / "m.db"
    with SimulatedMeter("demo", sensor="probe", seed=5, speed=100.0) as sim, Store(db) as store:
        Recorder(store, sim.port, interval_ms=1000, duration_s=60.0, host_timeout_s=30.0, freq_hz=101.8e6).run()
    return db


def test_assess_json_and_text_show_the_check(recorded_db, capsys):
    argv = ["assess", "--db", str(recorded_db), "--tier", "public"]
    assert main([*argv, "--standard", "fcc-1310", "--json"]) == 0
    raw = capsys.readouterr().out
    out = json.loads(raw)
    assert out["reference_level_e_v_per_m"] == pytest.approx(27.5)  # 47 CFR 1.1310 Table 1 (B), 30-300 MHz
    assert out["reference_level_check"].startswith("checked against 47 CFR 1.1310 Table 1 (B)")
    assert _clean(raw)
    assert main([*argv, "--standard", "hc-sc6-2015", "--json"]) == 0
    raw = capsys.readouterr().out
    assert json.loads(raw)["reference_level_check"] == NOT_CHECKED and _clean(raw)
    assert main([*argv, "--standard", "hc-sc6-2015"]) == 0
    text = _flat(capsys.readouterr().out)
    assert "reference level check" in text and NOT_CHECKED in text and _clean(text)


def test_session_report_shows_the_check(recorded_db, tmp_path, capsys):
    for std, expected in (("icnirp-1998", NOT_CHECKED), ("fcc-1310", "checked against 47 CFR 1.1310 Table 1 (B)")):
        assert main(["assess", "--db", str(recorded_db), "--standard", std, "--tier", "public", "--json"]) == 0
        capsys.readouterr()
        out = tmp_path / std
        assert main(["report", "--db", str(recorded_db), "--session", "1", "--out", str(out)]) == 0
        capsys.readouterr()
        html = (out / "report.html").read_text()
        row = re.search(r"reference level check</td>\s*<td[^>]*>([^<]*)<", html)
        assert row and row.group(1).startswith(expected), row
        assert _clean(html)


PLAN = {
    "survey": {"title": "Check status", "standard": "fcc-1310", "tier": "public", "rule": "guarded",
               "certificate": "demo-probe", "settle_s": 2, "spot_s": 3},
    "site": {"name": "Brannock Tor (invented)", "technician": "A. Example"},
    "point": [{"label": "gate", "x_m": -60, "y_m": 40, "mode": "spot"}],
}


@pytest.mark.parametrize("standard,expected", [
    ("fcc-1310", "level: checked against 47 CFR 1.1310 Table 1 (B)"),
    ("icnirp-2020", f"level: {NOT_CHECKED}"),
])
def test_survey_report_shows_the_check(tmp_path, standard, expected):
    plan = {**PLAN, "survey": {**PLAN["survey"], "standard": standard}}
    with SimulatedMeter("demo", seed=7, speed=100.0) as sim:
        sid = run_plan(sim.port, plan, tmp_path / "s.db", mover=sim.move_to)
    html = write_report(tmp_path / "s.db", sid, tmp_path / "out").read_text()
    row = re.search(r"reference level check</td>\s*<td[^>]*>([^<]*)<", html)
    assert row and row.group(1).startswith(expected), row
    # The multi-frequency summation rules were not read in a primary text: that is shown too.
    assert f"summation rule: {NOT_CHECKED}" in row.group(1)
    assert _clean(html)


def test_multi_frequency_status_names_levels_and_rule():
    # Two FM emitters under 47 CFR 1.1310 Table 1 (B) (checked): the levels name that text, the
    # summation rule (not read in a primary text) says it is not yet checked.
    from meterlink.physics.exposure import multi_frequency

    res = multi_frequency([94.3e6, 101.8e6], standard="fcc-1310", tier="public", e_v_per_m=[1.0, 2.0])
    assert res.status == ("levels: checked against 47 CFR 1.1310 Table 1 (B), (ii) in the 2020 e-CFR text, "
                          f"via the LII mirror; summation rule: {NOT_CHECKED}")
    # 30-300 MHz: E_L = 27.5 V/m, so the power-term sum is (1^2 + 2^2) / 27.5^2 (hand-worked).
    assert res.total == pytest.approx(5 / 27.5**2)
