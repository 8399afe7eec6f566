"""meterlink.physics.units against published relations; each check names its source."""

import math

import numpy as np
import pytest
from scipy import constants, integrate

from meterlink.physics import units


def test_z0_from_scipy_constants_not_120_pi():
    # CODATA 2018 (via scipy.constants): Z0 = sqrt(mu_0/epsilon_0) = 376.730 313 668 ohm.
    assert units.Z0_OHM == pytest.approx(math.sqrt(constants.mu_0 / constants.epsilon_0), rel=1e-15)
    assert units.Z0_OHM == pytest.approx(376.730313668, abs=1e-6)
    # 120*pi = 376.99 ohm is the legacy (pre-2019 exact mu_0 = 4e-7*pi) approximation: not used.
    assert abs(units.Z0_OHM - 120 * math.pi) > 0.25


def test_the_literal_constants_are_scipys_codata_values():
    # units.py types mu_0, epsilon_0 and c as literals (no scipy import at start-up); each must be
    # scipy.constants' value: CODATA 2022 (scipy >= 1.15) or 2018, which differ from the 10th digit on
    # (mu_0 1.256 637 061 27e-6 against 1.256 637 062 12e-6 N/A^2), so rel 1e-9 accepts either and no typo.
    # c is exact (SI definition of the metre).
    assert units.MU_0_N_PER_A2 == pytest.approx(constants.mu_0, rel=1e-9)
    assert units.EPSILON_0_F_PER_M == pytest.approx(constants.epsilon_0, rel=1e-9)
    assert units.C_M_PER_S == constants.c == 299792458.0


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


@pytest.mark.parametrize("text", ["1e30Hz", "400GHz", "0.5Hz", "2e30"])
def test_parse_frequency_rejects_values_outside_the_standards(text):
    # ICNIRP 1998/2020 and IEEE C95.1-2019 end at 300 GHz; nothing below 1 Hz is an RF exposure frequency.
    with pytest.raises(ValueError, match="outside 1 Hz-300 GHz"):
        units.parse_frequency_hz(text)
    assert units.parse_frequency_hz("300GHz") == 300e9 and units.parse_frequency_hz("1Hz") == 1.0


def test_parse_band():
    assert units.parse_band_hz("790MHz:960MHz") == (790e6, 960e6)
    for bad, needle in (("1e30Hz:2e30Hz", "'1e30Hz'"), ("2GHz:1GHz", "low edge 2 GHz"), ("900MHz", "LO:HI")):
        with pytest.raises(ValueError, match=needle):
            units.parse_band_hz(bad)


def test_antenna_factor_against_the_50_ohm_handbook_relation():
    # Handbook relation for a 50-ohm system (e.g. IEEE Std 291 / ANSI C63.5 practice, and most EMC
    # handbooks): AF(dB/m) = 20 log10(f_MHz) - 29.77 - G(dBi), i.e. AF = 9.73 / (lambda sqrt(G)).
    # The constant follows from AF = (1/lambda) sqrt(4 pi Z0 / (R G)): sqrt(4 pi 376.730 / 50) = 9.7305,
    # 20 log10(9.7305e6 / c) = -29.7737 dB; the handbook rounds it to -29.77 (0.004 dB apart).
    for f_hz, g_dbi in ((30e6, 0.0), (100e6, 2.15), (1e9, 10.0), (6e9, 15.5)):
        handbook = 20 * math.log10(f_hz / 1e6) - 29.77 - g_dbi
        assert float(units.antenna_factor_db_per_m(g_dbi, f_hz)) == pytest.approx(handbook, abs=0.005)
    # A half-wave dipole (G = 2.15 dBi) at 100 MHz: 40 - 29.77 - 2.15 = 8.08 dB/m.
    assert float(units.antenna_factor_db_per_m(2.15, 100e6)) == pytest.approx(8.08, abs=0.005)
    # Linear form at 299.792458 MHz (lambda = 1 m exactly), isotropic gain: AF = 9.73 1/m.
    assert float(units.antenna_factor_per_m(1.0, units.C_M_PER_S)) == pytest.approx(9.73, abs=0.001)
    # Both directions: the gain comes back from the antenna factor.
    af = units.antenna_factor_db_per_m(np.array([0.0, 6.0, 12.0]), np.array([50e6, 900e6, 5e9]))
    assert units.gain_dbi_from_antenna_factor(af, np.array([50e6, 900e6, 5e9])) == pytest.approx([0.0, 6.0, 12.0])


def test_mw_per_cm2_and_w_per_m2():
    # 47 CFR 1.1310(e) Table 1 (B), general population: 0.2 mW/cm^2 at 30-300 MHz and 1.0 mW/cm^2
    # above 1500 MHz; 1 mW/cm^2 = 1e-3 W / 1e-4 m^2 = 10 W/m^2. The table's 27.5 V/m at 30-300 MHz
    # is the plane-wave equivalent of 0.2 mW/cm^2: 27.5^2 / 376.73 = 2.007 W/m^2 = 0.2007 mW/cm^2.
    assert float(units.mw_per_cm2_to_w_per_m2(0.2)) == pytest.approx(2.0)
    assert float(units.mw_per_cm2_to_w_per_m2(1.0)) == pytest.approx(10.0)
    assert float(units.w_per_m2_to_mw_per_cm2(units.e_to_s(27.5))) == pytest.approx(0.2, rel=0.005)


def test_constants_are_codata_2022_as_in_scipy():
    # Literal constants (no scipy import at start-up) against scipy.constants and against the CODATA 2022
    # recommended values as published by NIST (physics.nist.gov/constants): mu_0 = 1.256 637 061 27(20)e-6
    # N/A^2, epsilon_0 = 8.854 187 8188(14)e-12 F/m, Z0 = 376.730 313 412(59) ohm, c = 299 792 458 m/s exact.
    assert units.MU_0_N_PER_A2 == pytest.approx(constants.mu_0, rel=1e-9)
    assert units.EPSILON_0_F_PER_M == pytest.approx(constants.epsilon_0, rel=1e-9)
    assert units.C_M_PER_S == constants.c == 299792458.0
    assert units.MU_0_N_PER_A2 == 1.25663706127e-6 and units.EPSILON_0_F_PER_M == 8.8541878188e-12
    assert units.Z0_OHM == pytest.approx(376.730313412, abs=5.9e-8)
    assert units.Z0_OHM == pytest.approx(constants.physical_constants["characteristic impedance of vacuum"][0],
                                         rel=1e-9)
