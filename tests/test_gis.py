"""The survey map, the GIS exports and the measured-vs-predicted check, on a survey over the
simulated meter and GNSS receiver (real ptys). The test scenario is the invented demo site with
one more, undeclared, emitter next to the "picnic site" point: the sources file declares only the demo
transmitters, so the picnic site must be flagged and a point far from the extra emitter must agree.

GeoJSON is checked against RFC 7946 (sections 3.1.1 positions [longitude, latitude], 3.1.6 closed
rings with the outer ring counterclockwise, 4 no "crs" member); KML against the OGC KML 2.2
namespace http://www.opengis.net/kml/2.2; GPX against the GPX 1.1 namespace
http://www.topografix.com/GPX/1/1 with version="1.1".
"""

import io
import json
import re
import xml.etree.ElementTree as ET
from importlib import resources

import numpy as np
import pytest

from meterlink.cautions import SAFETY_LINE
from meterlink.planning.sourcefile import parse_site
from meterlink.reports.percent_scale import PERCENT_COLOURS, kml_colour, percent_band, percent_colour
from meterlink.simulators.gnss import DEMO_ORIGIN, SimulatedGnss
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.storage.store import Store
from meterlink.survey.report import write_report
from meterlink.survey.run import run_plan
from meterlink.survey.store import load_survey

LAT0, LON0, _ = DEMO_ORIGIN
UNDECLARED = """
[[transmitter]]
name = "Undeclared link (test only)"
freq_hz = 450.0e6
erp_w = 300.0
position_m = [-140.0, -120.0, 3.0]
polarisation = "vertical"
technology = "link"
profile = "constant"

"""
DEMO_TX = [("Tor FM A", 94.3e6, 10000, 0, 0, 60), ("Tor FM B", 101.8e6, 5000, 0, 0, 55),
           ("Tor DAB", 222.064e6, 2000, 0, 0, 70), ("Tor DVB-T", 618.0e6, 5000, 0, 0, 80),
           ("Pole LTE 800", 806e6, 400, 30, -20, 25), ("Pole LTE 1800", 1842.5e6, 600, 30, -20, 24),
           ("Pole UMTS 2100", 2140e6, 300, 30, -20, 23), ("Pole NR 3500", 3600e6, 800, 30, -20, 26)]
PLAN = {
    "survey": {"standard": "icnirp-1998", "tier": "public", "rule": "guarded", "certificate": "demo-probe",
               "settle_s": 2, "spot_s": 5, "prediction_u_db": 3.0},
    "site": {"name": "Brannock Tor transmitting site", "latitude_deg": LAT0, "longitude_deg": LON0},
    "point": [{"label": "gate", "x_m": -60, "y_m": 40, "mode": "spot"},
              {"label": "picnic site", "x_m": -150, "y_m": -120, "mode": "spot"},
              {"label": "fence", "x_m": -8, "y_m": 6, "mode": "sweep", "duration_s": 15,
               "walk_m": [[-8, 6], [4, -4], [20, -12]]}],
}


def scenario_file(tmp_path):
    """The demo scenario with constant powers and the undeclared emitter added (invented)."""
    text = resources.files("meterlink.simulators.scenarios").joinpath("demo.toml").read_text(encoding="utf-8")
    text = text.replace('profile = "traffic"', 'profile = "constant"')
    i = text.index("[[meter]]")
    path = tmp_path / "undeclared.toml"
    path.write_text(text[:i] + UNDECLARED + text[i:], encoding="utf-8")
    return str(path)


def declared_site():
    # the demo transmitters as declared sources: EIRP = ERP x 1.64 (2.15 dBi), free space (ground factor 1)
    return parse_site({"site": {"name": "Brannock Tor (declared)", "origin": "foot of the main mast, x east, y north",
                                "ground_factor": 1.0},
                       "source": [{"name": n, "freq_hz": f, "power_w": p, "gain_dbi": 2.15, "x_m": x, "y_m": y,
                                   "height_m": h} for n, f, p, x, y, h in DEMO_TX]})


@pytest.fixture(scope="module")
def surveyed(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("gis")
    db = tmp / "s.db"
    with SimulatedMeter(scenario_file(tmp), seed=7, speed=100.0) as sim, SimulatedGnss.following(sim) as gnss:
        sid = run_plan(sim.port, PLAN, db, mover=sim.move_to, gnss_port=gnss.port, declared=declared_site())
    out = tmp / "report"
    html = write_report(db, sid, out)
    with Store(db, readonly=True) as st:
        sv = load_survey(st, sid)
    return sv, out, html.read_text(encoding="utf-8")


def test_shared_colour_scale_bands():
    # band edges 1, 5, 20, 50, 100 %: values on an edge belong to the band above it
    assert [percent_band(v) for v in (0.0, 0.99, 1.0, 4.9, 5.0, 20.0, 49.9, 50.0, 99.99, 100.0, 1e4)] == \
        [0, 0, 1, 1, 2, 3, 3, 4, 4, 5, 5]
    assert percent_band(float("nan")) is None and percent_colour(None).startswith("#")
    assert kml_colour("#112233") == "ff332211"          # KML: aabbggrr


def test_measured_against_predicted_flags_the_undeclared_emitter(surveyed):
    sv, out, html = surveyed
    from meterlink.survey import map as smap, predicted
    cmp = {c.label: c for c in predicted.compare(sv, smap.site_frame(sv))}
    assert set(cmp) == {"gate", "picnic site", "fence"}
    gate, bench = cmp["gate"], cmp["picnic site"]
    assert not gate.flagged and abs(gate.diff_db) <= gate.u_measured_db      # declared sources explain it
    assert bench.flagged and bench.diff_db > bench.u_combined_db > 3.0
    assert any("unknown source" in r for r in bench.reasons) and bench.where == "GNSS"
    assert "Measured against predicted" in html and "DISAGREE" in html and "unknown source" in html


def test_map_is_drawn_and_not_blank(surveyed):
    import matplotlib.image as mpimg

    sv, out, html = surveyed
    from meterlink.survey.map import site_frame, survey_map_png
    fr = site_frame(sv)
    assert len(fr.track) >= 25 and {p.label for p in fr.points} == {"gate", "picnic site", "fence"}
    assert all(p.gnss for p in fr.points) and len(fr.sources) == 8
    png = survey_map_png(sv, fr)
    (out / "map-test.png").write_bytes(png)
    img = mpimg.imread(io.BytesIO(png))[..., :3]
    assert img.shape[0] > 500 and img.shape[1] > 500
    assert (img < 0.95).any(axis=2).mean() > 0.03            # more than a blank page
    # the band colour of the flagged point's percent appears on the map
    bench = next(p for p in fr.points if p.label == "picnic site")
    rgb = np.array([int(percent_colour(bench.percent)[i:i + 2], 16) / 255 for i in (1, 3, 5)])
    assert (np.abs(img - rgb).max(axis=2) < 0.03).sum() > 20
    assert "survey map" in html and "Positions and map" in html


def _ring_area(ring):
    return 0.5 * sum(x0 * y1 - x1 * y0 for (x0, y0), (x1, y1) in zip(ring, ring[1:]))


def test_geojson_follows_rfc7946(surveyed):
    sv, out, html = surveyed
    doc = json.loads((out / "survey.geojson").read_text(encoding="utf-8"))
    assert doc["type"] == "FeatureCollection" and "crs" not in doc
    assert doc["meterlink"]["safety"] == SAFETY_LINE
    kinds = {}
    for f in doc["features"]:
        assert f["type"] == "Feature" and isinstance(f["properties"], dict)
        g = f["geometry"]
        kinds.setdefault(f["properties"]["kind"], []).append(g)
        pos = {"Point": lambda c: [c], "LineString": lambda c: c, "Polygon": lambda c: [p for r in c for p in r]}[
            g["type"]](g["coordinates"])
        for p in pos:
            assert 2 <= len(p) <= 3 and -180 <= p[0] <= 180 and -90 <= p[1] <= 90
        if g["type"] == "Polygon":
            for i, ring in enumerate(g["coordinates"]):
                assert len(ring) >= 4 and ring[0] == ring[-1]
                assert (_ring_area(ring) > 0) == (i == 0)       # outer counterclockwise, holes clockwise
    assert len(kinds["survey point"]) == 3 and len(kinds["declared source"]) == 8 and len(kinds["track"]) == 1
    # longitude first: the demo origin is at 50.65 N, 3.81 W
    gate = next(f for f in doc["features"] if f["properties"].get("label") == "gate")
    lon, lat = gate["geometry"]["coordinates"]
    assert lon == pytest.approx(LON0 - 60 / (6371008.8 * np.cos(np.radians(LAT0))) * 180 / np.pi, abs=1e-6)
    assert lat == pytest.approx(LAT0 + 40 / 6371008.8 * 180 / np.pi, abs=1e-6)
    assert "predicted zone" not in kinds      # the demo's declared sources stay under 100 % at 1.5 m


def test_geojson_zone_polygons(surveyed):
    # a declared source low enough to give a 100 % zone at 1.5 m (invented: 100 W into 10 dBi at 1.5 m)
    from meterlink.physics.prediction import Source
    from meterlink.survey import gis
    from meterlink.survey.map import site_frame

    sv, out, html = surveyed
    fr = site_frame(sv)
    fr.sources = [Source("test panel", 100.0, 10.0, 900e6, 10.0, 10.0, 1.5)]     # alone: its own zone
    zones = gis.zone_rings(sv, fr)
    assert len(zones) == 1
    doc = gis.geojson(sv, fr, zones)
    z = [f for f in doc["features"] if f["properties"]["kind"] == "predicted zone"]
    assert len(z) == 1 and z[0]["geometry"]["type"] == "Polygon"
    ring = z[0]["geometry"]["coordinates"][0]
    assert len(ring) >= 4 and ring[0] == ring[-1] and _ring_area(ring) > 0     # closed, counterclockwise
    # ICNIRP 1998 public at 900 MHz: S = f/200 = 4.5 W/m^2 (Table 7); S = P G / (4 pi r^2) = 4.5 gives
    # r = sqrt(1000 / (4 pi 4.5)) = 4.205 m around the panel at its own height
    lon, lat = np.array(ring).T
    x = (lon - LON0) * np.pi / 180 * 6371008.8 * np.cos(np.radians(LAT0))
    y = (lat - LAT0) * np.pi / 180 * 6371008.8
    r = np.hypot(x - 10.0, y - 10.0)
    assert r.max() == pytest.approx(4.205, abs=0.6) and r.min() > 3.0
    json.dumps(doc, allow_nan=False)


def test_kml_and_gpx_are_well_formed_with_their_namespaces(surveyed):
    sv, out, html = surveyed
    kml = ET.parse(out / "survey.kml").getroot()
    assert kml.tag == "{http://www.opengis.net/kml/2.2}kml"
    ns = {"k": "http://www.opengis.net/kml/2.2"}
    names = [e.text for e in kml.iterfind(".//k:Placemark/k:name", ns)]
    assert "1 gate" in names and "track" in names and "Tor FM A" in names
    assert SAFETY_LINE in kml.find("k:Document/k:description", ns).text
    styles = {s.get("id"): s.find("k:IconStyle/k:color", ns) for s in kml.iterfind(".//k:Style", ns)}
    assert [styles[f"band{i}"].text for i in range(6)] == [kml_colour(c) for c in PERCENT_COLOURS]
    for c in kml.iterfind(".//k:coordinates", ns):
        for tup in c.text.split():
            lon, lat = map(float, tup.split(","))
            assert -3.9 < lon < -3.7 and 50.6 < lat < 50.7
    gpx = ET.parse(out / "survey.gpx").getroot()
    g = {"g": "http://www.topografix.com/GPX/1/1"}
    assert gpx.tag == "{http://www.topografix.com/GPX/1/1}gpx" and gpx.get("version") == "1.1"
    order = [re.sub(r"\{.*\}", "", e.tag) for e in gpx]
    assert order == sorted(order, key=["metadata", "wpt", "rte", "trk"].index)    # GPX 1.1 element order
    pts = gpx.findall("g:trk/g:trkseg/g:trkpt", g)
    assert len(pts) >= 25 and all(p.find("g:time", g) is not None for p in pts)
    assert SAFETY_LINE in gpx.find("g:metadata/g:desc", g).text


def test_map_title_lines_fit_the_map():
    # a long survey title and the long origin note (no site position) are wrapped, not cut: every
    # line fits the map's width and every word is there
    from meterlink.survey.map import _TITLE_CHARS, SiteFrame, map_title
    title = "Annual walk-round of the Brannock Tor transmitting site (invented), after the band III antenna change"
    note = "origin: first GNSS position (50.651560, -3.813551); the plan gives no site latitude/longitude"
    text = map_title({"title": title, "site": {"name": "x"}}, SiteFrame(50.65156, -3.813551, note))
    lines = text.split("\n")
    assert len(lines) >= 3 and all(len(line) <= _TITLE_CHARS for line in lines)
    assert " ".join(lines) == f"{title} {note}; equirectangular projection, local metres"
