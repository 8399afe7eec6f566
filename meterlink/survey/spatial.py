"""Spatial-averaging schemes and the power-domain spatial average (pure).

Templates, from memory of common practice: three heights 1.1, 1.5 and 1.7 m above ground as in
ECC Recommendation (02)04 (and EN 50492); a vertical line of equally spaced points from 0.2 to
1.8 m as described for spatial averaging in IEC 62232. The average is taken in the power domain,
E_sa = sqrt(mean(E_i^2)), never as the mean of the field values.
"""

from __future__ import annotations

import math

import numpy as np

from meterlink.errors import MeterlinkError
from meterlink.survey.model import Scheme

THREE_HEIGHTS_M = (1.1, 1.5, 1.7)
LINE_LO_M, LINE_HI_M = 0.2, 1.8
SCHEMES = ("three-heights", "vertical-line", "custom")


def three_heights() -> Scheme:
    return Scheme("three-heights", THREE_HEIGHTS_M)


def vertical_line(n: int, lo_m: float = LINE_LO_M, hi_m: float = LINE_HI_M) -> Scheme:
    """n equally spaced heights from lo_m to hi_m inclusive (n >= 2)."""
    if int(n) != n or n < 2:
        raise MeterlinkError(f"vertical line needs a whole number of points >= 2, got {n!r}")
    return Scheme(f"vertical-line-{int(n)}", tuple(round(float(h), 6) for h in np.linspace(lo_m, hi_m, int(n))))


def custom(heights_m) -> Scheme:
    hs = tuple(float(h) for h in heights_m)
    if not hs or not all(math.isfinite(h) and 0 <= h <= 10 for h in hs):
        raise MeterlinkError(f"custom scheme needs heights between 0 and 10 m, got {list(heights_m)!r}")
    return Scheme("custom", hs)


def scheme_from(name: str, n: int | None = None, heights_m=None) -> Scheme:
    """A scheme by template name; MeterlinkError naming the known templates if unknown."""
    if name == "three-heights":
        return three_heights()
    if name == "vertical-line":
        return vertical_line(5 if n is None else n)
    if name == "custom":
        return custom(heights_m or ())
    raise MeterlinkError(f"unknown spatial scheme {name!r} (known: {', '.join(SCHEMES)})")


def spatial_average(e_v_per_m) -> float:
    """Power-domain spatial average of field values: sqrt(mean(E_i^2))."""
    e = np.asarray(e_v_per_m, dtype=float)
    if e.size == 0 or not np.all(np.isfinite(e)) or np.any(e < 0):
        raise MeterlinkError("spatial average needs one or more finite field values >= 0")
    return float(np.sqrt(np.mean(e**2)))


def spatial_average_ratio(ratios_power) -> float:
    """Spatial average of power-domain exposure ratios: their arithmetic mean."""
    r = np.asarray(ratios_power, dtype=float)
    if r.size == 0 or not np.all(np.isfinite(r)) or np.any(r < 0):
        raise MeterlinkError("spatial average needs one or more finite ratios >= 0")
    return float(np.mean(r))
