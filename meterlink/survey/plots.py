"""Report figures made with matplotlib's Agg canvas (no pyplot state); each returns PNG bytes."""

from __future__ import annotations

import math

from matplotlib.figure import Figure

from meterlink.reports.htmlpage import figure_png

_ACCENT, _MUTED, _LIMIT = "#2b6f77", "#b9c3c6", "#b3261e"


def _safe(s, max_chars: int = 32) -> str:
    """User text for a figure: no mathtext interpretation, and shortened with an ellipsis so that a
    long point or emitter name cannot squeeze the axes away (the tables carry the full text)."""
    s = str(s)
    if len(s) > max_chars:
        s = s[:max_chars - 1] + "…"
    return s.replace("$", r"\$")


_png = figure_png


def _runs(rows: list[dict]) -> list[tuple[int, list[dict]]]:
    """The used rows of each capture, in trace order: a run ends where another point starts, or where
    the same point settles again at the same or an earlier height (it was measured again)."""
    runs: list[tuple[int, list[dict]]] = []
    prev = None
    for t in rows:
        again = (prev is not None and not t["used"] and prev["used"] and t["sample_no"] <= prev["sample_no"])
        if prev is None or t["point_no"] != prev["point_no"] or again:
            runs.append((t["point_no"], []))
        if t["used"]:
            runs[-1][1].append(t)
        prev = t
    return [(no, run) for no, run in runs if run]


def walk_plot(trace: list[dict], points: list[dict], e_ref_v_per_m: float, followup_v_per_m=None) -> bytes:
    """Field of every reading along the survey (device time), points labelled, limit marked."""
    fig = Figure(figsize=(8.0, 3.2), layout="constrained")
    ax = fig.add_subplot()
    rows = [t for t in trace if t["e_v_per_m"] is not None and t["t_device_s"] is not None]
    if rows:
        t0 = min(t["t_device_s"] for t in rows)
        for used, colour, lab in ((0, _MUTED, "moving / settling"), (1, _ACCENT, "used")):
            sel = [t for t in rows if t["used"] == used]
            ax.plot([(t["t_device_s"] - t0) / 60 for t in sel], [t["e_v_per_m"] for t in sel], ".", ms=2.5,
                    color=colour, label=lab)
        labels = {p["point_no"]: p["label"] for p in points}
        runs = _runs(rows)
        for i, (no, run) in enumerate(runs):
            if no not in labels:
                continue
            later = any(n == no for n, _ in runs[i + 1:])      # a capture replaced by a re-measurement
            ax.annotate(_safe(labels[no]) + (" (replaced)" if later else ""),
                        ((sum(t["t_device_s"] for t in run) / len(run) - t0) / 60, max(t["e_v_per_m"] for t in run)),
                        textcoords="offset points", xytext=(0, 6), ha="center", fontsize=7,
                        color=_MUTED if later else "black")
    ax.axhline(e_ref_v_per_m, color=_LIMIT, lw=1, label=f"reference level {e_ref_v_per_m:.1f} V/m")
    if followup_v_per_m:
        ax.axhline(followup_v_per_m, color=_LIMIT, lw=0.8, ls=":", label="follow-up threshold")
    ax.set_xlabel("device time since the first reading (min)")
    ax.set_ylabel("E (V/m)")
    ax.set_ylim(bottom=0)
    ax.legend(fontsize=7, loc="upper right")
    return _png(fig)


def points_plot(points: list[dict]) -> bytes:
    """Per point: percent of the reference level in power terms, measured and extrapolated."""
    fig = Figure(figsize=(8.0, 1.1 + 0.42 * max(1, len(points))), layout="constrained")
    ax = fig.add_subplot()
    labels = [_safe(p["label"]) for p in points][::-1]
    meas = [p["percent_power"] or 0.0 for p in points][::-1]
    extra = [p["percent_power_extrapolated"] or 0.0 for p in points][::-1]
    y = range(len(points))
    ax.barh([i + 0.2 for i in y], extra, height=0.38, color=_MUTED, label="extrapolated to maximum power")
    ax.barh([i - 0.2 for i in y], meas, height=0.38, color=_ACCENT, label="measured")
    ax.axvline(100, color=_LIMIT, lw=1.2, label="reference level (100 %)")
    ax.set_yticks(list(y), labels, fontsize=8)
    ax.set_xlabel("percent of the reference level, power terms (%)")
    ax.set_xlim(0, max(110.0, *(v * 1.1 for v in meas + extra if math.isfinite(v))))
    fig.legend(fontsize=7, loc="outside lower center", ncol=3)
    return _png(fig)


def shares_plot(point: dict) -> bytes:
    """Emitter shares of one point's total exposure ratio (frequency-selective data)."""
    ems = sorted(point["emitters"], key=lambda m: -(m["share"] or 0))
    fig = Figure(figsize=(8.0, 0.6 + 0.32 * max(1, len(ems))), layout="constrained")
    ax = fig.add_subplot()
    names = [_safe(m["name"]) for m in ems][::-1]
    ax.barh(range(len(ems)), [100 * (m["share"] or 0) for m in ems][::-1], color=_ACCENT)
    ax.set_yticks(list(range(len(ems))), names, fontsize=8)
    ax.set_xlabel(f"share of the total exposure ratio at {_safe(point['label'])} (%)")
    ax.set_xlim(0, 100)
    return _png(fig)
