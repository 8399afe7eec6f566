"""Unit conversions for RF field work: small pure functions, SI inside, names say the units.

Free-space impedance comes from scipy.constants (mu_0 and epsilon_0 as measured since the
2019 SI revision), never from the legacy 120*pi shortcut.
"""

from __future__ import annotations

import math
import re

import numpy as np
from scipy import constants as _c

#: Impedance of free space, sqrt(mu_0/epsilon_0), about 376.730 ohm.
Z0_OHM: float = math.sqrt(_c.mu_0 / _c.epsilon_0)
#: Speed of light in vacuum (exact), m/s.
C_M_PER_S: float = _c.c
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


def parse_frequency_hz(text: str) -> float:
    """Parse '900MHz', '2.45 GHz', '100e6', '27k' into hertz; ValueError with the text if not.

    A bare number is hertz. Unit letters are case-insensitive ('m' means mega, since milli-
    hertz has no place in RF exposure work).
    """
    m = _FREQ_RE.match(str(text))
    if not m:
        raise ValueError(f"not a frequency: {text!r} (try 900MHz, 2.45GHz or 100e6)")
    value = float(m.group(1)) * _FREQ_SCALE[m.group(2).lower()]
    if not math.isfinite(value) or value <= 0:
        raise ValueError(f"not a positive frequency: {text!r}")
    return value


def format_frequency(freq_hz: float) -> str:
    """Human form of a frequency: '900 MHz', '2.45 GHz', '100 kHz'."""
    for scale, unit in ((1e12, "THz"), (1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if abs(freq_hz) >= scale:
            return f"{freq_hz / scale:.6g} {unit}"
    return f"{freq_hz:.6g} Hz"
