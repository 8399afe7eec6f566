"""One colour scale for "percent of the reference level", used by every live readout and verdict panel.

The bands are set on the power-density ratio S/S_L (the exposure ratio of the standards); a field
ratio E/E_L maps onto the same bands through its square, so the field and power displays of one
value always share a colour. Colour is never the only cue: the number is printed beside it.
"""

from __future__ import annotations

import math

#: (upper bound of S/S_L, rich style, name): below 5 % of the power-density level (about 22 % of the
#: field level), below 25 % (50 % of the field level), below the level, at or above it.
BANDS = ((0.05, "green", "low"), (0.25, "yellow", "moderate"), (1.0, "dark_orange", "near the level"),
         (math.inf, "red", "at or above the level"))


def band(ratio_power: float) -> tuple[str, str]:
    """(style, name) of a power-density ratio S/S_L; a value that is not finite counts as above the level."""
    if not math.isfinite(ratio_power):
        return BANDS[-1][1], BANDS[-1][2]
    for upper, style, name in BANDS:
        if ratio_power < upper:
            return style, name
    return BANDS[-1][1], BANDS[-1][2]


def style_power(ratio_power: float) -> str:
    """Rich style of a power-density ratio S/S_L."""
    return band(ratio_power)[0]


def style_field(ratio_field: float) -> str:
    """Rich style of a field ratio E/E_L: the style of its power-density equivalent (E/E_L)^2."""
    return style_power(ratio_field * ratio_field if math.isfinite(ratio_field) else math.inf)
