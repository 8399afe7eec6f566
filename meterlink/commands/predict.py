"""``meterlink predict SOURCES.toml``: predicted fields, compliance distances and exclusion zones
from declared sources, for planning before a survey (text, JSON, GeoJSON or a PNG map)."""

from __future__ import annotations

HELP = "predict fields, compliance distances and exclusion zones from a file of declared sources"

DEFAULT_STANDARD = "icnirp-2020"


def add_arguments(parser) -> None:
    parser.add_argument("sources", metavar="SOURCES", help="sources file (TOML, see docs/sources.md)")
    parser.add_argument("--standard", metavar="NAME", help=f"standard (default: the file's, else {DEFAULT_STANDARD})")
    parser.add_argument("--tier", choices=("public", "occupational", "both"), default="both",
                        help="tier of the distances and zones (default both)")
    parser.add_argument("--at", metavar="X,Y,Z", action="append", default=[],
                        help="a point in local metres (x east, y north, z above ground); repeatable")
    parser.add_argument("--grid", metavar="HALF_WIDTH_M", type=float,
                        help="predict on a square grid this far either side of the origin")
    parser.add_argument("--step", metavar="M", type=float, help="grid step (default: half width / 150)")
    parser.add_argument("--height", metavar="M", type=float, help="grid height above ground (default 1.5 m)")
    parser.add_argument("--margin", metavar="PERCENT", type=float,
                        help="also draw and export the zone at this percent of the reference level (e.g. 50)")
    parser.add_argument("--ground-factor", metavar="F", type=float,
                        help="power-density ground-reflection factor (default: the file's, else 2.56 as in "
                             "FCC OET Bulletin 65; 1 for none)")
    parser.add_argument("--max-eirp-at", metavar="M", type=float,
                        help="also give the largest EIRP each source may have for a person this far away in the "
                             "main beam")
    parser.add_argument("--public-access", metavar="M", type=float,
                        help="for the K.52 category: distance from each antenna to the nearest point the public "
                             "can reach (default: antenna height less 2 m)")
    parser.add_argument("--inherent-eirp", metavar="W", type=float,
                        help="for the K.52 category: EIRP threshold of inherently compliant sources, from the K.52 "
                             "table that applies")
    parser.add_argument("--map", metavar="PNG", help="write a map of the predicted zones")
    parser.add_argument("--geojson", metavar="FILE", help="write the zones and sources as GeoJSON (local metres)")
    parser.add_argument("--json", action="store_true", help="print machine-readable JSON")


def _point(text: str):
    from meterlink.planning.sourcefile import SourceFileError

    parts = text.split(",")
    try:
        vals = [float(p) for p in parts]
    except ValueError:
        vals = []
    if len(vals) != 3 or not all(v == v and abs(v) != float("inf") for v in vals):
        raise SourceFileError(f"--at {text!r}: give a point as X,Y,Z in metres, e.g. 12,-3,1.5")
    return tuple(vals)


def _positive(name: str, val, allow_zero: bool = False):
    import math

    from meterlink.planning.sourcefile import SourceFileError

    if val is not None and not (math.isfinite(val) and (val >= 0 if allow_zero else val > 0)):
        raise SourceFileError(f"{name} must be a {'non-negative' if allow_zero else 'positive'} number, got {val:g}")
    return val


def _fmt(x: float) -> str:
    return f"{x:.3g}" if abs(x) < 1e5 else f"{x:.3e}"


def compute(args):
    """(report dict ready for JSON, site, grids, zone levels in percent): everything the command shows."""
    import numpy as np

    from meterlink.physics import limits
    from meterlink.physics.prediction import far_field_distance_m, predict_points
    from meterlink.physics.prediction_compliance import (
        compliance_distance,
        exposure_grid,
        k52_class,
        max_eirp_w,
        predict_exposure,
    )
    from meterlink.planning.sourcefile import SourceFileError, load_site
    from meterlink.planning.zones import MODEL_NOTE, zone_polygons

    site = load_site(args.sources)
    standard = args.standard or site.standard or DEFAULT_STANDARD
    if standard not in limits.standards():
        raise SourceFileError(f"unknown standard {standard!r} (use one of {', '.join(limits.standards())})")
    gf = args.ground_factor if args.ground_factor is not None else (site.ground_factor or 2.56)
    if not gf >= 1.0:
        raise SourceFileError(f"--ground-factor must be >= 1 (1 = no reflection), got {gf:g}")
    for name in ("grid", "step", "margin", "max_eirp_at", "inherent_eirp"):
        _positive("--" + name.replace("_", "-"), getattr(args, name))
    _positive("--public-access", args.public_access, allow_zero=True)
    _positive("--height", args.height, allow_zero=True)
    tiers = ("public", "occupational") if args.tier == "both" else (args.tier,)
    targets = [1.0] + ([args.margin / 100.0] if args.margin else [])
    out: dict = {"site": site.name, "origin": site.origin, "standard": standard, "tiers": list(tiers),
                 "ground_factor": gf, "sources": [], "points": [], "zones": []}
    for s in site.sources:
        row = {"name": s.name, "freq_hz": s.freq_hz, "power_w": s.power_w, "gain_dbi": s.gain_dbi,
               "eirp_w": s.eirp_w, "x_m": s.x_m, "y_m": s.y_m, "height_m": s.height_m,
               "azimuth_deg": s.azimuth_deg, "compliance_distance": []}
        for tier in tiers:
            for t in targets:
                cd = compliance_distance(s, standard=standard, tier=tier, ground_factor=gf, target_ratio=t)
                row["compliance_distance"].append({"tier": tier, "percent": 100 * t, "distance_m": cd.distance_m,
                                                   "model": cd.model, "s_target_w_per_m2": cd.s_target_w_per_m2,
                                                   "level_status": cd.level_status})
            if args.max_eirp_at:
                row.setdefault("max_eirp_w", {})[tier] = max_eirp_w(args.max_eirp_at, s.freq_hz, standard=standard,
                                                                    tier=tier, ground_factor=gf)
        k = k52_class(s, standard=standard, public_access_m=args.public_access,
                      inherent_eirp_w=args.inherent_eirp, ground_factor=gf)
        row["k52"] = {"category": k.category, "reason": k.reason, "source": k.source_doc}
        out["sources"].append(row)
    if args.max_eirp_at:
        out["max_eirp_distance_m"] = args.max_eirp_at
    points = [_point(p) for p in args.at]
    for x, y, z in points:
        prow = {"x_m": x, "y_m": y, "z_m": z, "percent": {}, "by_source": []}
        for tier in tiers:
            pred = predict_exposure(site.sources, x, y, z, standard=standard, tier=tier, ground_factor=gf,
                                    keep_sources=True)
            prow["percent"][tier] = float(100 * pred.total)
            prow.setdefault("status", pred.status)
            prow["messages"] = list(pred.messages) + [_near_note(s, predict_points(s, x, y, z), far_field_distance_m(s))
                                                      for s in site.sources if bool(predict_points(s, x, y, z).near)]
            if tier == tiers[0]:
                for i, s in enumerate(site.sources):
                    pp = predict_points(s, x, y, z, ground_factor=gf)
                    prow["by_source"].append({"name": s.name, "s_w_per_m2": float(pp.s_w_per_m2),
                                              "e_v_per_m": float(pp.e_v_per_m), "distance_m": float(pp.distance_m),
                                              "model": "cylindrical" if bool(pp.cylindrical) else "far field",
                                              "inside_far_field_distance": bool(pp.near),
                                              "percent_" + tier: float(100 * pred.per_source[i])})
        out["points"].append(prow)
    grids = []
    if args.grid or args.map or args.geojson:
        hw = args.grid
        if hw is None:
            reach = max(d["distance_m"] for r in out["sources"] for d in r["compliance_distance"])
            spread = max(max(abs(s.x_m), abs(s.y_m)) for s in site.sources)
            hw = float(np.ceil(1.3 * (reach + spread) + 5.0))
        step = args.step or hw / 150.0
        z = args.height if args.height is not None else (site.grid_height_m if site.grid_height_m is not None else 1.5)
        for tier in tiers:
            g = exposure_grid(site.sources, standard=standard, tier=tier, half_width_m=hw, step_m=step, z_m=z,
                              ground_factor=gf)
            grids.append(g)
            for t in targets:
                polys = zone_polygons(g, 100 * t)
                area = sum(_ring_area(r[0]) - sum(_ring_area(h) for h in r[1:]) for r in polys)
                out["zones"].append({"tier": tier, "percent": 100 * t, "parts": len(polys), "area_m2": area,
                                     "grid_max_percent": float(g.percent.max()), "height_m": z,
                                     "half_width_m": hw, "step_m": step, "status": g.status})
    out["model_note"] = MODEL_NOTE
    return out, site, grids, [100 * t for t in targets]


def _near_note(src, pp, d_ff: float) -> str:
    """What a point inside a source's far-field distance means for its predicted value."""
    where = f"{src.name}: the point is {float(pp.distance_m):.3g} m away, inside its far-field distance of {d_ff:.3g} m"
    if bool(pp.cylindrical):
        return where + "; the cylindrical model (a spatial average over the array's height) was used"
    return where + ": the far-field value overestimates there"


def _ring_area(ring) -> float:
    """Area of a closed ring of (x, y) points, m^2 (shoelace formula)."""
    import numpy as np

    x, y = ring[:, 0], ring[:, 1]
    return float(abs(0.5 * (x @ np.roll(y, 1) - y @ np.roll(x, 1))))


def run(args) -> int:
    import json

    from meterlink.reports import digits
    import shutil
    from pathlib import Path

    from rich.console import Console
    from rich.table import Table

    from meterlink.cautions import SAFETY_LINE
    from meterlink.planning.sourcefile import SourceFileError
    from meterlink.planning.zones import zone_map_png, zones_geojson

    out, site, grids, levels = compute(args)
    out["safety"] = SAFETY_LINE
    for path, what in ((args.map, "map"), (args.geojson, "GeoJSON")):
        if path and not Path(path).parent.is_dir():
            raise SourceFileError(f"{path}: cannot write the {what}: no such directory")
    if args.map:
        Path(args.map).write_bytes(zone_map_png(grids, site, levels))
    if args.geojson:
        Path(args.geojson).write_text(json.dumps(zones_geojson(grids, site, levels), indent=1), encoding="utf-8")
    if args.json:
        print(digits.dumps(out, indent=2))
        return 0
    console = Console(width=max(shutil.get_terminal_size((160, 24)).columns, 100), highlight=False)
    console.print(f"Site {site.name}: origin {site.origin}; {out['standard']}; ground factor {out['ground_factor']:g}")
    t = Table(title="Declared sources: main-beam compliance distance", title_justify="left", pad_edge=False)
    for name in ("source", "MHz", "EIRP W", "distance m (tier, % of level, model)", "K.52 category"):
        t.add_column(name, overflow="fold")
    for r in out["sources"]:
        dist = "; ".join(f"{_fmt(d['distance_m'])} ({d['tier']}, {d['percent']:g} %, "
                         f"{'cyl' if d['model'].startswith('cyl') else 'far'})" for d in r["compliance_distance"])
        if "max_eirp_w" in r:
            dist += "; max EIRP at " + f"{out['max_eirp_distance_m']:g} m: " + ", ".join(
                f"{_fmt(v)} W ({k})" for k, v in r["max_eirp_w"].items())
        t.add_row(r["name"], f"{r['freq_hz'] / 1e6:g}", _fmt(r["eirp_w"]), dist, r["k52"]["category"])
    console.print(t)
    for r in out["sources"]:
        console.print(f"  {r['name']}: K.52 {r['k52']['reason']}")
    if out["points"]:
        pt = Table(title="Predicted at points (sum over sources by the standard's rule)", title_justify="left",
                   pad_edge=False)
        for name in ("x, y, z m", *(f"% {tier}" for tier in out["tiers"]), "largest contribution"):
            pt.add_column(name, overflow="fold")
        for p in out["points"]:
            top = max(p["by_source"], key=lambda b: b["s_w_per_m2"])
            pt.add_row(f"{p['x_m']:g}, {p['y_m']:g}, {p['z_m']:g}", *(f"{p['percent'][tier]:.3g}" for tier in out["tiers"]),
                       f"{top['name']}: S {_fmt(top['s_w_per_m2'])} W/m2, E {_fmt(top['e_v_per_m'])} V/m ({top['model']})")
        console.print(pt)
        for m in sorted({m for p in out["points"] for m in p["messages"]}):
            console.print(f"  note: {m}")
    for z in out["zones"]:
        console.print(f"Zone {z['tier']} >= {z['percent']:g} %: {z['parts']} part(s), {z['area_m2']:.4g} m2 at "
                      f"{z['height_m']:g} m (grid +-{z['half_width_m']:g} m, step {z['step_m']:.3g} m, "
                      f"max {z['grid_max_percent']:.3g} %)")
    statuses = sorted({d["level_status"] for r in out["sources"] for d in r["compliance_distance"]})
    console.print("Reference levels: " + "; ".join(statuses))
    if args.map:
        console.print(f"Map written to {args.map}")
    if args.geojson:
        console.print(f"GeoJSON written to {args.geojson} (local metres from the declared origin)")
    console.print(out["model_note"])
    console.print(SAFETY_LINE)
    return 0
