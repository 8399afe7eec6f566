"""``meterlink limits FREQUENCY``: the reference levels that apply at one frequency."""

from __future__ import annotations

HELP = "show the exposure reference levels of the packaged standards at one frequency"

PERCENT_NOTE = ("Field and power-density percentages differ: a field at 50 % of its E level "
                "is at 25 % of the S level (S goes with E squared).")
DERIVED_NOTE = "~ derived: plane-wave equivalent through Z0 (from S) or H = B/mu_0, not printed in the standard."
UNCHECKED_NOTE = ("Values marked 'not yet checked against the primary text' have not been compared with the "
                  "published document: confirm them against it before relying on them.")


def add_arguments(parser) -> None:
    parser.add_argument("frequency", metavar="FREQUENCY", help="e.g. 900MHz, 2.45GHz or 100e6 (Hz)")
    parser.add_argument("--standard", metavar="NAME", help="one standard (default: all that cover FREQUENCY)")
    parser.add_argument("--tier", metavar="TIER", help="public or occupational (default: both)")
    parser.add_argument("--kind", metavar="KIND", help="whole_body, local or peak (default: all)")
    parser.add_argument("--brief", metavar="SECONDS", type=float,
                        help="also show the brief-exposure incident energy density for an exposure this long "
                             "(0 < t <= 360 s; standards that give one, e.g. icnirp-2020 Table 7)")
    parser.add_argument("--chart", metavar="PNG", help="also draw the whole-body E levels of the standards against "
                        "frequency (100 kHz to 300 GHz) into this PNG file, FREQUENCY marked")
    parser.add_argument("--json", action="store_true", help="print machine-readable JSON")


def select_levels(freq_hz: float, standard: str | None, tier: str | None, kind: str | None) -> list:
    """The levels to show; a LimitsError naming the problem when nothing applies."""
    from meterlink.physics import limits
    from meterlink.physics.units import format_frequency

    if kind is not None and kind not in limits.KINDS:
        raise limits.LimitsError(f"unknown kind {kind!r} (use whole_body, local or peak)")
    levels = [lv for lv in limits.reference_levels_at(freq_hz, standard, tier)
              if kind is None or lv.kind == kind]
    if levels:
        return levels
    if standard is not None:  # let the lookup explain exactly why
        limits.reference_level(standard, tier or limits.describe_standard(standard)["coverage"][0]["tier"],
                               freq_hz, kind or "whole_body")
    raise limits.LimitsError(f"no packaged standard gives {kind or 'any'} levels at {format_frequency(freq_hz)}")


def _num(value: float | None, derived: bool) -> str:
    if value is None:
        return "-"
    text = f"{value:.4g}" if value < 1e5 else f"{value:.3e}"
    return ("~" + text) if derived else text


def _avg(seconds: float | None) -> str:
    if seconds is None:
        return "none (peak)"
    if seconds >= 60:
        return f"{seconds / 60:.3g} min"
    return f"{seconds:.3g} s"


def check_keys(statuses: list[str]) -> dict[str, str]:
    """A short key per distinct check status, in order of first appearance: {status: "[1]"}."""
    keys: dict[str, str] = {}
    for st in statuses:
        keys.setdefault(st, f"[{len(keys) + 1}]")
    return keys


#: below this console width the table names tiers by their short id and sources by a letter explained
#: under it, so that no word is folded mid-word on an 80-column terminal
NARROW_COLUMNS = 150


def source_keys(levels: list) -> dict[tuple[str, str], str]:
    """A letter per distinct (source, check status), in order of first appearance (narrow tables)."""
    keys: dict[tuple[str, str], str] = {}
    for lv in levels:
        keys.setdefault((lv.source, lv.status), "abcdefghijklmnopqrstuvwxyz"[len(keys) % 26])
    return keys


def render_table(levels: list, freq_hz: float, width: int = 200):
    """A table of the levels (meterlink.reports.termtable; pure: builds, does not print); the check column
    holds a key explained by render_check_keys. Narrower than NARROW_COLUMNS: short tier ids, compact bands
    and one letter per source and check status, explained under the table (render_narrow_keys)."""
    from meterlink.physics.units import format_frequency
    from meterlink.reports.termtable import Column, Styled, Table

    narrow = width < NARROW_COLUMNS
    numbers = [Column("E V/m", "right"), Column("H A/m", "right"), Column("S W/m2", "right")]
    if narrow:
        # the standard as a heading row over its levels (no column of its own)
        cols = [Column("tier", wrap=True), Column("kind", wrap=True), Column("band"), *numbers,
                Column("avg", "right"), Column("key")]
    else:
        cols = [Column("standard"), Column("tier", wrap=True), Column("kind", wrap=True), Column("band"), *numbers,
                Column("averaging", "right"), Column("source", wrap=True), Column("check")]
    table = Table(cols, title=f"Reference levels at {format_frequency(freq_hz)}")
    keys = check_keys([lv.status for lv in levels])
    src = source_keys(levels)
    standard = None
    for lv in levels:
        s_text = _num(lv.s_w_per_m2, lv.s_derived)
        if lv.s_h_w_per_m2 is not None and lv.s_h_w_per_m2 != lv.s_w_per_m2:
            s_text += f" (H: {_num(lv.s_h_w_per_m2, False)})"
        lo, hi = format_frequency(lv.band_lo_hz), format_frequency(lv.band_hi_hz)
        values = (_num(lv.e_v_per_m, lv.e_derived), _num(lv.h_a_per_m, lv.h_derived), s_text,
                  _avg(lv.averaging_time_s))
        style = "green" if lv.fully_checked else "yellow"
        if narrow:
            if lv.standard != standard:
                standard = lv.standard
                table.add_heading(Styled(standard, "bold"))
            table.add_row(lv.tier, lv.kind.replace("_", " "), f"{lo}-{hi}".replace(" ", ""), *values,
                          Styled(src[(lv.source, lv.status)], style))
        else:
            table.add_row(lv.standard, lv.tier_label, lv.kind.replace("_", " "), f"{lo}-{hi}", *values, lv.source,
                          Styled(keys[lv.status], style))
    return table


def render_narrow_keys(levels: list) -> list:
    """The lines under a narrow table: each key's source and check status (Styled text)."""
    from meterlink.physics.limits import CHECKED_PREFIX
    from meterlink.reports.termtable import Styled

    return [Styled(f"{key}: {source}; {status}", "green" if status.startswith(CHECKED_PREFIX) else "yellow")
            for (source, status), key in source_keys(levels).items()]


def render_check_keys(levels: list) -> list:
    """The lines explaining the check keys of render_table, one per distinct status (Styled text)."""
    from meterlink.physics.limits import CHECKED_PREFIX
    from meterlink.reports.termtable import Styled

    return [Styled(f"check {key}: {status}", "green" if status.startswith(CHECKED_PREFIX) else "yellow")
            for status, key in check_keys([lv.status for lv in levels]).items()]


def brief_table(brief: list[dict], duration_s: float):
    """The brief-exposure levels as a table (meterlink.reports.termtable)."""
    from meterlink.reports.termtable import Column, Table

    table = Table([Column("standard"), Column("tier"), Column("U J/m2", "right"),
                   Column("same as a mean S over the exposure, W/m2", "right", wrap=True), Column("check", wrap=True)],
                  title=f"Brief exposure of {duration_s:g} s (incident energy density, local)")
    for b in brief:
        table.add_row(b["standard"], b["tier"], f"{b['u_j_per_m2']:.4g}", f"{b['mean_s_w_per_m2']:.4g}", b["status"])
    return table


def levels_to_json(levels: list, freq_hz: float) -> dict:
    """JSON-ready dict of the levels with the cautions."""
    from dataclasses import asdict

    from meterlink.cli import SAFETY_LINE

    return {"frequency_hz": freq_hz, "levels": [asdict(lv) | {"fully_checked": lv.fully_checked} for lv in levels],
            "note": PERCENT_NOTE, "check_note": UNCHECKED_NOTE, "safety": SAFETY_LINE}


def brief_levels(freq_hz: float, duration_s: float, standard: str | None, tier: str | None) -> list[dict]:
    """Brief-exposure energy-density limits at freq_hz for every standard/tier that gives one."""
    from meterlink.physics import limits

    out = []
    for i, std in enumerate([standard] if standard else limits.standards()):
        for tr in [tier] if tier else list(limits.TIERS):
            try:
                u = limits.brief_exposure_energy_j_per_m2(std, tr, freq_hz, duration_s)
            except limits.LimitsError as exc:
                if "outside 0 < t" in str(exc):
                    raise
                continue
            out.append({"standard": std, "tier": tr, "duration_s": duration_s, "u_j_per_m2": u,
                        "mean_s_w_per_m2": u / duration_s,
                        "status": limits.brief_exposure_status(std, tr, freq_hz)})
    if not out:
        raise limits.LimitsError(f"no packaged standard gives a brief-exposure level at this frequency"
                                 f"{' for ' + standard if standard else ''}")
    return out


def draw_chart(path: str, freq_hz: float, standard: str | None, tier: str | None) -> None:
    """PNG of each standard's whole-body E reference level (plane-wave equivalent where derived)."""
    import numpy as np
    from matplotlib.figure import Figure

    from meterlink.physics import limits
    from meterlink.errors import MeterlinkError
    from meterlink.reports.htmlpage import figure_png
    from meterlink.physics.units import format_frequency

    f = np.geomspace(1e5, 3e11, 900)
    fig = Figure(figsize=(9, 5))
    ax = fig.add_subplot()
    colours = ["#1b6f7a", "#b3261e", "#6a3d9a", "#e08a00", "#2e7d32", "#5d6d7e", "#c2185b", "#8d6e63"]
    for i, std in enumerate([standard] if standard else limits.standards()):
        for tr in [tier] if tier else list(limits.TIERS):
            y = []
            for fi in f:
                try:
                    y.append(limits.reference_level(std, tr, float(fi)).e_v_per_m or np.nan)
                except MeterlinkError:
                    y.append(np.nan)
            if np.isfinite(y).any():
                ax.loglog(f, y, lw=1.4, ls="-" if tr == "public" else "--", color=colours[i % len(colours)],
                          label=f"{std} {tr}")
    ax.axvline(freq_hz, color="k", lw=0.8)
    ax.set(xlabel="frequency (Hz)", ylabel="E reference level, whole body (V/m)",
           title=f"whole-body E reference levels (marked: {format_frequency(freq_hz)}); dashed: occupational")
    ax.grid(True, which="both", alpha=0.25)
    ax.legend(fontsize=7, ncol=2)
    try:
        with open(path, "wb") as fh:
            fh.write(figure_png(fig))
    except OSError as exc:
        raise limits.LimitsError(f"cannot write chart {path!r}: {exc.strerror}") from None


def run(args) -> int:
    import sys

    from meterlink.cli import SAFETY_LINE
    from meterlink.physics import limits
    from meterlink.physics.limits import LimitsError
    from meterlink.physics.units import parse_frequency_hz
    from meterlink.reports.termtable import Styled, colour_wanted, paint_lines, terminal_width

    if args.frequency.strip().startswith("-"):
        raise LimitsError(f"FREQUENCY {args.frequency!r}: a frequency must be positive (e.g. 5MHz)")
    try:
        freq_hz = parse_frequency_hz(args.frequency)
    except ValueError as exc:
        raise LimitsError(str(exc)) from None
    levels = select_levels(freq_hz, args.standard, args.tier, args.kind)
    brief = brief_levels(freq_hz, args.brief, args.standard, args.tier) if args.brief is not None else None
    if args.chart:
        draw_chart(args.chart, freq_hz, args.standard, args.tier)
    if args.json:
        from meterlink.reports import digits

        doc = levels_to_json(levels, freq_hz)
        if brief is not None:
            doc["brief_exposure"] = brief
        print(digits.dumps(doc, indent=2))
        return 0
    width = terminal_width(160)
    colour = colour_wanted(sys.stdout)
    lines = render_table(levels, freq_hz, width).lines(width, colour)
    notes: list = render_narrow_keys(levels) if width < NARROW_COLUMNS else render_check_keys(levels)
    if any(lv.e_derived or lv.h_derived or lv.s_derived for lv in levels):
        notes.append(DERIVED_NOTE)
    if any(not lv.fully_checked for lv in levels) or any(b["status"] == limits.NOT_CHECKED for b in brief or []):
        notes.append(UNCHECKED_NOTE)
    lines += paint_lines(notes, width, colour)
    if brief:
        lines += brief_table(brief, args.brief).lines(width, colour)
    lines += paint_lines([PERCENT_NOTE, Styled(SAFETY_LINE, "bold")], width, colour)
    print("\n".join(lines))
    return 0
