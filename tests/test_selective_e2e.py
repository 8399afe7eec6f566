"""End to end over loopback TCP with pyvisa-py: a frequency-selective point at the invented demo site, the
simulated analyser seeing the same emitters as the simulated broadband probe on its pty.

Checks: per-band E within the point's stated expanded uncertainty of the simulator's truth; the total
field and the exposure ratio agree with the broadband probe's reading of the same point within the
combined uncertainty; a lost analyser stops the point with a one-line error and the journal keeps
every band measured before it, with an event giving the exact counts.
"""

from __future__ import annotations

import json
import math
import time

import numpy as np
import pytest

from meterlink.device.link import MeterLink, Reading
from meterlink.instruments.analyzer import SpectrumAnalyzer
from meterlink.instruments.session import InstrumentError, open_session
from meterlink.physics.calibrate import calibrate_axes
from meterlink.physics.certificate import load_certificate
from meterlink.physics.limits import reference_level
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.simulators.scenario import load_scenario
from meterlink.simulators.scpi_instruments import Analyzer, SiteAntenna
from meterlink.simulators.scpi_server import ScpiServer
from meterlink.survey.selective import Journal, assess_point, load_bands, measure_point

POINT_M = (4.0, -4.0, 1.5)


def _bands():
    from importlib import resources
    return load_bands(resources.files("meterlink.simulators.scenarios").joinpath("demo-bands.toml"))


def _probe_readings(n: int = 12):
    """Calibrated broadband readings of the simulated probe held at POINT_M (real pty, pyserial)."""
    cert = load_certificate("demo-probe")
    counts = []
    with SimulatedMeter("demo", sensor="probe", seed=5, speed=1.0) as sim:
        sim.move_to(POINT_M)
        t_s = sim.sim_time_s()
        with MeterLink(sim.port, interval_ms=200) as link:
            deadline = time.monotonic() + 30
            skip = 3                                   # readings already due saw the walk's position
            while len(counts) < n and time.monotonic() < deadline:
                item = link.get(0.2)
                if isinstance(item, Reading):
                    if skip:
                        skip -= 1
                        continue
                    counts.append((item.axes.x, item.axes.y, item.axes.z))
    assert len(counts) == n
    return calibrate_axes(cert, np.asarray(counts, dtype=float), None), t_s


@pytest.fixture(scope="module")
def point(tmp_path_factory):
    probe, t_s = _probe_readings()
    site = SiteAntenna(load_scenario("demo"), POINT_M, t_s=t_s, antenna="x")
    cert = load_certificate("demo-dipole")
    journal_path = tmp_path_factory.mktemp("sel") / "point.jsonl"
    with ScpiServer(Analyzer(site, seed=2)) as srv, open_session(srv.address, timeout_s=5) as s:
        j = Journal(journal_path)
        res = measure_point(SpectrumAnalyzer(s), _bands(), cert, antenna="three",
                            orient=lambda axis: setattr(site, "antenna", axis), journal=j)
        j.close()
    return res, site.truth(), probe, journal_path


def test_per_band_e_within_stated_uncertainty_of_truth(point):
    res, truth, _, journal = point
    by_name = {t["name"]: t["e_v_per_m"] for t in truth}
    assert [r.name for r in res] == list(by_name)
    for r in res:
        err_db = 20 * math.log10(r.e_v_per_m / by_name[r.name])
        assert abs(err_db) <= r.u_expanded_db, (r.name, err_db, r.u_expanded_db)
        assert 0.5 < r.u_expanded_db < 5.0
    # the journal holds all 8 bands x 3 orientations as measured
    lines = [json.loads(x) for x in journal.read_text().splitlines()]
    assert len(lines) == 24 and {x["orientation"] for x in lines} == {"x", "y", "z"}


def test_total_agrees_with_broadband_probe_within_combined_uncertainty(point):
    res, truth, probe, _ = point
    e_sel = math.sqrt(sum(r.e_v_per_m ** 2 for r in res))
    u_sel_db = max(r.u_expanded_db for r in res)       # fully correlated bands: the largest, not the RSS
    e_probe = float(np.mean(probe.e_v_per_m))
    u_probe_db = float(probe.u_expanded_db[0])
    u_comb_db = math.hypot(u_sel_db, u_probe_db)
    assert abs(20 * math.log10(e_sel / e_probe)) <= u_comb_db
    # exposure ratios (ICNIRP 2020, public): the selective sum, and the probe's reading spread over the
    # bands in the proportions the analyser found; equal within the combined uncertainty in power (2 x dB)
    a = assess_point(res, "icnirp-2020", "public")
    r_sel = a["total_exposure_ratio"]
    w = np.array([r.e_v_per_m ** 2 for r in res]) / e_sel ** 2
    lim = np.array([reference_level("icnirp-2020", "public", r.freq_hz).e_v_per_m for r in res])
    r_probe = e_probe ** 2 * float(np.sum(w / lim ** 2))
    assert abs(10 * math.log10(r_sel / r_probe)) <= 2 * u_comb_db
    # the broadband probe judged against the most restrictive level in its range is never below the sum
    e_min = min(reference_level("icnirp-2020", "public", f).e_v_per_m for f in (30e6, 100e6, 400e6, 2e9))
    assert (e_probe / e_min) ** 2 >= r_sel * 10 ** (-2 * u_comb_db / 10)
    assert a["cautions"] and 0 < r_sel < 1 and sum(b["share"] for b in a["bands"]) == pytest.approx(1.0)


def test_lost_analyser_keeps_measured_bands(tmp_path):
    site = SiteAntenna(load_scenario("demo"), POINT_M, antenna="isotropic")
    inst = Analyzer(site)
    journal_path = tmp_path / "p.jsonl"
    bands = _bands()
    with ScpiServer(inst) as srv, open_session(srv.address, timeout_s=2) as s:
        sa = SpectrumAnalyzer(s)
        original = sa.sweep

        def sweep_then_fail(binary=True):       # the analyser goes away during the fourth sweep
            if inst.sweeps == 3:
                inst.faults.disconnect = True
            return original(binary)
        sa.sweep = sweep_then_fail
        j = Journal(journal_path)
        with pytest.raises(InstrumentError) as e:
            measure_point(sa, bands, load_certificate("demo-dipole"), journal=j)
        j.close()
    assert "\n" not in str(e.value) and srv.address in str(e.value)
    lines = [json.loads(x) for x in journal_path.read_text().splitlines()]
    assert [x["band"] for x in lines[:3]] == [b.name for b in bands[:3]]
    assert lines[3]["event"] == "instrument_error"
    assert lines[3]["sweeps_measured"] == 3 and lines[3]["sweeps_not_measured"] == 5


def test_extrapolation_factors_shown_beside_measured_values(point):
    from meterlink.physics.extrapolation import lte_crs
    res, _, _, _ = point
    f = lte_crs(600)                                   # 10 MHz = 50 RB = 600 subcarriers, worked by hand: x sqrt(600)
    a = assess_point(res, "icnirp-2020", "public", factors={"Pole LTE 800": f})
    row = next(b for b in a["bands"] if b["name"] == "Pole LTE 800")
    assert row["extrapolation"]["power_factor"] == 600 and row["extrapolation"]["inputs"]["n_subcarriers"] == 600
    assert row["e_at_max_v_per_m"] == pytest.approx(row["e_v_per_m"] * math.sqrt(600))
    assert a["total_exposure_ratio_at_max"] > a["total_exposure_ratio"]
    assert "extrapolation" not in next(b for b in a["bands"] if b["name"] == "Tor FM A")
