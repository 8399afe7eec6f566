"""The live readout's render functions are pure: rendered here to text, without a terminal."""

import io
import math

from rich.console import Console

from meterlink.survey.capture import View
from meterlink.survey.readout import band_style, gauge, render_result, render_view


def text(renderable, width=110) -> str:
    c = Console(record=True, width=width, color_system=None, file=io.StringIO())
    c.print(renderable)
    return c.export_text()


def view(**kw) -> View:
    base = dict(label="P1 [bold]gate[/bold]", mode="average", phase="measuring", height_m=1.5, progress=0.5,
                elapsed_s=180.0, duration_s=360.0, e_v_per_m=13.75, axes_v_per_m=(10.0, 8.0, 5.0),
                e_max_v_per_m=15.0, e_avg_v_per_m=13.0, n=180, e_ref_v_per_m=27.5,
                ratio_power=(13.75 / 27.5) ** 2, battery_pct=12, battery_low=True, overrange=False)
    return View(**{**base, **kw})


def test_readout_shows_axes_total_max_average_and_both_percent_terms():
    out = text(render_view(view()))
    # 13.75 V/m against 27.5 V/m is 50 % in field terms and 25 % in power terms
    assert "50.0 % field" in out and "25.0 % power" in out
    assert "13.750 V/m" in out and "10.000 V/m" in out and "15.000 V/m" in out and "13.000 V/m" in out
    assert "180.0 / 360 s device time" in out
    assert "P1 [bold]gate[/bold]" in out            # user text is shown literally, never as markup
    assert "LOW BATTERY" in out and "12 %" in out
    assert "OVERRANGE" not in out


def test_readout_warnings_followup_and_emitters():
    v = view(overrange=True, battery_low=False, battery_pct=None, followup_v_per_m=8.25,
             emitters=(("Tor <FM> A", 94.3e6, 9.0), ("103.0 MHz", 103e6, 2.0)))
    out = text(render_view(v))
    assert "OVERRANGE" in out and "LOW BATTERY" not in out and "mains/unknown" in out
    assert "follow-up" in out and "8.25 V/m" in out
    assert "strongest emitters" in out and "Tor <FM> A" in out and "94.300" in out
    settling = text(render_view(view(phase="settling")))
    assert "settling" in settling and "device time" not in settling


def test_gauge_and_bands():
    assert "above the probe's range" in text(gauge(math.inf))
    assert band_style(0.01) != band_style(0.5) != band_style(2.0)
    assert text(gauge(0.25, width=10)).startswith("▕▮▮▮▮▮·····▏")   # 50 % of the field level: half the bar


def test_point_line():
    from meterlink.survey.assess import assess, broadband_reference
    from meterlink.survey.model import Point, Sample, Site, SurveyPlan

    plan = SurveyPlan(Site("x"), "icnirp-1998", "public", "simple", "demo-probe", ())
    r = assess(plan, Point("<i>L</i>"), (Sample(1.5, None, 5.5, 6.0, (5.5, 0, 0), 2.0, 5, 1.0, 0, 4),),
               broadband_reference("icnirp-1998", "public", (30e6, 6e9)))
    out = text(render_result(r))
    assert "<i>L</i>" in out and "20.0 % field" in out and "4.0 % power" in out and "compliant" in out
