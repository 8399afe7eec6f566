"""Reports from a station database: current state, period statistics, publication exports (CSV/JSON).

Every output names the limit set (standard, tier, source of the reference level) and the
convention (percent of the field or of the power-density reference level) and carries the
safety cautions. Reads only the monitoring tables of meterlink.station.derived and the Store's events.
"""

from __future__ import annotations

import bisect
import csv
import itertools
import datetime as _dt
import io
import json
import math
import re
from json.encoder import encode_basestring_ascii as _encode_str

import numpy as np

from meterlink.errors import MeterlinkError
from meterlink.reports.digits import rounded_array, tidy
from meterlink.safetext import clean_text, clean_tree, csv_cell
from meterlink.station.stats import PERCENTILE_METHOD, Reference, period_bounds, period_stats, profiles
from meterlink.physics.units import Z0_OHM



#: How coverage is defined, shown beside every coverage figure (status, stats, reports).
COVERAGE_NOTE = ("coverage: seconds covered by stored readings / seconds of the period inside the record "
                 "(from the meter's first 6-minute block on)")

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
        # Coverage, one definition with `stats` (meterlink.station.stats): covered seconds / seconds of the
        # window that lie inside the record, here the last 24 h from the meter's first block on (a station
        # started 3 h ago and never down shows 100 %, not 12.5 %); COVERAGE_NOTE says so wherever it is shown.
        # The window ends now, or at the newest block if the data run ahead of this host's clock.
        rec = _rows(conn, "SELECT min(t_start_utc) AS t0, max(t_start_utc + block_s) AS t1 FROM mon_block WHERE "
                    "station_id=? AND meter=? AND band='total'", (st["id"], m["meter"]))[0]
        end = max(now_utc, rec["t1"]) if rec["t1"] is not None else now_utc
        start = max(end - 86400.0, rec["t0"]) if rec["t0"] is not None else end
        day = _rows(conn, "SELECT sum(covered_s) AS c FROM mon_block WHERE station_id=? AND meter=? AND "
                    "band='total' AND t_start_utc >= ?", (st["id"], m["meter"], start))[0]["c"] or 0.0
        span_s = end - start
        e = m["last_e_v_per_m"]
        due = m["cert_due"]
        days = None if not due else (_dt.date.fromisoformat(due) - _dt.date.fromtimestamp(now_utc)).days
        pct_f = None if e is None else 100 * e / m["e_ref_v_per_m"]
        pct_p = None if e is None else 100 * (e * e / Z0_OHM) / m["s_ref_w_per_m2"]
        out["meters"].append({
            "meter": m["meter"], "port": m["port"], "link": m["link_state"], "last_seen_utc": iso(m["last_seen_utc"]),
            "last_e_v_per_m": e, "u_expanded_db": m["u_expanded_db"],
            "last_pct": pct_p if conv == "power" else pct_f, "last_pct_field": pct_f, "last_pct_power": pct_p,
            "coverage_24h": min(day / span_s, 1.0) if span_s > 0 else None, "coverage_24h_window_s": span_s,
            "battery_pct": m["battery_pct"],
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


def _columns(conn, sql: str, params, ncols: int) -> np.ndarray:
    """Rows of a numeric query as an (n, ncols) float array (NULL becomes NaN), without per-row dicts."""
    rows = conn.execute(sql, params).fetchall()
    return np.array(rows, dtype=float).reshape(len(rows), ncols)


def statistics(conn, t0: float, t1: float, periods=("day", "week", "month")) -> dict:
    """Per-meter period statistics and profiles between t0 and t1 (UTC seconds)."""
    st, meters = station_info(conn)
    out = {"station": st["name"], "from_utc": iso(t0), "to_utc": iso(t1), "standard": st["standard"],
           "tier": st["tier"], "convention": st["convention"], "percentile_method": PERCENTILE_METHOD,
           "block_s": st["block_s"], "timezone": st["timezone"] or "UTC", "meters": []}
    for m in meters:
        ref = _reference(st, m)
        key = (st["id"], m["meter"], "total", t0, t1)
        span = "station_id=? AND meter=? AND band=? AND t_start_utc >= ? AND t_start_utc < ?"
        # the value only where the block is complete (NaN otherwise): complete & finite is all the statistics need
        b = _columns(conn, f"SELECT t_start_utc, CASE WHEN complete THEN e_rms_v_per_m END, covered_s FROM mon_block "
                     f"WHERE {span} ORDER BY t_start_utc", key, 3)
        t, e, cov = b[:, 0], b[:, 1], b[:, 2]
        ok = np.isfinite(e)
        n_over = conn.execute(f"SELECT count(*) FROM mon_block WHERE {span} AND n_overrange", key).fetchone()[0]
        windows = [w for w in _windows(conn, key[:3])
                   if conn.execute(f"SELECT 1 FROM mon_running WHERE {span} AND window_s=? LIMIT 1", (*key, w)).fetchone()]
        entry = {"meter": m["meter"], "e_ref_v_per_m": ref.e_ref_v_per_m, "s_ref_w_per_m2": ref.s_ref_w_per_m2,
                 "label": ref.label(), "n_overrange_blocks": n_over}
        days = period_bounds(t0, t1, "day", out["timezone"])
        day_max = {w: _running_max(conn, key[:3], w, days) for w in windows}
        for p in periods:
            bounds = days if p == "day" else period_bounds(t0, t1, p, out["timezone"])
            run = {w: v if p == "day" else _max_of_days(days, v, bounds) for w, v in day_max.items()}
            entry[p] = period_stats(ref, t, e, cov, ok, t0, t1, p, out["timezone"], running_max=run)
        entry.update(profiles(ref, t, e, ok, out["timezone"]))
        out["meters"].append(entry)
    return clean_tree(out)


_FINITE = "e_max_v_per_m BETWEEN -1.7976931348623157e308 AND 1.7976931348623157e308"   # not NULL or +-inf


def _windows(conn, key: tuple) -> list[float]:
    """The running-average windows stored for (station, meter, band), by index seeks (a skip scan)."""
    out: list[float] = []
    while True:
        (w,) = conn.execute("SELECT min(window_s) FROM mon_running WHERE station_id=? AND meter=? AND band=? AND "
                            "window_s > ?", (*key, out[-1] if out else -math.inf)).fetchone()
        if w is None:
            return out
        out.append(w)


def _running_max(conn, key: tuple, window_s: float, bounds) -> list:
    """The largest finite running average of one window in each period [start, end) of ``bounds``: an SQL
    max over the primary-key range of each period (exact, as a max is), 200 periods per statement."""
    out = []
    for i in range(0, len(bounds), 200):
        part = bounds[i:i + 200]
        values = ",".join("(?,?,?)" for _ in part)
        sql = (f"WITH p(k, a, b) AS (VALUES {values}) SELECT (SELECT max(e_max_v_per_m) FROM mon_running WHERE "
               f"station_id=? AND meter=? AND band=? AND window_s=? AND t_start_utc >= p.a AND t_start_utc < p.b "
               f"AND {_FINITE}) FROM p ORDER BY p.k")
        params = [x for k, (_, a, b) in enumerate(part) for x in (k, a, b)] + [*key, window_s]
        out.extend(v for (v,) in conn.execute(sql, params))
    return out


def _max_of_days(days, day_max: list, bounds) -> list:
    """Per-period maxima from per-day ones: a local week or month is a run of whole local days (both clipped
    to the same span), so its largest value is the largest of its days' (None where all are None)."""
    starts = [a for _, a, _ in days]
    out = []
    for _, a, b in bounds:
        vals = [v for v in day_max[bisect.bisect_left(starts, a):bisect.bisect_left(starts, b)] if v is not None]
        out.append(max(vals) if vals else None)
    return out


SERIES_COLUMNS = ["meter", "start_utc", "end_utc", "e_rms_v_per_m", "percent_of_reference", "coverage", "complete",
                  "overrange_lower_bound"]


_NUMPY_ISO_MAX_S = 253_402_300_800.0     # 10000-01-01: below it numpy and strftime write the same text


def _iso_list(t: np.ndarray) -> list[str]:
    """[iso(x) for x in t], vectorised where every time is a whole second of years 1970-9999 (the text is
    then the same): each distinct day and each distinct second of the day is written once, and the texts
    joined per time; any other time goes through iso() itself."""
    if t.size and np.all((t >= 0) & (t < _NUMPY_ISO_MAX_S)) and np.all(t == np.floor(t)):
        day, sec = np.divmod(t.astype(np.int64), 86400)
        days, di = np.unique(day, return_inverse=True)
        secs, si = np.unique(sec, return_inverse=True)
        dtxt = np.array(np.datetime_as_string(days.astype("datetime64[D]")).tolist(), dtype=object)
        stxt = np.array([f"T{x // 3600:02d}:{x % 3600 // 60:02d}:{x % 60:02d}Z" for x in secs.tolist()], dtype=object)
        return (dtxt[di.reshape(-1)] + stxt[si.reshape(-1)]).tolist()
    return [iso(x) for x in t.tolist()]


def _none_where(values: list, missing: np.ndarray) -> list:
    """values with None at the positions where ``missing`` is true (NULL in the database)."""
    if missing.any():
        for i in np.flatnonzero(missing).tolist():
            values[i] = None
    return values


def _series_columns(conn, t0: float, t1: float, st: dict, meters: list[dict], name=lambda m: m):
    """The 6-minute series, one chunk of 4096 blocks at a time, as a list of columns (SERIES_COLUMNS order;
    the meter column as the one name, the others as lists), built column-wise from the cursor's rows.
    Rounding: as every writer rounds (meterlink.reports.digits: 5 significant digits), vectorised."""
    for m in meters:
        ref = _reference(st, m)
        cur = conn.execute("SELECT t_start_utc, block_s, e_rms_v_per_m, covered_s, complete, n_overrange FROM "
                           "mon_block WHERE station_id=? AND band='total' AND meter=? AND t_start_utc >= ? AND "
                           "t_start_utc < ? ORDER BY t_start_utc", (st["id"], m["meter"], t0, t1))
        meter = name(m["meter"])
        while True:
            chunk = cur.fetchmany(4096)
            if not chunk:
                break
            ts, bs, e, covered, complete, nover = zip(*chunk)
            tsa = np.array(ts, dtype=float)
            bsa = np.array(bs, dtype=float)
            ea = np.array(e, dtype=float)                      # NULL -> NaN (SQLite stores no NaN)
            null = np.isnan(ea)
            pct = ref.pct(ea)                                  # the same IEEE operations as ref.pct(one value)
            cov = np.minimum(np.array(covered, dtype=float) / bsa, 1.0)
            # numbers as every writer rounds them (meterlink.reports.digits), vectorised
            yield [meter, _iso_list(tsa), _iso_list(tsa + bsa),
                   _none_where(rounded_array(ea, "e_rms_v_per_m").tolist(), null),
                   _none_where(rounded_array(pct, "percent_of_reference").tolist(), null),
                   rounded_array(cov, "coverage").tolist(), list(map(bool, complete)), list(map(bool, nover))]


def _series_chunks(conn, t0: float, t1: float, st: dict, meters: list[dict], name=lambda m: m):
    """Iterators of series tuples (SERIES_COLUMNS order), one per chunk of 4096 blocks, built column-wise;
    ``name`` maps the meter name for the first column (e.g. csv_cell)."""
    for cols in _series_columns(conn, t0, t1, st, meters, name):
        yield zip(itertools.repeat(cols[0]), *cols[1:])


def series_tuples(conn, t0: float, t1: float, st: dict | None = None, meters: list[dict] | None = None):
    """The 6-minute series of every meter for publication, one tuple (SERIES_COLUMNS order) at a time:
    streamed from the database in chunks, a year of blocks is never held as one list."""
    if st is None or meters is None:
        st, meters = station_info(conn)
    return itertools.chain.from_iterable(_series_chunks(conn, t0, t1, st, meters))


def iter_series(conn, t0: float, t1: float, st: dict | None = None, meters: list[dict] | None = None):
    """The 6-minute series as row dicts (keys SERIES_COLUMNS), streamed as :func:`series_tuples`."""
    for r in series_tuples(conn, t0, t1, st, meters):
        yield dict(zip(SERIES_COLUMNS, r))


def series_rows(conn, t0: float, t1: float) -> tuple[dict, list[dict]]:
    """The 6-minute series of every meter for publication (as a list; exports use iter_series)."""
    st, meters = station_info(conn)
    return st, list(iter_series(conn, t0, t1, st, meters))


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


def write_csv(out, st: dict, rows, safety: str) -> None:
    """Write the series (row dicts) as :func:`to_csv` does, row by row to the text stream ``out``."""
    _csv_head(out, st, safety).writerows([csv_cell(r[k]) for k in SERIES_COLUMNS] for r in rows)


def _csv_head(out, st: dict, safety: str):
    for line in header_lines(st, safety):
        out.write(f"# {clean_text(line)}\n")
    w = csv.writer(out, lineterminator="\n")
    w.writerow(SERIES_COLUMNS)
    return w


def write_series_csv(out, conn, t0: float, t1: float, st: dict, meters: list[dict], safety: str) -> None:
    """The series of the station between t0 and t1 as CSV (the text of to_csv), streamed from the database
    in chunks. The meter name is the one text from outside (csv_cell, once per meter); the times come from
    iso() or the same text vectorised, the rest are numbers."""
    w = _csv_head(out, st, safety)
    for chunk in _series_chunks(conn, t0, t1, st, meters, name=csv_cell):
        w.writerows(chunk)


def _json_scalar(x) -> str:
    """One JSON value as json.dumps writes it (non-finite floats as null, as to_json)."""
    if x is None or x is True or x is False:
        return "null" if x is None else ("true" if x else "false")
    if isinstance(x, float):
        return float.__repr__(x) if math.isfinite(x) else "null"
    if isinstance(x, str):
        return _encode_str(x)
    return json.dumps(x)


def write_json(out, doc: dict, list_key: str, rows) -> None:
    """Write ``doc`` with ``doc[list_key] = list(rows)`` exactly as :func:`to_json` would, streaming the
    rows (flat dicts of scalars) one at a time instead of building the list. The rows' numbers are written
    as they come: iter_series has rounded them already (meterlink.reports.digits.rounded_array)."""
    head = to_json({**doc, list_key: []})
    empty = f'\n  {json.dumps(list_key)}: []\n}}'
    if not head.endswith(empty):
        raise ValueError(f"{list_key!r} must be the last key of the document")
    out.write(head[:-len(empty)] + f"\n  {json.dumps(list_key)}: [")
    first = True
    for r in rows:
        body = ",\n".join(f"      {_encode_str(k)}: {_json_scalar(v)}" for k, v in r.items())
        out.write(("\n" if first else ",\n") + "    {\n" + body + "\n    }")
        first = False
    out.write("]\n}" if first else "\n  ]\n}")


_JSON_BOOL = {False: "false", True: "true"}


def _json_numbers(values: list) -> list[str]:
    """JSON texts of a column of floats (None and non-finite as null), as json.dumps writes them."""
    bad = ~np.isfinite(np.array(values, dtype=float))       # None becomes NaN here
    if not bad.any():
        return list(map(float.__repr__, values))
    out = list(map(repr, values))
    for i in np.flatnonzero(bad).tolist():
        out[i] = "null"
    return out


def write_series_json(out, doc: dict, list_key: str, conn, t0: float, t1: float, st: dict,
                      meters: list[dict]) -> None:
    """Write ``doc`` with the station's series under ``list_key`` (its last key), the text of
    :func:`write_json` of :func:`iter_series` (json.dumps with indent 2), streamed chunk by chunk: each
    column is turned into JSON texts at once and every row is one %-format of a fixed template."""
    head = to_json({**doc, list_key: []})
    empty = f'\n  {json.dumps(list_key)}: []\n}}'
    if not head.endswith(empty):
        raise ValueError(f"{list_key!r} must be the last key of the document")
    out.write(head[:-len(empty)] + f"\n  {json.dumps(list_key)}: [")
    row = "    {\n" + ",\n".join(f"      {_encode_str(k)}: %s" for k in SERIES_COLUMNS) + "\n    }"
    sep = "\n"
    for meter, start, end, e, pct, cov, complete, nover in _series_columns(conn, t0, t1, st, meters):
        texts = zip(itertools.repeat(_json_scalar(meter)), [f'"{x}"' for x in start], [f'"{x}"' for x in end],
                    _json_numbers(e), _json_numbers(pct), _json_numbers(cov), map(_JSON_BOOL.__getitem__, complete),
                    map(_JSON_BOOL.__getitem__, nover))
        out.write(sep + ",\n".join(map(row.__mod__, texts)))
        sep = ",\n"
    out.write("]\n}" if sep == "\n" else "\n  ]\n}")


def to_json(doc) -> str:
    def clean(x):
        if isinstance(x, float) and not math.isfinite(x):
            return None
        if isinstance(x, dict):
            return {k: clean(v) for k, v in x.items()}
        if isinstance(x, (list, tuple)):
            return [clean(v) for v in x]
        return x
    return json.dumps(tidy(clean(doc)), indent=2)     # numbers: meterlink.reports.digits


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
