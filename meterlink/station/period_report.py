"""A monitoring station's period report (a month or a quarter): daily maxima and the 6-minute series
as plots, percent of the reference level, coverage with the gaps listed, alarms and health events,
the certificate in force; one HTML page (template station_period.html), also as PDF.

Statistics come from meterlink.station.publish (statistics, series_rows), so the report shows the
numbers `stats` and the publication page show. Long series are drawn as a min/max envelope per
time bin, so that a quarter of 6-minute blocks (about 22 000) stays a readable, small figure.
"""

from __future__ import annotations

import datetime as _dt
import re
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np

from meterlink.errors import MeterlinkError
from meterlink.safetext import clean_text
from meterlink.station.publish import iso, series_rows, station_info, statistics

#: Above this many blocks a series is drawn as a min/max envelope over this many bins.
ENVELOPE_BINS = 1500
_PERIOD = re.compile(r"^(\d{4})-(?:(\d{2})|Q([1-4]))$")


def period_bounds(spec: str, timezone: str = "UTC") -> tuple[float, float, str]:
    """'2026-11' (a month) or '2026-Q4' (a quarter) -> (t0, t1, label), in the station's time zone."""
    m = _PERIOD.match(str(spec).strip())
    if not m or (m.group(2) and not 1 <= int(m.group(2)) <= 12):
        raise MeterlinkError(f"--period {spec!r}: expected a month YYYY-MM (e.g. 2026-11) or a quarter YYYY-Qn")
    year = int(m.group(1))
    first = int(m.group(2)) if m.group(2) else 3 * int(m.group(3)) - 2
    months = 1 if m.group(2) else 3
    tz = ZoneInfo(timezone)
    start = _dt.datetime(year, first, 1, tzinfo=tz)
    end_month = first + months
    end = _dt.datetime(year + (end_month - 1) // 12, (end_month - 1) % 12 + 1, 1, tzinfo=tz)
    label = start.strftime("%Y-%m") if months == 1 else f"{year}-Q{(first + 2) // 3}"
    return start.timestamp(), end.timestamp(), label


def gaps(t_start_s, complete, t0: float, t1: float, block_s: float) -> list[tuple[float, float]]:
    """Intervals of [t0, t1) without a complete block (no block stored, or one with too little data),
    consecutive blocks merged."""
    ok = sorted(float(t) for t, c in zip(t_start_s, complete) if c and t0 <= t < t1)
    out, cursor = [], t0
    for t in ok:
        if t > cursor + 1e-6:
            out.append((cursor, t))
        cursor = max(cursor, t + block_s)
    if cursor < t1 - 1e-6:
        out.append((cursor, t1))
    return out


def envelope(t, v, bins: int = ENVELOPE_BINS):
    """(t_mid, v_min, v_max) per time bin, NaN-aware; the series itself (min = max) when short."""
    t, v = np.asarray(t, dtype=float), np.asarray(v, dtype=float)
    if t.size <= bins:
        return t, v, v
    edges = np.linspace(t.min(), t.max(), bins + 1)
    idx = np.clip(np.searchsorted(edges, t, side="right") - 1, 0, bins - 1)
    lo = np.full(bins, np.nan)
    hi = np.full(bins, np.nan)
    good = np.isfinite(v)
    np.fmin.at(lo, idx[good], v[good])
    np.fmax.at(hi, idx[good], v[good])
    return (edges[:-1] + edges[1:]) / 2, lo, hi


def _plots(meter: str, days: list[dict], series: list[dict], t0: float, t1: float, pct_label: str) -> dict[str, bytes]:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.dates as mdates
    import matplotlib.pyplot as plt

    from meterlink.reports.htmlpage import figure_png

    out = {}
    fig, ax = plt.subplots(figsize=(7, 2.8))
    x = [_dt.datetime.fromtimestamp(d["start_utc"], _dt.timezone.utc) for d in days]
    y = [np.nan if d.get("max_pct") is None else d["max_pct"] for d in days]
    ax.bar(x, y, width=0.8, color="#2b6f77")
    ax.set(ylabel=pct_label, title=f"{meter}: highest 6-minute value per day")
    _time_axis(ax, mdates, t0, t1)
    ax.grid(True, axis="y", alpha=.3)
    out["daily"] = figure_png(fig, dpi=90)
    plt.close(fig)
    t = np.array([_dt.datetime.fromisoformat(r["start_utc"].replace("Z", "+00:00")).timestamp() for r in series])
    v = np.array([np.nan if r["percent_of_reference"] is None else r["percent_of_reference"] for r in series])
    tm, lo, hi = envelope(t, v)
    fig, ax = plt.subplots(figsize=(7, 2.8))
    dt_ = [_dt.datetime.fromtimestamp(s, _dt.timezone.utc) for s in tm]
    if t.size > ENVELOPE_BINS:
        ax.fill_between(dt_, lo, hi, color="#2b6f77", alpha=.5, linewidth=0, label="min/max per bin")
        ax.legend(loc="upper right", fontsize=7)
    else:
        ax.plot(dt_, hi, ".-", color="#2b6f77", markersize=2, linewidth=.6)
    ax.set(ylabel=pct_label, title=f"{meter}: 6-minute values")
    _time_axis(ax, mdates, t0, t1)
    ax.grid(True, alpha=.3)
    out["series"] = figure_png(fig, dpi=90)
    plt.close(fig)
    return out


def _time_axis(ax, mdates, t0: float, t1: float) -> None:
    """The whole period on the x axis (UTC dates), so a month with few data still reads as a month."""
    ax.set_xlim(_dt.datetime.fromtimestamp(t0, _dt.timezone.utc), _dt.datetime.fromtimestamp(t1, _dt.timezone.utc))
    loc = mdates.AutoDateLocator(minticks=4, maxticks=10)
    ax.xaxis.set_major_locator(loc)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(loc))


def _hours(s: float) -> str:
    return f"{s / 3600:.1f} h" if s >= 3600 else f"{s / 60:.0f} min"


def station_section(conn, spec: str) -> dict:
    """Everything the period report shows of the station recorded in conn for spec ('2026-11', '2026-Q4'),
    in the station's time zone: per meter statistics, plots and gaps; alarms; health events."""
    st, meters = station_info(conn)
    tz = st["timezone"] or "UTC"
    t0, t1, label = period_bounds(spec, tz)
    stats = statistics(conn, t0, t1, periods=("day", "month"))
    _, rows = series_rows(conn, t0, t1)
    block_s = float(st["block_s"] or 360.0)
    pct_label = "% of S ref" if (st["convention"] or "power") == "power" else "% of E ref"
    per_meter = []
    for m, ms in zip(meters, stats["meters"]):
        series = [r for r in rows if r["meter"] == ms["meter"]]
        t = [_dt.datetime.fromisoformat(r["start_utc"].replace("Z", "+00:00")).timestamp() for r in series]
        gap = gaps(t, [r["complete"] for r in series], t0, t1, block_s)
        # coverage as `stats` defines it: covered seconds of the blocks over the period's length
        total = sum(r["coverage"] * (r["end_utc"] - r["start_utc"]) for r in ms["month"]) / (t1 - t0)
        due = m["cert_due"]
        per_meter.append({
            "meter": ms["meter"], "label": ms["label"], "days": ms["day"], "months": ms["month"],
            "coverage_pct": 100.0 * total,
            "highest_pct": max((r["max_pct"] for r in ms["month"] if r.get("max_pct") is not None), default=None),
            "gaps": [(iso(a), iso(b), _hours(b - a)) for a, b in gap], "n_gaps": len(gap),
            "gap_hours": sum(b - a for a, b in gap) / 3600.0,
            # the certificate by its file name (a station file may give a long path)
            "certificate": Path(m["certificate"]).name if m["certificate"] else None, "certificate_due": due,
            "certificate_lapsed": bool(due) and _dt.date.fromisoformat(due) < _dt.datetime.fromtimestamp(t1, _dt.timezone.utc).date(),
            "plots": _plots(clean_text(ms["meter"]), ms["day"], series, t0, t1, pct_label),
            "n_blocks": len(series)})
    alarms = [dict(r, t_on=iso(r["t_on_utc"]), peak_t=iso(r["peak_t_utc"]), last_t=iso(r["last_t_utc"]))
              for r in _rows(conn, "SELECT rule, meter, band, state, t_on_utc, peak_t_utc, peak_value, last_t_utc "
                             "FROM mon_alarm WHERE station_id=? AND coalesce(last_t_utc, t_on_utc, 0) >= ? AND "
                             "coalesce(t_on_utc, 0) < ? ORDER BY t_on_utc", (st["id"], t0, t1))]
    events = [dict(r, t=iso(r["t_utc"])) for r in _rows(
        conn, "SELECT t_utc, kind, severity, message FROM events WHERE t_utc >= ? AND t_utc < ? AND severity != 'info' "
        "ORDER BY t_utc LIMIT 200", (t0, t1))]
    counts = [list(r) for r in conn.execute("SELECT kind, severity, count(*) AS n FROM events WHERE t_utc >= ? AND "
                                            "t_utc < ? GROUP BY kind, severity ORDER BY n DESC", (t0, t1))]
    highest = [m["highest_pct"] for m in per_meter if m["highest_pct"] is not None]
    return {"st": st, "stats": stats, "meters": per_meter, "alarms": alarms, "events": events,
            "event_counts": counts, "pct_label": pct_label, "label": label, "timezone": tz, "t0": t0, "t1": t1,
            "from_utc": iso(t0), "to_utc": iso(t1),
            # the station in one line of a set's summary: its worst meter
            "highest_pct": max(highest) if highest else None,
            "coverage_pct": min((m["coverage_pct"] for m in per_meter), default=0.0),
            "n_alarms": len(alarms),
            "certificates": "; ".join(f"{m['certificate'] or '-'} ({m['certificate_due'] or 'due not stated'})"
                                      + (" LAPSED" if m["certificate_lapsed"] else "") for m in per_meter) or "-"}


def report_html(conn, spec: str, template_dir=None, now_utc: float | None = None) -> tuple[str, str]:
    """(HTML, label) of the period report of the station recorded in conn for spec ('2026-11', '2026-Q4')."""
    import time

    from meterlink.reports.templating import render

    s = station_section(conn, spec)
    st, label = s["st"], s["label"]
    title = f"Monitoring station {clean_text(st['name'])}: report for {label}"
    html = render("station_period.html", template_dir, title=title,
                  ident=f"{title} ({s['from_utc']} to {s['to_utc']})", st=st, section=s,
                  pct_label=s["pct_label"], label=label, from_utc=s["from_utc"], to_utc=s["to_utc"],
                  timezone=s["timezone"], made_utc=time.time() if now_utc is None else now_utc)
    return html, label


def set_report_html(sections: list[dict], template_dir=None, now_utc: float | None = None) -> str:
    """The period report of a set of stations (sections from station_section, one per station, each with
    'source', the database it was read from): a summary table, then a section per station."""
    import time

    from meterlink.reports.templating import render

    label = sections[0]["label"]
    names = ", ".join(clean_text(s["st"]["name"]) for s in sections)
    title = f"Monitoring stations: report for {label}"
    return render("station_period_set.html", template_dir, title=title,
                  ident=f"{title} ({len(sections)} stations: {names})"[:200], stations=sections, label=label,
                  made_utc=time.time() if now_utc is None else now_utc)


def _rows(conn, sql, params=()):
    cur = conn.execute(sql, params)
    cols = [c[0] for c in cur.description]
    return [dict(zip(cols, r)) for r in cur.fetchall()]


def _open(db_path):
    import sqlite3

    if not Path(db_path).is_file():
        raise MeterlinkError(f"database {str(db_path)!r} does not exist")
    return sqlite3.connect(f"file:{Path(db_path).resolve()}?mode=ro", uri=True, timeout=10)


def _outputs(html: str, out_dir, name: str, pdf: bool) -> list[Path]:
    from meterlink.reports.templating import write_outputs

    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise MeterlinkError(f"cannot create report directory {str(out)!r}: {exc.strerror}") from None
    return write_outputs(html, out / name, pdf)


def _checks(template_dir, pdf: bool) -> None:
    from meterlink.reports.templating import PDF_HINT, pdf_available, template_dir as checked

    checked(template_dir)
    if pdf and not pdf_available():
        raise MeterlinkError(PDF_HINT)


def write_period_report(db_path, spec: str, out_dir, *, template_dir=None, pdf: bool = False) -> list[Path]:
    """Write station-<label>.html (and .pdf) of a station database into out_dir; the files written."""
    _checks(template_dir, pdf)
    conn = _open(db_path)
    try:
        html, label = report_html(conn, spec, template_dir)
    finally:
        conn.close()
    return _outputs(html, out_dir, f"station-{label}.html", pdf)


def write_set_report(db_paths, spec: str, out_dir, *, template_dir=None, pdf: bool = False) -> list[Path]:
    """Write stations-<label>.html (and .pdf): the period report of the stations of several databases, one
    section each, in the order given; the files written. A database named twice, or one without a
    station, is refused before anything is written."""
    import sqlite3

    _checks(template_dir, pdf)
    seen, sections = set(), []
    for db in db_paths:
        key = Path(db).resolve()
        if key in seen:
            raise MeterlinkError(f"database {str(db)!r} is named twice")
        seen.add(key)
        conn = _open(db)
        try:
            s = station_section(conn, spec)
        except sqlite3.DatabaseError as exc:
            raise MeterlinkError(f"{db}: not a station database ({exc})") from None
        except MeterlinkError as exc:
            raise MeterlinkError(f"{db}: {exc}") from None
        finally:
            conn.close()
        sections.append(dict(s, source=str(db)))
    return _outputs(set_report_html(sections, template_dir), out_dir, f"stations-{sections[0]['label']}.html", pdf)


#: How often (monotonic seconds) the daemon looks whether a period has finished.
CHECK_EVERY_S = 600.0
_next_check: dict[str, float] = {}


def previous_period(now_utc: float, period: str, timezone: str = "UTC") -> str:
    """The label of the last finished month ('2026-11') or quarter ('2026-Q3') before now."""
    d = _dt.datetime.fromtimestamp(now_utc, ZoneInfo(timezone))
    months = 1 if period == "month" else 3
    first = (d.month - 1) // months * months + 1 - months          # the first month of the previous period
    year = d.year + (first - 1) // 12
    first = (first - 1) % 12 + 1
    return f"{year}-{first:02d}" if months == 1 else f"{year}-Q{(first + 2) // 3}"


def housekeeping(st, now_utc: float, event) -> Path | None:
    """Called by the monitor's housekeeping: when the station file has [reports] and a period has
    finished that has data and no report yet, write it; event(kind, severity, message) records the
    outcome. A failure is an event, never an exception: the monitor keeps measuring."""
    import sqlite3
    import time

    cfg = getattr(st, "reports", None)
    key = str(st.database)
    if cfg is None or time.monotonic() < _next_check.get(key, 0.0):
        return None
    _next_check[key] = time.monotonic() + CHECK_EVERY_S
    label = previous_period(now_utc, cfg.period, st.timezone)
    if (cfg.folder / f"station-{label}.html").exists():
        return None
    try:
        t0, t1, _ = period_bounds(label, st.timezone)
        conn = sqlite3.connect(f"file:{Path(st.database).resolve()}?mode=ro", uri=True, timeout=10)
        try:
            first = conn.execute("SELECT min(t_start_utc) FROM mon_block").fetchone()[0]
        finally:
            conn.close()
        if first is None or first >= t1:
            return None                     # the station did not measure in that period
        files = write_period_report(st.database, label, cfg.folder, pdf=cfg.pdf)
    except (MeterlinkError, OSError, sqlite3.Error) as exc:
        event("period_report", "warning", f"period report {label} not written: {exc}")
        return None
    event("period_report", "info", f"period report {label} written: {', '.join(str(f) for f in files)}")
    return files[0]
