"""Reports from a station database: current state, period statistics, publication exports (CSV/JSON).

Every output names the limit set (standard, tier, source of the reference level) and the
convention (percent of the field or of the power-density reference level) and carries the
safety cautions. Reads only the monitoring tables of meterlink.station.derived and the Store's events.
"""

from __future__ import annotations

import csv
import datetime as _dt
import io
import json
import math
import re

import numpy as np

from meterlink.station import derived
from meterlink.errors import MeterlinkError
from meterlink.safetext import clean_text, clean_tree, csv_cell
from meterlink.station.stats import PERCENTILE_METHOD, Reference, period_stats, profiles
from meterlink.physics.units import Z0_OHM


def _rows(conn, sql, params=()):
    cur = conn.execute(sql, params)
    cols = [c[0] for c in cur.description]
    return [dict(zip(cols, r)) for r in cur.fetchall()]


def station_info(conn) -> tuple[dict, list[dict]]:
    """(station row, meter rows) of the (single) station recorded in a database."""
    try:
        st = _rows(conn, "SELECT * FROM mon_station ORDER BY id")
    except Exception:  # noqa: BLE001 - sqlite3.OperationalError: not a monitoring database
        st = []
    if not st:
        raise MeterlinkError("database has no monitoring station record (was it written by 'meterlink monitor'?)")
    meters = _rows(conn, "SELECT * FROM mon_meter WHERE station_id=? ORDER BY meter", (st[0]["id"],))
    return st[0], meters


def iso(t) -> str | None:
    return None if t is None else _dt.datetime.fromtimestamp(t, _dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def export_file_name(st: dict, t0: float, t1: float, fmt: str) -> str:
    """The file name of an export written into a folder: station, content and UTC span, e.g.
    'mast-7_6min_20261101T000000Z_20261201T000000Z.csv'; only [a-z0-9-] from the station name."""
    slug = re.sub(r"[^a-z0-9]+", "-", str(st.get("name") or "").lower()).strip("-")[:60].strip("-") or "station"
    span = "_".join(_dt.datetime.fromtimestamp(t, _dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ") for t in (t0, t1))
    return f"{slug}_6min_{span}.{fmt}"


def heartbeat_s(st: dict) -> float:
    """The station file's heartbeat interval as recorded with the station (10 s when not given)."""
    import tomllib
    try:
        v = tomllib.loads(st.get("config_text") or "").get("station", {}).get("heartbeat_s", 10.0)
    except tomllib.TOMLDecodeError:
        return 10.0
    return float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) and v > 0 else 10.0


def current_state(conn, now_utc: float, recent_events: int = 10) -> dict:
    """What `meterlink status` shows: station, heartbeat, each meter's link, last value, health, alarms.

    ``stale``: the station is recorded as running but its heartbeat is older than 3 heartbeat intervals
    (the monitor hangs or was killed). Percentages follow the station's convention (``last_pct``)."""
    st, meters = station_info(conn)
    conv = st["convention"] or "power"
    hb = heartbeat_s(st)
    age = None if st["heartbeat_utc"] is None else now_utc - st["heartbeat_utc"]
    out = {"station": st["name"], "state": st["state"], "runs": st["runs"], "pid": st["pid"],
           "heartbeat_utc": iso(st["heartbeat_utc"]), "heartbeat_age_s": age, "heartbeat_s": hb,
           "stale": st["state"] == "running" and (age is None or age > 3 * hb),
           "standard": st["standard"], "tier": st["tier"], "convention": conv,
           "pct_label": "% S ref" if conv == "power" else "% E ref", "meters": []}
    for m in meters:
        active = _rows(conn, "SELECT rule, t_on_utc, peak_value FROM mon_alarm WHERE station_id=? AND meter=? "
                       "AND state='active'", (st["id"], m["meter"]))
        day = _rows(conn, "SELECT sum(covered_s) AS c FROM mon_block WHERE station_id=? AND meter=? AND band='total' "
                    "AND t_start_utc >= ?", (st["id"], m["meter"], now_utc - 86400.0))[0]["c"] or 0.0
        e = m["last_e_v_per_m"]
        due = m["cert_due"]
        days = None if not due else (_dt.date.fromisoformat(due) - _dt.date.fromtimestamp(now_utc)).days
        pct_f = None if e is None else 100 * e / m["e_ref_v_per_m"]
        pct_p = None if e is None else 100 * (e * e / Z0_OHM) / m["s_ref_w_per_m2"]
        out["meters"].append({
            "meter": m["meter"], "port": m["port"], "link": m["link_state"], "last_seen_utc": iso(m["last_seen_utc"]),
            "last_e_v_per_m": e, "u_expanded_db": m["u_expanded_db"],
            "last_pct": pct_p if conv == "power" else pct_f, "last_pct_field": pct_f, "last_pct_power": pct_p,
            "coverage_24h": min(day / 86400.0, 1.0), "battery_pct": m["battery_pct"],
            "temperature_degc": m["temperature_degc"], "drift_ppm": m["drift_ppm"],
            "certificate": m["certificate"], "certificate_due": due, "certificate_days_left": days,
            "active_alarms": active})
    out["recent_events"] = _rows(conn, "SELECT t_utc, kind, severity, message FROM events ORDER BY t_utc DESC, id "
                                 "DESC LIMIT ?", (recent_events,))
    for ev in out["recent_events"]:
        ev["t_utc"] = iso(ev["t_utc"])
    # names, ports and event messages (device fault texts among them) reach a terminal: no control codes
    return clean_tree(out)


def _reference(st: dict, m: dict) -> Reference:
    return Reference(st["standard"], st["tier"], m["e_ref_v_per_m"], m["s_ref_w_per_m2"], st["convention"] or "power")


def statistics(conn, t0: float, t1: float, periods=("day", "week", "month")) -> dict:
    """Per-meter period statistics and profiles between t0 and t1 (UTC seconds)."""
    st, meters = station_info(conn)
    out = {"station": st["name"], "from_utc": iso(t0), "to_utc": iso(t1), "standard": st["standard"],
           "tier": st["tier"], "convention": st["convention"], "percentile_method": PERCENTILE_METHOD,
           "block_s": st["block_s"], "timezone": st["timezone"] or "UTC", "meters": []}
    for m in meters:
        ref = _reference(st, m)
        b = derived.blocks(conn, st["id"], m["meter"], "total", t0, t1)
        t = np.array([r["t_start_utc"] for r in b], dtype=float)
        e = np.array([np.nan if r["e_rms_v_per_m"] is None else r["e_rms_v_per_m"] for r in b], dtype=float)
        cov = np.array([r["covered_s"] for r in b], dtype=float)
        ok = np.array([bool(r["complete"]) for r in b], dtype=bool)
        run = {}
        for r in derived.running(conn, st["id"], m["meter"], "total", t0, t1):
            run.setdefault(r["window_s"], ([], []))
            run[r["window_s"]][0].append(r["t_start_utc"])
            run[r["window_s"]][1].append(np.nan if r["e_max_v_per_m"] is None else r["e_max_v_per_m"])
        entry = {"meter": m["meter"], "e_ref_v_per_m": ref.e_ref_v_per_m, "s_ref_w_per_m2": ref.s_ref_w_per_m2,
                 "label": ref.label(), "n_overrange_blocks": sum(1 for r in b if r["n_overrange"])}
        for p in periods:
            entry[p] = period_stats(ref, t, e, cov, ok, t0, t1, p, out["timezone"], run)
        entry.update(profiles(ref, t, e, ok, out["timezone"]))
        out["meters"].append(entry)
    return clean_tree(out)


def series_rows(conn, t0: float, t1: float) -> tuple[dict, list[dict]]:
    """The 6-minute series of every meter for publication."""
    st, meters = station_info(conn)
    rows = []
    for m in meters:
        ref = _reference(st, m)
        for r in derived.blocks(conn, st["id"], m["meter"], "total", t0, t1):
            e = r["e_rms_v_per_m"]
            rows.append({"meter": m["meter"], "start_utc": iso(r["t_start_utc"]),
                         "end_utc": iso(r["t_start_utc"] + r["block_s"]),
                         "e_rms_v_per_m": None if e is None else round(e, 6),
                         "percent_of_reference": None if e is None else round(float(ref.pct(e)), 4),
                         "coverage": round(min(r["covered_s"] / r["block_s"], 1.0), 4),
                         "complete": bool(r["complete"]), "overrange_lower_bound": bool(r["n_overrange"])})
    return st, rows


def header_lines(st: dict, safety: str) -> list[str]:
    conv = "percent of the power-density reference level (S = E^2/Z0)" if st["convention"] == "power" \
        else "percent of the field-strength reference level"
    return [f"station: {st['name']}", f"limit set: {st['standard']} {st['tier']} (whole-body reference levels)",
            f"convention: {conv}", "values: RMS over fixed 6-minute blocks in the power domain; "
            "overrange blocks are lower bounds", f"caution: {safety}"]


def to_csv(st: dict, rows: list[dict], safety: str) -> str:
    """The 6-minute series as CSV (RFC 4180 quoting) under '#' comment lines; no text can start a
    spreadsheet formula or break a line (meterlink.safetext)."""
    buf = io.StringIO()
    for line in header_lines(st, safety):
        buf.write(f"# {clean_text(line)}\n")
    cols = ["meter", "start_utc", "end_utc", "e_rms_v_per_m", "percent_of_reference", "coverage", "complete",
            "overrange_lower_bound"]
    w = csv.DictWriter(buf, fieldnames=cols, lineterminator="\n")
    w.writeheader()
    w.writerows({k: csv_cell(v) for k, v in r.items()} for r in rows)
    return buf.getvalue()


def to_json(doc) -> str:
    def clean(x):
        if isinstance(x, float) and not math.isfinite(x):
            return None
        if isinstance(x, dict):
            return {k: clean(v) for k, v in x.items()}
        if isinstance(x, (list, tuple)):
            return [clean(v) for v in x]
        return x
    return json.dumps(clean(doc), indent=2)


def html_page(conn, now_utc: float, t0: float, t1: float, template_dir=None) -> str:
    """The station's publication page: current state and period statistics as one HTML page
    (template station.html, restyled from template_dir when given), with the cautions."""
    from meterlink.cautions import SAFETY_LINE
    from meterlink.reports.templating import render

    st, _ = station_info(conn)
    state, stats = current_state(conn, now_utc), statistics(conn, t0, t1)
    title = f"Monitoring station {clean_text(st['name'])}"
    return render("station.html", template_dir, title=title, ident=f"{title}, {iso(t0)} to {iso(t1)}",
                  state=state, stats=stats, header=header_lines(st, SAFETY_LINE)[:-1], made_utc=now_utc,
                  periods=("day", "week", "month"),
                  running_keys=lambda rows: [k for k in (rows[0] if rows else {}) if k.endswith("s_max_pct")],
                  running_label=lambda k: k.replace("running_", "").replace("s_max_pct", " s running max %"))
