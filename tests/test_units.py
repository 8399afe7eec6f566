"""meterlink.units against published relations; each check names its source."""

import math

import numpy as np
import pytest
from scipy import constants, integrate

from meterlink import units


def test_z0_from_scipy_constants_not_120_pi():
    # CODATA 2018 (via scipy.constants): Z0 = sqrt(mu_0/epsilon_0) = 376.730 313 668 ohm.
    assert units.Z0_OHM == pytest.approx(math.sqrt(constants.mu_0 / constants.epsilon_0), rel=1e-15)
    assert units.Z0_OHM == pytest.approx(376.730313668, abs=1e-6)
    # 120*pi = 376.99 ohm is the legacy (pre-2019 exact mu_0 = 4e-7*pi) approximation: not used.
    assert abs(units.Z0_OHM - 120 * math.pi) > 0.25


def test_plane_wave_power_density_s_equals_e2_over_z0_equals_e_times_h():
    # Plane-wave relations S = E^2/Z0 = E*H = Z0*H^2 (e.g. ICNIRP 2020 Guidelines, Health Phys 118(5),
    # Appendix A definitions; any electromagnetics text).
    e = np.array([0.1, 1.0, 27.5, 61.0])
    h = units.e_to_h(e)
    s = units.e_to_s(e)
    np.testing.assert_allclose(s, e**2 / units.Z0_OHM, rtol=1e-15)
    np.testing.assert_allclose(s, e * h, rtol=1e-14)
    np.testing.assert_allclose(units.h_to_s(h), s, rtol=1e-14)
    np.testing.assert_allclose(units.s_to_e(s), e, rtol=1e-14)
    np.testing.assert_allclose(units.s_to_h(s), h, rtol=1e-14)
    np.testing.assert_allclose(units.h_to_e(h), e, rtol=1e-14)
    # 61 V/m (ICNIRP 1998 Table 7, 2-300 GHz general public) corresponds to about 10 W/m^2.
    assert units.e_to_s(61.0) == pytest.approx(9.877, abs=0.01)


def test_dbuv_is_dbm_plus_107_in_50_ohm():
    # P = V^2/R: dBuV = dBm + 90 + 10*log10(50) = dBm + 106.99 (common RF practice, "+107").
    assert float(units.dbm_to_dbuv(0.0)) == pytest.approx(106.9897, abs=1e-4)
    assert float(units.dbm_to_dbuv(-30.0)) == pytest.approx(76.99, abs=0.005)
    assert float(units.dbuv_to_dbm(106.9897)) == pytest.approx(0.0, abs=1e-4)
    # 0 dBm into 50 ohm is 0.2236 V rms, 20*log10(0.2236e6) dBuV.
    assert float(units.dbm_to_dbuv(0.0)) == pytest.approx(20 * math.log10(math.sqrt(1e-3 * 50) * 1e6), abs=1e-9)
    # 75 ohm systems: +108.75 (same relation, r = 75 ohm).
    assert float(units.dbm_to_dbuv(0.0, 75.0)) == pytest.approx(108.75, abs=0.005)


def test_one_volt_per_metre_is_120_dbuv_per_m():
    # Definition of dB(uV/m) (CISPR 16-1-1 usage): 20*log10(E / 1 uV/m).
    assert float(units.v_per_m_to_dbuv_per_m(1.0)) == pytest.approx(120.0, abs=1e-12)
    assert float(units.v_per_m_to_dbuv_per_m(1e-6)) == pytest.approx(0.0, abs=1e-12)
    assert float(units.dbuv_per_m_to_v_per_m(140.0)) == pytest.approx(10.0, rel=1e-12)


def _af_from_aperture(freq_hz, gain_linear, r_ohm=50.0):
    """AF = E/V from the effective aperture A_e = lambda^2 G / (4 pi) (Balanis, Antenna Theory 3rd ed., 2-111)."""
    lam = units.wavelength_m(freq_hz)
    a_e = lam**2 * gain_linear / (4 * math.pi)
    # received power E^2/Z0 * A_e = V^2 / R  ->  E/V = sqrt(Z0 / (R * A_e))
    return np.sqrt(units.Z0_OHM / (r_ohm * a_e))


@pytest.mark.parametrize("freq_hz", [30e6, 100e6, 433e6, 900e6, 2.45e9])
@pytest.mark.parametrize("gain_dbi", [0.0, 2.15, 6.0])
def test_antenna_factor_into_50_ohm(freq_hz, gain_dbi):
    # AF = 9.73/(lambda*sqrt(G)) and AF(dB/m) = 20log10(f_MHz) - 29.77 - G(dBi) (receiving antenna into
    # 50 ohm; e.g. C. R. Paul, Introduction to Electromagnetic Compatibility, 2nd ed., sec. 7.x; ANSI C63.5).
    g = 10 ** (gain_dbi / 10)
    lam = float(units.wavelength_m(freq_hz))
    af = float(_af_from_aperture(freq_hz, g))
    assert af == pytest.approx(9.73 / (lam * math.sqrt(g)), rel=1e-3)
    af_db = float(units.ratio_field_to_db(af))
    assert af_db == pytest.approx(20 * math.log10(freq_hz / 1e6) - 29.77 - gain_dbi, abs=0.01)


def _dipole_pattern(theta):
    return (np.cos(np.pi / 2 * np.cos(theta)) / np.sin(theta)) ** 2


def test_half_wave_dipole_gain_and_effective_length():
    # Balanis, Antenna Theory 3rd ed., sec. 4.6: D0 = 4/Cin(2 pi) ~ 1.643 (2.15 dBi), Rr ~ 73 ohm.
    integral, _ = integrate.quad(lambda t: _dipole_pattern(t) * np.sin(t), 1e-12, np.pi - 1e-12)
    d0 = 2.0 / integral                      # 4*pi*Umax / (2*pi * integral), Umax = 1
    assert d0 == pytest.approx(1.64, abs=0.005)
    assert 10 * math.log10(d0) == pytest.approx(2.15, abs=0.01)
    r_rad = units.Z0_OHM / (2 * np.pi) * integral   # Rr = 2 P_rad / I0^2 (Balanis eq. 4-93)
    assert r_rad == pytest.approx(73.1, abs=0.1)
    # Effective length lambda/pi for a half-wave dipole (common practice; from memory, Balanis
    # sec. 4.6 gives the same vector effective length). Check it against the aperture with a matched load:
    # A_e = l_e^2 Z0 / (4 Rr) must equal lambda^2 D0 / (4 pi).
    lam = float(units.wavelength_m(300e6))
    l_e = lam / np.pi
    assert l_e**2 * units.Z0_OHM / (4 * r_rad) == pytest.approx(lam**2 * d0 / (4 * np.pi), rel=1e-3)


def test_field_and_power_ratios():
    # Decibel definitions (IEC 60027-3): field 20 log10, power 10 log10.
    assert float(units.db_to_ratio_field(20.0)) == pytest.approx(10.0)
    assert float(units.db_to_ratio_power(20.0)) == pytest.approx(100.0)
    assert float(units.ratio_field_to_db(2.0)) == pytest.approx(6.0206, abs=1e-4)
    assert float(units.ratio_power_to_db(2.0)) == pytest.approx(3.0103, abs=1e-4)


def test_wavelength():
    # c = 299 792 458 m/s exactly (SI); 1 GHz -> 0.2998 m.
    assert float(units.wavelength_m(1e9)) == pytest.approx(0.299792458, rel=1e-12)


@pytest.mark.parametrize("text,hz", [("900MHz", 900e6), ("2.45 GHz", 2.45e9), ("100e6", 100e6),
                                     ("27k", 27e3), ("50 Hz", 50.0), ("1.5ghz", 1.5e9), (".5 MHz", 5e5)])
def test_parse_frequency(text, hz):
    assert units.parse_frequency_hz(text) == pytest.approx(hz)


@pytest.mark.parametrize("text", ["", "MHz", "-5MHz", "0", "12 parsecs", "1e999", "5 MHz MHz"])
def test_parse_frequency_rejects(text):
    with pytest.raises(ValueError):
        units.parse_frequency_hz(text)


def test_format_frequency():
    assert units.format_frequency(900e6) == "900 MHz"
    assert units.format_frequency(2.45e9) == "2.45 GHz"
    assert units.format_frequency(50.0) == "50 Hz"
