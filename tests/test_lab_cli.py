"""meterlink lab: import hand readings -> certificate + HTML; budget JSON; one-line errors."""

import json
import subprocess
import sys
import datetime as dt

import pytest

from meterlink.physics.certificate import load_certificate
from meterlink.cli import SAFETY_LINE, main
from meterlink.lab import procedures as pr
from meterlink.lab.session import LabSession
from meterlink.simulators.lab import InProcessLab
from tests.conftest import ROOT
from labitems import ITEMS_TOML

SESSION_TOML = """
operator = "A <b>Tester</b> & co"
[probe]
model = "ML-EP3 (simulated)"
serial = "EP-4417"
[calibration]
lab = "Test lab (invented)"
address = "2 Bench Street, Labtown (invented)"
certificate_number = "LAB-CLI-1"
date = 2027-06-01
interval_agreed_with_customer = true
due = 2028-06-01
[method]
kind = "tem-cell"
spacing_m = 0.15
[ambient]
temp_c = 23.0
humidity_pct = 45.0
""" + ITEMS_TOML


def _readings(tmp_path):
    s = LabSession("m", "s", "l", "n", dt.date(2027, 6, 1), dt.date(2028, 6, 1))
    res = pr.run_plan(pr.full_plan(s, freqs=(1e8, 1e9, 3e9), levels=(0.2, 1, 5, 20), iso_step_deg=45),
                      InProcessLab(seed=5), repeats=3)
    pr.export_csv(res, tmp_path / "hand.csv")
    (tmp_path / "session.toml").write_text(SESSION_TOML)


def test_import_writes_loadable_certificate_and_escaped_html(tmp_path, capsys):
    _readings(tmp_path)
    out = tmp_path / "out"
    rc = main(["lab", "import", str(tmp_path / "hand.csv"), "--session", str(tmp_path / "session.toml"),
               "--out", str(out), "--json"])
    assert rc == 0
    summary = json.loads(capsys.readouterr().out)
    cert = load_certificate(out / "certificate.toml")
    assert cert.certificate_number == "LAB-CLI-1" and cert.freq_range_hz == (1e8, 3e9)
    assert summary["u_expanded_db"] > 0 and summary["safety"] == SAFETY_LINE
    page = (out / "certificate.html").read_text()
    assert "A &lt;b&gt;Tester&lt;/b&gt; &amp; co" in page and "<b>Tester" not in page
    assert page.count("data:image/png;base64,") == 3
    assert "+/- dB about the mean" in page and "max/min ratio (dB)" in page


def test_budget_json(tmp_path, capsys):
    (tmp_path / "session.toml").write_text(SESSION_TOML)
    assert main(["lab", "budget", "--session", str(tmp_path / "session.toml"), "--json"]) == 0
    b = json.loads(capsys.readouterr().out)
    assert b["u_expanded_db"] == pytest.approx(2 * b["u_c_db"])
    assert {r["name"] for r in b["rows"]} >= {"power measurement", "mismatch", "septum spacing", "repeatability"}


def test_bad_csv_is_one_line_error_naming_the_file(tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("procedure,freq_hz,counts_x\nzero,1e9,3\n")
    p = subprocess.run([sys.executable, "-m", "meterlink", "lab", "import", str(bad), "--out", str(tmp_path / "o")],
                       capture_output=True, text=True, cwd=ROOT, timeout=60)
    assert p.returncode == 2
    lines = p.stderr.strip().splitlines()
    assert len(lines) == 1 and str(bad) in lines[0] and "missing column(s) counts_y, counts_z" in lines[0]
    assert "Traceback" not in p.stderr


def test_chamber_readings_survive_the_csv_and_reach_certificate_and_page(tmp_path, capsys):
    s = LabSession("m", "s", "l", "n", dt.date(2027, 6, 1), dt.date(2028, 6, 1))
    plan = pr.full_plan(s, freqs=(1e8, 1e9, 3e9), levels=(0.2, 1, 5, 20), iso_step_deg=45)
    res = pr.run_plan(plan + pr.temperature_plan(s, (10.0, 23.0, 35.0)), InProcessLab(seed=5), repeats=3)
    pr.export_csv(res, tmp_path / "hand.csv")
    (tmp_path / "session.toml").write_text(SESSION_TOML)
    out = tmp_path / "out"
    assert main(["lab", "import", str(tmp_path / "hand.csv"), "--session", str(tmp_path / "session.toml"),
                 "--out", str(out), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["temperature"]["temp_c"] == [10.0, 23.0, 35.0]
    cert = load_certificate(out / "certificate.toml")
    assert cert.temp_coeff_db_per_c == round(summary["temperature"]["coeff_db_per_c"], 4) != 0.0
    page = (out / "certificate.html").read_text()
    assert "Temperature coefficient" in page and page.count("data:image/png;base64,") == 4


@pytest.mark.parametrize("value, needle", [("5", "two or more"), ("5,x", "separated by commas"),
                                           ("20,22", "at least 5 degC"), ("5,200", "between -40 and 85")])
def test_bad_temperature_list_is_one_line(value, needle):
    p = subprocess.run([sys.executable, "-m", "meterlink", "lab", "run", "--quick", "--temperatures", value],
                       capture_output=True, text=True, cwd=ROOT, timeout=60)
    assert p.returncode == 2 and needle in p.stderr and len(p.stderr.strip().splitlines()) == 1


def test_two_lab_runs_on_one_day_get_two_numbers_never_reused(tmp_path, capsys):
    """issue 13 item 12: two `lab run`s on one day used to issue the same certificate number."""
    from meterlink.lab.register import read_register
    summaries = []
    for name in ("first", "second"):
        assert main(["lab", "run", "--quick", "--repeats", "2", "--out", str(tmp_path / name), "--json"]) == 0
        summaries.append(json.loads(capsys.readouterr().out))
    numbers = [s["certificate_number"] for s in summaries]
    today = dt.date.today().strftime("%Y%m%d")
    assert numbers == [f"LAB-{today}-0001", f"LAB-{today}-0002"]
    for name, number in zip(("first", "second"), numbers):
        assert load_certificate(tmp_path / name / "certificate.toml").certificate_number == number
    reg = read_register(tmp_path / "lab-register.tsv")
    assert [r[0] for r in reg] == numbers and reg[0][2] == "EP-4417"
    assert summaries[1]["register"] == str(tmp_path / "lab-register.tsv")


def test_session_number_is_refused_once_issued_and_certificates_are_not_overwritten(tmp_path, capsys):
    _readings(tmp_path)
    args = ["lab", "import", str(tmp_path / "hand.csv"), "--session", str(tmp_path / "session.toml"), "--json"]
    assert main(args + ["--out", str(tmp_path / "a")]) == 0
    capsys.readouterr()
    first = (tmp_path / "a" / "certificate.toml").read_bytes()
    # the same session file again: its number LAB-CLI-1 is in the register
    assert main(args + ["--out", str(tmp_path / "b")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "'LAB-CLI-1' was already issued" in err and "lab-register.tsv" in err
    assert not (tmp_path / "b" / "certificate.toml").exists()
    # into the folder of an issued certificate: refused before anything is read or written
    assert main(args + ["--out", str(tmp_path / "a")]) == 2
    assert "already holds an issued certificate" in capsys.readouterr().err
    assert (tmp_path / "a" / "certificate.toml").read_bytes() == first
    # without a number in the session, the register issues the next one
    (tmp_path / "session.toml").write_text(SESSION_TOML.replace('certificate_number = "LAB-CLI-1"\n', ""))
    assert main(args + ["--out", str(tmp_path / "c")]) == 0
    number = json.loads(capsys.readouterr().out)["certificate_number"]
    assert number == f"LAB-{dt.date.today():%Y%m%d}-0002"
    assert load_certificate(tmp_path / "c" / "certificate.toml").certificate_number == number


def test_import_prints_the_factor_table_that_the_certificate_holds(tmp_path, capsys):
    """The table printed for the technician shows the same factors (per axis, per frequency) as the certificate."""
    _readings(tmp_path)
    out = tmp_path / "out"
    rc = main(["lab", "import", str(tmp_path / "hand.csv"), "--session", str(tmp_path / "session.toml"),
               "--out", str(out)])
    assert rc == 0
    text = capsys.readouterr().out
    assert "Calibration factors, dB" in text and "k = 2" in text
    cert = load_certificate(out / "certificate.toml")
    for f_hz, label in ((1e8, "100 MHz"), (1e9, "1 GHz"), (3e9, "3 GHz")):
        line = next(ln for ln in text.splitlines() if label in ln)
        k = list(cert.axes[0].freq_hz).index(f_hz)
        for ax in cert.axes:
            assert f"{ax.correction_db[k]:+.2f}" in line
