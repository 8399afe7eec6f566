"""The status pages (operator login) and the public pages of the central service, with a JSON API beside each.

Server-side rendered from the report templates (net_*.html extend base.html, so every page carries the
cautions); plots are inline SVG drawn here; no asset is fetched from anywhere. docs/network.md "Pages":

- public, no login: ``/public``, ``/public/stations/{name}``, ``/public/plot/{24h|30d}/{name}``, and
  ``/api/v1/public/stations[/{name}]``: station names, positions, percentages, plots, alarm state; no
  UUIDs, tokens, events, certificates or health detail;
- operator login (HTTP Basic, the password is the operator token of ``service.operator_token_file``, or
  an ``Authorization: Bearer`` header; never in a URL): ``/status``, ``/status/stations/{uuid}``,
  ``/status/plot/{24h|30d}/{uuid}`` and ``/api/v1/status[/stations/{uuid}]``.
"""

from __future__ import annotations

import asyncio
import base64
import hashlib
import hmac
import logging
import math
import time
from pathlib import Path

from meterlink.network import plots, queries
from meterlink.reports.digits import tidy   # numbers in the JSON API: meaningful digits
from meterlink.network.central import CentralError

log = logging.getLogger("meterlink.central")
PERIODS = {"24h": 86400.0, "30d": 30 * 86400.0}
CACHE_S = 5.0              # an overview page is rebuilt at most every 5 s (data arrive in 6-minute blocks)
BUCKETS = 240              # a plot's time axis in 240 slices: one 6-minute block each over 24 h, 3 h over 30 days
REALM = 'Basic realm="meterlink operator", charset="UTF-8"'


def read_operator_token(path: str | None) -> bytes | None:
    """SHA-256 of the operator token in the file (one line), None when no file is configured."""
    if path is None:
        return None
    try:
        tok = Path(path).read_text(encoding="utf-8").strip()
    except (OSError, UnicodeDecodeError) as exc:
        raise CentralError(f"service.operator_token_file: cannot read {path!r}: "
                           f"{getattr(exc, 'strerror', None) or exc}") from None
    if len(tok) < 16:
        raise CentralError(f"service.operator_token_file: {path!r} must hold a token of at least 16 characters")
    return hashlib.sha256(tok.encode()).digest()


def offered_token(auth: str | None) -> str | None:
    """The token of an Authorization header: Bearer TOKEN, or Basic with the token as password."""
    if not auth:
        return None
    kind, _, rest = auth.strip().partition(" ")
    if kind.lower() == "bearer":
        return rest.strip() or None
    if kind.lower() == "basic":
        try:
            return base64.b64decode(rest.strip(), validate=True).decode("utf-8").partition(":")[2] or None
        except (ValueError, UnicodeDecodeError):
            return None
    return None


def _finite(v):
    """JSON has no NaN: a non-finite number becomes null."""
    return None if isinstance(v, float) and not math.isfinite(v) else v


def _clean(rows, drop=()):
    return [{k: _finite(v) for k, v in r.items() if k not in drop} for r in rows]


PUBLIC_DROP = ("station_uuid", "alarm_text", "alarms_on")
PUBLIC_STATE = {"alarm": "alarm active", "stale": "no recent data", "never seen": "awaiting first data",
                "ok": "reporting"}


def add_routes(routes: list, pool, operator_sha256: bytes | None) -> None:
    """Append the page and API routes to a Starlette route list."""
    import psycopg
    from starlette.concurrency import run_in_threadpool
    from starlette.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
    from starlette.routing import Route

    from meterlink.errors import MeterlinkError
    from meterlink.reports.templating import render

    class NotFound(Exception):
        pass

    def page(name: str, **ctx) -> str:
        return render(name, ident=f"meterlink network pages · rendered {queries_iso(time.time())}", iso=queries_iso,
                      **ctx)

    def error(status: int, reason: str, as_json: bool):
        if as_json:
            return JSONResponse({"ok": False, "reason": reason}, status_code=status)
        return HTMLResponse(page("net_error.html", title="Page not available", reason=reason), status_code=status)

    def guarded(fn, as_json: bool):
        """Run a page's work in the thread pool with a connection; one-line errors, never a traceback."""
        async def endpoint(request):
            def work():
                try:
                    with pool.connection() as conn:
                        return fn(conn, request)
                except NotFound as exc:
                    return error(404, str(exc), as_json)
                except (psycopg.OperationalError, CentralError) as exc:
                    log.error("central database unavailable: %s", _line(exc))
                    return error(503, f"central database unavailable: {_line(exc)}", as_json)
                except (psycopg.Error, MeterlinkError) as exc:
                    log.error("page %s failed: %s", request.url.path, _line(exc))
                    return error(500, f"the page could not be built: {_line(exc)}", as_json)
            return await run_in_threadpool(work)
        return endpoint

    cache: dict[tuple, tuple[float, bytes, str]] = {}
    locks: dict[tuple, asyncio.Lock] = {}

    def cached(inner):
        """An overview page built at most once per CACHE_S (for every client asking meanwhile): 500 stations
        take milliseconds of the database and of Jinja, 20 clients asking at once would queue for them."""
        async def endpoint(request):
            key = (request.url.path, sort_of(request))
            hit = cache.get(key)
            if hit is None or hit[0] <= time.monotonic():
                async with locks.setdefault(key, asyncio.Lock()):     # one builds, the others wait for it
                    hit = cache.get(key)
                    if hit is None or hit[0] <= time.monotonic():
                        resp = await inner(request)
                        if resp.status_code != 200:
                            return resp
                        hit = cache[key] = (time.monotonic() + CACHE_S, bytes(resp.body), resp.media_type)
            return Response(hit[1], media_type=hit[2])
        return endpoint

    def operator(fn, as_json: bool, cache_it: bool = False):
        inner = cached(guarded(fn, as_json)) if cache_it else guarded(fn, as_json)

        async def endpoint(request):
            if operator_sha256 is None:
                return error(404, "status pages are off: set service.operator_token_file in the central "
                                  "configuration", as_json)
            tok = offered_token(request.headers.get("authorization"))
            if tok is None or not hmac.compare_digest(hashlib.sha256(tok.encode()).digest(), operator_sha256):
                resp = error(401, "operator login needed (the password is the operator token)", as_json)
                resp.headers["WWW-Authenticate"] = REALM
                return resp
            resp = await inner(request)
            resp.headers["Cache-Control"] = "no-store"
            return resp
        return endpoint

    # -- shared work -----------------------------------------------------------------------------------
    def station_detail(conn, st: dict, public: bool) -> dict:
        su = st["station_uuid"]
        ms = queries.meters(conn, su)
        end = queries.newest_block(conn, su)
        out = {"station": st, "meters": ms, "alarms": queries.alarms(conn, su),
               "events": [] if public else queries.events(conn, su), "plots": []}
        for period in PERIODS:
            for m in ms:
                out["plots"].append(plot_of(conn, st, m, period, end))
        latest = queries.overview(conn, only_uuid=su)
        out["latest"] = latest[0] if latest else None
        out.update(_table_rows(out))
        return out

    def plot_of(conn, st: dict, m: dict, period: str, end) -> dict:
        span = PERIODS[period]
        t1 = end if end is not None else time.time()
        t0 = t1 - span
        pts = queries.envelope(conn, st["station_uuid"], m["meter"], t0, t1, BUCKETS)
        conv = st["convention"]
        ref_known = (m["e_ref_v_per_m"] if conv == "field" else m["s_ref_w_per_m2"]) is not None
        if ref_known:
            conv_pts = [(t, queries.pct(lo, conv, m["e_ref_v_per_m"], m["s_ref_w_per_m2"]),
                         queries.pct(hi, conv, m["e_ref_v_per_m"], m["s_ref_w_per_m2"]), n) for t, lo, hi, n in pts]
            unit = "% of E ref" if conv == "field" else "% of S ref"
            ref = 100.0
        else:
            conv_pts, unit, ref = pts, "E (V/m)", None
        label = "24 hours" if period == "24h" else "30 days"
        what = ("percent of the field-strength reference level" if conv == "field" else
                "percent of the power-density reference level") if ref_known else "E in V/m"
        title = (f"{st['name']}, meter {m['meter']}: 6-minute values over {label}, {what}; lowest and highest "
                 f"in each {_slice(span / BUCKETS)} slice")
        return {"period": period, "meter": m["meter"], "title": title, "unit": unit, "t0": t0, "t1": t1,
                "points": conv_pts, "svg": plots.envelope_svg(conv_pts, t0, t1, span / BUCKETS, unit, title, ref)}

    def public_station(conn, name: str) -> dict:
        st = queries.station_by(conn, name=name)
        if st is None:
            raise NotFound(f"no station named {name!r} is published here")
        return st

    def operator_station(conn, su: str) -> dict:
        st = queries.station_by(conn, uuid=su)
        if st is None:
            raise NotFound(f"no station {su!r} is registered")
        return st

    def sort_of(request) -> str:
        return "name" if request.query_params.get("sort") == "name" else "worst"

    # -- public ----------------------------------------------------------------------------------------
    def public_overview(conn, request):
        now = time.time()
        rows = queries.overview(conn, now, sort_of(request))
        return HTMLResponse(page("net_overview.html", title="Measured RF field levels", public=True, rows=rows,
                                 sort=sort_of(request), now=now, states=PUBLIC_STATE, stale_min=queries.STALE_S / 60))

    def public_overview_json(conn, request):
        rows = queries.overview(conn, time.time(), sort_of(request))
        for r in rows:
            r["state"] = PUBLIC_STATE[r["state"]]
        return JSONResponse(tidy({"stations": _clean(rows, PUBLIC_DROP), "cautions": _cautions()}))

    def public_page(conn, request):
        d = station_detail(conn, public_station(conn, request.path_params["name"]), public=True)
        return HTMLResponse(page("net_station.html", title=f"{d['station']['name']}: measured RF field levels",
                                 public=True, d=d, now=time.time(), states=PUBLIC_STATE))

    def public_page_json(conn, request):
        d = station_detail(conn, public_station(conn, request.path_params["name"]), public=True)
        return JSONResponse(tidy(_json_detail(d, public=True)))

    def public_plot(conn, request):
        return plot_response(conn, public_station(conn, request.path_params["name"]), request)

    def plot_response(conn, st, request):
        period = request.path_params["period"]
        if period not in PERIODS:
            raise NotFound(f"no plot period {period!r} (24h or 30d)")
        end = queries.newest_block(conn, st["station_uuid"])
        svgs = [plot_of(conn, st, m, period, end)["svg"] for m in queries.meters(conn, st["station_uuid"])]
        if not svgs:
            raise NotFound(f"station {st['name']!r} has no meter registered yet")
        return Response(str(svgs[0]) if len(svgs) == 1 else
                        '<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 720 %d">%s</svg>' % (
                            220 * len(svgs), "".join(f'<g transform="translate(0 {220 * i})">{s}</g>'
                                                     for i, s in enumerate(svgs))),
                        media_type="image/svg+xml")

    # -- operator --------------------------------------------------------------------------------------
    def status(conn, request):
        now = time.time()
        rows = queries.overview(conn, now, sort_of(request))
        return HTMLResponse(page("net_overview.html", title="Network status", public=False, rows=rows,
                                 sort=sort_of(request), now=now, states={k: k for k in PUBLIC_STATE},
                                 stale_min=queries.STALE_S / 60))

    def status_json(conn, request):
        rows = queries.overview(conn, time.time(), sort_of(request))
        return JSONResponse(tidy({"stations": _clean(rows), "stale_after_s": queries.STALE_S, "cautions": _cautions()}))

    def status_station(conn, request):
        d = station_detail(conn, operator_station(conn, request.path_params["uuid"]), public=False)
        return HTMLResponse(page("net_station.html", title=f"Station {d['station']['name']}", public=False, d=d,
                                 now=time.time(), states={k: k for k in PUBLIC_STATE}))

    def status_station_json(conn, request):
        d = station_detail(conn, operator_station(conn, request.path_params["uuid"]), public=False)
        return JSONResponse(tidy(_json_detail(d, public=False)))

    def status_plot(conn, request):
        return plot_response(conn, operator_station(conn, request.path_params["uuid"]), request)

    async def home(request):
        return RedirectResponse("/public", status_code=307)

    routes += [
        Route("/", home),
        Route("/public", cached(guarded(public_overview, False))),
        Route("/public/stations/{name:path}", guarded(public_page, False)),
        Route("/public/plot/{period}/{name:path}", guarded(public_plot, False)),
        Route("/api/v1/public/stations", cached(guarded(public_overview_json, True))),
        Route("/api/v1/public/stations/{name:path}", guarded(public_page_json, True)),
        Route("/status", operator(status, False, cache_it=True)),
        Route("/status/stations/{uuid}", operator(status_station, False)),
        Route("/status/plot/{period}/{uuid}", operator(status_plot, False)),
        Route("/api/v1/status", operator(status_json, True, cache_it=True)),
        Route("/api/v1/status/stations/{uuid}", operator(status_station_json, True)),
    ]


def _table_rows(d: dict) -> dict:
    """The cells of the station page's tables, as text."""
    import datetime as dt

    def due(m):
        if not m["cert_due"]:
            return "–"
        try:
            left = (dt.date.fromisoformat(m["cert_due"]) - dt.datetime.now(dt.timezone.utc).date()).days
        except ValueError:
            return m["cert_due"]
        return f"{m['cert_due']} ({left} days left)" if left >= 0 else f"{m['cert_due']} (overdue by {-left} days)"

    def freq(m):
        if m["band_lo_hz"] is not None and m["band_hi_hz"] is not None:
            return f"{m['band_lo_hz'] / 1e6:g} to {m['band_hi_hz'] / 1e6:g} MHz"
        return "–" if m["freq_hz"] is None else f"{m['freq_hz'] / 1e6:g} MHz"

    def num(v, f="{:.4g}"):
        return "–" if v is None else f.format(v)

    return {
        "alarm_rows": [[a["rule"], a["meter"], a["band"], a["state"], queries_iso(a["t_on_utc"]),
                        queries_iso(a["peak_t_utc"]), num(a["peak_value"])] for a in d["alarms"]],
        "meter_rows": [[m["meter"], freq(m), num(m["e_ref_v_per_m"]), num(m["s_ref_w_per_m2"]),
                        m["certificate_name"] or (m["certificate_sha256"] or "–")[:16], due(m), m["link_state"] or "–"]
                       for m in d["meters"]],
        "event_rows": [[queries_iso(e["t_utc"]), e["severity"], e["kind"], e["message"] or ""] for e in d["events"]],
    }


def _json_detail(d: dict, public: bool) -> dict:
    st = dict(d["station"])
    latest = dict(d["latest"] or {})
    if public:
        st.pop("station_uuid", None)
        for k in PUBLIC_DROP:
            latest.pop(k, None)
        if "state" in latest:
            latest["state"] = PUBLIC_STATE[latest["state"]]
    meter_keys = ("meter", "freq_hz", "band_lo_hz", "band_hi_hz", "e_ref_v_per_m", "s_ref_w_per_m2") if public \
        else None
    meters = [{k: v for k, v in m.items() if meter_keys is None or k in meter_keys} for m in d["meters"]]
    out = {"station": _clean([st])[0], "latest": _clean([latest])[0], "meters": _clean(meters),
           "alarms": _clean(d["alarms"]),
           "plots": [{"period": p["period"], "meter": p["meter"], "unit": p["unit"], "t0_utc": p["t0"],
                      "t1_utc": p["t1"], "buckets": [[_finite(x) for x in q[:3]] for q in p["points"]]}
                     for p in d["plots"]],
           "cautions": _cautions()}
    if not public:
        out["events"] = _clean(d["events"])
    return out


def _slice(s: float) -> str:
    return f"{s / 3600:g}-hour" if s >= 3600 else f"{s / 60:g}-minute"


def _cautions() -> str:
    from meterlink.cautions import SAFETY_LINE

    return SAFETY_LINE


def queries_iso(t) -> str:
    """ISO 8601 UTC of a POSIX time, '–' for none."""
    import datetime as dt

    if t is None or not math.isfinite(t):
        return "–"
    return dt.datetime.fromtimestamp(t, dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _line(exc: BaseException) -> str:
    s = str(exc).strip()
    return s.splitlines()[0][:200] if s else type(exc).__name__
