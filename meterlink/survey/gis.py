"""GIS exports of a survey: GeoJSON (RFC 7946: WGS 84, [longitude, latitude(, altitude)] order),
KML 2.2 and GPX 1.1, each with the points, the track, the declared sources and, when a sources
file was declared, the predicted zones at 100 % of the reference level. Every file carries the
cautions. Geographic output needs an origin (the site's latitude/longitude or a GNSS position):
without one there is nothing to place, and no file is written.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import xml.etree.ElementTree as ET
from pathlib import Path

from meterlink.cautions import SAFETY_LINE
from meterlink.device.gnss import from_local_m
from meterlink.reports.percent_scale import PERCENT_COLOURS, PERCENT_LABELS, kml_colour, percent_band

KML_NS = "http://www.opengis.net/kml/2.2"
GPX_NS = "http://www.topografix.com/GPX/1/1"
ZONE_NOTE = ("Predicted zone: where the declared sources' predicted exposure reaches 100 % of the reference "
             "level at the grid height (far-field model with the declared patterns; an estimate, not a measurement).")


def _r(v, n=7):
    return None if v is None else round(float(v), n)


def _geo(frame, x, y):
    lat, lon = from_local_m(x, y, frame.lat0, frame.lon0)
    return float(lat), float(lon)


def zone_rings(sv: dict, frame, level_percent: float = 100.0, z_m: float = 1.5) -> list[list[list[tuple]]]:
    """Predicted zones (each a list of rings of (x, y) local metres, outer ring first) at level_percent
    of the survey's standard and tier, on a grid over the surveyed area; [] without declared sources."""
    import numpy as np
    from contourpy import FillType, contour_generator

    from meterlink.physics.prediction import OET65_GROUND_FACTOR
    from meterlink.physics.prediction_compliance import exposure_grid

    if not frame.sources or not frame.declared:
        return []
    xs = [p.x_m for p in frame.points] + [t[0] for t in frame.track] + [s.x_m for s in frame.sources]
    ys = [p.y_m for p in frame.points] + [t[1] for t in frame.track] + [s.y_m for s in frame.sources]
    half = max(max(abs(v) for v in xs + ys) * 1.2, 20.0)
    gf = frame.declared.get("ground_factor") or OET65_GROUND_FACTOR
    g = exposure_grid(frame.sources, standard=sv["standard"], tier=sv["tier"], half_width_m=half,
                      step_m=max(half / 200.0, 0.25), z_m=z_m, ground_factor=gf)
    z = np.asarray(g.percent, dtype=float)
    if not np.any(z >= level_percent):
        return []
    cg = contour_generator(g.x_m, g.y_m, z, fill_type=FillType.OuterOffset)
    pts, offs = cg.filled(level_percent, np.inf)
    out = []
    for p, o in zip(pts, offs):
        rings = [[(float(a), float(b)) for a, b in p[o[i]:o[i + 1]]] for i in range(len(o) - 1)]
        out.append(rings)
    return out


def _area(ring) -> float:
    return 0.5 * sum(x0 * y1 - x1 * y0 for (x0, y0), (x1, y1) in zip(ring, ring[1:] + ring[:1]))


def _rfc_ring(frame, ring, outer: bool):
    """A ring in [lon, lat], closed, outer counterclockwise and holes clockwise (RFC 7946 section 3.1.6)."""
    if (_area(ring) > 0) != outer:
        ring = ring[::-1]
    coords = [[_r(lon), _r(lat)] for lat, lon in (_geo(frame, x, y) for x, y in ring)]
    if coords and coords[0] != coords[-1]:
        coords.append(coords[0])
    return coords


def _points(frame):
    """(map point, lat, lon) for points that can be placed."""
    for p in frame.points:
        lat, lon = _geo(frame, p.x_m, p.y_m)
        yield p, lat, lon


def geojson(sv: dict, frame, zones) -> dict:
    """A FeatureCollection: points, the track (LineString), sources (Points) and zones (Polygons)."""
    feats = []
    for p, lat, lon in _points(frame):
        feats.append({"type": "Feature", "geometry": {"type": "Point", "coordinates": [_r(lon), _r(lat)]},
                      "properties": {"kind": "survey point", "point_no": p.point_no, "label": p.label,
                                     "height_m": p.height_m, "percent_of_reference_level": finite_or_none(p.percent),
                                     "position": "GNSS" if p.gnss else "plan", "position_u_m": finite_or_none(p.u_m)}})
    if len(frame.track_geo) >= 2:
        feats.append({"type": "Feature", "geometry": {"type": "LineString", "coordinates": [
            [_r(lon), _r(lat)] + ([round(alt, 2)] if alt is not None else []) for lat, lon, alt, _, _ in frame.track_geo]},
            "properties": {"kind": "track", "n_positions": len(frame.track_geo),
                           "percent_of_reference_level": [None if finite_or_none(t[4]) is None else round(t[4], 4)
                                                          for t in frame.track_geo]}})
    for s in frame.sources:
        lat, lon = _geo(frame, s.x_m, s.y_m)
        feats.append({"type": "Feature", "geometry": {"type": "Point", "coordinates": [_r(lon), _r(lat)]},
                      "properties": {"kind": "declared source", "name": s.name, "freq_hz": s.freq_hz,
                                     "eirp_w": s.eirp_w, "height_m": s.height_m}})
    for k, rings in enumerate(zones):
        feats.append({"type": "Feature", "geometry": {"type": "Polygon", "coordinates": [
            _rfc_ring(frame, r, i == 0) for i, r in enumerate(rings)]},
            "properties": {"kind": "predicted zone", "part": k + 1, "percent_of_reference_level": 100.0,
                           "standard": sv["standard"], "tier": sv["tier"], "note": ZONE_NOTE}})
    return {"type": "FeatureCollection", "features": feats,
            "meterlink": {"survey_session": int(sv["session_id"]), "title": sv["title"], "origin": frame.origin_note,
                          "safety": SAFETY_LINE}}


def _iso(t):
    return None if t is None else _dt.datetime.fromtimestamp(t, _dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def kml(sv: dict, frame, zones) -> str:
    """KML 2.2: one style per colour band of the shared scale, placemarks, the track and zones."""
    ET.register_namespace("", KML_NS)
    q = lambda t: f"{{{KML_NS}}}{t}"  # noqa: E731
    root = ET.Element(q("kml"))
    doc = ET.SubElement(root, q("Document"))
    ET.SubElement(doc, q("name")).text = sv["title"] or f"survey session {sv['session_id']}"
    ET.SubElement(doc, q("description")).text = f"{frame.origin_note}. {SAFETY_LINE}"
    for i, (c, lab) in enumerate(zip(PERCENT_COLOURS, PERCENT_LABELS)):
        st = ET.SubElement(doc, q("Style"), id=f"band{i}")
        ET.SubElement(ET.SubElement(st, q("IconStyle")), q("color")).text = kml_colour(c)
    st = ET.SubElement(doc, q("Style"), id="zone")
    ls = ET.SubElement(st, q("LineStyle"))
    ET.SubElement(ls, q("color")).text = kml_colour(PERCENT_COLOURS[-1])
    ET.SubElement(ls, q("width")).text = "2"
    ET.SubElement(ET.SubElement(st, q("PolyStyle")), q("color")).text = kml_colour(PERCENT_COLOURS[-1], 0x40)

    def placemark(name, desc, style=None):
        pm = ET.SubElement(doc, q("Placemark"))
        ET.SubElement(pm, q("name")).text = name
        ET.SubElement(pm, q("description")).text = desc
        if style:
            ET.SubElement(pm, q("styleUrl")).text = f"#{style}"
        return pm
    for p, lat, lon in _points(frame):
        b = percent_band(p.percent)
        pm = placemark(f"{p.point_no} {p.label}", f"{'' if p.percent is None else f'{p.percent:.2f}'} % of the "
                       f"reference level (power terms); position from {'GNSS' if p.gnss else 'the plan'}",
                       None if b is None else f"band{b}")
        ET.SubElement(ET.SubElement(pm, q("Point")), q("coordinates")).text = f"{lon:.7f},{lat:.7f}"
    if len(frame.track_geo) >= 2:
        pm = placemark("track", f"{len(frame.track_geo)} positioned readings")
        ET.SubElement(ET.SubElement(pm, q("LineString")), q("coordinates")).text = " ".join(
            f"{lon:.7f},{lat:.7f}" for lat, lon, _, _, _ in frame.track_geo)
    for s in frame.sources:
        lat, lon = _geo(frame, s.x_m, s.y_m)
        pm = placemark(s.name, f"declared source, {s.freq_hz / 1e6:g} MHz, EIRP {s.eirp_w:.4g} W")
        ET.SubElement(ET.SubElement(pm, q("Point")), q("coordinates")).text = f"{lon:.7f},{lat:.7f}"
    for k, rings in enumerate(zones):
        pm = placemark(f"predicted zone {k + 1} (100 %)", ZONE_NOTE + " " + SAFETY_LINE, "zone")
        poly = ET.SubElement(pm, q("Polygon"))
        for i, r in enumerate(rings):
            b = ET.SubElement(poly, q("outerBoundaryIs" if i == 0 else "innerBoundaryIs"))
            ET.SubElement(ET.SubElement(b, q("LinearRing")), q("coordinates")).text = " ".join(
                f"{lon:.7f},{lat:.7f}" for lon, lat in _rfc_ring(frame, r, i == 0))
    return '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode")


def gpx(sv: dict, frame, zones) -> str:
    """GPX 1.1: points and sources as waypoints, the track as trkpt with elevation and fix time,
    zone outlines as closed routes (GPX has no areas)."""
    ET.register_namespace("", GPX_NS)
    q = lambda t: f"{{{GPX_NS}}}{t}"  # noqa: E731
    root = ET.Element(q("gpx"), version="1.1", creator="meterlink")
    md = ET.SubElement(root, q("metadata"))
    ET.SubElement(md, q("name")).text = sv["title"] or f"survey session {sv['session_id']}"
    ET.SubElement(md, q("desc")).text = f"{frame.origin_note}. {SAFETY_LINE}"

    def wpt(lat, lon, name, desc, ele=None):
        w = ET.SubElement(root, q("wpt"), lat=f"{lat:.7f}", lon=f"{lon:.7f}")
        if ele is not None:
            ET.SubElement(w, q("ele")).text = f"{ele:.2f}"
        ET.SubElement(w, q("name")).text = name
        ET.SubElement(w, q("desc")).text = desc
    for p, lat, lon in _points(frame):
        wpt(lat, lon, f"{p.point_no} {p.label}", f"{'' if p.percent is None else f'{p.percent:.2f}'} % of the "
            f"reference level; position from {'GNSS' if p.gnss else 'the plan'}")
    for s in frame.sources:
        lat, lon = _geo(frame, s.x_m, s.y_m)
        wpt(lat, lon, s.name, "declared source")
    for k, rings in enumerate(zones):          # GPX order: wpt, rte, trk
        rte = ET.SubElement(root, q("rte"))
        ET.SubElement(rte, q("name")).text = f"predicted zone {k + 1} outline (100 %)"
        ET.SubElement(rte, q("desc")).text = ZONE_NOTE
        for lon, lat in _rfc_ring(frame, rings[0], True):
            ET.SubElement(rte, q("rtept"), lat=f"{lat:.7f}", lon=f"{lon:.7f}")
    if frame.track_geo:
        trk = ET.SubElement(root, q("trk"))
        ET.SubElement(trk, q("name")).text = "survey track"
        seg = ET.SubElement(trk, q("trkseg"))
        for lat, lon, alt, t, _ in frame.track_geo:
            tp = ET.SubElement(seg, q("trkpt"), lat=f"{lat:.7f}", lon=f"{lon:.7f}")
            if alt is not None:
                ET.SubElement(tp, q("ele")).text = f"{alt:.2f}"
            if t is not None:
                ET.SubElement(tp, q("time")).text = _iso(t)
    return '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode")


def write_gis(sv: dict, frame, out: Path) -> list[Path]:
    """survey.geojson, survey.kml and survey.gpx in out; [] when nothing can be placed."""
    if frame.lat0 is None or (not frame.points and not frame.track_geo):
        return []
    zones = zone_rings(sv, frame)
    files = {"survey.geojson": json.dumps(geojson(sv, frame, zones), indent=1, allow_nan=False),
             "survey.kml": kml(sv, frame, zones), "survey.gpx": gpx(sv, frame, zones)}
    paths = []
    for name, text in files.items():
        (out / name).write_text(text, encoding="utf-8")
        paths.append(out / name)
    return paths


def finite_or_none(v):
    return v if v is None or (isinstance(v, float) and math.isfinite(v)) else None
