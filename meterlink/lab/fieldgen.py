"""Reference field from the set-up, by each generation method's published relation (pure).

TEM / GTEM cell: E = sqrt(P * Z) / d, P the net power into the cell, Z its line impedance and d
the septum-to-wall (or septum height) spacing at the test point (Crawford 1974, IEEE Trans. EMC
16(4), "Generation of standard EM fields using TEM transmission cells"; IEC 61000-4-20 uses the
same relation). Standard antenna, far field: E = sqrt(Z0 * P * G / (4 pi)) / d, G the numeric
gain, d the distance, from P * G / (4 pi d^2) = E^2 / Z0 with Z0 = sqrt(mu_0 / epsilon_0) of
scipy.constants (meterlink.physics.units.Z0_OHM), not the 120 pi shortcut (IEEE Std 1309 describes this
method). Transfer standard: the field is what the calibrated reference probe indicates.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from meterlink.errors import MeterlinkError
from meterlink.physics.units import Z0_OHM

METHODS = ("tem-cell", "gtem-cell", "standard-antenna", "transfer-probe", "entered")


def tem_cell_e_v_per_m(net_power_w: float, impedance_ohm: float, spacing_m: float) -> float:
    """E = sqrt(P Z) / d at the centre of a TEM (or GTEM) cell."""
    return math.sqrt(net_power_w * impedance_ohm) / spacing_m


def tem_cell_power_w(e_v_per_m: float, impedance_ohm: float, spacing_m: float) -> float:
    """Net power for a wanted field in a TEM cell: P = (E d)^2 / Z."""
    return (e_v_per_m * spacing_m) ** 2 / impedance_ohm


def antenna_e_v_per_m(net_power_w: float, gain_lin: float, distance_m: float) -> float:
    """Far field of a standard antenna on its boresight: E = sqrt(Z0 P G / (4 pi)) / d."""
    return math.sqrt(Z0_OHM * net_power_w * gain_lin / (4.0 * math.pi)) / distance_m


def antenna_power_w(e_v_per_m: float, gain_lin: float, distance_m: float) -> float:
    """Net power for a wanted far field: P = 4 pi (E d)^2 / (Z0 G)."""
    return 4.0 * math.pi * (e_v_per_m * distance_m) ** 2 / (Z0_OHM * gain_lin)


@dataclass(frozen=True)
class FieldMethod:
    """How the lab makes its reference field, with the set-up quantities its relation needs."""

    kind: str = "tem-cell"
    impedance_ohm: float = 50.0       # TEM / GTEM line impedance
    spacing_m: float = 0.15           # TEM septum-to-wall spacing, GTEM septum height at the test point
    gain_dbi: float = 0.0             # standard antenna gain
    distance_m: float = 1.0           # antenna to probe
    description: str = ""

    def __post_init__(self):
        if self.kind not in METHODS:
            raise MeterlinkError(f"field method {self.kind!r}: expected one of {', '.join(METHODS)}")
        for name in ("impedance_ohm", "spacing_m", "distance_m"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v > 0):
                raise MeterlinkError(f"field method {self.kind}: {name} must be > 0, got {v!r}")

    @property
    def uses_power(self) -> bool:
        """True when the reference field follows from a net power by a relation."""
        return self.kind in ("tem-cell", "gtem-cell", "standard-antenna")

    def e_from_power(self, net_power_w: float) -> float:
        """Reference field for a net power by the method's relation."""
        if not (math.isfinite(net_power_w) and net_power_w >= 0):
            raise MeterlinkError(f"net power {net_power_w!r} W: must be a finite number >= 0")
        if self.kind in ("tem-cell", "gtem-cell"):
            return tem_cell_e_v_per_m(net_power_w, self.impedance_ohm, self.spacing_m)
        if self.kind == "standard-antenna":
            return antenna_e_v_per_m(net_power_w, 10 ** (self.gain_dbi / 10), self.distance_m)
        raise MeterlinkError(f"field method {self.kind}: the reference field is entered or imported, not computed")

    def power_for(self, e_v_per_m: float) -> float:
        """Net power the generator must deliver for a wanted field (NaN when the method has no relation)."""
        if self.kind in ("tem-cell", "gtem-cell"):
            return tem_cell_power_w(e_v_per_m, self.impedance_ohm, self.spacing_m)
        if self.kind == "standard-antenna":
            return antenna_power_w(e_v_per_m, 10 ** (self.gain_dbi / 10), self.distance_m)
        return float("nan")

    def relation(self) -> str:
        """The relation in words, for reports."""
        if self.kind in ("tem-cell", "gtem-cell"):
            return f"E = sqrt(P * Z) / d, Z = {self.impedance_ohm:g} ohm, d = {self.spacing_m:g} m (Crawford 1974)"
        if self.kind == "standard-antenna":
            return (f"E = sqrt(Z0 * P * G / (4 pi)) / d, Z0 = {Z0_OHM:.3f} ohm, G = {self.gain_dbi:g} dBi, "
                    f"d = {self.distance_m:g} m (far field)")
        if self.kind == "transfer-probe":
            return "E as indicated by the calibrated transfer-standard probe"
        return "E entered by the operator"
