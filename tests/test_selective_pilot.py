"""Pilot-based extrapolation (UMTS CPICH, LTE RS, NR SSB) in frequency-selective points: the pilot's level comes
from a decoder-capable instrument and is declared with the point, with its own uncertainty; without it the
method stays refused with one line (a swept channel power does not isolate a pilot).

End to end over loopback TCP with pyvisa-py against the simulated analyser (the invented demo site): the simulator
sends each cellular carrier as a flat channel at full power, so the pilot a decoder would read at the point is the
channel's true field over sqrt(F); declared so, the field at maximum must come back to the simulator's truth and
agree with the swept channel field within the combined uncertainty, and the stored point keeps the pilot, its
uncertainty and its instrument. The arithmetic of the rules (pilot above the channel, maximum below the measured
field) is worked by hand below.
"""

from __future__ import annotations

import json
import math
import sqlite3
import subprocess
import sys
from importlib import resources

import pytest

from meterlink.physics.extrapolation import ExtrapolationError
from meterlink.simulators.scenario import load_scenario
from meterlink.simulators.scpi_instruments import Analyzer, SiteAntenna
from meterlink.simulators.scpi_server import ScpiServer
from meterlink.survey.plan import PlanError, load_plan
from meterlink.survey.selective import PILOT_CAVEAT, BandResult, check_extrapolation, field_at_max, load_bands

POINT_M = (4.0, -4.0, 1.5)
DEMO_BANDS = resources.files("meterlink.simulators.scenarios").joinpath("demo-bands.toml")
PILOT = {"pilot_e_v_per_m": 0.05, "pilot_u_db": 2.5, "pilot_instrument": "decoder-capable analyser, cert. X-1 (invented)"}


def _bands():
    return load_bands(DEMO_BANDS)


def test_without_the_pilot_the_method_is_refused_in_one_line():
    for method, extra in (("lte-rs", {"n_subcarriers": 600}), ("umts-cpich", {"p_max_w": 20.0, "p_cpich_w": 2.0}),
                          ("nr-ssb", {"n_subcarriers": 3276})):
        band = {"lte-rs": "Pole LTE 800", "umts-cpich": "Pole UMTS 2100", "nr-ssb": "Pole NR 3500"}[method]
        with pytest.raises(ExtrapolationError) as e:
            check_extrapolation({band: {"method": method, **extra}}, _bands())
        msg = str(e.value)
        assert "swept channel power" in msg and "pilot_e_v_per_m" in msg and "\n" not in msg


@pytest.mark.parametrize("band, decl, message", [
    ("Pole LTE 800", {"method": "lte-rs", "n_subcarriers": 600, "pilot_e_v_per_m": 0.05}, "missing input 'pilot_instrument'"),
    ("Pole LTE 800", {"method": "lte-rs", "n_subcarriers": 600, **PILOT, "pilot_u_db": 0}, "pilot_u_db"),
    ("Pole LTE 800", {"method": "lte-rs", "n_subcarriers": 600, **PILOT, "pilot_e_v_per_m": -1.0}, "pilot_e_v_per_m"),
    ("Pole LTE 800", {"method": "lte-rs", "n_subcarriers": 600, **PILOT, "pilot_instrument": " "}, "pilot_instrument"),
    # 1200 subcarriers x 15 kHz = 18 MHz cannot sit in the 9 MHz band of the band file
    ("Pole LTE 800", {"method": "lte-rs", "n_subcarriers": 1200, **PILOT}, "do not fit"),
    ("Pole UMTS 2100", {"method": "lte-rs", "n_subcarriers": 240, **PILOT}, "technology 'UMTS'"),
    ("Pole UMTS 2100", {"method": "umts-cpich", "p_max_w": 20.0, "p_cpich_w": 2.0, **PILOT,
                        "pilot_e_v_per_m": [0.1, 0.1]}, "one field"),
])
def test_a_bad_pilot_declaration_is_one_line(band, decl, message):
    with pytest.raises(ExtrapolationError) as e:
        check_extrapolation({band: decl}, _bands())
    assert message in str(e.value) and "\n" not in str(e.value)


def test_declared_pilot_is_kept_with_the_factor():
    f = check_extrapolation({"Pole LTE 800": {"method": "lte-rs", "n_subcarriers": 600,
                                              "pilot_e_v_per_m": [0.03, 0.04], "pilot_u_db": 2.5,
                                              "pilot_instrument": "decoder (invented)"}}, _bands())["Pole LTE 800"]
    # two antenna ports add in power: sqrt(0.03^2 + 0.04^2) = 0.05 V/m; F = 600
    assert f.power_factor == 600 and f.inputs["pilot_e_v_per_m"] == pytest.approx(0.05, rel=1e-12)
    assert f.inputs["pilot_e_per_port_v_per_m"] == [0.03, 0.04] and PILOT_CAVEAT in f.caveats
    assert f.record()["inputs"]["pilot_instrument"] == "decoder (invented)"


def _band(e_v_per_m: float, u_db: float = 3.0) -> BandResult:
    r = BandResult("Pole LTE 800", 806e6, 9e6, "LTE", 9e5, (797e6, 815e6))
    r.e_v_per_m, r.u_expanded_db = e_v_per_m, u_db
    return r


def test_field_at_max_rules_worked_by_hand():
    f = check_extrapolation({"Pole LTE 800": {"method": "lte-rs", "n_subcarriers": 600, **PILOT}},
                            _bands())["Pole LTE 800"]
    # 0.05 V/m * sqrt(600) = 0.05 * 24.494897 = 1.224745 V/m, with the pilot's 2.5 dB
    e, u, notes = field_at_max(_band(0.8), f)
    assert e == pytest.approx(1.224745, abs=1e-6) and u == 2.5 and notes == []
    # measured 2.0 V/m now is above 1.224745 V/m at maximum: the measured field is kept, with a note
    e, u, notes = field_at_max(_band(2.0), f)
    assert e == 2.0 and u == 3.0 and len(notes) == 1 and "below the channel field" in notes[0]
    # a pilot of 0.05 V/m against a channel of 0.02 V/m: 20 log10(2.5) = 7.96 dB > 3.0 + 2.5 dB -> flagged
    e, u, notes = field_at_max(_band(0.02), f)
    assert any("exceeds the channel field" in n for n in notes)
    # ... and 0.05 against 0.03 V/m (4.44 dB, inside 5.5 dB) is not
    assert not any("exceeds" in n for n in field_at_max(_band(0.03), f)[2])


def test_plan_accepts_a_declared_pilot():
    d = {"survey": {"standard": "icnirp-2020", "tier": "public", "rule": "guarded", "certificate": "demo-probe"},
         "site": {"name": "Brannock Tor transmitting site"},
         "point": [{"label": "p", "mode": "selective", "bands": str(DEMO_BANDS), "antenna_cert": "demo-dipole",
                    "extrapolation": {"Pole LTE 800": {"method": "lte-rs", "n_subcarriers": 600,
                                                       "pilot_e_v_per_m": [0.03, 0.04], "pilot_u_db": 2.5,
                                                       "pilot_instrument": "decoder (invented)"}}}]}
    plan = load_plan(d)
    ex = dict(plan.points[0].selective.extrapolation)["Pole LTE 800"]
    assert dict(ex)["pilot_e_v_per_m"] == (0.03, 0.04)
    del d["point"][0]["extrapolation"]["Pole LTE 800"]["pilot_instrument"]
    with pytest.raises(PlanError, match="missing input 'pilot_instrument'"):
        load_plan(d)


def _run(address, tmp_path, extrapolation_text: str, bands_text: str):
    bands, ex = tmp_path / "bands.toml", tmp_path / "ex.toml"
    bands.write_text(bands_text, encoding="utf-8")
    ex.write_text(extrapolation_text, encoding="utf-8")
    return subprocess.run([sys.executable, "-m", "meterlink", "selective", address, "--bands", str(bands),
                           "--journal", str(tmp_path / "p.jsonl"), "--extrapolation", str(ex), "--db",
                           str(tmp_path / "p.db"), "--json"], capture_output=True, text=True, timeout=120)


BANDS_TEXT = """
[[band]]
name = "Pole LTE 800"
freq_hz = 806.0e6
bandwidth_hz = 9.0e6
technology = "LTE"

[[band]]
name = "Pole UMTS 2100"
freq_hz = 2140.0e6
bandwidth_hz = 3.84e6
technology = "UMTS"
"""


def test_pilot_point_end_to_end_over_the_simulated_analyser(tmp_path):
    site = SiteAntenna(load_scenario("demo"), POINT_M, antenna="isotropic")
    truth = {t["name"]: t["e_v_per_m"] for t in site.truth()}
    # The pilots a decoder would read, from the simulator's truth. LTE: the carrier is sent at its maximum now;
    # F = 600 (10 MHz, no boost), so the RS per resource element is E / sqrt(600). UMTS: the carrier is sent at
    # half its maximum now (20 W of 40 W, CPICH 2 W): F = 40 / 2 = 20, the CPICH field E * sqrt(2 / 20), and the
    # maximum is E * sqrt(2). `load` is that true maximum-over-now ratio of each carrier.
    decl = {"Pole LTE 800": (600.0, truth["Pole LTE 800"] / math.sqrt(600), 1.0),
            "Pole UMTS 2100": (20.0, truth["Pole UMTS 2100"] * math.sqrt(2 / 20), 2.0)}
    ex = f"""
["Pole LTE 800"]
method = "lte-rs"
n_subcarriers = 600
pilot_e_v_per_m = {decl["Pole LTE 800"][1]!r}
pilot_u_db = 2.0
pilot_instrument = "decoder-capable analyser (simulated)"

["Pole UMTS 2100"]
method = "umts-cpich"
p_max_w = 40.0
p_cpich_w = 2.0
pilot_e_v_per_m = {decl["Pole UMTS 2100"][1]!r}
pilot_u_db = 2.0
pilot_instrument = "decoder-capable analyser (simulated)"
"""
    with ScpiServer(Analyzer(site, seed=6)) as srv:
        p = _run(srv.address, tmp_path, ex, BANDS_TEXT)
    assert p.returncode == 0, p.stderr
    out = json.loads(p.stdout.splitlines()[0])
    for b in out["bands"]:
        f, pilot, load = decl[b["name"]]
        scaled = pilot * math.sqrt(f)
        assert b["extrapolation"]["power_factor"] == f
        assert b["extrapolation"]["inputs"]["pilot_instrument"].startswith("decoder")
        # the pilot scaled to maximum agrees with the channel swept now times the true load ratio, within the
        # combined expanded uncertainty of the two measurements
        comb = math.hypot(b["u_expanded_db"], 2.0)
        assert abs(20 * math.log10(scaled / (b["e_v_per_m"] * math.sqrt(load)))) <= comb, b["name"]
        # the field at maximum is the scaled pilot with the pilot's U, unless that falls below the field measured
        # now: then the measured field, its U, and a note (JSON keeps 5 digits)
        if scaled >= b["e_v_per_m"]:
            assert b["e_at_max_v_per_m"] == pytest.approx(scaled, rel=1e-4) and b["u_at_max_db"] == 2.0
        else:
            assert b["e_at_max_v_per_m"] == pytest.approx(b["e_v_per_m"], rel=1e-4)
            assert b["u_at_max_db"] == pytest.approx(b["u_expanded_db"], rel=1e-4)
            assert any(b["name"] in m and "below the channel field" in m for m in out["messages"])
    umts = next(b for b in out["bands"] if b["name"] == "Pole UMTS 2100")
    assert umts["e_at_max_v_per_m"] == pytest.approx(truth["Pole UMTS 2100"] * math.sqrt(2), rel=1e-4)
    assert out["total_exposure_ratio_at_max"] > out["total_exposure_ratio"]
    con = sqlite3.connect(tmp_path / "p.db")
    rows = con.execute("select name, extrapolation_json, e_at_max_v_per_m from sel_bands order by band_no").fetchall()
    assert [r[0] for r in rows] == ["Pole LTE 800", "Pole UMTS 2100"]
    for (name, ex_json, e_max), b in zip(rows, out["bands"]):
        rec = json.loads(ex_json)
        assert rec["inputs"]["pilot_u_db"] == 2.0 and PILOT_CAVEAT in rec["caveats"]
        assert e_max == pytest.approx(b["e_at_max_v_per_m"], rel=1e-4)


def test_pilot_method_without_pilot_stops_before_any_sweep(tmp_path):
    site = SiteAntenna(load_scenario("demo"), POINT_M, antenna="isotropic")
    analyser = Analyzer(site, seed=7)
    with ScpiServer(analyser) as srv:
        p = _run(srv.address, tmp_path, '["Pole LTE 800"]\nmethod = "lte-rs"\nn_subcarriers = 600\n', BANDS_TEXT)
    assert p.returncode == 2 and p.stdout == ""
    lines = p.stderr.strip().splitlines()
    assert len(lines) == 1 and "swept channel power" in lines[0] and "ex.toml" in lines[0]
    assert analyser.sweeps == 0 and not (tmp_path / "p.jsonl").exists()


def test_pilot_in_a_survey_plan_end_to_end(tmp_path):
    """A plan's selective point with a declared CPICH pilot, measured during the survey (simulated meter on a pty,
    simulated analyser on loopback TCP): stored, judged at maximum with the pilot, and the report shows the pilot
    and its instrument beside the factor."""
    import re

    from meterlink.simulators.pty_meter import SimulatedMeter
    from meterlink.survey.report import write_report
    from meterlink.survey.run import run_plan

    site = SiteAntenna(load_scenario("demo"), POINT_M, antenna="isotropic")
    truth = {t["name"]: t["e_v_per_m"] for t in site.truth()}
    bands = tmp_path / "bands.toml"
    bands.write_text(BANDS_TEXT, encoding="utf-8")
    # the UMTS carrier at half its maximum now (20 W of 40 W, CPICH 2 W): CPICH field E * sqrt(2 / 20)
    pilot = truth["Pole UMTS 2100"] * math.sqrt(2 / 20)
    d = {"survey": {"standard": "icnirp-2020", "tier": "public", "rule": "guarded", "certificate": "demo-probe",
                    "settle_s": 1, "spot_s": 2},
         "site": {"name": "Brannock Tor transmitting site"},
         "point": [{"label": "mast foot", "x_m": POINT_M[0], "y_m": POINT_M[1], "height_m": POINT_M[2],
                    "mode": "selective", "bands": str(bands), "antenna_cert": "demo-dipole",
                    "extrapolation": {"Pole UMTS 2100": {
                        "method": "umts-cpich", "p_max_w": 40.0, "p_cpich_w": 2.0, "pilot_e_v_per_m": pilot,
                        "pilot_u_db": 2.0, "pilot_instrument": "decoder-capable analyser (simulated)"}}}]}
    db = tmp_path / "s.db"
    with ScpiServer(Analyzer(site, seed=8)) as srv, \
            SimulatedMeter("demo", sensor="probe", seed=4, speed=100.0) as sim:
        sid = run_plan(sim.port, d, db, mover=sim.move_to, analyser=srv.address)
    con = sqlite3.connect(db)
    (e_max, ex_json), = con.execute("select e_at_max_v_per_m, extrapolation_json from sel_bands "
                                    "where name = 'Pole UMTS 2100'").fetchall()
    # F = 40 / 2 = 20: E_max = pilot * sqrt(20) = E * sqrt(2)
    assert e_max == pytest.approx(truth["Pole UMTS 2100"] * math.sqrt(2), rel=1e-9)
    assert json.loads(ex_json)["inputs"]["pilot_instrument"] == "decoder-capable analyser (simulated)"
    (r, r_x), = con.execute("select exposure_ratio, exposure_ratio_extrapolated from survey_points "
                            "where session_id = ?", [sid]).fetchall()
    assert r_x > r
    text = re.sub(r"<[^>]+>", " ", write_report(db, sid, tmp_path / "report").read_text(encoding="utf-8"))
    assert "decoder-capable analyser (simulated)" in text and "pilot_u_db = 2.0" in text
    assert "decoder-capable instrument and declared with the point" in text and "do not replace" in text
