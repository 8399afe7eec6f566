"""Assessing series against reference levels: pure tests with hand-worked values.

Reference values: ICNIRP 2020 (Health Phys 118(5)) Table 5, general public, 30-400 MHz:
E = 27.7 V/m, averaged over 30 min; FCC 47 CFR 1.1310 Table 1 (B), 30-300 MHz: 27.5 V/m, 30 min.
"""

import math

import numpy as np
import pytest

from meterlink.assessment import assess_field, assess_spectrum, governing_level
from meterlink.calibrate import ABOVE_RANGE
from meterlink.errors import MeterlinkError
from meterlink.processing import FieldSeries, SpectrumSeries


def series(e, dt_s=1.0, u_db=1.0, flags=None):
    e = np.asarray(e, dtype=float)
    n = e.size
    return FieldSeries(1, 1, "test certificate", np.arange(n), 1.8e9 + dt_s * np.arange(n), e, np.zeros((n, 3)),
                       e / 376.73, e * e / 376.73, np.full(n, u_db), np.zeros(n, np.int64) if flags is None else flags, ())


def test_half_the_field_level_is_a_quarter_in_power_terms():
    # 13.85 V/m for 40 minutes at 100 MHz: 50 % of 27.7 V/m in field terms, 25 % in power terms
    a = assess_field(series(np.full(2400, 13.85)), "icnirp-2020", "public", "guarded", freq_hz=100e6)
    assert a.limit_v_per_m == pytest.approx(27.7)
    assert a.window_s == pytest.approx(1800)
    assert a.value_complete
    assert a.percent_field == pytest.approx(50.0, rel=1e-6)
    assert a.percent_power == pytest.approx(25.0, rel=1e-6)
    assert a.verdict.outcome == "compliant"


def test_averaging_is_in_the_power_domain_over_the_standards_time():
    # 10 V/m for 3 min then 0 for 27 min: sqrt(100 * 3/30) = 3.162 V/m over the 30-minute window, not 1 V/m
    e = np.r_[np.zeros(1800), np.full(180, 10.0), np.zeros(1800)]
    a = assess_field(series(e), "icnirp-2020", "public", "simple", freq_hz=100e6)
    assert a.value_v_per_m == pytest.approx(math.sqrt(10.0), rel=2e-3)
    assert a.peak_v_per_m == 10.0


def test_short_record_is_judged_on_its_mean_and_says_so():
    a = assess_field(series(np.full(300, 5.0)), "fcc-1310", "public", "simple", freq_hz=100e6)
    assert not a.value_complete
    assert a.value_v_per_m == pytest.approx(5.0)
    assert a.limit_v_per_m == pytest.approx(27.5)
    assert any("shorter than the 30-minute" in n for n in a.notes)


def test_guarded_rule_leaves_a_value_near_the_limit_undecided():
    # 95 % of the field level with U = 1 dB: 95 % * 10^(1/20) = 106.6 % > 100 %, 95 % / 10^(1/20) < 100 %
    a = assess_field(series(np.full(2400, 0.95 * 27.7)), "icnirp-2020", "public", "guarded", freq_hz=100e6)
    assert a.verdict.outcome == "undecided"
    a = assess_field(series(np.full(2400, 0.95 * 27.7)), "icnirp-2020", "public", "simple", freq_hz=100e6)
    assert a.verdict.outcome == "compliant"


def test_readings_above_range_cannot_show_compliance():
    flags = np.zeros(2400, np.int64)
    flags[100] = ABOVE_RANGE
    e = np.full(2400, 5.0)
    e[100] = np.nan
    a = assess_field(series(e, flags=flags), "icnirp-2020", "public", "guarded", freq_hz=100e6)
    assert a.verdict.outcome == "undecided"
    assert any("above the probe's calibrated range" in n for n in a.notes)


def test_e_only_below_30_mhz_is_flagged_and_not_compliant():
    a = assess_field(series(np.full(2400, 1.0)), "icnirp-2020", "public", "guarded", freq_hz=10e6)
    assert a.verdict.outcome == "undecided"
    assert any("H" in n for n in a.notes)


def test_band_uses_the_most_restrictive_level():
    # ICNIRP 2020 Table 5 public: 27.7 V/m over 30-400 MHz, 1.375*sqrt(f_M) above 400 MHz, which is
    # 27.5 V/m just above the breakpoint: the table steps down there, so that is the band's minimum
    rl, note = governing_level("icnirp-2020", "public", band=(100e6, 900e6))
    assert rl.e_v_per_m == pytest.approx(1.375 * math.sqrt(400), rel=1e-6)
    rl, _ = governing_level("icnirp-2020", "public", band=(100e6, 300e6))
    assert rl.e_v_per_m == pytest.approx(27.7)
    assert "most restrictive" in note
    with pytest.raises(MeterlinkError):
        governing_level("icnirp-2020", "public")


def test_spectrum_total_uses_the_standards_sum_and_shares():
    # two emitters, each at half the S level in plane-wave terms (ICNIRP 2020 Table 5 public):
    # 100 MHz: S_L = 2 W/m2; 2.1 GHz: S_L = 10 W/m2. S = E^2/Z0.
    z0 = 376.730313
    e1, e2 = math.sqrt(1.0 * z0), math.sqrt(5.0 * z0)
    f = np.array([100e6, 2.1e9])
    e = np.tile([e1, e2], (6, 1))
    s = SpectrumSeries(1, 1, "dipole", f, 1.8e9 + np.arange(6.0), e, np.array([1.0, 1.0]), np.zeros(2, np.int64),
                       np.full(6, 3), ())
    a = assess_spectrum(s, "icnirp-2020", "public", "simple")
    assert a.total_exposure_ratio == pytest.approx(1.0, rel=1e-6)
    assert sorted(em.share for em in a.emitters) == pytest.approx([0.5, 0.5])
    assert all(em.quantity == "S/S_L" for em in a.emitters)
