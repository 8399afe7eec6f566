"""Frequency-selective points in survey plans and in SQLite, end to end over loopback TCP with pyvisa-py against
the simulated analyser (the invented demo site's emitters) and the simulated meter on a pty.

Checks: a plan with a broadband point above the follow-up threshold and a selective point at the same label ->
stored rows (point, bands, packed sweeps) -> the report shows the bands and counts the follow-up as made; a
stored point re-evaluated with another antenna certificate moves E by exactly the antenna-factor and cable-loss
difference (worked by hand in dB); the CLI stores into a database; plan mistakes are one-line errors.
"""

from __future__ import annotations

import json
import math
import re
import sqlite3
import subprocess
import sys
from importlib import resources
from pathlib import Path

import pytest

from meterlink.instruments.session import InstrumentError
from meterlink.physics.certificate import dump_certificate, load_certificate
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.simulators.scenario import load_scenario
from meterlink.simulators.scpi_instruments import Analyzer, SiteAntenna
from meterlink.simulators.scpi_server import ScpiServer
from meterlink.storage.store import Store
from meterlink.survey.plan import PlanError, load_plan
from meterlink.survey.report import write_report
from meterlink.survey.run import run_plan
from meterlink.survey.selstore import load_points, reevaluate

POINT_M = (4.0, -4.0, 1.5)
BANDS = str(resources.files("meterlink.simulators.scenarios").joinpath("demo-bands.toml"))


def plan(analyser: str = "") -> dict:
    return {
        "survey": {"standard": "icnirp-2020", "tier": "public", "rule": "guarded", "certificate": "demo-probe",
                   "settle_s": 1, "spot_s": 2, "followup_percent": 1},
        "site": {"name": "Brannock Tor transmitting site"},
        "point": [
            {"label": "mast foot", "x_m": POINT_M[0], "y_m": POINT_M[1], "height_m": POINT_M[2], "mode": "spot"},
            {"label": "mast foot", "x_m": POINT_M[0], "y_m": POINT_M[1], "height_m": POINT_M[2], "mode": "selective",
             "bands": BANDS, "antenna_cert": "demo-dipole", "antenna": "isotropic", "analyser": analyser,
             "extrapolation": {"Pole LTE 800": {"method": "power-ratio", "p_max_w": 400.0, "p_measured_w": 250.0,
                                                "source": "operator declaration (invented example)"}}},
        ],
    }


@pytest.fixture(scope="module")
def surveyed(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("selstore")
    db = tmp / "s.db"
    site = SiteAntenna(load_scenario("demo"), POINT_M, antenna="isotropic")
    with ScpiServer(Analyzer(site, seed=3)) as srv, \
            SimulatedMeter("demo", sensor="probe", seed=4, speed=100.0) as sim:
        sid = run_plan(sim.port, plan(), db, mover=sim.move_to, analyser=srv.address)
    return db, sid, site.truth(), srv.address, tmp


def test_plan_point_stored_and_reported(surveyed):
    db, sid, truth, address, tmp = surveyed
    con = sqlite3.connect(db)
    con.row_factory = sqlite3.Row
    pts = con.execute("select * from survey_points where session_id = ? order by point_no", [sid]).fetchall()
    assert [(p["label"], p["mode"]) for p in pts] == [("mast foot", "spot"), ("mast foot", "selective")]
    assert pts[0]["followup"] == 1 and pts[1]["exposure_ratio"] > 0
    sp = con.execute("select * from sel_points where session_id = ?", [sid]).fetchone()
    assert sp["label"] == "mast foot" and sp["point_no"] == 2 and sp["analyser_address"] == address
    assert sp["antenna_sha256"] == __import__("hashlib").sha256(
        dump_certificate(load_certificate("demo-dipole")).encode()).hexdigest()
    assert sp["analyser_idn"] == Analyzer.IDN
    bands = con.execute("select * from sel_bands where point_id = ? order by band_no", [sp["id"]]).fetchall()
    by_truth = {t["name"]: t["e_v_per_m"] for t in truth}
    assert [b["name"] for b in bands] == list(by_truth)
    for b in bands:         # each band within its stated expanded uncertainty of the simulator's truth
        assert abs(20 * math.log10(b["e_v_per_m"] / by_truth[b["name"]])) <= b["u_expanded_db"], b["name"]
        tr = con.execute("select * from sel_traces where band_id = ?", [b["id"]]).fetchall()
        assert len(tr) == 1 and len(tr[0]["level_dbm"]) == 4 * tr[0]["n"] and tr[0]["n"] >= 101
    # the summation total of the bands is the survey point's exposure ratio; shares add to one
    assert sum(b["exposure_ratio"] for b in bands) == pytest.approx(sp["total_exposure_ratio"], rel=1e-9)
    assert pts[1]["exposure_ratio"] == pytest.approx(sp["total_exposure_ratio"], rel=1e-12)
    assert sum(b["share"] for b in bands) == pytest.approx(1.0)
    # the declared power ratio 400 W / 250 W scales the LTE 800 field by sqrt(1.6) = 1.264911, only that band
    lte = next(b for b in bands if b["name"] == "Pole LTE 800")
    assert lte["e_at_max_v_per_m"] == pytest.approx(lte["e_v_per_m"] * 1.264911, rel=1e-6)
    assert json.loads(lte["extrapolation_json"])["inputs"]["source"].startswith("operator declaration")
    assert all(b["extrapolation_json"] is None for b in bands if b["name"] != "Pole LTE 800")
    assert sp["total_exposure_ratio_at_max"] > sp["total_exposure_ratio"]
    # the journal, the crash-safe log, holds every band as measured
    lines = [json.loads(x) for x in Path(sp["journal_path"]).read_text(encoding="utf-8").splitlines()]
    assert [x["band"] for x in lines if "band" in x and "event" not in x] == list(by_truth)

    html = write_report(db, sid, tmp / "report").read_text(encoding="utf-8")
    text = re.sub(r"<[^>]+>", " ", html)
    assert "Frequency-selective points" in text and "Frequency-selective follow-up made at" in text
    assert "Frequency-selective follow-up needed at" not in text
    for name in by_truth:
        assert name in text
    assert "P_max/P_during" in text and "operator declaration (invented example)" in text
    assert "1 of the 2 point(s) were measured band by band" in text
    assert "do not replace" in text
    rows = (tmp / "report" / "selective.csv").read_text(encoding="utf-8").splitlines()
    assert len(rows) == 1 + len(by_truth) and rows[0].startswith("point_no,label,band")


def test_stored_sweeps_reevaluated_with_another_antenna_file(surveyed, tmp_path, capsys):
    db, sid, _, _, _ = surveyed
    base = load_certificate("demo-dipole")
    # another antenna file: every antenna factor 2.0 dB higher and every cable loss 0.5 dB higher. By hand:
    # E = sqrt(P R) * 10^((AF + L)/20), so E_new / E_old = 10^((2.0 + 0.5)/20) = 10^0.125 = 1.333521 (+2.5 dB)
    # the checkout's calibration/ folder (installed as meterlink.calibration_data; the tests run from the checkout)
    text = (Path(__file__).resolve().parents[1] / "calibration" / "demo-dipole.toml").read_text(encoding="utf-8")

    def shifted(line, key, by):
        if not line.startswith(key + " = ["):
            return line
        vals = [float(v) + by for v in line.split("[", 1)[1].rstrip("]").split(",")]
        return f"{key} = [{', '.join(f'{v:.4f}' for v in vals)}]"
    text = "\n".join(shifted(shifted(ln, "db_per_m", 2.0), "db", 0.5) for ln in text.splitlines())
    other = tmp_path / "other-antenna.toml"
    other.write_text(text, encoding="utf-8")
    with Store(db, readonly=True) as store:
        (sp,) = load_points(store, sid)
        same = reevaluate(store, sp["id"], base)
        new = reevaluate(store, sp["id"], load_certificate(other))
    for a, b in zip(same, new):
        # the same certificate gives back the stored value (float32 trace: far below 0.001 dB)
        assert abs(20 * math.log10(a["e_v_per_m"] / a["e_stored_v_per_m"])) < 1e-3
        assert b["af_db_per_m"] - b["af_stored_db_per_m"] == pytest.approx(2.0, abs=1e-6)
        assert b["e_v_per_m"] / b["e_stored_v_per_m"] == pytest.approx(1.333521, rel=2e-4)
    # the command shows the same, read only; every band's ratio scales by 10^0.25 = 1.778279 in power
    from meterlink.cli import main
    assert main(["reevaluate", "--db", str(db), "--point", str(sp["id"]), "--antenna-cert", str(other), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert [round(b["change_db"], 3) for b in out["bands"]] == [2.5] * 8
    assert out["total_exposure_ratio"] == pytest.approx(out["total_exposure_ratio_stored"] * 1.778279, rel=5e-4)
    with Store(db, readonly=True) as store:
        assert load_points(store, sid)[0]["total_exposure_ratio"] == sp["total_exposure_ratio"]
    assert main(["reevaluate", "--db", str(db), "--point", "99", "--antenna-cert", str(other)]) == 2
    assert capsys.readouterr().err.count("\n") == 1


def test_salvage_copies_the_selective_rows(surveyed, tmp_path):
    from meterlink.storage.salvage import salvage

    db = surveyed[0]
    salvage(db, tmp_path / "copy.db")
    counts = {}
    for path in (db, tmp_path / "copy.db"):
        con = sqlite3.connect(path)
        counts[path] = [con.execute(f"select count(*), sum(length(quote(id))) from {t}").fetchone()
                        for t in ("sel_points", "sel_bands", "sel_traces")]
        blob = con.execute("select group_concat(hex(level_dbm)) from sel_traces order by id").fetchone()[0]
        counts[path].append(blob)
        con.close()
    assert counts[db] == counts[tmp_path / "copy.db"] and counts[db][2][0] == 8


def test_lost_analyser_stops_the_survey_and_keeps_what_was_measured(tmp_path):
    db = tmp_path / "lost.db"
    site = SiteAntenna(load_scenario("demo"), POINT_M, antenna="isotropic")
    inst = Analyzer(site)
    with ScpiServer(inst) as srv, SimulatedMeter("demo", sensor="probe", seed=6, speed=100.0) as sim:
        d = plan(srv.address)
        from meterlink.instruments.analyzer import SpectrumAnalyzer
        original = SpectrumAnalyzer.sweep

        def sweep_then_fail(self, binary=True):      # the analyser goes away during the fourth sweep
            if inst.sweeps == 3:
                inst.faults.disconnect = True
            return original(self, binary)
        SpectrumAnalyzer.sweep = sweep_then_fail
        try:
            with pytest.raises(InstrumentError) as e:
                run_plan(sim.port, d, db, mover=sim.move_to)
        finally:
            SpectrumAnalyzer.sweep = original
    assert "\n" not in str(e.value) and srv.address in str(e.value)
    con = sqlite3.connect(db)
    # the broadband point measured before stays; no half-stored selective point
    assert [r[0] for r in con.execute("select mode from survey_points")] == ["spot"]
    assert con.execute("select count(*) from sel_points").fetchone()[0] == 0
    (journal,) = tmp_path.glob("lost-survey*-point2-selective.jsonl")
    lines = [json.loads(x) for x in journal.read_text(encoding="utf-8").splitlines()]
    assert [x.get("band") for x in lines[1:4]] == ["Tor FM A", "Tor FM B", "Tor DAB"]
    assert lines[4]["event"] == "instrument_error" and lines[4]["sweeps_measured"] == 3
    assert lines[4]["sweeps_not_measured"] == 5


def test_cli_stores_a_point_in_a_database(tmp_path):
    site = SiteAntenna(load_scenario("demo"), POINT_M, antenna="isotropic")
    db, journal = tmp_path / "c.db", tmp_path / "p.jsonl"
    with ScpiServer(Analyzer(site, seed=5)) as srv:
        p = subprocess.run([sys.executable, "-m", "meterlink", "selective", srv.address, "--bands", BANDS,
                            "--journal", str(journal), "--db", str(db), "--label", "roof edge", "--json"],
                           capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr
    out = json.loads(p.stdout.splitlines()[0])
    with Store(db, readonly=True) as store:
        (sp,) = load_points(store, out["session_id"])
        assert store.session(out["session_id"])["kind"] == "selective"
    assert sp["label"] == "roof edge" and len(sp["bands"]) == 8
    assert sp["total_exposure_ratio"] == pytest.approx(out["total_exposure_ratio"], rel=1e-4)   # JSON: 5 digits
    assert len(journal.read_text().splitlines()) == 10     # analyser, 8 bands, result


@pytest.mark.parametrize("change, message", [
    ({"extrapolation": {"Pole LTE 800": {"method": "lte-rs", "n_subcarriers": 600}}}, "swept channel power"),
    ({"extrapolation": {"Pole LTE 9000": {"method": "power-ratio"}}}, "no such band"),
    ({"extrapolation": {"Pole LTE 800": {"method": "gsm-bcch", "n_trx": 4}}}, "BCCH carrier swept alone"),
    ({"extrapolation": {"Pole LTE 800": {"method": "power-ratio", "p_max_w": 1.0}}}, "missing input"),
    ({"antenna": "tripod"}, "antenna 'tripod'"),
    ({"bands": "/nonexistent/bands.toml"}, "bands.toml"),
])
def test_plan_mistakes_are_one_line_errors(change, message):
    d = plan()
    d["point"][1].update(change)
    with pytest.raises(PlanError) as e:
        load_plan(d)
    assert message in str(e.value) and "\n" not in str(e.value)


def test_selective_keys_belong_to_selective_points():
    d = plan()
    d["point"][0]["bands"] = BANDS
    with pytest.raises(PlanError, match="belongs to mode 'selective'"):
        load_plan(d)
