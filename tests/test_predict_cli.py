"""``meterlink predict``: text, JSON, GeoJSON and PNG outputs carry the cautions and the model note;
bad input is one line and exit 2. Expected numbers are hand-worked from 47 CFR 1.1310 Table 1 (B)
(as packaged and checked in fcc-1310.toml); the site and sources in these files are invented."""

from __future__ import annotations

import json
import math
import subprocess
import sys

import pytest

from meterlink.cli import SAFETY_LINE, main

SITE = """
[site]
name = "test roof (invented)"
origin = "mast foot, x east, y north"
standard = "fcc-1310"
ground_factor = 1.0

[[source]]
name = "iso"
frequency = "900MHz"
power_w = 1.0
gain_dbi = 30.0
height_m = 1.5

[[source]]
name = "sector"
freq_hz = 2.4e9
power_w = 20
gain_dbi = 15
x_m = 20
y_m = 5
height_m = 4
azimuth_deg = 270
h_beamwidth_deg = 65
v_beamwidth_deg = 10
electrical_tilt_deg = 2
"""


def _flat(text: str) -> str:
    return " ".join(text.split())


@pytest.fixture
def site_file(tmp_path):
    p = tmp_path / "site.toml"
    p.write_text(SITE, encoding="utf-8")
    return p


def test_text_output_distances_and_cautions(site_file, capsys):
    assert main(["predict", str(site_file), "--tier", "public", "--at", "10,0,1.5"]) == 0
    out = _flat(capsys.readouterr().out)
    # 47 CFR 1.1310 Table 1 (B), 900 MHz: 6 W/m^2; EIRP 1000 W: r = sqrt(1000/(4*pi*6)) = 3.64 m
    assert "3.64 (public, 100 %, far)" in out
    assert _flat(SAFETY_LINE) in out
    assert "estimates from declared sources" in out
    assert "checked against 47 CFR 1.1310 Table 1 (B)" in out


def test_json_point_and_zones(site_file, capsys):
    assert main(["predict", str(site_file), "--tier", "public", "--at", "10,0,1.5", "--grid", "15",
                 "--step", "0.25", "--margin", "50", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["safety"] == SAFETY_LINE and "far-field formula" in doc["model_note"]
    iso = doc["points"][0]["by_source"][0]
    # hand-worked: S = 1000/(4*pi*100) = 0.795775 W/m^2, E = sqrt(Z0*S) = 17.3144 V/m
    assert iso["s_w_per_m2"] == pytest.approx(0.795775, rel=1e-5)
    assert iso["e_v_per_m"] == pytest.approx(17.3144, rel=1e-4)
    zones = {(z["tier"], z["percent"]): z for z in doc["zones"]}
    # the isotropic source alone: 100 % inside r = 3.64 m, area pi*r^2 = 41.67 m^2 (the sector adds
    # nothing there); the contour of a 0.25 m grid follows the circle to about 1 %
    assert zones[("public", 100.0)]["area_m2"] == pytest.approx(math.pi * 3.641828 ** 2, rel=0.02)
    assert zones[("public", 50.0)]["area_m2"] > zones[("public", 100.0)]["area_m2"]


def test_map_and_geojson_files(site_file, tmp_path, capsys):
    png, gj = tmp_path / "zones.png", tmp_path / "zones.geojson"
    assert main(["predict", str(site_file), "--map", str(png), "--geojson", str(gj), "--margin", "50"]) == 0
    out = _flat(capsys.readouterr().out)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and png.stat().st_size > 20_000
    doc = json.loads(gj.read_text())
    assert doc["type"] == "FeatureCollection" and doc["local_frame"]["origin"] == "mast foot, x east, y north"
    assert doc["safety"] == SAFETY_LINE
    polys = [f for f in doc["features"] if f["geometry"]["type"] == "Polygon"]
    assert {(f["properties"]["tier"], f["properties"]["percent_of_reference_level"]) for f in polys} >= {
        ("public", 100.0), ("occupational", 100.0)}
    for f in polys:
        ring = f["geometry"]["coordinates"][0]
        assert ring[0] == ring[-1] and len(ring) >= 4
    assert [f["properties"]["name"] for f in doc["features"] if f["geometry"]["type"] == "Point"] == ["iso", "sector"]
    assert "Map written" in out and _flat(SAFETY_LINE) in out


BAD = [
    ("[site]\norigin = 'o'\n[[source]]\nname = 'a'\nfrequency = '900MHz'\npower_w = -5\ngain_dbi = 3\nheight_m = 2\n",
     "power_w"),
    ("[site]\norigin = 'o'\n[[source]]\nname = 'a'\nfrequency = '900MHz'\npower_w = 5\ngain_dbi = 3\n", "height_m"),
    ("[site]\norigin = 'o'\n[[source]]\nname = 'a'\nfrequency = 'lots'\npower_w = 5\ngain_dbi = 3\nheight_m = 2\n",
     "frequency"),
    ("[site]\norigin = 'o'\n[[source]]\nname = 'a'\nfreq_hz = 9e8\npower_w = 5\ngain_dbi = 3\nheight_m = 2\n"
     "colour = 'red'\n", "colour"),
    ("[site]\nname = 'no origin'\n[[source]]\nname = 'a'\nfreq_hz = 9e8\npower_w = 5\ngain_dbi = 3\nheight_m = 2\n",
     "origin"),
    ("[site]\norigin = 'o'\n", "no [[source]]"),
    ("this is = = not toml", "not valid TOML"),
]


@pytest.mark.parametrize("text,needle", BAD)
def test_bad_files_one_line_exit_2(tmp_path, capsys, text, needle):
    p = tmp_path / "bad.toml"
    p.write_text(text, encoding="utf-8")
    assert main(["predict", str(p)]) == 2
    err = capsys.readouterr().err.strip()
    assert needle in err and len(err.splitlines()) == 1 and "Traceback" not in err


@pytest.mark.parametrize("extra,needle", [(["--at", "1,2"], "X,Y,Z"), (["--grid", "-3"], "--grid"),
                                          (["--standard", "nope"], "unknown standard"),
                                          (["--ground-factor", "0.5"], "ground-factor"),
                                          (["--map", "/no/such/dir/x.png"], "no such directory")])
def test_bad_options_one_line_exit_2(site_file, capsys, extra, needle):
    assert main(["predict", str(site_file), *extra]) == 2
    err = capsys.readouterr().err.strip()
    assert needle in err and len(err.splitlines()) == 1


def test_missing_file_as_a_real_process(tmp_path):
    r = subprocess.run([sys.executable, "-m", "meterlink", "predict", str(tmp_path / "none.toml")],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "no such file" in r.stderr and "Traceback" not in r.stderr


def test_example_file_in_deploy_runs(capsys):
    from pathlib import Path

    example = Path(__file__).resolve().parents[1] / "deploy" / "example-sources.toml"
    assert main(["predict", str(example), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert len(doc["sources"]) == 3 and doc["safety"] == SAFETY_LINE



def test_zone_cut_by_the_grid_edge_says_so(site_file, tmp_path, capsys):
    # the isotropic source's public zone has a radius of 3.64 m (hand-worked above); a grid of +-2 m
    # cannot hold it, so the exported polygon must say it was clipped
    gj = tmp_path / "z.geojson"
    assert main(["predict", str(site_file), "--tier", "public", "--grid", "2", "--step", "0.1",
                 "--geojson", str(gj)]) == 0
    capsys.readouterr()
    polys = [f for f in json.loads(gj.read_text())["features"] if f["geometry"]["type"] == "Polygon"]
    assert polys and all(f["properties"]["clipped_by_grid_edge"] for f in polys)


def test_point_inside_far_field_distance_is_noted(site_file, capsys):
    # 900 MHz: lambda = 299792458/900e6 = 0.3331 m; a point 0.2 m from the source is inside it
    assert main(["predict", str(site_file), "--tier", "public", "--at", "0,0.2,1.5", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    p = doc["points"][0]
    assert p["by_source"][0]["inside_far_field_distance"] is True
    assert any("iso: the point is 0.2 m away" in m and "overestimates" in m for m in p["messages"])


def test_geojson_rings_follow_rfc7946_orientation(site_file, tmp_path, capsys):
    # RFC 7946 section 3.1.6: exterior rings counterclockwise, holes clockwise (shoelace sign)
    gj = tmp_path / "z.geojson"
    assert main(["predict", str(site_file), "--grid", "12", "--step", "0.2", "--margin", "30",
                 "--geojson", str(gj)]) == 0
    capsys.readouterr()
    polys = [f for f in json.loads(gj.read_text())["features"] if f["geometry"]["type"] == "Polygon"]
    assert polys
    for f in polys:
        for i, ring in enumerate(f["geometry"]["coordinates"]):
            area = 0.5 * sum(x0 * y1 - x1 * y0 for (x0, y0), (x1, y1) in zip(ring, ring[1:]))
            assert (area > 0) == (i == 0)
