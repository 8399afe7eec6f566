"""The status and public pages in a real headless chromium (Debian's /usr/bin/chromium, driven by Playwright),
loaded from the real service on loopback, with data synced from real station files into a real PostgreSQL.

Expected percentages are computed from the blocks in the station files and the ICNIRP 2020 reference
levels typed from the primary text (Health Phys 118(5), Table 5, general public, whole body, 30-400 MHz:
E = 27.7 V/m, S = 2 W/m^2), with Z0 from scipy.constants.
"""

from __future__ import annotations

import json
import math
import sqlite3
import urllib.error
import urllib.parse
import urllib.request
from pathlib import Path

import numpy as np
import pytest
import scipy.constants as sc

from test_central_support import (ROOT, Service, central_database, free_port, make_station_db,
                                  write_central_config)

CHROMIUM = "/usr/bin/chromium"
E_REF_ICNIRP2020_100MHZ = 27.7         # V/m, ICNIRP 2020 Table 5, general public, 30-400 MHz
S_REF_ICNIRP2020_100MHZ = 2.0          # W/m^2, same row
Z0 = math.sqrt(sc.mu_0 / sc.epsilon_0)
OPERATOR_TOKEN = "op-" + "k3Jq9xW2mZ7tR4vB"


def _register(dsn, name):
    from meterlink.network import central

    conn = central.connect(dsn)
    try:
        su = central.add_station(conn, name)
        return su, central.create_token(conn, su, "pages")[2]
    finally:
        conn.close()


def _station_file(db: Path, name: str, convention: str, n_blocks: int, alarm: bool) -> None:
    """A station file with its meter row as the monitor writes it (reference levels and certificate due
    date from the station code), blocks, events and, when asked, an active alarm."""
    from meterlink.physics.certificate import load_certificate
    from meterlink.station.monitor import band_reference
    from meterlink.storage.store import Store

    make_station_db(db, name, n_blocks=n_blocks, n_events=3)
    e_ref, s_ref = band_reference("icnirp-2020", "public", 100e6)
    cert_path = ROOT / "calibration" / "demo-probe.toml"
    cert = load_certificate(cert_path)
    with Store(db, create=False) as store, store.write() as conn:
        conn.execute("UPDATE mon_station SET convention = ?", (convention,))
        conn.execute("INSERT INTO mon_meter (station_id, meter, port, certificate, freq_hz, e_ref_v_per_m, "
                     "s_ref_w_per_m2, cert_due, link_state) VALUES (1, 'm1', '/dev/null', ?, 100e6, ?, ?, ?, 'up')",
                     (str(cert_path), e_ref, s_ref, cert.due_date.isoformat()))
        if alarm:
            t = conn.execute("SELECT max(t_start_utc) FROM mon_block").fetchone()[0]
            conn.execute("INSERT INTO mon_alarm VALUES (1, 'block-over-50pct', 'm1', 'total', 'active', ?, ?, 61.0, ?)",
                         (t, t, t))


def _sync(db, url, token, su):
    from meterlink.network.syncd import SyncSettings, sync_once
    from meterlink.storage.store import Store

    with Store(db, create=False) as store:
        s = sync_once(store, SyncSettings(url=url, token=token, station_uuid=su, timeout_s=10.0))
    assert s.error is None and sum(s.pending.values()) == 0


def _latest_e(db) -> float:
    with sqlite3.connect(db) as c:
        return c.execute("SELECT e_rms_v_per_m FROM mon_block WHERE band='total' ORDER BY t_start_utc DESC "
                         "LIMIT 1").fetchone()[0]


@pytest.fixture(scope="module")
def net(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("pages")
    with central_database() as dsn:
        port = free_port()
        (tmp / "operator.token").write_text(OPERATOR_TOKEN + "\n")
        cfg = write_central_config(tmp / "central.toml", dsn, port)
        cfg.write_text(cfg.read_text() + 'operator_token_file = "operator.token"\n')
        svc = Service(cfg, port, tmp / "service.log").start()
        try:
            stations = {}
            for name, conv, n, alarm in (("Hilltop mast east", "power", 300, False),
                                         ("Riverside school roof", "field", 300, True)):
                su, token = _register(dsn, name)
                db = tmp / f"{conv}.db"
                _station_file(db, name, conv, n, alarm)
                _sync(db, svc.url, token, su)
                stations[name] = {"uuid": su, "db": db, "e": _latest_e(db)}
            for name in ("Quarry road (not yet installed)", "Mill lane <b>north</b> & annex"):
                su, _ = _register(dsn, name)
                stations[name] = {"uuid": su}
            yield {"url": svc.url, "stations": stations, "tmp": tmp, "dsn": dsn}
        finally:
            svc.stop()


@pytest.fixture(scope="module")
def browser():
    from playwright.sync_api import sync_playwright

    assert Path(CHROMIUM).exists(), "Debian's chromium is needed (apt-get install chromium; .ci/run does it)"
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, headless=True)
        try:
            yield b
        finally:
            b.close()


def _shot(page, folder: Path, name: str) -> Path:
    """A full-page screenshot, checked not to be blank (a page of one colour has no spread)."""
    from PIL import Image

    path = folder / f"{name}.png"
    page.screenshot(path=str(path), full_page=True)
    px = np.asarray(Image.open(path).convert("L"), dtype=float)
    assert px.std() > 10.0 and (px < 128).mean() > 0.005, f"{path} looks blank"
    return path


def _json(url, auth=None):
    req = urllib.request.Request(url, headers={"Authorization": auth} if auth else {})
    try:
        with urllib.request.urlopen(req, timeout=10) as r:
            return r.status, json.loads(r.read())
    except urllib.error.HTTPError as exc:
        return exc.code, json.loads(exc.read())


def test_the_status_page_shows_every_station_worst_first_with_its_percentage(net, browser):
    from meterlink.cautions import SAFETY_LINE

    st = net["stations"]
    ctx = browser.new_context(http_credentials={"username": "operator", "password": OPERATOR_TOKEN})
    page = ctx.new_page()
    resp = page.goto(net["url"] + "/status")
    assert resp.status == 200
    text = page.inner_text("body")
    assert SAFETY_LINE in text
    names = [page.inner_text(f"table.net tbody tr:nth-child({i}) td:first-child") for i in (1, 2, 3, 4)]
    # worst first: the station with an active alarm, then those never seen, then the one that is fine; a
    # name holding markup is shown as the characters it is made of, never as markup
    assert names == ["Riverside school roof", "Mill lane <b>north</b> & annex", "Quarry road (not yet installed)",
                     "Hilltop mast east"], names
    assert page.locator("table.net b").count() == 0
    rows = {n: page.inner_text(f"table.net tbody tr:nth-child({i})") for i, n in enumerate(names, 1)}
    e_p, e_f = st["Hilltop mast east"]["e"], st["Riverside school roof"]["e"]
    pct_power = 100 * (e_p * e_p / Z0) / S_REF_ICNIRP2020_100MHZ
    pct_field = 100 * e_f / E_REF_ICNIRP2020_100MHZ
    assert f"{pct_power:.2f} %" in rows["Hilltop mast east"] and "S reference" in rows["Hilltop mast east"]
    assert f"{pct_field:.2f} %" in rows["Riverside school roof"] and "E reference" in rows["Riverside school roof"]
    assert "alarm" in rows["Riverside school roof"] and "block-over-50pct (m1, total)" in rows["Riverside school roof"]
    assert "never seen" in rows["Quarry road (not yet installed)"]
    assert "min ago" in rows["Hilltop mast east"] and "ok" in rows["Hilltop mast east"]
    _shot(page, net["tmp"], "status")
    # by name, on request
    page.click("text=by name")
    assert page.inner_text("table.net tbody tr:nth-child(1) td:first-child") == "Hilltop mast east"
    # the station page: plots drawn as SVG with the envelope, the certificate and its due date, events
    page.click("text=Hilltop mast east")
    text = page.inner_text("body")
    assert SAFETY_LINE in text and "Certificate in force" in text and "days left" in text
    assert "event 2 of Hilltop mast east" in text
    assert page.locator("svg.plot").count() == 2
    assert page.locator("svg.plot polygon").count() >= 2          # both periods have data drawn
    box = page.locator("svg.plot").first.bounding_box()
    assert box["width"] > 400 and box["height"] > 100
    _shot(page, net["tmp"], "status-station")
    ctx.close()


def test_operator_pages_and_api_need_the_operator_token(net, browser):
    # without the token a browser is asked to log in (headless chromium cannot show the prompt, so the
    # answer is read as the browser's own request client receives it)
    ctx = browser.new_context()
    resp = ctx.request.get(net["url"] + "/status")
    assert resp.status == 401 and resp.headers["www-authenticate"].startswith("Basic ")
    assert "operator login needed" in resp.text()
    ctx.close()
    code, ans = _json(net["url"] + "/api/v1/status", "Bearer wrong-token-of-some-length")
    assert code == 401 and "operator login" in ans["reason"]
    code, ans = _json(net["url"] + "/api/v1/status", f"Bearer {OPERATOR_TOKEN}")
    assert code == 200 and {s["name"] for s in ans["stations"]} == set(net["stations"])
    su = net["stations"]["Riverside school roof"]["uuid"]
    code, ans = _json(net["url"] + f"/api/v1/status/stations/{su}", f"Bearer {OPERATOR_TOKEN}")
    assert code == 200 and ans["alarms"][0]["state"] == "active" and ans["events"]
    code, ans = _json(net["url"] + "/api/v1/status/stations/00000000-0000-0000-0000-000000000000",
                      f"Bearer {OPERATOR_TOKEN}")
    assert code == 404 and "no station" in ans["reason"]


def test_public_pages_show_levels_and_cautions_without_internal_detail(net, browser):
    from meterlink.cautions import SAFETY_LINE

    st = net["stations"]
    ctx = browser.new_context()
    page = ctx.new_page()
    assert page.goto(net["url"] + "/").status == 200 and page.url.endswith("/public")
    html, text = page.content(), page.inner_text("body")
    assert SAFETY_LINE in text and "Hilltop mast east" in text and "alarm active" in text
    assert "awaiting first data" in text
    for s in st.values():
        assert s["uuid"] not in html                                 # no internal ids in what is published
    e_p = st["Hilltop mast east"]["e"]
    assert f"{100 * (e_p * e_p / Z0) / S_REF_ICNIRP2020_100MHZ:.2f} %" in text
    _shot(page, net["tmp"], "public")
    page.click("text=Riverside school roof")
    html, text = page.content(), page.inner_text("body")
    assert SAFETY_LINE in text and "Riverside school roof" in text and "block-over-50pct" in text
    assert "event 0 of" not in text and "Certificate" not in text and "/dev/null" not in text
    assert st["Riverside school roof"]["uuid"] not in html
    assert page.locator("svg.plot polygon").count() >= 2
    _shot(page, net["tmp"], "public-station")
    ctx.close()
    code, ans = _json(net["url"] + "/api/v1/public/stations")
    assert code == 200 and SAFETY_LINE == ans["cautions"]
    assert all("station_uuid" not in s for s in ans["stations"])
    code, ans = _json(net["url"] + "/api/v1/public/stations/Hilltop%20mast%20east")
    assert code == 200 and "station_uuid" not in ans["station"] and "events" not in ans
    # the JSON API writes 5 significant digits (docs/formats.md)
    assert ans["latest"]["pct"] == pytest.approx(100 * (e_p * e_p / Z0) / S_REF_ICNIRP2020_100MHZ, rel=1e-4)
    code, ans = _json(net["url"] + "/api/v1/public/stations/" + urllib.parse.quote("Mill lane <b>north</b> & annex"))
    assert code == 200 and ans["station"]["name"] == "Mill lane <b>north</b> & annex"
    assert ans["latest"]["state"] == "awaiting first data" and ans["plots"] == []
    try:                                                             # no anonymous list of stations and UUIDs
        urllib.request.urlopen(net["url"] + "/api/v1/stations", timeout=10)
        raise AssertionError("/api/v1/stations answered without a login")
    except urllib.error.HTTPError as exc:
        body = exc.read().decode("utf-8", "replace")
        assert exc.code in (401, 404) and all(s["uuid"] not in body for s in st.values())
    code, ans = _json(net["url"] + "/api/v1/public/stations/Nowhere")
    assert code == 404 and ans["reason"] == "no station named 'Nowhere' is published here"


@pytest.mark.parametrize("content, words", [(None, "cannot read"), ("short\n", "at least 16 characters")])
def test_a_bad_operator_token_file_stops_the_service_in_one_line(net, tmp_path, content, words):
    import subprocess
    import sys

    if content is not None:
        (tmp_path / "op.token").write_text(content)
    cfg = write_central_config(tmp_path / "central.toml", net["dsn"], free_port())
    cfg.write_text(cfg.read_text() + 'operator_token_file = "op.token"\n')
    p = subprocess.run([sys.executable, "-m", "meterlink", "central", "serve", "--config", str(cfg)],
                       capture_output=True, text=True, timeout=60, cwd=ROOT)
    assert p.returncode == 2 and words in p.stderr and "operator_token_file" in p.stderr
    assert "Traceback" not in p.stderr and len(p.stderr.strip().splitlines()) == 1, p.stderr
