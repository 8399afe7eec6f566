"""The survey map, drawn locally with matplotlib (no map tiles): the track coloured by percent of
the reference level, the points with their labels, the declared sources, a scale bar and a north
arrow, in local metres about an origin.

The origin is the site's latitude/longitude from the plan ([site] latitude_deg, longitude_deg),
which is also the (0, 0) of the plan's x_m/y_m and of the sources file; without it, the first GNSS
position. Latitude/longitude become local metres by the equirectangular projection
(meterlink.device.gnss.to_local_m): over a site of a few kilometres its error is far below the
GNSS accuracy.
"""

from __future__ import annotations

import json
import math
import textwrap
from dataclasses import dataclass, field

from meterlink.cautions import SAFETY_LINE
from meterlink.device.gnss import to_local_m
from meterlink.reports.percent_scale import PERCENT_LABELS, percent_cmap_norm, percent_colour


@dataclass
class MapPoint:
    label: str
    point_no: int
    x_m: float
    y_m: float
    height_m: float
    percent: float | None
    gnss: bool                 # True: placed by its GNSS position; False: by the plan's x/y
    u_m: float | None = None


@dataclass
class SiteFrame:
    """Everything a map or an export needs, in local metres about (lat0, lon0)."""

    lat0: float | None
    lon0: float | None
    origin_note: str
    points: list[MapPoint] = field(default_factory=list)
    track: list[tuple[float, float, float | None, int, int]] = field(default_factory=list)  # x, y, percent, point_no, used
    track_geo: list[tuple[float, float, float | None, float | None, float | None]] = field(default_factory=list)
    sources: list = field(default_factory=list)   # physics.prediction.Source, local metres
    declared: dict | None = None


def declared_sources(sv: dict):
    """(declaration dict, [physics Source]) of the sources file recorded with the survey, or (None, [])."""
    from meterlink.physics.prediction import Pattern, Source

    text = sv.get("declared_json")
    if not text:
        return None, []
    d = json.loads(text)
    out = []
    for s in d.get("sources", []):
        pat = s.get("pattern")
        out.append(Source(**{**s, "pattern": Pattern(**pat) if pat else None}))
    return d, out


def site_frame(sv: dict) -> SiteFrame:
    """Points, track and sources of a loaded survey (meterlink.survey.store.load_survey) in local metres."""
    site = sv.get("site") or {}
    lat0, lon0 = site.get("latitude_deg"), site.get("longitude_deg")
    declared_origin = lat0 is not None and lon0 is not None
    geo_rows = [t for t in sv["trace"] if t.get("lat_deg") is not None]
    geo_samples = [s for p in sv["points"] for s in p["samples"] if s.get("lat_deg") is not None]
    if not declared_origin and (geo_rows or geo_samples):
        first = geo_samples[0] if geo_samples else geo_rows[0]
        lat0, lon0 = first["lat_deg"], first["lon_deg"]
        note = f"origin: first GNSS position ({lat0:.6f}, {lon0:.6f}); the plan gives no site latitude/longitude"
    elif declared_origin:
        note = f"origin: site position {lat0:.6f}, {lon0:.6f} (WGS 84), the (0, 0) of the plan and the sources"
    else:
        note = "local plan coordinates (no GNSS positions, no site latitude/longitude)"
    decl, sources = declared_sources(sv)
    fr = SiteFrame(lat0, lon0, note, declared=decl)
    # sources in local metres belong to the declared origin: placed only when it is known or nothing is GNSS
    if declared_origin or not (geo_rows or geo_samples):
        fr.sources = sources
    e_ref = sv["e_ref_v_per_m"]
    for p in sv["points"]:
        g = [s for s in p["samples"] if s.get("lat_deg") is not None]
        if g and lat0 is not None:
            x, y = to_local_m([s["lat_deg"] for s in g], [s["lon_deg"] for s in g], lat0, lon0)
            us = [s["pos_u_m"] for s in g if s.get("pos_u_m") is not None]
            fr.points.append(MapPoint(p["label"], p["point_no"], float(x.mean()), float(y.mean()), p["height_m"],
                                      p["percent_power"], True, max(us) if us else None))
        elif p["x_m"] is not None and p["y_m"] is not None and (declared_origin or not geo_rows):
            fr.points.append(MapPoint(p["label"], p["point_no"], p["x_m"], p["y_m"], p["height_m"],
                                      p["percent_power"], False))
    for t in geo_rows if lat0 is not None else []:
        x, y = to_local_m(t["lat_deg"], t["lon_deg"], lat0, lon0)
        e = t["e_v_per_m"]
        pct = 100.0 * (e / e_ref) ** 2 if e is not None and math.isfinite(e) else None
        fr.track.append((float(x), float(y), pct, t["point_no"], int(t.get("used") or 0)))
        fr.track_geo.append((t["lat_deg"], t["lon_deg"], t.get("alt_m"), t.get("fix_utc"), pct))
    return fr


def _nice(span_m: float) -> float:
    raw = max(span_m, 1e-3) / 5.0
    p = 10 ** math.floor(math.log10(raw))
    return next(m * p for m in (5, 2, 1) if m * p <= raw)


#: characters of an 8.5 pt title line that fit above the map's axes (8 in figure, colour bar beside)
_TITLE_CHARS = 90


def _safe(s, n: int = 28) -> str:
    s = str(s)
    return (s[:n - 1] + "…" if len(s) > n else s).replace("$", r"\$")


def map_title(sv: dict, fr: SiteFrame) -> str:
    """The map's title: the survey's title (or site name) and the origin note, wrapped to the width
    of the map (_TITLE_CHARS): a line wider than the figure would run past its edges."""
    head = sv.get("title") or (sv.get("site") or {}).get("name") or "survey"
    return "\n".join(textwrap.wrap(_safe(head, 160), _TITLE_CHARS)
                     + textwrap.wrap(f"{fr.origin_note}; equirectangular projection, local metres", _TITLE_CHARS))


def survey_map_png(sv: dict, frame: SiteFrame | None = None) -> bytes | None:
    """The map as PNG, or None when the survey has no position at all."""
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import FancyArrow

    from meterlink.reports.htmlpage import figure_png

    fr = frame or site_frame(sv)
    if not fr.points and not fr.track:
        return None
    cmap, norm = percent_cmap_norm()
    fig = Figure(figsize=(8.0, 8.0), layout="constrained")
    ax = fig.add_subplot()
    xs = [p.x_m for p in fr.points] + [t[0] for t in fr.track] + [s.x_m for s in fr.sources]
    ys = [p.y_m for p in fr.points] + [t[1] for t in fr.track] + [s.y_m for s in fr.sources]
    if fr.track:
        seg: list = []           # the line joins the used readings of one point; the walk between points is
        for i, t in enumerate(fr.track):     # unknown, and a settling reading may still be from the last place
            seg.append(t)
            if i + 1 == len(fr.track) or fr.track[i + 1][3:5] != t[3:5]:
                if t[4]:
                    ax.plot([u[0] for u in seg], [u[1] for u in seg], "-", color="#c8c8c8", lw=0.8, zorder=1)
                seg = []
        ax.scatter([t[0] for t in fr.track], [t[1] for t in fr.track],
                   c=[percent_colour(t[2]) for t in fr.track], s=9, zorder=2, linewidths=0)
    near_m = 0.05 * max(max(xs + [0.0]) - min(xs + [0.0]), max(ys + [0.0]) - min(ys + [0.0]), 20.0)
    placed: list = []            # points already labelled: a label near one of them goes a line lower
    for p in fr.points:
        ax.scatter([p.x_m], [p.y_m], s=70, c=[percent_colour(p.percent)], edgecolors="black",
                   linewidths=1.0 if p.gnss else 0.0, marker="o" if p.gnss else "s", zorder=4)
        k = sum(1 for q in placed if math.hypot(q[0] - p.x_m, q[1] - p.y_m) < near_m)
        placed.append((p.x_m, p.y_m))
        ax.annotate(f"{p.point_no} {_safe(p.label)}", (p.x_m, p.y_m), textcoords="offset points",
                    xytext=(7, 5 - 10 * k), fontsize=7.5, zorder=5)
    at: dict = {}                # sources on one mast share a marker and a label
    for s in fr.sources:
        at.setdefault((round(s.x_m, 1), round(s.y_m, 1)), []).append(s.name)
    for (x, y), names in at.items():
        ax.plot(x, y, marker="^", color="#1b2f5c", ms=9, ls="", zorder=3)
        lab = _safe(names[0]) + (f" +{len(names) - 1}" if len(names) > 1 else "")
        # to the left of the marker: point labels go to the right, so a source beside a point stays legible
        ax.annotate(lab, (x, y), textcoords="offset points", xytext=(-6, -11), ha="right", fontsize=7,
                    color="#1b2f5c")
    ax.plot(0, 0, marker="+", color="black", ms=11, zorder=3)
    x0, x1, y0, y1 = min(xs + [0.0]), max(xs + [0.0]), min(ys + [0.0]), max(ys + [0.0])
    span = max(x1 - x0, y1 - y0, 20.0) * 1.25
    cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
    ax.set_xlim(cx - span / 2, cx + span / 2)
    ax.set_ylim(cy - span / 2, cy + span / 2)
    ax.set_aspect("equal")
    ax.set_xlabel("east of origin, m")
    ax.set_ylabel("north of origin, m")
    ax.grid(True, color="#eeeeee", lw=0.6)
    # scale bar lower left, north arrow upper right (north is +y in this projection)
    bar = _nice(span)
    bx, by = cx - span / 2 + 0.05 * span, cy - span / 2 + 0.05 * span
    ax.plot([bx, bx + bar], [by, by], color="black", lw=3, solid_capstyle="butt")
    ax.text(bx + bar / 2, by + 0.015 * span, f"{bar:g} m", ha="center", va="bottom", fontsize=8)
    nx, ny = cx + span / 2 - 0.07 * span, cy + span / 2 - 0.17 * span
    ax.add_patch(FancyArrow(nx, ny, 0, 0.09 * span, width=0.012 * span, head_width=0.04 * span,
                            head_length=0.035 * span, color="black", length_includes_head=True))
    ax.text(nx, ny + 0.1 * span, "N", ha="center", va="bottom", fontsize=11, fontweight="bold")
    from matplotlib.cm import ScalarMappable

    cb = fig.colorbar(ScalarMappable(norm=norm, cmap=cmap), ax=ax, shrink=0.7, pad=0.02,
                      ticks=[0.5, 3, 12.5, 35, 75, 550])
    cb.ax.set_yticklabels(PERCENT_LABELS, fontsize=7)
    cb.set_label("% of the reference level (power terms)")
    handles = [Line2D([], [], marker="o", ls="", color="#777777", mec="black", label="point at its GNSS position"),
               Line2D([], [], marker="s", ls="", color="#777777", label="point at its planned position (no GNSS)"),
               Line2D([], [], marker=".", ls="-", color="#c8c8c8", mfc="#777777", label="track (every reading)"),
               Line2D([], [], marker="^", ls="", color="#1b2f5c", label="declared source"),
               Line2D([], [], marker="+", ls="", color="black", label="origin")]
    ax.legend(handles=handles, loc="upper left", fontsize=7, framealpha=0.85)
    ax.set_title(map_title(sv, fr), fontsize=8.5)
    fig.text(0.01, -0.01, SAFETY_LINE, fontsize=6.5, wrap=True, va="top")
    return figure_png(fig)
