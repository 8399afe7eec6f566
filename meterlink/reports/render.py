"""Pure rendering of results for the terminal (rich renderables) and for scripts (plain dicts).

Nothing here prints; callers hand the renderables to a Console. Device and user text is escaped.
"""

from __future__ import annotations

import datetime as _dt
import math

from rich.console import Group
from rich.markup import escape as _escape_markup
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from meterlink.cautions import SAFETY_LINE
from meterlink.reports.percent_scale import style_field, style_power
from meterlink.safetext import clean_text
from meterlink.physics.units import format_frequency


def escape(text) -> str:
    """Text for rich markup: markup escaped, control characters shown as escapes (meterlink.safetext)."""
    return _escape_markup(clean_text(text))

#: Our own palette for outcomes: the word is always printed too, colour is never the only cue.
OUTCOME_STYLE = {"compliant": "bold white on dark_green", "not compliant": "bold white on red3",
                 "conditional pass": "bold black on khaki1", "conditional fail": "bold black on orange1",
                 "not assessable": "bold white on grey39", "undecided": "bold black on gold1"}


def value_label(a) -> str:
    """What the judged value is: the standard's average, an instantaneous value, or a partial mean."""
    if a.averaging == "instantaneous":
        return "highest instantaneous value"
    if a.value_complete:
        return f"max {a.window_s / 60:g}-min average" if a.window_s else "time average"
    return "partial mean (no full window)"


def utc_text(t_s: float | None) -> str:
    """ISO-like UTC time for a POSIX timestamp, or a dash."""
    if t_s is None or not math.isfinite(t_s):
        return "-"
    return _dt.datetime.fromtimestamp(t_s, _dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")


def bar(fraction: float, width: int = 30, style: str | None = None) -> Text:
    """A horizontal gauge of a fraction of a limit (1.0 = the reference level), marked at 100 %;
    coloured by the shared scale (a field fraction unless the caller gives the style)."""
    f = max(0.0, fraction) if math.isfinite(fraction) else 0.0
    filled = min(width, int(round(f * width)))
    style = style or style_field(f)
    t = Text("▕")
    t.append("█" * filled, style=style)
    t.append("·" * (width - filled), style="grey50")
    t.append("▏" + ("▶" if f > 1.0 else " "))
    return t


def assessment_renderable(a) -> Panel:
    """A panel with the assessment's figures, both percent terms, the verdict and the cautions."""
    t = Table(show_header=False, box=None, pad_edge=False)
    t.add_column(style="bold cyan", no_wrap=True)
    t.add_column()
    t.add_row("standard", escape(f"{a.standard}, {a.tier_label} ({a.tier})"))
    t.add_row("source", escape(a.source))
    t.add_row("reference level check", Text(a.status, style="green" if a.status.startswith("checked") else "yellow"))
    t.add_row("mode", escape(f"{a.mode}: {a.frequency_note}"))
    t.add_row("certificate", escape(a.certificate))
    if a.limit_v_per_m:
        t.add_row("reference level", f"{a.limit_v_per_m:.4g} V/m" + (" (derived from S)" if a.limit_derived else ""))
    if a.window_s:
        t.add_row("averaging time", f"{a.window_s / 60:g} min")
    elif a.averaging == "instantaneous":
        t.add_row("averaging time", "none in the standard: instantaneous values compared")
    t.add_row("peak", f"{a.peak_v_per_m:.4g} V/m at {utc_text(a.t_peak_utc)}" if a.t_peak_utc else f"{a.peak_v_per_m:.4g} V/m")
    t.add_row(value_label(a), f"{a.value_v_per_m:.4g} V/m (coverage {100 * a.coverage:.1f} %)")
    if a.partial_v_per_m is not None:
        t.add_row("partial windows", f"up to {a.partial_v_per_m:.4g} V/m (start of record, not the standard's average)")
    t.add_row("expanded uncertainty", f"U = {a.u_expanded_db:.2f} dB (k = 2)")
    t.add_row("exposure, field terms", Text.assemble(bar(a.percent_field / 100, style=style_power(a.percent_power / 100)),
                                                           f" {a.percent_field:.1f} % of the field level"))
    t.add_row("exposure, power terms", Text.assemble(bar(a.percent_power / 100, style=style_power(a.percent_power / 100)),
                                                           f" {a.percent_power:.1f} % of the power-density level"))
    parts = [t]
    if a.emitters:
        et = Table(title="emitters (largest share first)", title_justify="left")
        et.add_column("frequency", justify="right")
        et.add_column("E V/m", justify="right")
        et.add_column("term", justify="right")
        et.add_column("uses")
        et.add_column("share")
        for em in a.emitters[:12]:
            et.add_row(format_frequency(em.freq_hz), f"{em.e_v_per_m:.3g}", f"{em.term_ratio:.3g}", escape(em.quantity),
                       Text.assemble(bar(em.share, 20), f" {100 * em.share:.1f} %"))
        parts.append(et)
    outcome = Text(f" {a.verdict.outcome.upper()} ", style=OUTCOME_STYLE.get(a.verdict.outcome, "bold"))
    parts.append(Text.assemble("verdict ", outcome, f"  rule: {a.rule}"))
    parts.append(Text(a.verdict.statement))
    for n in a.notes:
        parts.append(Text("note: " + n, style="yellow"))
    parts.append(Text(SAFETY_LINE, style="italic"))
    return Panel(Group(*parts), title=f"assessment of session {a.session_id}", title_align="left")


def assessment_dict(a) -> dict:
    """JSON-ready form of an Assessment; every number labelled with its quantity and unit."""
    return {
        "session_id": a.session_id, "standard": a.standard, "tier": a.tier, "tier_label": a.tier_label,
        "decision_rule": a.rule, "mode": a.mode, "frequency_note": a.frequency_note,
        "source": a.source, "status": a.status, "reference_level_check": a.status, "certificate": a.certificate,
        "reference_level_e_v_per_m": a.limit_v_per_m, "reference_level_derived": a.limit_derived,
        "averaging_time_s": a.window_s, "peak_e_v_per_m": a.peak_v_per_m, "t_peak_utc": a.t_peak_utc,
        "averaging": a.averaging, "value_label": value_label(a),
        "averaged_e_v_per_m": a.value_v_per_m, "averaged_window_complete": a.value_complete,
        "partial_window_max_e_v_per_m": a.partial_v_per_m,
        "coverage": a.coverage, "t_averaged_end_utc": a.t_value_end_utc,
        "exposure_ratio_power": a.total_exposure_ratio, "percent_of_field_level": a.percent_field,
        "percent_of_power_density_level": a.percent_power, "u_expanded_db": a.u_expanded_db, "k": 2,
        "outcome": a.verdict.outcome, "conformity_statement_made": a.verdict.outcome != "not assessable",
        "not_assessable_reason": a.verdict.reason or None, "statement": a.verdict.statement,
        "emitters": [{"freq_hz": e.freq_hz, "e_v_per_m": e.e_v_per_m, "term_ratio": e.term_ratio,
                      "quantity": e.quantity, "share": e.share} for e in a.emitters],
        "notes": list(a.notes), "caution": SAFETY_LINE,
    }


def field_summary_renderable(series, title: str = "calibrated field") -> Table:
    """Min / mean (power domain) / max of a calibrated probe series with its uncertainty."""
    import numpy as np

    e = np.asarray(series.e_v_per_m, dtype=float)
    ok = np.isfinite(e)
    t = Table(title=title, show_header=True)
    for col in ("quantity", "min", "rms mean", "max", "unit"):
        t.add_column(col, justify="right" if col not in ("quantity", "unit") else "left")
    if ok.any():
        def row(name, v, unit):
            v = np.asarray(v, dtype=float)[ok]
            if not np.isfinite(v).any():
                t.add_row(name, "-", "-", "-", unit + " (not derived)")
                return
            t.add_row(name, f"{np.nanmin(v):.4g}", f"{math.sqrt(np.nanmean(v * v)):.4g}", f"{np.nanmax(v):.4g}", unit)

        row("E", e, "V/m")
        row("H (plane-wave equiv.)", series.h_a_per_m, "A/m")
        s = np.asarray(series.s_w_per_m2, dtype=float)[ok]
        if np.isfinite(s).any():
            t.add_row("S (plane-wave equiv.)", f"{np.nanmin(s):.4g}", f"{np.nanmean(s):.4g}", f"{np.nanmax(s):.4g}", "W/m²")
    u = np.asarray(series.u_expanded_db, dtype=float)
    u = u[np.isfinite(u)]
    if u.size:
        from meterlink.physics.units import db_to_ratio_field
        t.caption = (f"{int(ok.sum())} values; expanded uncertainty U = {u.max():.2f} dB (k = 2), "
                     f"+{100 * (float(db_to_ratio_field(u.max())) - 1):.0f} % / "
                     f"-{100 * (1 - float(db_to_ratio_field(-u.max()))):.0f} % in field; "
                     f"certificate {escape(series.certificate_name)}")
    return t


_EIGHTHS = " ▁▂▃▄▅▆▇█"


def field_trace(t_s, e_v_per_m, limit_v_per_m: float | None, width: int = 60, rows: int = 5) -> Text:
    """A small chart of the field against time: each column the rms of its time bin, in percent of
    the field reference level (top row = 100 %); a column above the level ends in '▲'."""
    import numpy as np

    t = np.asarray(t_s, dtype=float)
    e = np.asarray(e_v_per_m, dtype=float)
    ok = np.isfinite(t) & np.isfinite(e)
    t, e = t[ok], e[ok]
    out = Text()
    if e.size == 0:
        return Text("(no values)")
    top = float(limit_v_per_m) if limit_v_per_m else float(e.max()) or 1.0
    width = max(1, min(width, e.size))
    edges = np.linspace(t.min(), t.max() + 1e-9, width + 1)
    idx = np.clip(np.searchsorted(edges, t, side="right") - 1, 0, width - 1)
    p = np.bincount(idx, weights=e * e, minlength=width)
    n = np.bincount(idx, minlength=width)
    col = np.where(n > 0, np.sqrt(p / np.maximum(n, 1)), np.nan) / top      # fraction of the level
    for r in range(rows, 0, -1):
        label = f"{100 * r / rows:>4.0f} % ┤" if r in (rows, (rows + 1) // 2) else "       │"
        out.append(label, style="grey50")
        for c in col:
            if not np.isfinite(c):
                out.append(" ")
                continue
            level = c * rows - (r - 1)            # how much of this row the column fills
            if r == rows and c > 1.0:
                out.append("▲", style="red")
            elif level >= 1:
                out.append("█", style="green" if c < 0.5 else ("yellow" if c < 1.0 else "red"))
            elif level > 0:
                out.append(_EIGHTHS[max(1, int(level * 8))], style="green" if c < 0.5 else "yellow")
            else:
                out.append(" ")
        out.append("\n")
    out.append("     0 ┴" + "─" * width + "\n", style="grey50")
    out.append(f"        {utc_text(float(t.min()))}  →  {utc_text(float(t.max()))}   (rms per column, "
               f"percent of {top:.4g} V/m)", style="grey50")
    return out
