"""The calibration procedures run on a bench of SCPI instruments over loopback TCP (pyvisa-py): the generator
is levelled by the power meter on a coupler, the rotator turns the probe, the simulated probe on its pty
reads the field the instruments really made. The analysis is the lab's own, unchanged; the recovered
per-axis factors are compared with the simulated probe's known response (as tests/test_lab_truth.py does
for the in-process bench)."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest

from meterlink.device.link import MeterLink
from meterlink.instruments.session import InstrumentError
from meterlink.lab import certify
from meterlink.lab import procedures as pr
from meterlink.lab.scpi_bench import BenchFile, ScpiController, ScpiMeterBench, load_bench
from meterlink.lab.session import LabError, LabSession
from meterlink.simulators.instruments import axis_gain_db
from meterlink.simulators.scpi_lab import COUPLING_DB, ScpiLabRig

SESSION = LabSession("ML-EP3 (simulated)", "EP-4417", "Test lab (invented)", "LAB-S1", dt.date(2027, 6, 1),
                     dt.date(2028, 6, 1))


def _bench(rig, **kw) -> BenchFile:
    a = rig.addresses()
    return BenchFile(a["generator"], a["power_meter"], a["rotator"], rig.port, coupling_db=COUPLING_DB,
                     path_gain_db=kw.get("path_gain_db", 25.0), max_level_dbm=kw.get("max_level_dbm", 10.0),
                     timeout_s=2.0, move_timeout_s=2.0, positioner=kw.get("positioner", False))


def test_frequency_linearity_isotropy_over_scpi():
    plan = pr.full_plan(SESSION, freqs=(1e8, 1e9, 3e9), levels=(1.0, 5.0, 10.0), iso_step_deg=90)
    with ScpiLabRig(SESSION.method, seed=4, speed=5.0) as rig:
        # the rotator is a positioner here: it places the probe too (POS:DIR, POS:TILT), no operator
        with ScpiController(_bench(rig, positioner=True), SESSION.method) as ctl, \
                MeterLink(rig.port, interval_ms=100) as link:
            bench = ScpiMeterBench(ctl, link)
            bench.wait_connected()
            res = pr.run_plan(plan, bench, repeats=3)
            levels = list(ctl.levels)
        model = rig.lab.scenario.probe
    cal = certify.analyse(SESSION, res)
    # every levelled step reached its net power within the tolerance
    assert levels and max(abs(x["net_dbm"] - x["want_dbm"]) for x in levels) <= 0.02
    f = cal.response.freq_hz
    truth = -(axis_gain_db(model, f) - axis_gain_db(model, model.ref_freq_hz))
    err = cal.response.cf_axes_db - truth
    assert np.max(np.abs(err)) <= cal.budget.u_expanded_db
    assert np.max(np.abs(err)) < 0.15                # levelling within 0.02 dB, noise, few repeats
    assert np.abs(truth).max() > 0.3


def test_generator_limit_is_one_line_and_rf_left_off():
    plan = pr.frequency_plan(SESSION, freqs=(1e9,), level_v_per_m=20.0)
    with ScpiLabRig(SESSION.method, seed=1, speed=5.0) as rig:
        with pytest.raises(LabError) as e:
            with ScpiController(_bench(rig, max_level_dbm=-20.0), SESSION.method, place=rig.place) as ctl, \
                    MeterLink(rig.port, interval_ms=100) as link:
                bench = ScpiMeterBench(ctl, link)
                bench.wait_connected()
                pr.run_plan(plan, bench, repeats=2)
        assert rig.gen.on is False
    assert "max_level_dbm" in str(e.value) and "\n" not in str(e.value)


def test_lost_rotator_is_one_line():
    with ScpiLabRig(SESSION.method, seed=2, speed=5.0) as rig:
        with pytest.raises(InstrumentError) as e:
            with ScpiController(_bench(rig), SESSION.method) as ctl:
                rig.rot.faults.timeout = True          # the rotator stops answering after the bench opened
                ctl.apply(1e9, 1.0, (1.0, 0.0, 0.0), 45.0, 0.0)
    assert "POS:ANGL" in str(e.value) and "no answer within 2 s" in str(e.value) and "\n" not in str(e.value)


def test_bench_file_errors_name_the_key(tmp_path):
    p = tmp_path / "bench.toml"
    p.write_text('[instruments]\ngenerator = "TCPIP::127.0.0.1::5025::SOCKET"\npower_meter = "x"\nrotator = "y"\n'
                 'meter_port = "/dev/ttyUSB0"\n[chain]\ncoupling_db = "twenty"\n')
    with pytest.raises(LabError, match="chain.coupling_db"):
        load_bench(p)
    p.write_text(p.read_text().replace('"twenty"', "20.0"))
    assert load_bench(p).coupling_db == 20.0


def test_lab_run_keeps_the_steps_taken_when_the_bench_fails(tmp_path, capsys):
    """`lab run --bench` stopping part-way (the generator cannot reach 10 V/m under its limit): exit 2, one line,
    and the steps already measured saved as an importable readings file with an event giving the counts."""
    import json

    from meterlink.cli import main
    from meterlink.lab.procedures import import_csv

    with ScpiLabRig(SESSION.method, seed=3, speed=5.0) as rig:
        a = rig.addresses()
        bench = tmp_path / "bench.toml"
        bench.write_text(f'[instruments]\ngenerator = "{a["generator"]}"\npower_meter = "{a["power_meter"]}"\n'
                         f'rotator = "{a["rotator"]}"\nmeter_port = "{rig.port}"\npositioner = true\n'
                         f'[chain]\ncoupling_db = {COUPLING_DB}\npath_gain_db = 25.0\nmax_level_dbm = -20.0\n')
        code = main(["lab", "run", "--bench", str(bench), "--quick", "--repeats", "2", "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "\n" not in err and "max_level_dbm" in err and "steps measured, saved in" in err
    ev = json.loads((tmp_path / "o" / "partial-event.json").read_text())
    assert ev["steps_measured"] >= 2 and ev["steps_measured"] + ev["steps_not_measured"] == 70
    kept = import_csv(tmp_path / "o" / "partial-readings.csv", SESSION)
    assert len(kept) == ev["steps_measured"] and kept[0].step.procedure == "zero"
    assert not (tmp_path / "o" / "certificate.toml").exists()
