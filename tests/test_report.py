"""The survey report: generated from a real survey over the simulated meter, checked for its
sections, values and escaping of device and user text; CSV files; the report command."""

import csv
import dataclasses
import re
import subprocess
import sys

import pytest

from conftest import ROOT
from meterlink.cli import SAFETY_LINE
from meterlink.errors import MeterlinkError
from meterlink.storage.store import Store
from meterlink.survey.report import write_report
from meterlink.survey.run import run_plan
from meterlink.survey.store import load_survey
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.simulators.scenario import load_scenario

EVIL = "<script>alert(1)</script>"
PLAN = {
    "survey": {"title": "Report check <b>bold</b>", "standard": "icnirp-1998", "tier": "public", "rule": "guarded",
               "certificate": "demo-probe", "settle_s": 2, "spot_s": 4, "followup_v_per_m": 5.0},
    "site": {"name": "Brannock Tor & <i>site</i>", "technician": "A. Example"},
    "source": [{"name": "Pole LTE 800 <x>", "technology": "LTE", "freq_hz": 806e6, "power_w": 250, "max_power_w": 400}],
    "point": [
        {"label": f"gate {EVIL}", "x_m": -60, "y_m": 40, "mode": "spot", "notes": "=cmd|' /C calc'!A0"},
        {"label": "mast foot", "x_m": 4, "y_m": -4, "mode": "spatial", "scheme": "custom", "heights_m": [1.0, 1.6]},
    ],
}


@pytest.fixture(scope="module")
def survey(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("report")
    sc = load_scenario("demo")
    sc = dataclasses.replace(sc, device={**sc.device, "model": "<img src=x onerror=y>"})  # hostile device text
    with SimulatedMeter(sc, seed=7, speed=100.0) as sim:
        sid = run_plan(sim.port, PLAN, tmp / "s.db", mover=sim.move_to)
    return tmp, sid


def test_report_sections_values_and_escaping(survey):
    tmp, sid = survey
    html_path = write_report(tmp / "s.db", sid, tmp / "out")
    html = html_path.read_text()
    for section in ("site", "sources", "instrument", "basis", "points", "extrapolation", "exposure-ratio", "plots",
                    "cautions"):
        assert f"id='{section}'" in html
    assert SAFETY_LINE in html and "qualified person" in html
    # device and user text is escaped wherever it appears
    assert "<script>" not in html and "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "<img src=x" not in html and "&lt;img src=x onerror=y&gt;" in html
    assert "<b>bold</b>" not in html and "<i>site</i>" not in html and "Brannock Tor &amp; &lt;i&gt;site&lt;/i&gt;" in html
    # the stored values appear as reported
    with Store(tmp / "s.db") as store:
        sv = load_survey(store, sid)
    for p in sv["points"]:
        assert f"{p['e_v_per_m']:.3f}" in html and f"{p['percent_power']:.1f}" in html
        assert f"{p['e_extrapolated_v_per_m']:.3f}" in html
    assert "27.50 V/m" in html                      # ICNIRP 1998 Table 7 lowest level in the band
    assert "2027-06-15" in html                     # the certificate's due date
    assert "guarded" in html and "ILAC-G8" in html
    assert "1.00, 1.60" in html                     # both heights of the custom spatial scheme
    assert "frequency-selective measurement needed" in html   # 5 V/m follow-up threshold exceeded
    assert len(re.findall(r"data:image/png;base64,", html)) == 3   # walk, per-point figures and the map (no emitters)


def test_report_csv_files(survey):
    tmp, sid = survey
    out = write_report(tmp / "s.db", sid, tmp / "csv").parent
    with open(out / "points.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert [r["label"] for r in rows] == [f"gate {EVIL}", "mast foot"]
    assert rows[0]["notes"].startswith("'=")        # no formula for a spreadsheet to run
    with open(out / "samples.csv", newline="") as f:
        heights = [float(r["height_m"]) for r in csv.DictReader(f) if r["label"] == "mast foot"]
    assert heights == [1.0, 1.6]
    assert (out / "trace.csv").stat().st_size > 100 and (out / "sources.csv").read_text().count("\n") == 2


def test_report_command_and_errors(survey, tmp_path):
    tmp, sid = survey
    ok = subprocess.run([sys.executable, "-m", "meterlink", "report", "--db", str(tmp / "s.db"), "--session",
                         str(sid), "--out", str(tmp_path / "r"), "--json"], capture_output=True, text=True,
                        cwd=ROOT, timeout=60)
    assert ok.returncode == 0, ok.stderr
    assert (tmp_path / "r" / "report.html").is_file() and '"csv"' in ok.stdout
    bad = subprocess.run([sys.executable, "-m", "meterlink", "report", "--db", str(tmp / "s.db"), "--session",
                          "999", "--out", str(tmp_path / "x")], capture_output=True, text=True, cwd=ROOT, timeout=60)
    assert bad.returncode == 2 and len(bad.stderr.strip().splitlines()) == 1 and "999" in bad.stderr
    with pytest.raises(MeterlinkError, match="does not exist"):
        write_report(tmp_path / "none.db", 1, tmp_path / "y")


def test_report_shows_the_four_guarded_outcomes_and_no_averaging_time(survey):
    # ILAC-G8:09/2019 4.2.3 outcomes reach the report as words (never colour alone), and a band whose
    # rows prescribe no averaging time (ICNIRP 1998 below 100 kHz) says so instead of inventing one.
    from meterlink.survey.report import render_html
    tmp, sid = survey
    with Store(tmp / "s.db") as store:
        sv = load_survey(store, sid)
    sv["averaging_time_s"] = None
    sv["points"][0]["verdict"] = "conditional pass"
    sv["points"][1]["verdict"] = "not assessable"
    sv["points"][1]["verdict_extrapolated"] = "conditional fail"
    html = render_html(sv, {})
    assert ">conditional pass<" in html and ">not assessable<" in html and ">conditional fail<" in html
    assert "none in the standard: the highest single reading is judged" in html
    assert "conditional pass (measured at or below the limit)" in html     # the rule's description
