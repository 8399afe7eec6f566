"""Unit conversions for RF field work: small pure functions, SI inside, names say the units.

Free-space impedance is sqrt(mu_0/epsilon_0) from the measured CODATA 2022 values (mu_0 is no longer
exact since the 2019 SI revision), never the legacy 120*pi shortcut. The constants are literals so that
importing this module costs no scipy (about 0.1 s); tests/test_units.py checks them against
scipy.constants. numpy is imported on the first call that needs it, so a command that only parses a
frequency does not pay for it.
"""

from __future__ import annotations

import math
import re


class _Numpy:
    """Stands in for the numpy module until first use, then puts the real one in its place."""

    def __getattr__(self, name):
        import numpy
        globals()["np"] = numpy
        return getattr(numpy, name)


np = _Numpy()

#: Vacuum magnetic permeability, N/A^2: CODATA 2022 (NIST, physics.nist.gov/constants, "mu_0"),
#: 1.256 637 061 27(20) e-6; CODATA 2018 gave 1.256 637 062 12(19) e-6.
MU_0_N_PER_A2: float = 1.25663706127e-6
#: Vacuum electric permittivity, F/m: CODATA 2022, 8.854 187 8188(14) e-12 (CODATA 2018: 8.854 187 8128(13) e-12).
EPSILON_0_F_PER_M: float = 8.8541878188e-12
#: Impedance of free space, sqrt(mu_0/epsilon_0), about 376.730 ohm (CODATA 2022: 376.730 313 412(59) ohm).
Z0_OHM: float = math.sqrt(MU_0_N_PER_A2 / EPSILON_0_F_PER_M)
#: Speed of light in vacuum (exact, SI definition of the metre), m/s.
C_M_PER_S: float = 299792458.0
#: Reference impedance of RF receivers and cables, ohm.
R_50_OHM: float = 50.0


def e_to_h(e_v_per_m):
    """Plane-wave magnetic field H = E / Z0 (A/m) from E (V/m)."""
    return np.divide(e_v_per_m, Z0_OHM)


def h_to_e(h_a_per_m):
    """Plane-wave electric field E = Z0 * H (V/m) from H (A/m)."""
    return np.multiply(h_a_per_m, Z0_OHM)


def e_to_s(e_v_per_m):
    """Plane-wave-equivalent power density S = E^2 / Z0 (W/m^2) from E (V/m)."""
    return np.square(e_v_per_m) / Z0_OHM


def s_to_e(s_w_per_m2):
    """Plane-wave-equivalent field E = sqrt(S * Z0) (V/m) from power density (W/m^2)."""
    return np.sqrt(np.multiply(s_w_per_m2, Z0_OHM))


def h_to_s(h_a_per_m):
    """Plane-wave-equivalent power density S = Z0 * H^2 (W/m^2) from H (A/m)."""
    return Z0_OHM * np.square(h_a_per_m)


def s_to_h(s_w_per_m2):
    """Plane-wave-equivalent H = sqrt(S / Z0) (A/m) from power density (W/m^2)."""
    return np.sqrt(np.divide(s_w_per_m2, Z0_OHM))


def v_per_m_to_dbuv_per_m(e_v_per_m):
    """Field strength in dB(uV/m): 20*log10(E / 1 uV/m); 1 V/m is 120 dBuV/m."""
    return 20.0 * np.log10(np.asarray(e_v_per_m, dtype=float) * 1e6)


def dbuv_per_m_to_v_per_m(e_dbuv_per_m):
    """Field strength in V/m from dB(uV/m)."""
    return 10.0 ** ((np.asarray(e_dbuv_per_m, dtype=float) - 120.0) / 20.0)


def dbm_to_dbuv(p_dbm, r_ohm: float = R_50_OHM):
    """Voltage level dB(uV) across r_ohm for a power in dBm (about dBm + 107 in 50 ohm)."""
    return np.asarray(p_dbm, dtype=float) + 90.0 + 10.0 * math.log10(r_ohm)


def dbuv_to_dbm(v_dbuv, r_ohm: float = R_50_OHM):
    """Power in dBm for a voltage level in dB(uV) across r_ohm."""
    return np.asarray(v_dbuv, dtype=float) - 90.0 - 10.0 * math.log10(r_ohm)


def db_to_ratio_power(x_db):
    """Power ratio from decibels: 10^(x/10)."""
    return 10.0 ** (np.asarray(x_db, dtype=float) / 10.0)


def db_to_ratio_field(x_db):
    """Field (amplitude) ratio from decibels: 10^(x/20)."""
    return 10.0 ** (np.asarray(x_db, dtype=float) / 20.0)


def ratio_field_to_db(ratio):
    """Decibels from a field (amplitude) ratio: 20*log10(r)."""
    return 20.0 * np.log10(np.asarray(ratio, dtype=float))


def ratio_power_to_db(ratio):
    """Decibels from a power ratio: 10*log10(r)."""
    return 10.0 * np.log10(np.asarray(ratio, dtype=float))


def wavelength_m(freq_hz):
    """Free-space wavelength c/f in metres."""
    return C_M_PER_S / np.asarray(freq_hz, dtype=float)


_FREQ_RE = re.compile(r"^\s*([+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?)\s*([kKmMgGtT]?)(?:[hH][zZ])?\s*$")
_FREQ_SCALE = {"": 1.0, "k": 1e3, "m": 1e6, "g": 1e9, "t": 1e12}


#: Frequencies meterlink accepts: the span of the exposure standards it carries (ICNIRP 1998 and
#: 2020 and IEEE C95.1-2019 end at 300 GHz; the ICNIRP 1998 summation terms start at 1 Hz).
FREQ_MIN_HZ: float = 1.0
FREQ_MAX_HZ: float = 300e9


def check_frequency_hz(freq_hz: float, what: str = "frequency") -> float:
    """freq_hz as a float if it lies in FREQ_MIN_HZ..FREQ_MAX_HZ; ValueError naming the value if not."""
    f = float(freq_hz)
    if not (math.isfinite(f) and FREQ_MIN_HZ <= f <= FREQ_MAX_HZ):
        raise ValueError(f"{what} {f:g} Hz is outside {format_frequency(FREQ_MIN_HZ)}-"
                         f"{format_frequency(FREQ_MAX_HZ)}, the range the exposure standards cover")
    return f


def parse_frequency_hz(text: str) -> float:
    """Parse '900MHz', '2.45 GHz', '100e6', '27k' into hertz; ValueError with the text if not.

    A bare number is hertz. Unit letters are case-insensitive ('m' means mega, since milli-
    hertz has no place in RF exposure work). The value must lie in 1 Hz-300 GHz.
    """
    m = _FREQ_RE.match(str(text))
    if not m:
        raise ValueError(f"not a frequency: {text!r} (try 900MHz, 2.45GHz or 100e6)")
    value = float(m.group(1)) * _FREQ_SCALE[m.group(2).lower()]
    if not math.isfinite(value) or value <= 0:
        raise ValueError(f"not a positive frequency: {text!r}")
    return check_frequency_hz(value, f"frequency {str(text).strip()!r} =")


def parse_band_hz(text: str) -> tuple[float, float]:
    """Parse 'LO:HI' ('790MHz:960MHz') into (lo_hz, hi_hz), both in range and lo < hi; ValueError if not."""
    lo, sep, hi = str(text).partition(":")
    if not sep:
        raise ValueError(f"not a band: {text!r} (expected LO:HI, e.g. 790MHz:960MHz)")
    band = parse_frequency_hz(lo.strip()), parse_frequency_hz(hi.strip())
    if band[0] >= band[1]:
        raise ValueError(f"the low edge {format_frequency(band[0])} must be below the high edge {format_frequency(band[1])}")
    return band


def antenna_factor_per_m(gain_ratio, freq_hz, r_ohm: float = R_50_OHM):
    """Antenna factor AF = E / V (1/m) of an antenna of gain G (ratio) into r_ohm, far field, matched.

    Derivation: an antenna of gain G has effective area A_e = G*lambda^2/(4*pi); in a plane wave of
    power density S = E^2/Z0 it delivers P = S*A_e = V^2/R to a matched load R. So
    V^2 = E^2 * R * G * lambda^2 / (4*pi*Z0) and AF = E/V = (1/lambda)*sqrt(4*pi*Z0/(R*G)), which is
    9.73/(lambda*sqrt(G)) for R = 50 ohm.
    """
    g = np.asarray(gain_ratio, dtype=float)
    return np.sqrt(4.0 * math.pi * Z0_OHM / (r_ohm * g)) / wavelength_m(freq_hz)


def antenna_factor_db_per_m(gain_dbi, freq_hz, r_ohm: float = R_50_OHM):
    """Antenna factor in dB(1/m) from gain in dBi: 20*log10(AF); about 20*log10(f_MHz) - 29.77 - G_dBi."""
    return ratio_field_to_db(antenna_factor_per_m(db_to_ratio_power(gain_dbi), freq_hz, r_ohm))


def gain_dbi_from_antenna_factor(af_db_per_m, freq_hz, r_ohm: float = R_50_OHM):
    """Gain (dBi) of an antenna from its antenna factor (dB/m): the inverse of antenna_factor_db_per_m."""
    af = db_to_ratio_field(af_db_per_m)
    g = 4.0 * math.pi * Z0_OHM / (r_ohm * (af * wavelength_m(freq_hz)) ** 2)
    return ratio_power_to_db(g)


#: 1 mW/cm^2 = 1e-3 W / 1e-4 m^2 = 10 W/m^2.
W_PER_M2_PER_MW_PER_CM2: float = 10.0


def mw_per_cm2_to_w_per_m2(s_mw_per_cm2):
    """Power density in W/m^2 from mW/cm^2 (the unit of 47 CFR 1.1310): x 10."""
    return np.multiply(s_mw_per_cm2, W_PER_M2_PER_MW_PER_CM2)


def w_per_m2_to_mw_per_cm2(s_w_per_m2):
    """Power density in mW/cm^2 from W/m^2: / 10."""
    return np.divide(s_w_per_m2, W_PER_M2_PER_MW_PER_CM2)


def format_frequency(freq_hz: float) -> str:
    """Human form of a frequency: '900 MHz', '2.45 GHz', '100 kHz'."""
    for scale, unit in ((1e12, "THz"), (1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if abs(freq_hz) >= scale:
            return f"{freq_hz / scale:.6g} {unit}"
    return f"{freq_hz:.6g} Hz"
