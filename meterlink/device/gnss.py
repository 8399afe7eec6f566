"""A GNSS receiver on a second serial port: NMEA 0183 GGA and RMC read on a background thread.

Same link style as the meter (meterlink.device.link): any port or pyserial URL through the one
transport module, a reader thread, reconnection with back-off, events for what went wrong. The
sentences are parsed by pynmeagps; a sentence whose checksum does not match is counted and never
used. Positions are WGS 84 latitude/longitude in degrees and altitude above mean sea level in m.

Accuracy: a receiver's GGA gives HDOP, not an error in metres. The estimate kept with every fix is
HDOP x UERE_M (a user-equivalent range error of 5 m, 1 sigma: common practice for a standalone
single-frequency receiver, no single published source), a rough 1-sigma horizontal error.
"""

from __future__ import annotations

import datetime as _dt
import math
import threading
import time
from collections import deque
from dataclasses import dataclass

from meterlink.device.link import LinkEvent
from meterlink.device.transport import Link, SerialLink
from meterlink.errors import LinkError

GNSS_BAUD = 9600
UERE_M = 5.0
#: Mean Earth radius R1 = (2a + b)/3 of WGS 84, m (the IUGG mean radius).
EARTH_RADIUS_M = 6_371_008.8
_MAX_LINE = 256          # NMEA 0183 allows 82 characters; anything longer without a newline is garbage


@dataclass(frozen=True)
class Fix:
    """One position from a GGA sentence (with the date of the latest RMC, else the host's date)."""

    fix_utc: float | None    # time of the fix, UTC epoch seconds
    lat_deg: float
    lon_deg: float
    alt_m: float | None      # above mean sea level
    quality: int             # GGA fix quality: 1 GPS, 2 DGPS, 4 RTK fixed, ...
    n_sats: int | None
    hdop: float | None
    t_host: float            # host monotonic time the sentence arrived

    @property
    def accuracy_m(self) -> float | None:
        """Rough 1-sigma horizontal error: HDOP x UERE_M (see the module note)."""
        return None if self.hdop is None else self.hdop * UERE_M


@dataclass
class GnssStats:
    sentences: int = 0
    used: int = 0
    bad_checksum: int = 0
    no_checksum: int = 0
    malformed: int = 0
    garbage_bytes: int = 0
    no_fix: int = 0
    fixes: int = 0
    port_losses: int = 0
    reconnects: int = 0


class SentenceError(ValueError):
    """A line that is not a usable NMEA sentence; kind is bad_checksum, no_checksum or malformed."""

    def __init__(self, kind: str, message: str):
        super().__init__(message)
        self.kind = kind


def nmea_checksum(body: str) -> int:
    """XOR of every character between '$' and '*' (NMEA 0183)."""
    c = 0
    for ch in body.encode("ascii", "replace"):
        c ^= ch
    return c


def parse_sentence(line: bytes | str):
    """A pynmeagps message from one sentence; SentenceError if the checksum is wrong or missing,
    or the sentence cannot be parsed."""
    from pynmeagps import NMEAReader

    text = line.decode("ascii", "replace") if isinstance(line, bytes) else line
    text = text.strip()
    if not text.startswith(("$", "!")) or "*" not in text:
        raise SentenceError("no_checksum" if text.startswith(("$", "!")) else "malformed",
                            f"not a checksummed NMEA sentence: {text[:40]!r}")
    body, _, cs = text[1:].rpartition("*")
    try:
        want = int(cs[:2], 16)
    except ValueError:
        raise SentenceError("malformed", f"bad checksum field {cs[:8]!r}") from None
    if nmea_checksum(body) != want or len(cs) != 2:
        raise SentenceError("bad_checksum", f"checksum {cs[:8]!r} does not match {nmea_checksum(body):02X}")
    try:
        return NMEAReader.parse(text, validate=0)
    except Exception as exc:  # noqa: BLE001 - pynmeagps raises several types for malformed input
        raise SentenceError("malformed", f"{type(exc).__name__}: {exc}"[:120]) from None


def _f(v):
    return None if v in ("", None) else float(v)


def to_local_m(lat_deg, lon_deg, lat0_deg: float, lon0_deg: float):
    """(x east, y north) in metres about an origin: equirectangular projection on a sphere of
    EARTH_RADIUS_M, x = R cos(lat0) dlon, y = R dlat (good to far under a metre over a site)."""
    import numpy as np

    lat, lon = np.asarray(lat_deg, dtype=float), np.asarray(lon_deg, dtype=float)
    x = EARTH_RADIUS_M * math.cos(math.radians(lat0_deg)) * np.radians(lon - lon0_deg)
    y = EARTH_RADIUS_M * np.radians(lat - lat0_deg)
    return x, y


def from_local_m(x_m, y_m, lat0_deg: float, lon0_deg: float):
    """Inverse of to_local_m: (lat_deg, lon_deg) of local (x east, y north) metres."""
    import numpy as np

    x, y = np.asarray(x_m, dtype=float), np.asarray(y_m, dtype=float)
    lat = lat0_deg + np.degrees(y / EARTH_RADIUS_M)
    lon = lon0_deg + np.degrees(x / (EARTH_RADIUS_M * math.cos(math.radians(lat0_deg))))
    return lat, lon


class GnssLink:
    """Read NMEA from one receiver on a background thread; latest() gives the current fix."""

    def __init__(self, port: str, *, baudrate: int = GNSS_BAUD, link_factory=None, backoff_initial_s: float = 0.1,
                 backoff_max_s: float = 2.0, read_timeout_s: float = 0.1, keep_fixes: int = 100_000):
        if not port or not str(port).strip():
            raise LinkError("no GNSS port given")
        self.port = str(port)
        self._factory = link_factory or (lambda: SerialLink(self.port, baudrate))
        self.backoff_initial_s, self.backoff_max_s = backoff_initial_s, backoff_max_s
        self.read_timeout_s = read_timeout_s
        self.stats = GnssStats()
        self._lock = threading.Lock()
        self._latest: Fix | None = None
        self._events: deque[LinkEvent] = deque()
        self._date: _dt.date | None = None
        self._has_fix: bool | None = None
        self._link: Link | None = None
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.finished = threading.Event()
        self._keep = keep_fixes

    # -- public --------------------------------------------------------------------------------
    def start(self, require_open: bool = True) -> "GnssLink":
        """Start the reader; with require_open the port is opened first (LinkError naming it here)."""
        if require_open:
            link = self._factory()
            try:
                link.open()
            except LinkError as exc:
                raise LinkError(f"GNSS receiver: {exc}") from None
            self._link = link
        self._thread = threading.Thread(target=self._run, name=f"meterlink-gnss-{self.port}", daemon=True)
        self._thread.start()
        return self

    def stop(self, timeout_s: float = 5.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout_s)

    def latest(self, max_age_s: float | None = 2.0) -> Fix | None:
        """The newest valid fix, or None if there is none or it arrived more than max_age_s ago
        (host seconds): a stale position is not given out as the current one."""
        with self._lock:
            f = self._latest
        if f is None or (max_age_s is not None and time.monotonic() - f.t_host > max_age_s):
            return None
        return f

    def events(self) -> list[LinkEvent]:
        """Events since the last call (port lost, reconnected, fix lost/regained, bad sentences)."""
        with self._lock:
            out = list(self._events)
            self._events.clear()
        return out

    def summary(self) -> dict:
        s = self.stats
        return {k: getattr(s, k) for k in s.__dataclass_fields__}

    def __enter__(self) -> "GnssLink":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    # -- thread --------------------------------------------------------------------------------
    def _event(self, kind: str, severity: str, message: str, **detail) -> None:
        with self._lock:
            self._events.append(LinkEvent(kind, severity, message, time.time(), detail))

    def _run(self) -> None:
        attempts, delay = 0, self.backoff_initial_s
        try:
            while not self._stop.is_set():
                try:
                    if self._link is None or not self._link.is_open:
                        link = self._factory()
                        link.open()
                        self._link = link
                    if attempts:
                        self.stats.reconnects += 1
                        self._event("gnss_reconnected", "info", f"GNSS receiver on {self.port} back after "
                                    f"{attempts} attempt(s)", attempts=attempts)
                    attempts, delay = 0, self.backoff_initial_s
                    self._pump_until_lost()
                except LinkError as exc:
                    self._close()
                    if self._stop.is_set():
                        break
                    attempts += 1
                    if attempts == 1:
                        self.stats.port_losses += 1
                        with self._lock:
                            self._latest = None        # no position from a receiver that is gone
                        self._event("gnss_lost", "warning", f"GNSS receiver: {exc}; samples are stored "
                                    "without position until it returns", port=self.port)
                    self._stop.wait(delay)
                    delay = min(delay * 2, self.backoff_max_s)
        except Exception as exc:  # a bug must not stop the survey silently
            self._event("gnss_internal_error", "error", f"GNSS thread stopped: {type(exc).__name__}: {exc}")
        finally:
            self._close()
            self.finished.set()

    def _close(self) -> None:
        if self._link is not None:
            self._link.close()
        self._link = None

    def _pump_until_lost(self) -> None:
        buf = bytearray()
        bad: dict[str, int] = {}
        last_report = time.monotonic()
        try:
            self._pump(buf, bad, last_report)
        finally:           # lost or stopping: what was rejected since the last report is still counted
            if bad:
                self._report_bad(bad)

    def _report_bad(self, bad: dict) -> None:
        self._event("gnss_bad_sentences", "warning", "GNSS sentences not used: " + ", ".join(
            f"{v} {k.replace('_', ' ')}" for k, v in sorted(bad.items())), **bad)
        bad.clear()

    def _pump(self, buf: bytearray, bad: dict, last_report: float) -> None:
        while not self._stop.is_set():
            data = self._link.read(4096, self.read_timeout_s)
            buf += data
            while True:
                i = buf.find(b"\n")
                if i < 0:
                    break
                line = bytes(buf[:i]).strip()
                del buf[:i + 1]
                if line:
                    kind = self._line(line)
                    if kind:
                        bad[kind] = bad.get(kind, 0) + 1
            if len(buf) > _MAX_LINE:
                self.stats.garbage_bytes += len(buf)
                bad["garbage_bytes"] = bad.get("garbage_bytes", 0) + len(buf)
                buf.clear()
            if bad and (time.monotonic() - last_report >= 1.0 or not data):   # at most one event a second
                self._report_bad(bad)
                last_report = time.monotonic()

    def _line(self, line: bytes) -> str | None:
        """Handle one sentence; returns the kind of rejection, or None if it was fine."""
        self.stats.sentences += 1
        try:
            msg = parse_sentence(line)
        except SentenceError as exc:
            setattr(self.stats, exc.kind, getattr(self.stats, exc.kind) + 1)
            return exc.kind
        ident = getattr(msg, "msgID", "")
        if ident == "RMC":
            self.stats.used += 1
            if isinstance(getattr(msg, "date", None), _dt.date):
                self._date = msg.date
            if getattr(msg, "status", "A") != "A":
                self._set_fix(False)
        elif ident == "GGA":
            self.stats.used += 1
            self._gga(msg)
        return None

    def _gga(self, msg) -> None:
        q = int(msg.quality or 0) if str(msg.quality).strip() != "" else 0
        lat, lon = _f(msg.lat), _f(msg.lon)
        if q == 0 or lat is None or lon is None or not (math.isfinite(lat) and math.isfinite(lon)):
            self.stats.no_fix += 1
            self._set_fix(False)
            return
        fix_utc = None
        t = getattr(msg, "time", None)
        if isinstance(t, _dt.time):
            day = self._date or _dt.datetime.now(_dt.timezone.utc).date()
            fix_utc = _dt.datetime.combine(day, t.replace(tzinfo=_dt.timezone.utc)).timestamp()
        sats = _f(msg.numSV)
        fix = Fix(fix_utc, lat, lon, _f(msg.alt), q, None if sats is None else int(sats), _f(msg.HDOP),
                  time.monotonic())
        with self._lock:
            self._latest = fix
        self.stats.fixes += 1
        self._set_fix(True)

    def _set_fix(self, ok: bool) -> None:
        if ok == self._has_fix:
            return
        before, self._has_fix = self._has_fix, ok
        if not ok:
            with self._lock:
                self._latest = None
            self._event("gnss_no_fix", "warning", f"GNSS receiver on {self.port} reports no position fix; "
                        "samples are stored without position until it has one again")
        elif before is False:
            self._event("gnss_fix", "info", f"GNSS receiver on {self.port} has a position fix again")

