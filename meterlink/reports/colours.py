"""The one colour scale for "percent of the reference level" (power terms) used by every map and
export: six bands, so that a colour means the same on a survey map, in KML and in a legend.

Bands (percent of the power-density reference level, i.e. exposure ratio x 100): below 1, 1-5,
5-20, 20-50, 50-100 and 100 or more. Colours run from blue through green and amber to red, with
a dark purple for at or above the level; chosen to stay apart in greyscale print as well.
"""

from __future__ import annotations

import math

#: Band edges in percent; the last band is open-ended.
PERCENT_EDGES = (0.0, 1.0, 5.0, 20.0, 50.0, 100.0)
PERCENT_COLOURS = ("#3b6fb6", "#4aa58a", "#b7b83a", "#e59a2f", "#cc3b2a", "#5b1248")
PERCENT_LABELS = ("< 1 %", "1-5 %", "5-20 %", "20-50 %", "50-100 %", ">= 100 %")
NO_VALUE_COLOUR = "#9a9a9a"


def percent_band(percent: float | None) -> int | None:
    """Index of the band a percent falls in, or None for a missing / non-finite value."""
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


def kml_colour(hex_rgb: str, alpha: int = 255) -> str:
    """KML's aabbggrr form of '#rrggbb'."""
    r, g, b = hex_rgb[1:3], hex_rgb[3:5], hex_rgb[5:7]
    return f"{alpha:02x}{b}{g}{r}"


def percent_cmap_norm():
    """(matplotlib colormap, norm) drawing the same bands; the top band reaches to 1000 % on a colour bar."""
    from matplotlib.colors import BoundaryNorm, ListedColormap

    cmap = ListedColormap(PERCENT_COLOURS, name="meterlink-percent")
    return cmap, BoundaryNorm(list(PERCENT_EDGES) + [1000.0], cmap.N)
