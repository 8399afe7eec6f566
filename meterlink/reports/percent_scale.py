"""The one colour scale for "percent of the reference level": live readouts, verdict panels, survey
maps, predicted-exposure maps, KML styles and legends all colour a value by the same six bands.

The bands are set on the power-density ratio S/S_L (the exposure ratio of the standards), in percent:
below 1, 1-5, 5-20, 20-50, 50-100 and 100 or more. A field ratio E/E_L maps onto the same bands through
its square (far field: S = E^2/Z0), so the field and power displays of one value always share a colour.
Colours run from blue through green and amber to red, with a dark purple at or above the level, and stay
apart in greyscale print; colour is never the only cue: the number is printed beside it.
"""

from __future__ import annotations

import math

#: Band edges in percent of the power-density reference level; the last band is open-ended.
PERCENT_EDGES = (0.0, 1.0, 5.0, 20.0, 50.0, 100.0)
PERCENT_COLOURS = ("#3b6fb6", "#4aa58a", "#b7b83a", "#e59a2f", "#cc3b2a", "#5b1248")
PERCENT_LABELS = ("< 1 %", "1-5 %", "5-20 %", "20-50 %", "50-100 %", ">= 100 %")
PERCENT_NAMES = ("very low", "low", "moderate", "elevated", "near the level", "at or above the level")
NO_VALUE_COLOUR = "#9a9a9a"


def percent_band(percent: float | None) -> int | None:
    """Index of the band a percent (power terms) falls in, or None for a missing / non-finite value."""
    if percent is None or not math.isfinite(percent):
        return None
    i = 0
    for k, edge in enumerate(PERCENT_EDGES):
        if percent >= edge:
            i = k
    return i


def percent_colour(percent: float | None) -> str:
    """'#rrggbb' of the band of percent (grey without a value)."""
    b = percent_band(percent)
    return NO_VALUE_COLOUR if b is None else PERCENT_COLOURS[b]


def band(ratio_power: float) -> tuple[str, str]:
    """(terminal style, name) of a power-density ratio S/S_L; a value that is not finite counts as above
    the level (a display must never look safe for a value it could not compute)."""
    b = percent_band(100.0 * ratio_power) if math.isfinite(ratio_power) else len(PERCENT_EDGES) - 1
    return PERCENT_COLOURS[b], PERCENT_NAMES[b]


def style_power(ratio_power: float) -> str:
    """Terminal (rich) style of a power-density ratio S/S_L: the band's colour."""
    return band(ratio_power)[0]


def style_field(ratio_field: float) -> str:
    """Terminal style of a field ratio E/E_L: the style of its power-density equivalent (E/E_L)^2."""
    return style_power(ratio_field * ratio_field if math.isfinite(ratio_field) else math.inf)


def kml_colour(hex_rgb: str, alpha: int = 255) -> str:
    """KML's aabbggrr form of '#rrggbb'."""
    r, g, b = hex_rgb[1:3], hex_rgb[3:5], hex_rgb[5:7]
    return f"{alpha:02x}{b}{g}{r}"


def percent_cmap_norm():
    """(matplotlib colormap, norm) drawing the same bands; the top band reaches to 1000 % on a colour bar."""
    from matplotlib.colors import BoundaryNorm, ListedColormap

    cmap = ListedColormap(PERCENT_COLOURS, name="meterlink-percent")
    return cmap, BoundaryNorm(list(PERCENT_EDGES) + [1000.0], cmap.N)
