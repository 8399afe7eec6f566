"""The calibration's uncertainty budget in the GUM manner (JCGM 100:2008), per field method (pure).

Each input is a Component (meterlink.physics.uncertainty) with its distribution and divisor. The budget is
kept in dB, where the model is a sum: E = sqrt(P Z)/d (TEM cell) and E = sqrt(Z0 P G/(4 pi))/d
(antenna) give 20 log10 E = 10 log10 P + 10 log10 Z (or G) - 20 log10 d + const, so every input
stated in dB of its own quantity (power, gain, impedance, the power mismatch) has the sensitivity
coefficient c = 1 (JCGM 100:2008 5.1.3). A 1/2 would belong only to a relative power uncertainty
carried to a relative field uncertainty in percent, never to a dB input. Percent inputs of a
power-like quantity are turned into dB of that quantity, 10 log10(1 + p/100); lengths into field
dB, 20 log10(1 + dd/d). Mismatch: limits 20 log10(1 +/- |G_s||G_l|) dB on the power, U-shaped
(common practice, e.g. UKAS M3003). Combined in quadrature (5.1.2), U = k u_c, k = 2 (6.2.1).
The default values are example values of a well-kept lab; a real lab states its own in the session.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from meterlink.lab.session import LabSession
from meterlink.physics.uncertainty import Budget, Component, combine

DEFAULTS = {
    "power_meter_pct": 3.0,            # net power measurement, expanded, k = 2
    "gamma_source": 0.1,               # reflection coefficients for the mismatch term
    "gamma_load": 0.15,
    "impedance_pct": 2.0,              # TEM/GTEM line impedance, rectangular half-width
    "spacing_mm": 1.0,                 # septum spacing, rectangular half-width
    "field_uniformity_db": 0.5,        # over the probe's volume, rectangular half-width
    "antenna_gain_db": 0.5,            # standard antenna gain, expanded, k = 2
    "distance_mm": 10.0,               # antenna to probe, rectangular half-width
    "reflections_db": 0.4,             # room reflections (anechoic room), rectangular half-width
    "transfer_standard_db": 0.8,       # transfer probe's certificate, expanded, k = 2
    "positioning_db": 0.2,             # probe placement and alignment, rectangular half-width
    "probe_perturbation_db": 0.2,      # the probe disturbing the field, rectangular half-width
    "temperature_db": 0.05,            # ambient within the lab's band, rectangular half-width
}
#: Rows that form the reference field (the certificate's reference_field component).
FIELD_STANDARD = ("power measurement", "mismatch", "line impedance", "septum spacing", "antenna gain",
                  "antenna distance", "transfer standard", "entered reference field")


@dataclass(frozen=True)
class LabBudget:
    """The budget of a calibration factor: rows with a note each, and the combined result."""

    components: tuple[Component, ...]
    notes: tuple[str, ...]
    budget: Budget

    @property
    def u_expanded_db(self) -> float:
        return self.budget.u_expanded_db

    def part(self, names) -> Budget:
        """A budget of the named rows only (k = 2)."""
        return combine([c for c in self.components if c.name in names], k=self.budget.k)


def _pct_db_power(p: float) -> float:
    return 10 * math.log10(1 + p / 100)


def mismatch_limit_db(gamma_source: float, gamma_load: float) -> float:
    """Half-width of the power mismatch uncertainty: 20 log10(1 + |G_s||G_l|) dB."""
    return 20 * math.log10(1 + abs(gamma_source) * abs(gamma_load))


def calibration_budget(session: LabSession, type_a_db: float, k: float = 2.0) -> LabBudget:
    """Budget of a calibration factor for the session's field method, with the measured Type A part."""
    v = {**DEFAULTS, **session.budget}
    m = session.method
    rows: list[tuple[Component, str]] = []
    if m.uses_power:
        rows += [(Component("power measurement", _pct_db_power(v["power_meter_pct"]), "dB", "normal", 2.0),
                  f"net power, {v['power_meter_pct']:g} % (k = 2) = 10 log10(1 + p) dB of P; "
                  "20 log10 E = 10 log10 P + ...: c = 1"),
                 (Component("mismatch", mismatch_limit_db(v["gamma_source"], v["gamma_load"]), "dB", "u-shaped"),
                  f"|G_s| = {v['gamma_source']:g}, |G_l| = {v['gamma_load']:g}; dB of P: c = 1")]
    if m.kind in ("tem-cell", "gtem-cell"):
        rows += [(Component("line impedance", _pct_db_power(v["impedance_pct"]), "dB", "rectangular"),
                  f"Z +/- {v['impedance_pct']:g} % = 10 log10(1 + p) dB of Z; 20 log10 E = 10 log10 Z + ...: c = 1"),
                 (Component("septum spacing", 20 * math.log10(1 + v["spacing_mm"] / 1000 / m.spacing_m), "dB",
                            "rectangular"), f"d +/- {v['spacing_mm']:g} mm of {m.spacing_m * 1000:g} mm; E ~ 1/d"),
                 (Component("field uniformity", v["field_uniformity_db"], "dB", "rectangular"), "over the probe volume")]
    elif m.kind == "standard-antenna":
        rows += [(Component("antenna gain", v["antenna_gain_db"], "dB", "normal", 2.0),
                  "gain in dB (k = 2); 20 log10 E = 10 log10 G + ...: c = 1"),
                 (Component("antenna distance", 20 * math.log10(1 + v["distance_mm"] / 1000 / m.distance_m), "dB",
                            "rectangular"), f"d +/- {v['distance_mm']:g} mm; E ~ 1/d"),
                 (Component("room reflections", v["reflections_db"], "dB", "rectangular"), "anechoic room")]
    elif m.kind == "entered":
        rows += [(Component("entered reference field", v.get("entered_field_db", 0.7), "dB", "normal", 2.0),
                  "stated by the operator (k = 2)")]
    elif m.kind == "transfer-probe":
        rows += [(Component("transfer standard", v["transfer_standard_db"], "dB", "normal", 2.0),
                  "reference probe certificate (k = 2)"),
                 (Component("field uniformity", v["field_uniformity_db"], "dB", "rectangular"),
                  "between the two probe positions")]
    rows += [(Component("positioning", v["positioning_db"], "dB", "rectangular"), "placement and alignment"),
             (Component("probe perturbation", v["probe_perturbation_db"], "dB", "rectangular"), "probe in the field"),
             (Component("ambient temperature", v["temperature_db"], "dB", "rectangular"),
              f"lab at {session.ambient.temp_c:g} degC"),
             (Component("repeatability", float(type_a_db), "dB", "normal", 1.0),
              "Type A: largest s(mean) over the steps (JCGM 100:2008 4.2.3)")]
    comps = tuple(c for c, _ in rows)
    return LabBudget(comps, tuple(n for _, n in rows), combine(comps, k=k))
