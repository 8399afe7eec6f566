"""The station page's envelope plot says where the reference level is, drawn or not."""

from __future__ import annotations

from meterlink.network.plots import envelope_svg

T0 = 1_780_000_200.0


def _pts(hi: float) -> list[tuple]:
    return [(T0 + 360.0 * k, hi * 0.5, hi) for k in range(10)]


def test_reference_line_drawn_when_the_values_come_near_it():
    svg = str(envelope_svg(_pts(80.0), T0, T0 + 3600.0, 360.0, "% of S ref", "near", reference=100.0))
    assert 'stroke-dasharray="6 4"' in svg and ">reference level</text>" in svg
    assert "above this scale" not in svg


def test_far_below_the_reference_the_plot_says_so_instead_of_a_line():
    svg = str(envelope_svg(_pts(0.3), T0, T0 + 3600.0, 360.0, "% of S ref", "far", reference=100.0))
    assert 'stroke-dasharray="6 4"' not in svg
    assert "reference level (100) is above this scale" in svg


def test_no_reference_no_note():
    svg = str(envelope_svg(_pts(0.3), T0, T0 + 3600.0, 360.0, "V/m", "none"))
    assert "reference level" not in svg
