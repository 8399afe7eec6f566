"""assess, recalibrate, record-with-calibration and demo, through the CLI entry point."""

import json
import sqlite3

import pytest

from meterlink.cli import SAFETY_LINE, main
from meterlink.storage.recorder import Recorder
from meterlink.storage.store import Store
from meterlink.simulators.pty_meter import SimulatedMeter


@pytest.fixture(scope="module")
def recorded_db(tmp_path_factory):
    db = tmp_path_factory.mktemp("cli") / "m.db"
    with SimulatedMeter("demo", sensor="probe", seed=3, speed=100.0) as sim, Store(db) as store:
        Recorder(store, sim.port, interval_ms=1000, duration_s=120.0, host_timeout_s=30.0, freq_hz=101.8e6).run()
    return db


def test_assess_json_labels_both_percent_terms_and_records_the_rule(recorded_db, capsys):
    assert main(["assess", "--db", str(recorded_db), "--standard", "icnirp-2020", "--tier", "public", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["decision_rule"] == "guarded"
    assert out["reference_level_e_v_per_m"] == pytest.approx(27.7)   # ICNIRP 2020 Table 5, 30-400 MHz public
    # both written to 5 significant digits (docs/formats.md): the relation holds to that precision
    assert out["percent_of_power_density_level"] == pytest.approx(out["percent_of_field_level"] ** 2 / 100, rel=3e-4)
    # 120 s recorded against a 30-min average (ICNIRP 2020 Table 5): a partial value, no statement
    assert out["outcome"] == "not assessable" and not out["conformity_statement_made"]
    assert "incomplete" in out["not_assessable_reason"]
    assert out["averaged_window_complete"] is False and out["averaged_e_v_per_m"] > 0
    assert out["caution"] == SAFETY_LINE
    with Store(recorded_db) as store:
        kinds = [e["kind"] for e in store.events(1)]
    assert kinds.index("assessment_rule") < kinds.index("assessment")


def test_assess_outside_the_certificates_frequency_range_is_not_assessable(recorded_db, capsys):
    # The demo probe's certificate covers a finite frequency range; 50 GHz lies outside it, where
    # neither the response nor the uncertainty is known: no verdict, with the reason, in JSON and text.
    from meterlink.physics.certificate import load_certificate
    lo, hi = load_certificate("demo-probe").freq_range_hz
    assert hi < 50e9
    assert main(["assess", "--db", str(recorded_db), "--standard", "icnirp-2020", "--tier", "public",
                 "--freq", "50GHz", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["outcome"] == "not assessable"
    assert "50 GHz" in out["not_assessable_reason"] and "calibrated frequency range" in out["not_assessable_reason"]
    assert main(["assess", "--db", str(recorded_db), "--standard", "icnirp-2020", "--tier", "public",
                 "--freq", "50GHz"]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert "NOT ASSESSABLE" in text and "COMPLIANT " not in text.replace("NOT ASSESSABLE", "")


def test_assess_table_carries_the_cautions(recorded_db, capsys):
    assert main(["assess", "--db", str(recorded_db), "--standard", "fcc-1310", "--tier", "occupational"]) == 0
    out = " ".join(capsys.readouterr().out.split())
    assert "energised antennas" in out and "power-density level" in out


@pytest.mark.parametrize("argv, needle", [
    (["--standard", "no-such"], "unknown standard"),
    (["--standard", "icnirp-2020", "--rule", "lenient"], "unknown decision rule"),
    (["--standard", "icnirp-2020", "--freq", "fast"], "--freq"),
    (["--standard", "icnirp-2020", "--session", "99"], "no session 99"),
])
def test_assess_bad_input_is_one_line(recorded_db, capsys, argv, needle):
    code = main(["assess", "--db", str(recorded_db), "--tier", "public", *argv])
    err = capsys.readouterr().err
    assert code == 2 and needle in err and len(err.strip().splitlines()) == 1 and "Traceback" not in err


def test_recalibrate_keeps_earlier_calibrations(recorded_db, capsys):
    assert main(["recalibrate", "--db", str(recorded_db), "--certificate", "demo-probe", "--json"]) == 0
    first = json.loads(capsys.readouterr().out)
    # the same certificate with the same declared frequency again: refused in one line, nothing added
    assert main(["recalibrate", "--db", str(recorded_db), "--certificate", "demo-probe", "--json"]) == 2
    err = capsys.readouterr().err
    assert "already the calibration in force" in err and len(err.strip().splitlines()) == 1
    con = sqlite3.connect(recorded_db)
    assert con.execute("select count(*) from calibrations").fetchone()[0] == len(first["calibrations"])
    con.close()
    assert main(["recalibrate", "--db", str(recorded_db), "--certificate", "demo-probe", "--again", "--json"]) == 0
    second = json.loads(capsys.readouterr().out)
    assert len(second["calibrations"]) == len(first["calibrations"]) + 1
    assert second["e_rms_v_per_m"] == pytest.approx(first["e_rms_v_per_m"])
    con = sqlite3.connect(recorded_db)
    n_values = con.execute("select coalesce(sum(n), 0) from field_spans").fetchone()[0]     # stored packed only
    n_readings = con.execute("select count(*) from readings").fetchone()[0]
    assert n_values == n_readings * len(second["calibrations"])
    assert con.execute("select count(*) from field_values").fetchone()[0] == 0


def test_recalibrate_with_a_broken_certificate_is_one_line(recorded_db, tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text('format = "meterlink-cert/1"\nkind = "isotropic-probe"\n')
    assert main(["recalibrate", "--db", str(recorded_db), "--certificate", str(bad)]) == 2
    err = capsys.readouterr().err
    assert str(bad) in err and len(err.strip().splitlines()) == 1


def test_demo_runs_end_to_end(tmp_path, capsys):
    assert main(["demo", "--out", str(tmp_path / "d"), "--minutes", "2", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert [s["assessment"]["mode"] for s in out["sessions"]][:2] == ["broadband", "frequency-selective"]
    assert out["sessions"][0]["readings"] >= 110
    assert out["sessions"][1]["assessment"]["emitters"]
    assert (tmp_path / "d" / "demo.db").is_file()
    # the survey: every sample positioned by the simulated GNSS receiver, and measured against
    # predicted flags only the picnic site, next to the emitter the demo's sources file leaves out
    sv = out["survey"]
    assert sv["samples"] == sv["samples_positioned"] == 7
    checks = {c["label"]: c for c in sv["measured_vs_predicted"]}
    assert len(checks) == 5 and [k for k, c in checks.items() if c["flagged"]] == ["P5 picnic site"]
    assert checks["P5 picnic site"]["diff_db"] > checks["P5 picnic site"]["u_combined_db"]
    assert any("unknown source" in r for r in checks["P5 picnic site"]["reasons"])
    html = (tmp_path / "d" / "survey-report" / "report.html").read_text()
    assert "DISAGREE" in html and (tmp_path / "d" / "survey-report" / "survey.geojson").is_file()


def test_report_of_a_recorded_session_uses_its_assessment_and_escapes_text(tmp_path, capsys):
    db = tmp_path / "r.db"
    with SimulatedMeter("demo", sensor="probe", seed=9, speed=100.0) as sim, Store(db) as store:
        Recorder(store, sim.port, interval_ms=1000, duration_s=60.0, host_timeout_s=30.0, freq_hz=101.8e6,
                 notes="<script>alert(1)</script> north gate").run()
    assert main(["report", "--db", str(db), "--session", "1", "--out", str(tmp_path / "rep")]) == 2
    assert "has not been assessed" in capsys.readouterr().err
    assert main(["assess", "--db", str(db), "--standard", "fcc-1310", "--tier", "occupational", "--json"]) == 0
    verdict = json.loads(capsys.readouterr().out)
    assert main(["report", "--db", str(db), "--session", "1", "--out", str(tmp_path / "rep"), "--json"]) == 0
    html = (tmp_path / "rep" / "report.html").read_text()
    assert "<script>alert" not in html and "&lt;script&gt;alert(1)&lt;/script&gt; north gate" in html
    assert "fcc-1310" in html and verdict["outcome"] in html and "energised antennas" in html
    assert "61.4 V/m" in html          # FCC 47 CFR 1.1310 Table 1 (A), 30-300 MHz occupational
    rows = (tmp_path / "rep" / "values.csv").read_text().splitlines()
    assert rows[0].startswith("reading_id,t_utc,e_v_per_m") and len(rows) >= 60


def _record_at(tmp_path, temp_c: float):
    """Record 7 device minutes (a full 6-min FCC window) with the meter held at temp_c."""
    import dataclasses

    from meterlink.simulators.scenario import load_scenario

    sc = load_scenario("demo")
    sc = dataclasses.replace(sc, site={**sc.site, "temp_mean_c": float(temp_c), "temp_daily_amp_c": 0.0})
    db = tmp_path / f"t{temp_c:g}.db"
    with SimulatedMeter(sc, sensor="probe", seed=5, speed=100.0) as sim, Store(db) as store:
        Recorder(store, sim.port, interval_ms=1000, duration_s=420.0, host_timeout_s=30.0, freq_hz=101.8e6).run()
        assert set(store.status_temperatures(1)) == {float(temp_c)}     # the meter reported it
    return db


def test_meter_temperature_outside_the_certificates_range_is_not_assessable(tmp_path, capsys):
    # The demo probe's certificate states 5..40 degC (its climatic-chamber range). FCC 47 CFR 1.1310
    # Table 1 (A), occupational, 30-300 MHz: 61.4 V/m over 6 min; 7 minutes recorded fill a window.
    from meterlink.physics.certificate import load_certificate
    assert load_certificate("demo-probe").temp_range_c == (5.0, 40.0)
    argv = ["--standard", "fcc-1310", "--tier", "occupational"]
    hot, mild = _record_at(tmp_path, 47.5), _record_at(tmp_path, 30.0)
    assert main(["assess", "--db", str(mild), *argv, "--json"]) == 0
    ok = json.loads(capsys.readouterr().out)
    assert ok["averaged_window_complete"] is True and ok["outcome"] in ("compliant", "conditional pass")
    assert main(["assess", "--db", str(hot), *argv, "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["outcome"] == "not assessable" and not out["conformity_statement_made"]
    assert "47.5 degC" in out["not_assessable_reason"] and "5..40 degC" in out["not_assessable_reason"]
    assert out["averaged_window_complete"] is True and out["averaged_e_v_per_m"] > 0   # the value stays reported
    assert main(["assess", "--db", str(hot), *argv]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert "NOT ASSESSABLE" in text and "47.5 degC" in text and "energised antennas" in text
    assert main(["report", "--db", str(hot), "--session", "1", "--out", str(tmp_path / "rep")]) == 0
    html = " ".join((tmp_path / "rep" / "report.html").read_text().split())
    assert "not assessable" in html and "47.5 degC" in html and "5..40 degC" in html
