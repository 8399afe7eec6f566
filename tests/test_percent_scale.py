"""One colour scale for percent of the reference level: the live survey readout and the assess panel
colour the same exposure alike, and a field ratio takes the colour of its power-density equivalent."""

from __future__ import annotations

import numpy as np
from rich.console import Console

from meterlink.physics.assessment import assess_field
from meterlink.reports.percent_scale import PERCENT_COLOURS, percent_colour, style_field, style_power
from meterlink.reports.render import assessment_renderable
from meterlink.storage.processing import FieldSeries
from meterlink.survey.readout import band_style, gauge


def _bar_styles(renderable) -> list[str]:
    """Styles of the gauge blocks (the filled part of a bar) in a rendered renderable."""
    con = Console(width=140, record=True, color_system="truecolor")
    out = []
    for seg in con.render(renderable):
        if seg.text and ({"█", "▮"} & set(seg.text)) and seg.style is not None and seg.style.color is not None:
            out.append(seg.style.color.name)
    return out


def test_field_ratio_takes_the_colour_of_its_power_density_equivalent():
    # far field: S = E^2 / Z0, so S/S_L = (E/E_L)^2 (ICNIRP 2020 Table 5 footnotes: S_eq from E and H)
    for rf in (0.1, 0.2236, 0.2237, 0.49, 0.51, 0.99, 1.0, 1.5, float("inf")):
        assert style_field(rf) == style_power(rf * rf)
    # and the bands are ordered: a higher exposure never gets an earlier colour
    order = list(PERCENT_COLOURS)
    ratios = np.linspace(0, 1.5, 301)
    idx = [order.index(style_power(r)) for r in ratios]
    assert idx == sorted(idx) and idx[0] == 0 and idx[-1] == len(order) - 1
    assert style_power(1.0) == PERCENT_COLOURS[-1] and style_power(0.999) != PERCENT_COLOURS[-1]
    assert style_power(float("nan")) == PERCENT_COLOURS[-1]   # a value that could not be computed never looks safe


def test_live_readout_and_assess_panel_share_the_scale():
    # ICNIRP 2020 Table 5, public, 30-400 MHz: E_L = 27.7 V/m. At 60 % of E_L the power-density ratio is 36 %.
    e = np.full(2400, 0.60 * 27.7)
    n = e.size
    s = FieldSeries(1, 1, "cert", np.arange(n), 1.8e9 + np.arange(n, dtype=float), e, np.zeros((n, 3)),
                    e / 376.73, e * e / 376.73, np.full(n, 1.0), np.zeros(n, np.int64), ())
    a = assess_field(s, "icnirp-2020", "public", "guarded", freq_hz=100e6)
    assert abs(a.percent_power - 36.0) < 0.1
    panel = set(_bar_styles(assessment_renderable(a)))
    live = set(_bar_styles(gauge(a.percent_power / 100)))
    # 36 % of the power-density level falls in the 20-50 % band, on the map and KML scale as well
    assert panel == live == {band_style(0.36)} == {percent_colour(36.0)}
