"""Survey plan files (TOML, docs/survey.md): loading and validation into a SurveyPlan.

Every problem raises PlanError with one line naming the file and the entry at fault.
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

from meterlink.errors import MeterlinkError, read_input_text
from meterlink.survey.model import MODES, FollowUp, Photo, Point, SelectiveSpec, Site, Source, SurveyPlan
from meterlink.survey.spatial import SCHEMES, scheme_from

_TOP = {"survey", "site", "source", "point", "report", "conditions", "transmitter"}   # [report]: survey/report.py
_CONDITIONS = {"weather", "temperature_degc", "humidity_percent"}
_TRANSMITTER = {"confirmed_with", "confirmed_at", "state"}
_PHOTO = {"file", "caption", "direction_deg"}
_SURVEY = {"title", "standard", "tier", "rule", "certificate", "interval_ms", "freq_hz", "band_hz",
           "followup_v_per_m", "followup_percent", "settle_s", "spot_s", "sweep_s", "sources_file",
           "prediction_u_db", "gnss_output_delay_s"}
_SITE = {"name", "address", "operator", "technician", "latitude_deg", "longitude_deg", "notes"}
_SOURCE = {"name", "freq_hz", "technology", "power_w", "max_power_w", "notes"}
_POINT = {"label", "mode", "height_m", "x_m", "y_m", "lat_deg", "lon_deg", "notes", "near_field",
          "duration_s", "scheme", "n", "heights_m", "walk_m", "photos",
          "bands", "antenna_cert", "antenna", "analyser", "extrapolation", "analyser_level_db", "sweep_time_s"}
_SELECTIVE = ("bands", "antenna_cert", "antenna", "analyser", "extrapolation", "analyser_level_db", "sweep_time_s")


# Bounds that no real survey comes near, so that a typing slip is caught when the plan is loaded
# rather than hours into a measurement: 3 THz (the top of the standards' range is 300 GHz), a day
# per point, 100 km from the site origin, 1 GW of transmitter power.
MAX_FREQ_HZ = 3e12
MAX_DURATION_S = 86400.0
MAX_SITE_M = 1e5
MAX_POWER_W = 1e9
#: A GNSS receiver's output delay (fix epoch to its NMEA sentences) is some 50-500 ms; more than this is a mistake, s.
MAX_GNSS_OUTPUT_DELAY_S = 2.0


class PlanError(MeterlinkError):
    """A survey plan that cannot be used."""


class _Ctx:
    def __init__(self, where: str, base: Path | None = None, kind: str = "plan"):
        self.where, self.kind = where, kind
        self.base = base if base is not None else Path(".")   # folder that relative photo names start from

    def fail(self, what: str, problem: str):
        raise PlanError(f"{self.kind} {self.where}: {what}: {problem}")

    def known(self, d, allowed, what):
        if not isinstance(d, dict):
            self.fail(what, "expected a table")
        extra = sorted(set(d) - allowed)
        if extra:
            self.fail(what, f"unknown key {extra[0]!r} (known: {', '.join(sorted(allowed))})")

    def text(self, d, key, what, required=False, default=""):
        if key not in d:
            if required:
                self.fail(what, f"missing {key!r}")
            return default
        v = d[key]
        if not isinstance(v, str) or (required and not v.strip()):
            self.fail(what, f"{key} must be {'non-empty ' if required else ''}text, got {v!r}")
        return v

    def num(self, d, key, what, *, default=None, lo=None, hi=None, positive=False):
        if key not in d:
            return default
        v = d[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            self.fail(what, f"{key} must be a number, got {v!r}")
        if (positive and v <= 0) or (lo is not None and v < lo) or (hi is not None and v > hi):
            rng = " and ".join(r for r in ("positive" if positive else "",
                                             f"at least {lo:g}" if lo is not None else "",
                                             f"at most {hi:g}" if hi is not None else "") if r)
            self.fail(what, f"{key} = {v!r} must be {rng}")
        return float(v)

    def tables(self, doc, key):
        """The [[key]] tables of the document (a list of tables), or a PlanError naming the key."""
        v = doc.get(key, [])
        if not isinstance(v, list) or not all(isinstance(t, dict) for t in v):
            self.fail(key, f"use [[{key}]] tables, got {v!r}"[:160])
        return v


def _read(path_or_dict) -> tuple[dict, str, str]:
    if isinstance(path_or_dict, dict):
        return path_or_dict, "<dict>", ""

    p = Path(path_or_dict)
    text = read_input_text(p, "plan", PlanError)
    try:
        return tomllib.loads(text), str(p), text
    except tomllib.TOMLDecodeError as exc:
        raise PlanError(f"plan {p}: not valid TOML ({exc})") from None


def _selective(c: _Ctx, d: dict, what: str) -> SelectiveSpec:
    """The chain of a selective point; the band file is checked here, relative to the plan's folder."""
    from meterlink.survey.selective import ORIENTATIONS, check_extrapolation, load_bands

    bands = c.text(d, "bands", what, required=True)
    p = Path(bands)
    if not p.is_absolute() and c.where != "<dict>":
        p = Path(c.where).parent / p
    try:
        loaded = load_bands(p)
    except MeterlinkError as exc:
        c.fail(what, str(exc))
    antenna = c.text(d, "antenna", what, default="isotropic")
    if antenna not in ORIENTATIONS:
        c.fail(what, f"antenna {antenna!r} is not one of {', '.join(ORIENTATIONS)}")
    ex = d.get("extrapolation", {})
    if not isinstance(ex, dict) or not all(isinstance(v, dict) for v in ex.values()):
        c.fail(what, "extrapolation must be a table of band name -> table of inputs")
    try:
        check_extrapolation(ex, loaded)
    except MeterlinkError as exc:
        c.fail(what, str(exc))
    return SelectiveSpec(str(p), c.text(d, "antenna_cert", what, required=True), antenna, c.text(d, "analyser", what),
                         tuple((k, tuple(sorted((kk, tuple(vv) if isinstance(vv, list) else vv) for kk, vv in v.items())))
                               for k, v in ex.items()),
                         c.num(d, "analyser_level_db", what, default=0.5, lo=0.0, hi=10.0),
                         c.num(d, "sweep_time_s", what, default=0.1, positive=True, hi=3600.0))


def _point(c: _Ctx, d: dict, i: int) -> Point:
    what = f"point {i}"
    c.known(d, _POINT, what)
    label = c.text(d, "label", what, required=True)
    what = f"point {i} ({label!r})"
    mode = c.text(d, "mode", what, default="spot")
    if mode not in MODES:
        c.fail(what, f"mode {mode!r} is not one of {', '.join(MODES)}")
    scheme = None
    if mode == "spatial":
        name = c.text(d, "scheme", what, default="three-heights")
        if name not in SCHEMES:
            c.fail(what, f"scheme {name!r} is not one of {', '.join(SCHEMES)}")
        heights = d.get("heights_m")
        if name == "custom" and (not isinstance(heights, list) or not heights):
            c.fail(what, "a custom scheme needs heights_m = [...]")
        if heights is not None and (not isinstance(heights, list) or any(
                isinstance(h, bool) or not isinstance(h, (int, float)) for h in heights)):
            c.fail(what, f"heights_m must be a list of heights in metres, got {heights!r}"[:160])
        n = d.get("n")
        if n is not None and (isinstance(n, bool) or not isinstance(n, int) or n < 2 or n > 50):
            c.fail(what, f"n = {n!r} must be a whole number from 2 to 50")
        try:
            scheme = scheme_from(name, n, heights)
        except MeterlinkError as exc:
            c.fail(what, str(exc))
    elif any(k in d for k in ("scheme", "n", "heights_m")):
        c.fail(what, "scheme, n and heights_m belong to mode 'spatial'")
    sel = _selective(c, d, what) if mode == "selective" else None
    if sel is None and any(k in d for k in _SELECTIVE):
        c.fail(what, f"{next(k for k in _SELECTIVE if k in d)} belongs to mode 'selective'")
    walk = d.get("walk_m", [])
    if walk and mode != "sweep":
        c.fail(what, "walk_m belongs to mode 'sweep'")
    if not isinstance(walk, list) or not all(
            isinstance(w, list) and len(w) == 2 and all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                                         and abs(v) <= MAX_SITE_M for v in w) for w in walk):
        c.fail(what, "walk_m must be a list of [x, y] pairs in metres")
    photos = _photos(c, d.get("photos", []), what)
    near = d.get("near_field", False)
    if not isinstance(near, bool):
        c.fail(what, f"near_field must be true or false, got {near!r}")
    x, y = c.num(d, "x_m", what, lo=-MAX_SITE_M, hi=MAX_SITE_M), c.num(d, "y_m", what, lo=-MAX_SITE_M, hi=MAX_SITE_M)
    if (x is None) != (y is None):
        c.fail(what, "give both x_m and y_m, or neither")
    return Point(label=label, mode=mode, height_m=c.num(d, "height_m", what, default=1.5, lo=0.0, hi=10.0),
                 x_m=x, y_m=y, lat_deg=c.num(d, "lat_deg", what, lo=-90, hi=90),
                 lon_deg=c.num(d, "lon_deg", what, lo=-180, hi=180), notes=c.text(d, "notes", what),
                 near_field=near, duration_s=c.num(d, "duration_s", what, positive=True, hi=MAX_DURATION_S),
                 scheme=scheme,
                 walk_m=tuple((float(a), float(b)) for a, b in walk), selective=sel,
                 photos=photos)


def _photos(c: _Ctx, photos, what: str) -> tuple[Photo, ...]:
    """A point's photos: file names, or tables {file, caption, direction_deg} (degrees from north)."""
    if isinstance(photos, str) or not isinstance(photos, list):
        c.fail(what, "photos must be a list of file names or {file, caption, direction_deg} tables")
    out = []
    for i, f in enumerate(photos, 1):
        if isinstance(f, str):
            f = {"file": f}
        c.known(f, _PHOTO, f"{what}: photo {i}")
        name = c.text(f, "file", f"{what}: photo {i}", required=True)
        out.append(Photo(str(c.base / name), c.text(f, "caption", f"{what}: photo {i}"),
                         c.num(f, "direction_deg", f"{what}: photo {i}", lo=0.0, hi=360.0)))
    return tuple(out)


def site_conditions(doc: dict, where: str = "<dict>", kind: str = "plan") -> dict:
    """The plan's [conditions] (weather as text, air temperature in degC, relative humidity in percent)
    and [transmitter] (the state confirmed with the operator: with whom, when, what), checked; each
    key present only when given ("transmitter" absent when nothing was confirmed). kind names the
    document in errors (a plan, or the conditions file given to render)."""
    c = _Ctx(where, kind=kind)
    cond, tx = doc.get("conditions", {}), doc.get("transmitter", {})
    c.known(cond, _CONDITIONS, "[conditions]")
    c.known(tx, _TRANSMITTER, "[transmitter]")
    out = {"weather": c.text(cond, "weather", "[conditions]"),
           "temperature_degc": c.num(cond, "temperature_degc", "[conditions]", lo=-60.0, hi=70.0),
           "humidity_percent": c.num(cond, "humidity_percent", "[conditions]", lo=0.0, hi=100.0)}
    out = {k: v for k, v in out.items() if v not in (None, "")}
    if tx:
        out["transmitter"] = {k: c.text(tx, k, "[transmitter]", required=True) for k in sorted(_TRANSMITTER)}
    return out


def load_plan(path_or_dict, *, check_photos: bool = True) -> SurveyPlan:
    """Load and check a plan (a TOML file path or an already parsed dict); the photos it names must
    be PNG or JPEG files (relative to the plan's folder) unless check_photos is false."""
    from meterlink.physics.limits import reference_level
    from meterlink.physics.verdict import get_rule

    doc, where, text = _read(path_or_dict)
    c = _Ctx(where, Path(where).parent if where != "<dict>" else None)
    c.known(doc, _TOP, "top level")
    sv, st = doc.get("survey", {}), doc.get("site", {})
    c.known(sv, _SURVEY, "[survey]")
    c.known(st, _SITE, "[site]")
    std = c.text(sv, "standard", "[survey]", required=True)
    tier = c.text(sv, "tier", "[survey]", default="public")
    rule = c.text(sv, "rule", "[survey]", required=True)
    try:
        reference_level(std, tier, 1e9)
        get_rule(rule)
    except MeterlinkError as exc:
        c.fail("[survey]", str(exc))
    band = sv.get("band_hz")
    if band is not None:
        if (not isinstance(band, list) or len(band) != 2
                or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in band)
                or not 0 < band[0] < band[1] <= MAX_FREQ_HZ):
            c.fail("[survey]", f"band_hz must be [low, high] with 0 < low < high, got {band!r}")
        band = (float(band[0]), float(band[1]))
    freq = c.num(sv, "freq_hz", "[survey]", positive=True, hi=MAX_FREQ_HZ)
    if freq is not None and band is not None:
        c.fail("[survey]", "give freq_hz or band_hz, not both")
    site = Site(name=c.text(st, "name", "[site]", required=True), address=c.text(st, "address", "[site]"),
                operator=c.text(st, "operator", "[site]"), technician=c.text(st, "technician", "[site]"),
                latitude_deg=c.num(st, "latitude_deg", "[site]", lo=-90, hi=90),
                longitude_deg=c.num(st, "longitude_deg", "[site]", lo=-180, hi=180),
                notes=c.text(st, "notes", "[site]"))
    sources = []
    for i, s in enumerate(c.tables(doc, "source"), 1):
        what = f"source {i}"
        c.known(s, _SOURCE, what)
        f = c.num(s, "freq_hz", what, positive=True, hi=MAX_FREQ_HZ)
        if f is None:
            c.fail(what, "missing 'freq_hz'")
        p, pm = (c.num(s, "power_w", what, positive=True, hi=MAX_POWER_W),
                 c.num(s, "max_power_w", what, positive=True, hi=MAX_POWER_W))
        if p is not None and pm is not None and pm < p:
            c.fail(what, f"max_power_w {pm:g} is below power_w {p:g}")
        sources.append(Source(c.text(s, "name", what, required=True), f, c.text(s, "technology", what), p, pm,
                              c.text(s, "notes", what)))
    raw_points = c.tables(doc, "point")
    points = tuple(_point(c, p, i) for i, p in enumerate(raw_points, 1))
    # a label names one broadband point and at most one selective point (its frequency-selective follow-up)
    labels = [(p.label, p.mode == "selective") for p in points]
    dup = next((lb for lb, s in labels if labels.count((lb, s)) > 1), None)
    if dup is not None:
        c.fail("points", f"label {dup!r} is used twice")
    if check_photos:
        from meterlink.survey.photos import read_photo

        for p in points:      # before the meter is touched: a photo that cannot be kept is found now
            for f in p.photos:
                try:
                    read_photo(f, p.label)
                except MeterlinkError as exc:
                    raise PlanError(f"plan {where}: {exc}") from None
    site_conditions(doc, where)
    interval = c.num(sv, "interval_ms", "[survey]", default=1000, lo=10, hi=3_600_000)
    return SurveyPlan(
        site=site, standard=std, tier=tier, rule=rule,
        certificate=c.text(sv, "certificate", "[survey]", required=True), points=points, sources=tuple(sources),
        title=c.text(sv, "title", "[survey]"), interval_ms=int(interval), freq_hz=freq, band_hz=band,
        followup=FollowUp(c.num(sv, "followup_v_per_m", "[survey]", positive=True, hi=1e6),
                          c.num(sv, "followup_percent", "[survey]", positive=True, hi=1e6)),
        settle_s=c.num(sv, "settle_s", "[survey]", default=2.0, lo=0.0, hi=600.0),
        spot_s=c.num(sv, "spot_s", "[survey]", default=5.0, positive=True, hi=MAX_DURATION_S),
        sweep_s=c.num(sv, "sweep_s", "[survey]", default=60.0, positive=True, hi=MAX_DURATION_S),
        source_text=text, source_path=where if where != "<dict>" else "",
        sources_file=_sources_file(c, sv, where),
        prediction_u_db=c.num(sv, "prediction_u_db", "[survey]", default=3.0, positive=True, hi=60.0),
        gnss_output_delay_s=c.num(sv, "gnss_output_delay_s", "[survey]", lo=0.0, hi=MAX_GNSS_OUTPUT_DELAY_S))


def _sources_file(c: _Ctx, sv: dict, where: str) -> str:
    """The plan's sources file (docs/sources.md), relative to the plan's folder; "" without one."""
    name = c.text(sv, "sources_file", "[survey]")
    if not name:
        return ""
    p = Path(name)
    if not p.is_absolute() and where != "<dict>":
        p = Path(where).parent / p
    return str(p)


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        if isinstance(v, float) and not math.isfinite(v):
            raise ValueError(f"not a finite number: {v!r}")
        return repr(v)
    if isinstance(v, str):      # a TOML basic string: JSON's escapes, and DEL escaped too
        import json
        return json.dumps(v, ensure_ascii=False).replace("\x7f", "\\u007f")
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):     # an inline table (a photo with its caption)
        return "{" + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items() if x is not None) + "}"
    raise ValueError(f"cannot write {v!r} to a plan")


def dump_plan(doc: dict) -> str:
    """A plan dict (tables [survey], [site], [report] and arrays [[source]], [[point]]) as TOML text
    that load_plan reads back to the same dict: what an interactive survey stores as its plan."""
    out = []
    for key, val in doc.items():
        tables = val if isinstance(val, list) else [val]
        for t in tables:
            out.append(f"[[{key}]]" if isinstance(val, list) else f"[{key}]")
            out += [f"{k} = {_toml_value(v)}" for k, v in t.items() if v is not None]
            out.append("")
    text = "\n".join(out)
    if tomllib.loads(text) != {k: ([{a: b for a, b in t.items() if b is not None} for t in v] if isinstance(v, list)
                                   else {a: b for a, b in v.items() if b is not None}) for k, v in doc.items()}:
        raise ValueError("the plan does not read back as written")       # a bug, never the user's input
    return text
