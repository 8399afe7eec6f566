"""GUM-style uncertainty budgets (JCGM 100:2008): components, quadrature sum, expanded U (pure).

Components are combined in the log (dB) domain, the common practice for RF field and EMC
measurements (small uncertainties, multiplicative errors). A component of +/-p % is first turned
into dB on its larger side: a factor (1 - p/100) lies further from 0 dB than (1 + p/100), so
|20*log10(1 - p/100)| for a field quantity and |10*log10(1 - p/100)| for a power quantity (the
upper side alone, 20*log10(1 + p/100), would understate the component: 0.83 dB instead of
0.92 dB for +/-10 % of a field). p must be below 100 %. The expanded uncertainty U (dB) is
reported back in percent of the field, +100*(10**(U/20) - 1) / -100*(1 - 10**(-U/20)), and of
the power density alike with U/10.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from meterlink.physics.response import band_correction_spread_db

#: Divisors that turn a half-width (or an expanded value) into a standard uncertainty.
#: JCGM 100:2008 4.3.7 (rectangular, a/sqrt(3)), 4.3.9 (triangular, a/sqrt(6)); U-shaped
#: (arcsine) a/sqrt(2) as used for mismatch, e.g. JCGM 101:2008 6.4.6 / UKAS M3003.
DIVISORS = {
    "rectangular": math.sqrt(3.0),
    "triangular": math.sqrt(6.0),
    "u-shaped": math.sqrt(2.0),
}
DISTRIBUTIONS = ("normal", *DIVISORS)
UNITS = ("dB", "%")
#: Default coverage factor, about 95 % for a normal distribution (JCGM 100:2008 6.2, 6.3.3).
K_DEFAULT = 2.0
#: Half-range of site temperature assumed when the operator gives none (documented choice).
TEMP_UNKNOWN_HALFRANGE_C = 10.0


@dataclass(frozen=True)
class Component:
    """One input: value is a half-width (rectangular/triangular/U) or an expanded value with k (normal)."""

    name: str
    value: float
    unit: str = "dB"
    distribution: str = "normal"
    k: float = 1.0
    sensitivity: float = 1.0

    def __post_init__(self):
        if self.unit not in UNITS:
            raise ValueError(f"uncertainty {self.name!r}: unit must be one of {UNITS}, not {self.unit!r}")
        if self.distribution not in DISTRIBUTIONS:
            raise ValueError(f"uncertainty {self.name!r}: unknown distribution {self.distribution!r}")
        if not (math.isfinite(self.value) and self.value >= 0):
            raise ValueError(f"uncertainty {self.name!r}: value must be finite and >= 0")
        if not (math.isfinite(self.k) and self.k > 0):
            raise ValueError(f"uncertainty {self.name!r}: k must be > 0")
        if self.unit == "%" and self.value >= 100.0:
            raise ValueError(f"uncertainty {self.name!r}: {self.value:g} % has no lower side in dB "
                             "(a percent component must be below 100 %)")

    @property
    def divisor(self) -> float:
        """k for a normal component, the distribution's divisor otherwise."""
        return self.k if self.distribution == "normal" else DIVISORS[self.distribution]

    def value_db(self, domain: str = "field") -> float:
        """The value in dB; +/-p % converts on its larger side, |log10(1 - p/100)| (field 20, power 10)."""
        if self.unit == "dB":
            return self.value
        p = self.value / 100.0
        side = max(math.log10(1.0 + p), -math.log10(1.0 - p))     # = -log10(1 - p) for 0 <= p < 1
        return (20.0 if domain == "field" else 10.0) * side

    def standard_db(self, domain: str = "field") -> float:
        """Standard uncertainty contribution |c| * u(x) in dB."""
        return abs(self.sensitivity) * self.value_db(domain) / self.divisor


@dataclass(frozen=True)
class BudgetRow:
    """A printable line of a budget."""

    name: str
    value: float
    unit: str
    distribution: str
    divisor: float
    sensitivity: float
    u_db: float


@dataclass(frozen=True)
class Budget:
    """A combined budget: rows, combined standard u_c, coverage factor k and expanded U."""

    rows: tuple[BudgetRow, ...]
    u_c_db: float
    k: float
    domain: str

    @property
    def u_expanded_db(self) -> float:
        """Expanded uncertainty U = k * u_c, dB."""
        return self.k * self.u_c_db

    @property
    def u_expanded_pct_field(self) -> float:
        """U as a percentage of the field strength (upper side)."""
        return 100.0 * (10.0 ** (self.u_expanded_db / 20.0) - 1.0)

    @property
    def u_expanded_pct_power(self) -> float:
        """U as a percentage of the power density (upper side)."""
        return 100.0 * (10.0 ** (self.u_expanded_db / 10.0) - 1.0)

    @property
    def u_expanded_pct_field_lower(self) -> float:
        """U as a percentage of the field strength (lower side, smaller than the upper side)."""
        return 100.0 * (1.0 - 10.0 ** (-self.u_expanded_db / 20.0))

    @property
    def u_expanded_pct_power_lower(self) -> float:
        """U as a percentage of the power density (lower side)."""
        return 100.0 * (1.0 - 10.0 ** (-self.u_expanded_db / 10.0))


def combine(components, k: float = K_DEFAULT, domain: str = "field") -> Budget:
    """Root-sum-square of uncorrelated contributions (JCGM 100:2008 5.1.2), U = k*u_c (6.2)."""
    if domain not in ("field", "power"):
        raise ValueError(f"domain must be 'field' or 'power', not {domain!r}")
    rows = tuple(
        BudgetRow(c.name, c.value, c.unit, c.distribution, c.divisor, c.sensitivity, c.standard_db(domain))
        for c in components
    )
    u_c = math.sqrt(sum(r.u_db**2 for r in rows))
    return Budget(rows, u_c, float(k), domain)


def _interp_halfwidth_db(freq_table_hz, values_db, freq_hz: float) -> float:
    """Half the step between the two table points around f: zero at a table point (common practice)."""
    f = np.asarray(freq_table_hz, dtype=float)
    v = np.asarray(values_db, dtype=float)
    if len(f) < 2 or freq_hz <= f[0] or freq_hz >= f[-1] or np.any(np.isclose(freq_hz, f, rtol=1e-12)):
        return 0.0
    i = int(np.searchsorted(f, freq_hz))
    return abs(float(v[i] - v[i - 1])) / 2.0


def measurement_budget(cert, freq_hz=None, level=None, temp_c=None, k: float = K_DEFAULT,
                       extra=()) -> Budget:
    """Per-reading budget: the certificate's components plus interpolation, isotropy, temperature.

    freq_hz may be a number, a (lo, hi) band or None (unknown: the band spread is added as a
    rectangular term, see response.py). level is accepted for symmetry with readings; the
    certificate format states linearity as level-independent within the calibrated range.
    """
    comps = list(cert.uncertainties)
    band = None
    if freq_hz is None:
        band = cert.freq_range_hz
    elif np.ndim(freq_hz) == 1 and len(freq_hz) == 2:
        band = (float(freq_hz[0]), float(freq_hz[1]))
    if cert.kind == "isotropic-probe":
        comps.append(Component("isotropy", cert.isotropy_db, "dB", "rectangular"))
        if band is None:
            hw = max(_interp_halfwidth_db(ax.freq_hz, ax.correction_db, float(freq_hz)) for ax in cert.axes)
            comps.append(Component("frequency interpolation", hw, "dB", "rectangular"))
        else:
            comps.append(Component("frequency unknown in band", band_correction_spread_db(cert, band),
                                   "dB", "rectangular"))
        coeff, coeff_hw = abs(cert.temp_coeff_db_per_c), cert.temp_coeff_halfwidth_db_per_c
        if temp_c is None:
            t_hw = (coeff + coeff_hw) * TEMP_UNKNOWN_HALFRANGE_C
        else:
            t_hw = coeff_hw * abs(float(temp_c) - cert.temp_ref_c)
        comps.append(Component("temperature", t_hw, "dB", "rectangular"))
    else:
        if band is None:
            # AF = 9.73/(lambda sqrt(G)) for 50 ohm: in dB, 20 log10 f less the realised gain. The table is
            # interpolated linearly in log f (calibrate.af_db_per_m), which follows the 20 log10 f part
            # exactly, so what interpolation can miss is the change of gain between the table points: half
            # of that step is the half-width (not half the AF step, which is mostly the known 20 log f rise).
            f_tab = np.asarray(cert.af_freq_hz, dtype=float)
            gain_part_db = np.asarray(cert.af_db_per_m, dtype=float) - 20.0 * np.log10(f_tab)
            hw = _interp_halfwidth_db(f_tab, gain_part_db, float(freq_hz))
            comps.append(Component("antenna factor interpolation", hw, "dB", "rectangular"))
        else:
            af = np.asarray(cert.af_db_per_m)
            comps.append(Component("frequency unknown in band", float(af.max() - af.min()), "dB", "rectangular"))
    comps.extend(extra)
    return combine(comps, k=k, domain="field")
