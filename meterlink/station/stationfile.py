"""Station file (``meterlink-station/1``, TOML): one monitoring site, its meters, rules and retention.

Parsing is strict: an unknown key, a wrong type or an impossible value raises
:class:`StationFileError` with one line naming the file and the dotted key. Relative paths
(database, certificate files) are resolved against the station file's folder.
See docs/station-file.md.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from meterlink.errors import MeterlinkError
from meterlink.network.syncd import settings_from_table
from meterlink.physics.units import parse_frequency_hz

FORMAT = "meterlink-station/1"
UNITS = ("v_per_m", "pct_field", "pct_power")
CONVENTIONS = ("field", "power")
DEFAULT_WINDOWS_S = (360.0, 1800.0, 86400.0)
MAX_WINDOW_S = 366 * 86400.0   # the longest averaging window or health interval a station file may ask for


class StationFileError(MeterlinkError):
    """A station file that cannot be read or is invalid."""


@dataclass(frozen=True)
class MeterConfig:
    """One meter at the station: its port, certificate, interval and declared frequency or band."""

    name: str
    port: str
    certificate: str
    interval_s: float = 1.0
    freq_hz: float | None = None          # declared single frequency; None -> station default
    band_hz: tuple[float, float] | None = None
    baudrate: int = 115200
    bands: tuple[tuple[str, float, float], ...] = ()   # per-band series of a frequency-selective meter


@dataclass(frozen=True)
class AlarmRule:
    """Raise when the running average over window_s stays >= threshold for min_duration_s;
    clear when it falls below clear (hysteresis)."""

    name: str
    window_s: float
    unit: str
    threshold: float
    clear: float
    min_duration_s: float = 0.0
    meters: tuple[str, ...] = ()          # empty: every meter
    command: tuple[str, ...] = ()         # argv of an external command, run per episode event
    command_timeout_s: float = 10.0       # past this its whole process group is killed (meterlink.station.hooks)


@dataclass(frozen=True)
class HealthRules:
    """Thresholds of the station-health checks (each finding becomes an event)."""

    max_gap_s: float = 10.0
    stuck_s: float = 600.0
    battery_low_pct: float = 20.0
    temp_min_c: float = -20.0
    temp_max_c: float = 55.0
    drift_max_ppm: float = 100.0
    cert_warn_days: int = 30


@dataclass(frozen=True)
class Retention:
    """Age limits, in days of data time, of every table that grows (meterlink/station/retention.py).

    derived_days = 0 keeps the 6-minute blocks and running averages for ever."""

    raw_days: float = 90.0
    status_days: float = 90.0
    events_days: float = 365.0
    derived_days: float = 0.0
    check_every_s: float = 3600.0
    chunk_rows: int = 20000


@dataclass(frozen=True)
class Reports:
    """[reports]: the daemon writes the period report of each finished month or quarter into folder
    (meterlink/station/period_report.py)."""

    period: str              # "month" or "quarter"
    folder: Path
    pdf: bool = False


@dataclass(frozen=True)
class Station:
    """A parsed station file."""

    path: Path
    name: str
    latitude_deg: float | None
    longitude_deg: float | None
    elevation_m: float | None
    database: Path
    standard: str
    tier: str
    freq_hz: float | None
    band_hz: tuple[float, float] | None
    convention: str
    windows_s: tuple[float, ...]
    block_s: float
    min_coverage: float
    timezone: str
    heartbeat_s: float
    meters: tuple[MeterConfig, ...]
    alarms: tuple[AlarmRule, ...] = ()
    health: HealthRules = field(default_factory=HealthRules)
    retention: Retention = field(default_factory=Retention)
    central: dict | None = None      # [central]: url, token_file, station_uuid (checked by meterlink.network.syncd)
    reports: Reports | None = None

    def meter(self, name: str) -> MeterConfig:
        """The meter called ``name``."""
        for m in self.meters:
            if m.name == name:
                return m
        raise KeyError(name)

    def meter_freq(self, m: MeterConfig):
        """Frequency (Hz) or band (lo, hi) used to calibrate and to look up the reference level."""
        if m.freq_hz is not None:
            return m.freq_hz
        if m.band_hz is not None:
            return m.band_hz
        return self.freq_hz if self.freq_hz is not None else self.band_hz


_TYPES = {"str": (str,), "num": (int, float), "int": (int,), "bool": (bool,), "list": (list,),
          "table": (dict,), "tables": (list,)}


class _Doc:
    """Typed access to one table of the TOML document, remembering which keys were used."""

    def __init__(self, src: str, table: dict, prefix: str):
        self.src, self.t, self.prefix, self.used = src, table, prefix, set()

    def fail(self, key: str, problem: str):
        where = f"{self.prefix}{key}" if key else self.prefix.rstrip(".")
        raise StationFileError(f"{self.src}: {where}: {problem}")

    def get(self, key: str, kind: str, default=..., *, positive=False, lo=None, hi=None):
        self.used.add(key)
        if key not in self.t:
            if default is ...:
                self.fail(key, "missing")
            return default
        v = self.t[key]
        if isinstance(v, bool) and kind != "bool" or not isinstance(v, _TYPES[kind]):
            self.fail(key, f"expected {kind}, got {type(v).__name__} {v!r}"[:120])
        if kind == "num":
            v = float(v)
            if v != v or v in (float("inf"), float("-inf")):
                self.fail(key, "must be finite")
        if kind in ("num", "int"):
            if positive and v <= 0:
                self.fail(key, f"must be > 0, got {v!r}")
            if lo is not None and v < lo or hi is not None and v > hi:
                self.fail(key, f"must be within [{lo}, {hi}], got {v!r}")
        if kind == "str" and not v.strip():
            self.fail(key, "must not be empty")
        return v

    def sub(self, key: str, required=False) -> "_Doc":
        t = self.get(key, "table", ... if required else {})
        return _Doc(self.src, t, f"{self.prefix}{key}.")

    def subs(self, key: str) -> list["_Doc"]:
        items = self.get(key, "tables", [])
        out = []
        for i, t in enumerate(items):
            if not isinstance(t, dict):
                self.fail(f"{key}[{i}]", "expected a table")
            out.append(_Doc(self.src, t, f"{self.prefix}{key}[{i}]."))
        return out

    def done(self):
        extra = sorted(set(self.t) - self.used)
        if extra:
            self.fail(extra[0], "unknown key")

    def freq(self, key: str):
        v = self.get(key, "str", None) if isinstance(self.t.get(key), str) else self.get(key, "num", None)
        if v is None:
            return None
        try:
            f = parse_frequency_hz(v) if isinstance(v, str) else float(v)
        except (ValueError, MeterlinkError) as exc:
            self.fail(key, str(exc))
        if not 0 < f <= 3e12:       # nothing above 3 THz: the standards end at 300 GHz
            self.fail(key, f"must be > 0 Hz and at most 3 THz, got {f!r}")
        return f

    def band(self, key: str):
        v = self.get(key, "list", None)
        if v is None:
            return None
        if len(v) != 2:
            self.fail(key, "expected [low, high]")
        sub = _Doc(self.src, {"low": v[0], "high": v[1]}, f"{self.prefix}{key}.")
        lo, hi = sub.freq("low"), sub.freq("high")
        if not hi > lo:
            self.fail(key, "high must exceed low")
        return (lo, hi)


def _bands(d: _Doc):
    names = set()
    for b in d.subs("bands"):
        name = b.get("name", "str")
        if name in names or name == "total":
            b.fail("name", f"duplicate or reserved band name {name!r}")
        names.add(name)
        lo, hi = b.freq("low"), b.freq("high")
        if lo is None or hi is None or not hi > lo:
            b.fail("high", "need low and high with high > low")
        b.done()
        yield (name, lo, hi)


def _meter(d: _Doc, base: Path, default_interval: float) -> MeterConfig:
    cert = d.get("certificate", "str")
    if cert.endswith(".toml") and not Path(cert).is_absolute():
        cert = str(base / cert)
    m = MeterConfig(name=d.get("name", "str"), port=d.get("port", "str"), certificate=cert,
                    interval_s=d.get("interval_s", "num", default_interval, lo=0.01, hi=3600.0),
                    freq_hz=d.freq("freq"), band_hz=d.band("band"),
                    baudrate=d.get("baudrate", "int", 115200, positive=True, hi=10_000_000),
                    bands=tuple(_bands(d)))
    if m.freq_hz is not None and m.band_hz is not None:
        d.fail("band", "give either freq or band, not both")
    d.done()
    return m


def _alarm(d: _Doc, meters: set[str], windows: tuple[float, ...]) -> AlarmRule:
    unit = d.get("unit", "str")
    if unit not in UNITS:
        d.fail("unit", f"expected one of {', '.join(UNITS)}, got {unit!r}")
    thr = d.get("threshold", "num", positive=True)
    clear = d.get("clear", "num", thr, positive=True)
    if clear > thr:
        d.fail("clear", f"must not exceed threshold {thr:g}")
    window = float(d.get("window_s", "num", windows[0], positive=True))
    if window not in windows:   # the monitor evaluates alarms only on the running averages it computes
        d.fail("window_s", f"{window:g} s is not one of the station's averaging windows (assessment.windows_s = "
                           f"[{', '.join(f'{w:g}' for w in windows)}]): this alarm could never fire")
    names = d.get("meters", "list", [])
    for i, n in enumerate(names):
        if not isinstance(n, str) or n not in meters:
            d.fail(f"meters[{i}]", f"no meter named {n!r}")
    cmd = d.get("command", "list", [])
    if any(not isinstance(c, str) or not c for c in cmd):
        d.fail("command", "expected a list of non-empty strings (an argument list, not a shell line)")
    a = AlarmRule(name=d.get("name", "str"), window_s=window, unit=unit, threshold=thr, clear=clear,
                  min_duration_s=d.get("min_duration_s", "num", 0.0, lo=0.0),
                  meters=tuple(names), command=tuple(cmd),
                  command_timeout_s=d.get("command_timeout_s", "num", 10.0, lo=0.1, hi=3600.0))
    d.done()
    return a


def parse_station(text: str, path: Path | str = "<station>") -> Station:
    """Parse and validate station-file text; ``path`` names it in messages and anchors relative paths."""
    path = Path(path)
    src = str(path)
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise StationFileError(f"{src}: not valid TOML: {exc}") from None
    top = _Doc(src, doc, "")
    fmt = top.get("format", "str")
    if fmt != FORMAT:
        top.fail("format", f"expected {FORMAT!r}, got {fmt!r}")
    base = path.parent if path.name != "<station>" else Path.cwd()
    st = top.sub("station", required=True)
    name = st.get("name", "str")
    lat = st.get("latitude_deg", "num", None, lo=-90.0, hi=90.0)
    lon = st.get("longitude_deg", "num", None, lo=-180.0, hi=180.0)
    elev = st.get("elevation_m", "num", None, lo=-11000.0, hi=9000.0)
    db = Path(st.get("database", "str"))
    tz = st.get("timezone", "str", "UTC")
    try:
        from zoneinfo import ZoneInfo
        ZoneInfo(tz)
    except Exception:  # noqa: BLE001 - any failure means the name is unusable here
        st.fail("timezone", f"unknown time zone {tz!r}")
    heartbeat = st.get("heartbeat_s", "num", 10.0, positive=True, hi=86400.0)
    st.done()

    a = top.sub("assessment", required=True)
    standard = a.get("standard", "str")
    tier = a.get("tier", "str")
    freq, band = a.freq("freq"), a.band("band")
    if freq is not None and band is not None:
        a.fail("band", "give either freq or band, not both")
    conv = a.get("convention", "str", "power")
    if conv not in CONVENTIONS:
        a.fail("convention", f"expected one of {', '.join(CONVENTIONS)}, got {conv!r}")
    wins = a.get("windows_s", "list", list(DEFAULT_WINDOWS_S))
    if not wins:
        a.fail("windows_s", "expected a non-empty list of positive seconds")
    for i, w in enumerate(wins):
        # math.isfinite also refuses nan, which would pass "w <= 0" and fail later in round()
        if isinstance(w, bool) or not isinstance(w, (int, float)) or not math.isfinite(w) or not 0 < w <= MAX_WINDOW_S:
            a.fail(f"windows_s[{i}]", f"expected positive seconds up to {MAX_WINDOW_S:g} (a year), got {w!r}")
    block_s = a.get("block_s", "num", 360.0, positive=True, hi=86400.0)
    for w in wins:
        if abs(w / block_s - round(w / block_s)) > 1e-9:
            a.fail("windows_s", f"window {w:g} s is not a whole number of {block_s:g} s blocks")
    if abs(86400.0 / block_s - round(86400.0 / block_s)) > 1e-9:
        a.fail("block_s", "must divide a day into whole blocks")
    min_cov = a.get("min_coverage", "num", 0.9, lo=0.0, hi=1.0)
    interval = a.get("interval_s", "num", 1.0, lo=0.01, hi=3600.0)
    a.done()

    meters = tuple(_meter(d, base, interval) for d in top.subs("meter"))
    if not meters:
        top.fail("meter", "at least one [[meter]] is required")
    seen = set()
    for i, m in enumerate(meters):
        if m.name in seen:
            top.fail(f"meter[{i}].name", f"duplicate meter name {m.name!r}")
        seen.add(m.name)
        if m.freq_hz is None and m.band_hz is None and freq is None and band is None:
            top.fail(f"meter[{i}]", "no frequency: set assessment.freq/band or the meter's freq/band")
    windows = tuple(float(w) for w in wins)
    alarms = tuple(_alarm(d, seen, windows) for d in top.subs("alarm"))

    h = top.sub("health")
    health = HealthRules(max_gap_s=h.get("max_gap_s", "num", 10.0, positive=True, hi=MAX_WINDOW_S),
                         stuck_s=h.get("stuck_s", "num", 600.0, positive=True, hi=MAX_WINDOW_S),
                         battery_low_pct=h.get("battery_low_pct", "num", 20.0, lo=0.0, hi=100.0),
                         temp_min_c=h.get("temp_min_c", "num", -20.0, lo=-100.0, hi=150.0),
                         temp_max_c=h.get("temp_max_c", "num", 55.0, lo=-100.0, hi=150.0),
                         drift_max_ppm=h.get("drift_max_ppm", "num", 100.0, positive=True, hi=1e9),
                         cert_warn_days=h.get("cert_warn_days", "int", 30, lo=0, hi=3650))
    if health.temp_max_c <= health.temp_min_c:
        h.fail("temp_max_c", "must exceed temp_min_c")
    h.done()
    r = top.sub("retention")
    raw_days = r.get("raw_days", "num", 90.0, positive=True, hi=36500.0)
    retention = Retention(raw_days=raw_days,
                          status_days=r.get("status_days", "num", raw_days, positive=True, hi=36500.0),
                          events_days=r.get("events_days", "num", 365.0, positive=True, hi=36500.0),
                          derived_days=r.get("derived_days", "num", 0.0, lo=0.0, hi=36500.0),
                          check_every_s=r.get("check_every_s", "num", 3600.0, positive=True, hi=MAX_WINDOW_S),
                          chunk_rows=r.get("chunk_rows", "int", 20000, positive=True, hi=10_000_000))
    if 0 < retention.derived_days < raw_days:
        r.fail("derived_days", f"must be 0 (keep for ever) or at least raw_days ({raw_days:g}), "
               f"got {retention.derived_days:g}")
    r.done()
    central = top.get("central", "table", None)
    if central is not None:                      # checked now: a monitor never starts with unusable sync settings
        settings_from_table(central, src, base)
    reports = None
    if "reports" in top.t:
        rp = top.sub("reports")
        period = rp.get("period", "str")
        if period not in ("month", "quarter"):
            rp.fail("period", f"expected 'month' or 'quarter', got {period!r}")
        folder = Path(rp.get("folder", "str", "reports"))
        reports = Reports(period, folder if folder.is_absolute() else base / folder, rp.get("pdf", "bool", False))
        rp.done()
    top.done()
    return Station(path=path, name=name, latitude_deg=lat, longitude_deg=lon, elevation_m=elev,
                   database=db if db.is_absolute() else base / db, standard=standard, tier=tier,
                   freq_hz=freq, band_hz=band, convention=conv, windows_s=windows, block_s=block_s,
                   min_coverage=min_cov, timezone=tz, heartbeat_s=heartbeat, meters=meters,
                   alarms=alarms, health=health, retention=retention, central=central, reports=reports)


def load_station(path) -> Station:
    """Read and validate a station file."""
    from meterlink.errors import read_input_text

    p = Path(path)
    return parse_station(read_input_text(p, "station", StationFileError), p)
