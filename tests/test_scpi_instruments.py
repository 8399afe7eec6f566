"""SCPI instruments through pyvisa-py against the simulated instruments on real loopback TCP sockets:
settings, single sweeps in ASCII and REAL,32 block form, and the fault switches giving one-line errors."""

from __future__ import annotations

import math

import numpy as np
import pytest

from meterlink.instruments.analyzer import SpectrumAnalyzer
from meterlink.instruments.bench import PowerMeter, Rotator, SignalGenerator
from meterlink.instruments.session import InstrumentError, open_session
from meterlink.simulators.scenario import load_scenario
from meterlink.simulators.scpi_instruments import Analyzer, Generator, PowerMeterSim, RotatorSim, SiteAntenna
from meterlink.simulators.scpi_server import ScpiServer


@pytest.fixture
def analyser_server():
    site = SiteAntenna(load_scenario("demo"), (4.0, -4.0, 1.5), t_s=900.0)
    with ScpiServer(Analyzer(site, seed=1)) as srv:
        yield srv


def _setup(sa: SpectrumAnalyzer, points=2001):
    sa.set_start_stop(80e6, 110e6)
    sa.set_bandwidths(100e3, 300e3)
    sa.set_detector("rms")
    sa.set_sweep(0.2, points)
    sa.set_levels(20.0, 10.0)


def test_settings_read_back_and_traces_agree_in_both_forms(analyser_server):
    with open_session(analyser_server.address, timeout_s=2) as s:
        assert s.idn.split(",")[1] == "SIM-SA"
        sa = SpectrumAnalyzer(s)
        _setup(sa)
        st = sa.settings()
        assert st["start_hz"] == 80e6 and st["stop_hz"] == 110e6 and st["points"] == 2001
        assert st["rbw_hz"] == 100e3 and st["detector"] == "rms" and st["attenuation_db"] == 10.0
        sa.set_center_span(95e6, 10e6)
        assert sa.settings()["start_hz"] == 90e6
        _setup(sa)
        b = sa.sweep(binary=True)
        a = sa.sweep(binary=False)
    assert b.level_dbm.shape == a.level_dbm.shape == (2001,)
    assert b.freq_hz[0] == 80e6 and b.freq_hz[-1] == 110e6
    # both sweeps show the two FM carriers of the scenario at the same bins (jitter aside)
    for f0 in (94.3e6, 101.8e6):
        i = int(np.argmin(abs(b.freq_hz - f0)))
        assert abs(b.level_dbm[i] - a.level_dbm[i]) < 0.5
        assert b.level_dbm[i] > np.median(b.level_dbm) + 40


def test_bad_setting_is_caught_by_the_error_queue(analyser_server):
    with open_session(analyser_server.address, timeout_s=2) as s:
        sa = SpectrumAnalyzer(s)
        with pytest.raises(InstrumentError) as e:
            sa.set_bandwidths(50e6)           # beyond the simulated analyser's largest RBW
        msg = str(e.value)
        assert "\n" not in msg and analyser_server.address in msg and "BAND" in msg and "-222" in msg


@pytest.mark.parametrize("fault, words", [("timeout", "no answer within"), ("garbage", "answered"),
                                          ("scpi_error", "instrument reports"), ("disconnect", "INIT:IMM")])
def test_faults_give_one_line_errors(analyser_server, fault, words):
    with open_session(analyser_server.address, timeout_s=0.5) as s:
        sa = SpectrumAnalyzer(s)
        _setup(sa, 501)
        setattr(analyser_server.instrument.faults, fault, True)
        with pytest.raises(InstrumentError) as e:
            if fault == "scpi_error":
                _setup(sa, 501)
            elif fault == "disconnect":
                sa.sweep()
            else:
                sa.settings()
    msg = str(e.value)
    assert "\n" not in msg and msg.startswith(analyser_server.address) and words in msg


def test_unreachable_address_is_one_line():
    with pytest.raises(InstrumentError) as e:
        open_session("TCPIP::127.0.0.1::1::SOCKET", timeout_s=0.5)
    assert "cannot open" in str(e.value) and "\n" not in str(e.value) and "127.0.0.1::1" in str(e.value)


def test_generator_power_meter_rotator():
    gen = Generator()
    with ScpiServer(gen) as g, ScpiServer(PowerMeterSim(gen, coupling_db=20.0)) as p, ScpiServer(RotatorSim()) as r:
        with open_session(g.address) as sg, open_session(p.address) as sp, open_session(r.address) as sr:
            gen_i, pm, rot = SignalGenerator(sg), PowerMeter(sp), Rotator(sr)
            gen_i.set(2.45e9, -10.0)
            gen_i.rf(True)
            assert gen_i.state() == (2.45e9, -10.0, True)
            pm.zero()
            pm.set_frequency(2.45e9)
            assert math.isclose(pm.read_dbm(), -30.0, abs_tol=0.1)
            rot.move(135.0)
            assert rot.angle_deg() == 135.0
            with pytest.raises(InstrumentError) as e:
                rot.move(400.0)
            assert "-222" in str(e.value)
