"""What the status and public pages read from the central store, as plain dicts (docs/network.md, "Pages").

Percentages follow each station's convention (meterlink.station.stats): "field" is 100 E / E_ref,
"power" is 100 S / S_ref with the plane-wave S = E^2 / Z0. A station's state is, worst first:
alarm (an alarm is active), stale (nothing received for STALE_S), never seen (no batch yet), ok.
"""

from __future__ import annotations

import math
import time

from meterlink.physics.units import Z0_OHM

STALE_S = 1800.0          # no batch for 30 minutes: the station, its link or its sync is down
STATE_RANK = {"alarm": 0, "stale": 1, "never seen": 2, "ok": 3}
DAY_S = 86400.0


def pct(e_v_per_m, convention: str | None, e_ref_v_per_m, s_ref_w_per_m2):
    """Percent of the reference level in the station's convention (None when a value or level is missing)."""
    if e_v_per_m is None or not math.isfinite(e_v_per_m):
        return None
    if (convention or "power") == "field":
        return None if not e_ref_v_per_m else 100.0 * e_v_per_m / e_ref_v_per_m
    return None if not s_ref_w_per_m2 else 100.0 * (e_v_per_m * e_v_per_m / Z0_OHM) / s_ref_w_per_m2


def state_of(last_seen_utc, alarms_on: int, now_utc: float) -> str:
    if alarms_on:
        return "alarm"
    if last_seen_utc is None:
        return "never seen"
    return "stale" if now_utc - last_seen_utc > STALE_S else "ok"


def ago(t_utc, now_utc: float) -> str:
    """'x min ago' (or hours/days) of a time, or '' for None."""
    if t_utc is None:
        return ""
    s = max(0.0, now_utc - t_utc)
    if s < 3600:
        return f"{int(s // 60)} min ago"
    if s < 2 * DAY_S:
        return f"{s / 3600:.1f} h ago"
    return f"{s / DAY_S:.0f} days ago"


_OVERVIEW = """
SELECT s.station_uuid::text AS station_uuid, s.name, s.latitude_deg, s.longitude_deg, s.standard, s.tier,
       coalesce(s.convention, 'power') AS convention, s.last_seen_utc,
       (SELECT count(*) FROM alarms a WHERE a.station_uuid = s.station_uuid AND a.state = 'active') AS alarms_on,
       (SELECT string_agg(a.rule || ' (' || a.meter || ', ' || a.band || ')', '; ' ORDER BY a.rule, a.meter)
          FROM alarms a WHERE a.station_uuid = s.station_uuid AND a.state = 'active') AS alarm_text,
       m.meter, m.e_ref_v_per_m, m.s_ref_w_per_m2, b.t_start_utc, b.block_s, b.e_rms_v_per_m
FROM stations s
LEFT JOIN meters m ON m.station_uuid = s.station_uuid
LEFT JOIN LATERAL (SELECT t_start_utc, block_s, e_rms_v_per_m FROM blocks
                   WHERE station_uuid = s.station_uuid AND band = 'total'
                     AND meter = m.meter
                   ORDER BY t_start_utc DESC LIMIT 1) b ON true
"""
_ONE = " WHERE s.station_uuid::text = %s"


def overview(conn, now_utc: float | None = None, sort: str = "worst", only_uuid: str | None = None) -> list[dict]:
    """Every station (or only one): state, latest 6-minute percent (largest over its meters), last seen,
    open alarms."""
    now = time.time() if now_utc is None else now_utc
    by: dict[str, dict] = {}
    cur = conn.execute(_OVERVIEW) if only_uuid is None else conn.execute(_OVERVIEW + _ONE, (only_uuid,))
    cols = [c.name for c in cur.description]
    for r in cur.fetchall():
        d = dict(zip(cols, r))
        st = by.get(d["station_uuid"])
        if st is None:
            st = by[d["station_uuid"]] = {
                k: d[k] for k in ("station_uuid", "name", "latitude_deg", "longitude_deg", "standard", "tier",
                                  "convention", "last_seen_utc", "alarms_on", "alarm_text")}
            st.update(state=state_of(d["last_seen_utc"], d["alarms_on"], now), pct=None, e_rms_v_per_m=None,
                      block_t_utc=None, last_seen_ago=ago(d["last_seen_utc"], now))
        p = pct(d["e_rms_v_per_m"], d["convention"], d["e_ref_v_per_m"], d["s_ref_w_per_m2"])
        better = (p is not None and (st["pct"] is None or p > st["pct"])) or \
            (st["pct"] is None and p is None and d["e_rms_v_per_m"] is not None and st["e_rms_v_per_m"] is None)
        if better:
            st.update(pct=p, e_rms_v_per_m=d["e_rms_v_per_m"], block_t_utc=d["t_start_utc"])
    rows = list(by.values())
    if sort == "name":
        rows.sort(key=lambda s: s["name"].casefold())
    else:               # worst first: state, then the highest percentage, then the name
        rows.sort(key=lambda s: (STATE_RANK[s["state"]], -(s["pct"] if s["pct"] is not None else -1.0),
                                 s["name"].casefold()))
    return rows


def station_by(conn, *, uuid: str | None = None, name: str | None = None) -> dict | None:
    """A station's own row (by UUID or by name), or None."""
    where, arg = ("station_uuid::text = %s", uuid) if uuid is not None else ("name = %s", name)
    cur = conn.execute("SELECT station_uuid::text AS station_uuid, name, latitude_deg, longitude_deg, elevation_m, "
                       "standard, tier, coalesce(convention, 'power') AS convention, block_s, timezone, "
                       f"last_seen_utc FROM stations WHERE {where}", (arg,))
    r = cur.fetchone()
    return None if r is None else dict(zip([c.name for c in cur.description], r))


def meters(conn, su: str) -> list[dict]:
    """The station's meters with their reference levels and the certificate in force (name, due date)."""
    cur = conn.execute(
        "SELECT m.meter, m.freq_hz, m.band_lo_hz, m.band_hi_hz, m.e_ref_v_per_m, m.s_ref_w_per_m2, "
        "m.certificate_sha256, m.cert_due, c.name AS certificate_name, h.link_state, h.battery_pct, "
        "h.last_seen_utc AS meter_seen_utc FROM meters m LEFT JOIN certificates c ON c.sha256 = m.certificate_sha256 "
        "LEFT JOIN health h ON h.station_uuid = m.station_uuid AND h.meter = m.meter "
        "WHERE m.station_uuid = %s ORDER BY m.meter", (su,))
    return [dict(zip([c.name for c in cur.description], r)) for r in cur.fetchall()]


def alarms(conn, su: str) -> list[dict]:
    cur = conn.execute("SELECT rule, meter, band, state, t_on_utc, peak_t_utc, peak_value, last_t_utc FROM alarms "
                       "WHERE station_uuid = %s ORDER BY state = 'active' DESC, t_on_utc DESC NULLS LAST", (su,))
    return [dict(zip([c.name for c in cur.description], r)) for r in cur.fetchall()]


def events(conn, su: str, limit: int = 50) -> list[dict]:
    """The newest events of a station (served by the events_station index)."""
    cur = conn.execute("SELECT t_utc, kind, severity, message FROM events WHERE station_uuid = %s "
                       "ORDER BY t_utc DESC LIMIT %s", (su, limit))
    return [dict(zip([c.name for c in cur.description], r)) for r in cur.fetchall()]


def newest_block(conn, su: str):
    """Start time of the station's newest 'total' block, or None."""
    r = conn.execute("SELECT t_start_utc + block_s FROM blocks WHERE station_uuid = %s AND band = 'total' "
                     "ORDER BY t_start_utc DESC LIMIT 1", (su,)).fetchone()
    return None if r is None else r[0]


def envelope(conn, su: str, meter: str, t0: float, t1: float, buckets: int = 240) -> list[tuple]:
    """(bucket start, min E, max E, blocks) of the 'total' blocks of one meter in [t0, t1), reduced in the
    database to at most ``buckets`` min/max pairs, so that a 30-day plot moves a few hundred rows, not 7200."""
    width = (t1 - t0) / buckets
    cur = conn.execute(ENVELOPE, (t0, t0, width, width, su, meter, t0, t1))
    return [tuple(r) for r in cur.fetchall()]


ENVELOPE = (
    "SELECT %s + width * k AS t, min(e_rms_v_per_m), max(e_rms_v_per_m), count(*) FROM "
    "(SELECT floor((t_start_utc - %s) / %s) AS k, %s::float8 AS width, e_rms_v_per_m FROM blocks "
    " WHERE station_uuid = %s AND meter = %s AND band = 'total' AND t_start_utc >= %s AND t_start_utc < %s "
    " AND e_rms_v_per_m IS NOT NULL) q GROUP BY k, width ORDER BY k")
