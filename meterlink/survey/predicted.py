"""Measured against predicted: each survey point's measured field beside the field predicted from
the declared sources (meterlink.physics.prediction), flagged where they differ by more than the
combined uncertainty.

The comparison is in field terms, in dB: 20 log10(E_measured / E_predicted), with E_predicted =
sqrt(Z0 * sum of the sources' S) at the point (spatial averages: power mean over the heights, as
measured). The combined expanded uncertainty is sqrt(U_measured^2 + U_predicted^2) (both k = 2, dB,
independent: root-sum-square as in the GUM), with U_predicted declared in the plan.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from meterlink.device.gnss import to_local_m

REASONS_HIGH = ("an emitter not in the sources file (unknown source)",
                "a declared power or gain lower than what is radiated")
REASONS_LOW = ("a declared power higher than radiated at the time (traffic, power reduction, a transmitter off)",
               "an obstruction, or a real antenna pattern narrower than declared")
REASON_NEAR = "a near-field point: the far-field formula does not hold this close to a source"


@dataclass(frozen=True)
class Comparison:
    """One point: measured and predicted E, their difference and whether it exceeds the uncertainty."""

    point_no: int
    label: str
    e_measured_v_per_m: float
    e_predicted_v_per_m: float
    diff_db: float
    u_measured_db: float
    u_predicted_db: float
    u_combined_db: float
    flagged: bool
    near_field: bool
    reasons: tuple[str, ...]
    where: str                # "GNSS" or "plan": which position the prediction used


def _sample_xyz(s: dict, p: dict, frame):
    if s.get("lat_deg") is not None and frame.lat0 is not None:
        x, y = to_local_m(s["lat_deg"], s["lon_deg"], frame.lat0, frame.lon0)
        return float(x), float(y), float(s["height_m"]), "GNSS"
    x, y = (s.get("x_m"), s.get("y_m")) if s.get("x_m") is not None else (p["x_m"], p["y_m"])
    if x is None or y is None:
        return None
    return float(x), float(y), float(s["height_m"]), "plan"


def compare(sv: dict, frame) -> list[Comparison]:
    """Comparisons for every point that has a position and a measured value (declared sources needed)."""
    from meterlink.physics.prediction import OET65_GROUND_FACTOR, far_field_distance_m, predict_points
    from meterlink.physics.units import Z0_OHM

    decl = frame.declared
    if not decl or not frame.sources:
        return []
    gf = decl.get("ground_factor") or OET65_GROUND_FACTOR
    u_pred = float(decl.get("prediction_u_db") or 3.0)
    out = []
    for p in sv["points"]:
        e_meas = p["e_v_per_m"]
        if e_meas is None or not math.isfinite(e_meas) or e_meas <= 0:
            continue
        s2, near, where = [], bool(p["near_field"]), set()
        for s in p["samples"]:
            xyz = _sample_xyz(s, p, frame)
            if xyz is None:
                continue
            x, y, z, w = xyz
            where.add(w)
            s_tot = 0.0
            for src in frame.sources:
                pr = predict_points(src, x, y, z, ground_factor=gf)
                s_tot += float(pr.s_w_per_m2)
                near |= bool(pr.near) or float(pr.distance_m) < far_field_distance_m(src)
            s2.append(Z0_OHM * s_tot)          # E^2
        if not s2:
            continue
        e_pred = math.sqrt(sum(s2) / len(s2))
        diff = 20 * math.log10(e_meas / e_pred)
        u_m = float(p["u_expanded_db"] or 0.0)
        u_c = math.hypot(u_m, u_pred)
        flagged = abs(diff) > u_c
        reasons = ()
        if flagged:
            reasons = (REASONS_HIGH if diff > 0 else REASONS_LOW) + ((REASON_NEAR,) if near else ())
        out.append(Comparison(p["point_no"], p["label"], e_meas, e_pred, diff, u_m, u_pred, u_c, flagged, near,
                              reasons, "GNSS" if where == {"GNSS"} else ("plan" if where == {"plan"} else "mixed")))
    return out
