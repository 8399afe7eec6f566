"""Exclusion zones from a predicted grid: the contours at 100 % of the reference level (and a
chosen margin) as GeoJSON in local metres with a declared origin, and a PNG map with the zones,
the sources, a scale bar and a north arrow. Drawing only; the grid is physics.prediction_compliance."""

from __future__ import annotations

import math

import numpy as np

from meterlink.cautions import SAFETY_LINE

MODEL_NOTE = ("Predicted values are estimates from declared sources: far-field formula (conservative close to "
              "large antennas, where the cylindrical model is used if declared), with the declared antenna "
              "pattern (not conservative where the real pattern is wider). Reflections other than the declared "
              "ground factor, other emitters and obstacles are not modelled.")


def zone_polygons(grid, percent_level: float) -> list[list[np.ndarray]]:
    """Regions of the grid at or above percent_level: each a list of rings (outer first, holes
    after), each ring an (n, 2) array of local x, y in metres. Clipped at the grid's edge."""
    from contourpy import FillType, contour_generator

    z = np.asarray(grid.percent, dtype=float)
    if not np.any(z >= percent_level):
        return []
    cg = contour_generator(grid.x_m, grid.y_m, z, fill_type=FillType.OuterOffset)
    points, offsets = cg.filled(percent_level, np.inf)
    out = []
    for pts, offs in zip(points, offsets):
        out.append([pts[offs[i]:offs[i + 1]] for i in range(len(offs) - 1)])
    return out


def _signed_area(ring) -> float:
    x, y = ring[:, 0], ring[:, 1]
    return float(0.5 * (x @ np.roll(y, -1) - y @ np.roll(x, -1)))


def _oriented(rings):
    """Rings as RFC 7946 asks: the outer one counterclockwise, holes clockwise."""
    out = []
    for i, r in enumerate(rings):
        ccw = _signed_area(r) > 0
        out.append(r if ccw == (i == 0) else r[::-1])
    return out


def _edge_touched(grid, polys) -> bool:
    x0, x1, y0, y1 = grid.x_m[0], grid.x_m[-1], grid.y_m[0], grid.y_m[-1]
    tol = 1e-9 * max(1.0, abs(x1 - x0))
    for rings in polys:
        r = rings[0]
        if (np.any(np.abs(r[:, 0] - x0) < tol) or np.any(np.abs(r[:, 0] - x1) < tol)
                or np.any(np.abs(r[:, 1] - y0) < tol) or np.any(np.abs(r[:, 1] - y1) < tol)):
            return True
    return False


def zones_geojson(grids, site, levels_percent=(100.0,)) -> dict:
    """A GeoJSON FeatureCollection of the zones of every grid (one per tier) at each level, and the
    sources as points. Coordinates are local metres (x east, y north) from the site's declared
    origin, not longitude/latitude: the collection says so in its "local_frame" member."""
    feats = []
    for grid in grids:
        for lvl in levels_percent:
            polys = zone_polygons(grid, lvl)
            for k, rings in enumerate(polys):
                feats.append({"type": "Feature",
                              "geometry": {"type": "Polygon",
                                           "coordinates": [[[round(float(x), 3), round(float(y), 3)]
                                                            for x, y in ring] for ring in _oriented(rings)]},
                              "properties": {"kind": "exclusion zone", "standard": grid.standard,
                                             "tier": grid.tier, "percent_of_reference_level": lvl,
                                             "height_m": grid.z_m, "part": k + 1,
                                             "clipped_by_grid_edge": _edge_touched(grid, [rings]),
                                             "ground_factor": grid.ground_factor,
                                             "check_status": grid.status}})
    for s in site.sources:
        feats.append({"type": "Feature", "geometry": {"type": "Point", "coordinates": [s.x_m, s.y_m]},
                      "properties": {"kind": "source", "name": s.name, "height_m": s.height_m,
                                     "freq_hz": s.freq_hz, "power_w": s.power_w, "gain_dbi": s.gain_dbi,
                                     "azimuth_deg": s.azimuth_deg, "eirp_w": s.eirp_w}})
    return {"type": "FeatureCollection",
            "local_frame": {"units": "m", "axes": "x east, y north", "origin": site.origin, "site": site.name,
                            "note": "local coordinates, not WGS 84: place with the declared origin"},
            "features": feats, "model_note": MODEL_NOTE, "safety": SAFETY_LINE}


def _nice_length(span_m: float) -> float:
    """A round scale-bar length near a fifth of the span: 1, 2 or 5 times a power of ten."""
    raw = span_m / 5.0
    p = 10 ** math.floor(math.log10(raw))
    return next(m * p for m in (5, 2, 1) if m * p <= raw)


def zone_map_png(grids, site, levels_percent=(100.0,), title: str | None = None) -> bytes:
    """PNG map: public/occupational zones as filled contours, sources with azimuth ticks, a scale
    bar, a north arrow, the origin and the cautions."""
    from matplotlib.figure import Figure

    from meterlink.reports.htmlpage import figure_png

    fig = Figure(figsize=(8.0, 8.6), layout="constrained")
    ax = fig.add_subplot()
    styles = {"public": ("#d08c1a", "-"), "occupational": ("#a3231b", "--")}
    handles = []
    from matplotlib.lines import Line2D
    from matplotlib.patches import FancyArrow

    # Background: the first grid's percent of the reference level on the shared banded scale
    # (meterlink.reports.percent_scale: the colours of the live readout, assess and survey maps), so that a
    # map whose zones lie above head height (or off the grid) still shows where the field is.
    from meterlink.reports.percent_scale import PERCENT_EDGES, PERCENT_LABELS, percent_cmap_norm

    g_bg = grids[0]
    cmap, norm = percent_cmap_norm()
    mesh = ax.pcolormesh(g_bg.x_m, g_bg.y_m, np.asarray(g_bg.percent, dtype=float), cmap=cmap, norm=norm,
                         shading="auto", alpha=0.45, rasterized=True)
    mids = [(a + b) / 2 for a, b in zip(PERCENT_EDGES, list(PERCENT_EDGES[1:]) + [1000.0])]
    cbar = fig.colorbar(mesh, ax=ax, shrink=0.7, pad=0.02, ticks=mids)
    cbar.ax.set_yticklabels(PERCENT_LABELS)
    cbar.set_label(f"% of the {g_bg.tier} reference level ({g_bg.standard}), power terms")
    for grid in grids:
        colour, ls = styles.get(grid.tier, ("#444444", ":"))
        z = np.asarray(grid.percent)
        for j, lvl in enumerate(sorted(levels_percent)):
            if np.any(z >= lvl):
                ax.contourf(grid.x_m, grid.y_m, z, levels=[lvl, max(float(z.max()), lvl) * 1.0001 + 1e-9],
                            colors=[colour], alpha=0.18 if lvl >= 100 else 0.08)
                ax.contour(grid.x_m, grid.y_m, z, levels=[lvl], colors=[colour], linestyles=[ls],
                           linewidths=1.6 if lvl >= 100 else 0.9)
            handles.append(Line2D([], [], color=colour, ls=ls, lw=1.6 if lvl >= 100 else 0.9,
                                  label=f"{grid.tier}: {lvl:g} % of the reference level ({grid.standard})"
                                  + ("" if np.any(z >= lvl) else " - nowhere on this grid")))
    g0 = grids[0]
    span = float(g0.x_m[-1] - g0.x_m[0])
    for s in site.sources:
        ax.plot(s.x_m, s.y_m, marker="^", color="#1d3f6e", ms=8)
        if s.pattern is not None and s.pattern.h_beamwidth_deg < 360:
            a = math.radians(s.azimuth_deg)
            ax.plot([s.x_m, s.x_m + 0.06 * span * math.sin(a)], [s.y_m, s.y_m + 0.06 * span * math.cos(a)],
                    color="#1d3f6e", lw=1.2)
        ax.annotate(str(s.name).replace("$", r"\$"), (s.x_m, s.y_m), textcoords="offset points",
                    xytext=(6, -10), fontsize=7, color="#1d3f6e")
    handles.append(Line2D([], [], color="#1d3f6e", marker="^", ls="", label="declared source (line: azimuth)"))
    ax.plot(0, 0, marker="+", color="black", ms=10)
    ax.set_aspect("equal")
    ax.set_xlim(g0.x_m[0], g0.x_m[-1])
    ax.set_ylim(g0.y_m[0], g0.y_m[-1])
    ax.set_xlabel("east of origin, m")
    ax.set_ylabel("north of origin, m")
    # scale bar (lower left) and north arrow (upper right), in data units
    bar = _nice_length(span)
    x0, y0 = g0.x_m[0] + 0.05 * span, g0.y_m[0] + 0.05 * span
    ax.plot([x0, x0 + bar], [y0, y0], color="black", lw=3, solid_capstyle="butt")
    ax.text(x0 + bar / 2, y0 + 0.015 * span, f"{bar:g} m", ha="center", va="bottom", fontsize=8)
    xn, yn = g0.x_m[-1] - 0.07 * span, g0.y_m[-1] - 0.16 * span
    ax.add_patch(FancyArrow(xn, yn, 0, 0.09 * span, width=0.012 * span, head_width=0.04 * span,
                            head_length=0.035 * span, color="black", length_includes_head=True))
    ax.text(xn, yn + 0.1 * span, "N", ha="center", va="bottom", fontsize=11, fontweight="bold")
    ax.legend(handles=handles, loc="upper left", fontsize=7, framealpha=0.85)
    ax.set_title((title or f"Predicted exclusion zones - {site.name}").replace("$", r"\$")
                 + f"\nat {g0.z_m:g} m above ground, ground factor {g0.ground_factor:g}; origin (+): "
                 + site.origin.replace("$", r"\$"), fontsize=9)
    fig.text(0.01, -0.02, MODEL_NOTE + "\n" + SAFETY_LINE, fontsize=6.5, wrap=True, va="top")
    return figure_png(fig)
