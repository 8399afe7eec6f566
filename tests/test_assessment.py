"""Assessing series against reference levels: pure tests with hand-worked values.

Reference values: ICNIRP 2020 (Health Phys 118(5)) Table 5, general public, 30-400 MHz:
E = 27.7 V/m, averaged over 30 min; FCC 47 CFR 1.1310 Table 1 (B), 30-300 MHz: 27.5 V/m, 30 min.
"""

import math

import numpy as np
import pytest

from meterlink.physics.assessment import assess_field, assess_spectrum, governing_level
from meterlink.physics.calibrate import ABOVE_RANGE, FREQ_OUT
from meterlink.errors import MeterlinkError
from meterlink.storage.processing import FieldSeries, SpectrumSeries


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


def test_short_record_gets_its_mean_but_no_conformity_statement():
    # FCC 47 CFR 1.1310(e) Table 1 (B), 30-300 MHz: 27.5 V/m averaged over 30 minutes. A 5-minute
    # record is no 30-minute average: its power-domain mean (5 V/m) is reported as a partial value
    # only, with no statement of conformity (coverage 300/1800 = 16.7 %).
    a = assess_field(series(np.full(300, 5.0)), "fcc-1310", "public", "simple", freq_hz=100e6)
    assert not a.value_complete
    assert a.value_v_per_m == pytest.approx(5.0)
    assert a.limit_v_per_m == pytest.approx(27.5)
    assert a.coverage == pytest.approx(300 / 1800)
    assert a.verdict.outcome == "not assessable"
    assert "incomplete" in a.verdict.reason and "No conformity statement" in a.verdict.statement
    assert any("30-minute window" in n and "partial" in n for n in a.notes)


def test_guarded_rule_reports_a_conditional_pass_near_the_limit():
    # 95 % of the field level with U = 1 dB: 95 % * 10^(1/20) = 106.6 % > 100 %, 95 % / 10^(1/20) < 100 %,
    # measured below the limit: ILAC-G8:09/2019 4.2.3 "conditional pass".
    a = assess_field(series(np.full(2400, 0.95 * 27.7)), "icnirp-2020", "public", "guarded", freq_hz=100e6)
    assert a.verdict.outcome == "conditional pass"
    # 105 % with U = 1 dB: 105 % / 1.122 = 93.6 % < 100 % < 105 %: conditional fail
    a = assess_field(series(np.full(2400, 1.05 * 27.7)), "icnirp-2020", "public", "guarded", freq_hz=100e6)
    assert a.verdict.outcome == "conditional fail"
    a = assess_field(series(np.full(2400, 0.95 * 27.7)), "icnirp-2020", "public", "simple", freq_hz=100e6)
    assert a.verdict.outcome == "compliant"


def test_readings_above_range_cannot_show_compliance():
    flags = np.zeros(2400, np.int64)
    flags[100] = ABOVE_RANGE
    e = np.full(2400, 5.0)
    e[100] = np.nan
    a = assess_field(series(e, flags=flags), "icnirp-2020", "public", "guarded", freq_hz=100e6)
    assert a.verdict.outcome == "not assessable" and "lower bound" in a.verdict.reason
    assert any("above the probe's calibrated range" in n for n in a.notes)


def test_e_only_below_30_mhz_is_flagged_and_not_compliant():
    a = assess_field(series(np.full(2400, 1.0)), "icnirp-2020", "public", "guarded", freq_hz=10e6)
    assert a.verdict.outcome == "not assessable"
    assert any("H" in n for n in a.notes)


def test_no_averaging_time_in_the_standard_compares_instantaneous_values():
    # ICNIRP 1998 (Health Phys 74(4)) Table 7, general public, 3-150 kHz: E = 87 V/m; the table notes
    # give 6-min averaging only from 100 kHz to 10 GHz, so at 50 kHz the rms values themselves are
    # compared. A 40-min record at 10 V/m with a 10-s burst of 100 V/m: a 6-min average would be
    # sqrt((100^2 * 10 + 10^2 * 350) / 360) = sqrt(375) = 19.4 V/m (22 % of 87 V/m, "compliant");
    # the instantaneous 100 V/m is 115 % of 87 V/m: not compliant.
    e = np.full(2400, 10.0)
    e[1000:1010] = 100.0
    a = assess_field(series(e), "icnirp-1998", "public", "simple", freq_hz=50e3)
    assert a.window_s is None and a.averaging == "instantaneous"
    assert a.value_v_per_m == pytest.approx(100.0)
    assert a.limit_v_per_m == pytest.approx(87.0)
    assert a.verdict.outcome == "not compliant"
    assert any("no averaging time" in n for n in a.notes)
    # Above 100 kHz the same table averages over 6 min: a band reaching below 100 kHz takes none.
    from meterlink.physics.assessment import averaging_time_s
    assert averaging_time_s("icnirp-1998", "public", freq_hz=1e6) == pytest.approx(360.0)
    assert averaging_time_s("icnirp-1998", "public", band=(50e3, 1e6)) is None
    assert averaging_time_s("icnirp-1998", "public", band=(1e6, 100e6)) == pytest.approx(360.0)


def test_partial_windows_are_reported_apart_from_the_standards_average():
    # FCC 47 CFR 1.1310(e) Table 1 (B), 30-300 MHz: 27.5 V/m, 30-min average. 40 min of record: the
    # first 20 s at 20 V/m then 5 V/m. Windows of 30 min inside the record: the first one (ending at
    # t = 1800 s) holds the burst: sqrt((20^2 * 20 + 5^2 * 1780) / 1800) = sqrt(29.17) = 5.40 V/m.
    # Windows ending earlier reach before the record (partial): their covered mean reaches 20 V/m at
    # the start - reported apart, never judged as the average.
    e = np.full(2400, 5.0)
    e[:20] = 20.0
    a = assess_field(series(e), "fcc-1310", "public", "simple", freq_hz=100e6)
    assert a.value_complete
    assert a.value_v_per_m == pytest.approx(math.sqrt((400 * 20 + 25 * 1780) / 1800), rel=1e-9)
    assert a.partial_v_per_m == pytest.approx(20.0)
    assert any("partial windows" in n for n in a.notes)


def test_frequency_outside_the_certificate_is_not_assessable():
    # A probe certified 30 MHz-6 GHz says nothing about 50 GHz: no verdict, whatever the value.
    s = series(np.full(2400, 1.0), flags=np.full(2400, FREQ_OUT, np.int64))
    a = assess_field(s, "icnirp-2020", "public", "guarded", freq_hz=50e9, fallback_range=(30e6, 6e9))
    assert a.verdict.outcome == "not assessable"
    assert "outside the certificate's calibrated frequency range (30 MHz-6 GHz)" in a.verdict.reason
    assert "50 GHz" in a.verdict.reason


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


def _spectrum(f, t, e):
    e = np.asarray(e, dtype=float)
    return SpectrumSeries(1, 1, "dipole", np.asarray(f, dtype=float), np.asarray(t, dtype=float), e,
                          np.ones(e.shape[1]), np.zeros(e.shape[1], np.int64), np.full(e.shape[0], 3), ())


def test_sweeps_are_weighted_by_time_not_equally():
    # Sweeps at t = 0, 60, 70, 80 s of one 900 MHz line at 2, 4, 4, 4 V/m. Each sweep stands for the
    # time to the next, capped at 3 median intervals (median 10 s -> cap 30 s), the last for one
    # median interval: weights 30, 10, 10, 10 s. Time mean of E^2 = (4*30 + 16*30) / 60 = 10 V^2/m^2,
    # E = sqrt(10) = 3.162 V/m; equal weights would give sqrt((4 + 3*16) / 4) = 3.606 V/m. Hand-worked
    # from the definition of an rms over time (power domain).
    s = _spectrum([900e6], [0, 60, 70, 80], [[2.0], [4.0], [4.0], [4.0]])
    a = assess_spectrum(s, "icnirp-2020", "public", "simple")
    assert a.emitters[0].e_v_per_m == pytest.approx(math.sqrt(10.0), rel=1e-12)
    # 60 s of sweeps is no 30-min average (ICNIRP 2020 Table 5): a partial value, no statement.
    assert not a.value_complete and a.verdict.outcome == "not assessable"


def test_lines_below_the_floor_are_upper_bounds_not_zero():
    # A line seen in one sweep at 3 V/m and below the receiver's floor (NaN) in the other: with a
    # floor of 1 V/m per orientation the missing value is < sqrt(3) * 1 V/m (all three orientations
    # just below it), so the power mean is at most (9 + 3) / 2 = 6 V^2/m^2 (E <= 2.449 V/m), not
    # (9 + 0) / 2 = 4.5 V^2/m^2 (2.121 V/m) as a zero would give.
    s = _spectrum([900e6], [0, 1], [[3.0], [np.nan]])
    a = assess_spectrum(s, "icnirp-2020", "public", "simple", floor_v_per_m=np.array([1.0]))
    assert a.emitters[0].e_v_per_m == pytest.approx(math.sqrt(6.0), rel=1e-12)
    assert any("< floor" in n for n in a.notes)
    b = assess_spectrum(s, "icnirp-2020", "public", "simple")
    assert b.emitters[0].e_v_per_m == pytest.approx(math.sqrt(4.5), rel=1e-12)
    assert any("not an upper bound" in n for n in b.notes)



@pytest.mark.parametrize("dt_s", [10.0, 1.0])      # 1 s: more windows than are evaluated exactly
def test_spectrum_judges_the_largest_complete_window_not_the_record_mean(dt_s):
    # ICNIRP 2020 Table 5 public, 400-2000 MHz: S_L = f/200 W/m2 (900 MHz: 4.5 W/m2), 30-min
    # average. Sweeps every 10 s for 2 h: 1 V/m, except 40 V/m for the 30 min from t = 3600 s.
    # The worst 30-min window is that burst: S = 40^2 / Z0 = 4.247 W/m2 -> S/S_L = 0.9438; the 2-h
    # mean, sqrt((1 * 90 + 1600 * 30) / 120) = 20.0 V/m, would give only a quarter of that.
    from meterlink.physics.units import Z0_OHM
    t = np.arange(0.0, 7200.0, dt_s)
    e = np.where((t >= 3600) & (t < 5400), 40.0, 1.0)[:, None]
    a = assess_spectrum(_spectrum([900e6], t, e), "icnirp-2020", "public", "simple")
    assert a.value_complete and a.window_s == pytest.approx(1800.0)
    assert a.emitters[0].e_v_per_m == pytest.approx(40.0, rel=1e-9)
    assert a.total_exposure_ratio == pytest.approx(40.0**2 / Z0_OHM / 4.5, rel=1e-9)
    assert a.verdict.outcome == "compliant"


def test_orientations_that_missed_a_line_count_at_the_floor():
    # One sweep: the 900 MHz line was seen by one orientation only, at 3 V/m; the other two were
    # below the 1 V/m floor. E^2 = Ex^2 + Ey^2 + Ez^2 <= 9 + 1 + 1 = 11: E <= sqrt(11) = 3.317 V/m,
    # not the 3 V/m that counts the two unseen orientations as 0 V/m.
    import dataclasses
    s = dataclasses.replace(_spectrum([900e6], [0.0], [[3.0]]), n_seen=np.array([[1]]))
    a = assess_spectrum(s, "icnirp-2020", "public", "simple", floor_v_per_m=np.array([1.0]))
    assert a.emitters[0].e_v_per_m == pytest.approx(math.sqrt(11.0), rel=1e-12)


def test_temperature_outside_the_certificates_range_gives_no_verdict():
    # 13.85 V/m for 40 min at 100 MHz: 50 % of 27.7 V/m (ICNIRP 2020 Table 5, public), compliant
    # at any U below 6 dB (20 log10 2). The same values with the meter at 45 degC, beyond a certificate
    # range of 5..40 degC, have no statement; inside it (or at its edges) the verdict stands.
    import dataclasses

    from meterlink.physics.assessment import Temperatures

    base = series(np.full(2400, 13.85))
    for span, outcome in [((12.0, 30.0), "compliant"), ((5.0, 40.0), "compliant"),
                          ((20.0, 45.0), "not assessable"), ((-3.5, 20.0), "not assessable")]:
        s = dataclasses.replace(base, temperatures=Temperatures(span, (5.0, 40.0)))
        a = assess_field(s, "icnirp-2020", "public", "guarded", freq_hz=100e6)
        assert a.verdict.outcome == outcome, span
        if outcome == "not assessable":
            worst = span[1] if span[1] > 40 else span[0]
            assert f"{worst:.1f} degC" in a.verdict.reason and "5..40 degC" in a.verdict.reason
            assert a.percent_field == pytest.approx(50.0, rel=1e-6)      # the measured value stays reported
    # no range stated: the verdict is unchanged and a note says so
    a = assess_field(dataclasses.replace(base, temperatures=Temperatures((45.0, 45.0), None)),
                     "icnirp-2020", "public", "guarded", freq_hz=100e6)
    assert a.verdict.outcome == "compliant"
    assert any("states no temperature range" in n and "45.0 degC" in n for n in a.notes)


def test_dipole_sweeps_outside_the_temperature_range_give_no_verdict():
    # one 100 MHz line at 14 V/m in every sweep, 40 min of sweeps 10 s apart. ICNIRP 1998 Table 7,
    # public, 10-400 MHz: 28 V/m, 0.073 A/m, averaged over 6 min. E terms (14/28)^2 = 0.25; H terms
    # with the plane-wave H = E/Z0 (Z0 = 376.730313 ohm, scipy.constants): (14/376.730313/0.073)^2
    # = 0.259149, the larger sum governs (ICNIRP 1998 eqs. 10-11 apply to E and H separately).
    ratio = (14 / 376.730313 / 0.073) ** 2
    import dataclasses

    from meterlink.physics.assessment import Temperatures

    t = np.arange(0, 2400, 10.0)
    s = _spectrum([100e6], t, np.full((t.size, 1), 14.0))
    a = assess_spectrum(s, "icnirp-1998", "public", "simple")
    assert a.total_exposure_ratio == pytest.approx(ratio, rel=1e-6) and a.verdict.outcome == "compliant"
    hot = assess_spectrum(dataclasses.replace(s, temperatures=Temperatures((30.0, 42.5), (5.0, 40.0))),
                          "icnirp-1998", "public", "simple")
    assert hot.verdict.outcome == "not assessable" and "42.5 degC" in hot.verdict.reason
    assert hot.total_exposure_ratio == pytest.approx(ratio, rel=1e-6)
