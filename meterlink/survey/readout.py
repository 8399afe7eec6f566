"""The live survey readout: pure render functions returning rich renderables, and a thin Live loop.

Layout of our own: a headline with the total field and where it stands against the reference
level (field and power terms), a row per probe axis, a progress line in device time, a status
line (battery, overrange, follow-up) and, for frequency-selective data, the strongest emitters.
"""

from __future__ import annotations

import contextlib
import math
import time

from rich.console import Group
from rich.markup import escape
from rich.panel import Panel
from rich.progress_bar import ProgressBar
from rich.table import Table
from rich.text import Text

from meterlink.survey.capture import View

from meterlink.reports.percent_scale import style_power


def _fmt(v: float, unit: str = "V/m") -> str:
    return "  --  " if v is None or not math.isfinite(v) else f"{v:7.3f} {unit}"


def band_style(ratio_power: float) -> str:
    """Colour of a power-domain exposure ratio: the shared scale of meterlink.reports.percent_scale."""
    return style_power(ratio_power)


def gauge(ratio_power: float, width: int = 30) -> Text:
    """A bar of the field-terms ratio (E/E_L) on a 0..100 % scale with the two percent figures."""
    rf = math.sqrt(ratio_power) if math.isfinite(ratio_power) and ratio_power >= 0 else math.inf
    n = width if not math.isfinite(rf) else min(width, int(round(rf * width)))
    t = Text()
    t.append("▕" + "▮" * n + "·" * (width - n) + "▏ ", style=band_style(ratio_power))
    if math.isfinite(rf):
        t.append(f"{100 * rf:5.1f} % field  ·  {100 * ratio_power:5.1f} % power")
    else:
        t.append("above the probe's range", style="bold red")
    return t


def render_view(v: View) -> Panel:
    """The whole readout for one moment (pure)."""
    head = Text()
    head.append(v.label, style="bold")
    head.append(f"  {v.mode}")
    if v.height_m is not None:
        head.append(f"  at {v.height_m:.2f} m")
    if v.sample:
        head.append(f"  ({v.sample})")
    total = Text(f"E  {_fmt(v.e_v_per_m)}", style=f"bold {band_style(v.ratio_power)}")
    axes = Table.grid(padding=(0, 2))
    for name in ("axis", "X", "Y", "Z", "max", "avg (rms)", "n"):
        axes.add_column(name, justify="right")
    axes.add_row("", *(Text(_fmt(a), style="cyan") for a in v.axes_v_per_m), _fmt(v.e_max_v_per_m),
                 _fmt(v.e_avg_v_per_m), str(v.n))
    axes.add_row("", "X", "Y", "Z", "max", "avg (rms)", "readings", style="dim")
    parts = [head, total, gauge(v.ratio_power),
             Text(f"reference level {v.e_ref_v_per_m:.2f} V/m", style="dim")]
    parts.append(axes)
    if v.phase == "settling":
        parts.append(Text("probe settling: readings kept, not used", style="italic"))
    elif v.duration_s:
        bar = Table.grid(padding=(0, 1))
        bar.add_row(ProgressBar(total=1.0, completed=v.progress, width=30),
                    f"{v.elapsed_s:7.1f} / {v.duration_s:.0f} s device time")
        parts.append(bar)
    status = Text()
    status.append("battery " + ("mains/unknown" if v.battery_pct is None else f"{v.battery_pct} %"),
                  style="red" if v.battery_low else "")
    if v.battery_low:
        status.append("  LOW BATTERY", style="bold red")
    if v.overrange:
        status.append("  OVERRANGE: value is a lower bound or missing", style="bold red")
    if v.followup_v_per_m is not None and math.isfinite(v.e_v_per_m) and v.e_v_per_m >= v.followup_v_per_m:
        status.append(f"  follow-up: above {v.followup_v_per_m:.2f} V/m, measure frequency-selectively",
                      style="bold magenta")
    parts.append(status)
    if v.emitters:
        parts.append(render_emitters(v.emitters))
    return Panel(Group(*parts), title="survey readout", border_style=band_style(v.ratio_power))


def render_emitters(emitters) -> Table:
    """Strongest emitters first: name, frequency, field."""
    t = Table(title="strongest emitters", show_edge=False, pad_edge=False)
    t.add_column("emitter")
    t.add_column("MHz", justify="right")
    t.add_column("V/m", justify="right")
    for name, f, e in emitters:
        t.add_row(escape(str(name)), f"{f / 1e6:.3f}", f"{e:.3f}")
    return t


def render_result(r) -> Text:
    """One line per finished point: value, U, both percents, verdict, warnings."""
    t = Text()
    t.append(r.point.label, style="bold")
    t.append(f"  {r.scheme}: {_fmt(r.e_v_per_m).strip()} (U {r.u_expanded_db:.2f} dB)  ")
    t.append(f"{r.percent_field:.1f} % field / {r.percent_power:.1f} % power  ", style=band_style(r.percent_power / 100))
    t.append(r.verdict, style={"compliant": "green", "conditional pass": "yellow", "conditional fail": "dark_orange",
                               "not assessable": "bold"}.get(r.verdict, "bold red"))
    if r.followup:
        t.append("  follow-up needed", style="magenta")
    if not r.complete:
        t.append("  INCOMPLETE", style="bold red")
    return t


class LiveReadout:
    """Thin loop around rich.live; without a console it only forwards views to a callback."""

    def __init__(self, console=None, on_view=None, min_interval_s: float = 0.1):
        self.console, self.extra, self.min_interval_s = console, on_view, min_interval_s
        self._live = None
        self._last = 0.0

    def __enter__(self) -> "LiveReadout":
        if self.console is not None:
            from rich.live import Live
            self._live = Live(Text("waiting for the meter..."), console=self.console, refresh_per_second=8,
                              transient=True)
            self._live.start()
        return self

    def update(self, view: View) -> None:
        if self.extra is not None:
            self.extra(view)
        now = time.monotonic()
        if self._live is not None and now - self._last >= self.min_interval_s:
            self._last = now
            self._live.update(render_view(view))

    @contextlib.contextmanager
    def paused(self):
        """Take the panel off the screen while the technician is asked something, so the prompt is
        seen (a live panel redrawn eight times a second would hide it), then bring it back."""
        live = self._live
        if live is None or not live.is_started:
            yield
            return
        live.stop()
        try:
            yield
        finally:
            live.start()

    def point_done(self, result) -> None:
        if self.console is not None:
            self.console.print(render_result(result))

    def __exit__(self, *exc) -> None:
        if self._live is not None:
            self._live.stop()
