"""A GNSS receiver on a second serial port: NMEA 0183 GGA and RMC read on a background thread.

Same link style as the meter (meterlink.device.link): any port or pyserial URL through the one
transport module, a reader thread, reconnection with back-off, events for what went wrong. The
sentences are parsed by pynmeagps; a sentence whose checksum does not match is counted and never
used. Positions are WGS 84 latitude/longitude in degrees and altitude above mean sea level in m.

Accuracy: a receiver's GGA gives HDOP, not an error in metres. The estimate kept with every fix is
HDOP x UERE_M (a user-equivalent range error of 5 m, 1 sigma: common practice for a standalone
single-frequency receiver, no single published source), a rough 1-sigma horizontal error.

Time: every fix is kept in a short track keyed by its own UTC (GGA time, RMC date). A reading is
placed on that track by time, not by when the host happened to handle it: the offset between
GNSS time and the readings' time scale is estimated as the median of (arrival - fix time) over
recent fixes, the arrival expressed in the readings' time scale (frame_clock; the host's UTC when
none is given), less the receiver's output delay when one is declared (output_delay_s: a receiver
sends a fix's sentences some 50-500 ms after the fix's epoch, receiver-dependent; undeclared, that
delay is taken for clock offset and every position is the one from that long before), and
position_on_track() interpolates between the two fixes that bracket the reading's time.
"""

from __future__ import annotations

import datetime as _dt
import math
import threading
import time
from bisect import bisect_right
from collections import deque
from dataclasses import dataclass
from typing import Callable

from meterlink.device.link import LinkEvent
from meterlink.device.transport import Link, SerialLink
from meterlink.errors import LinkError

GNSS_BAUD = 9600
UERE_M = 5.0
#: Mean Earth radius R1 = (2a + b)/3 of WGS 84, m (the IUGG mean radius).
EARTH_RADIUS_M = 6_371_008.8
_MAX_LINE = 256          # NMEA 0183 allows 82 characters; anything longer without a newline is garbage
#: The fastest a surveyor carrying the probe is taken to move (a brisk walk), m/s: between two fixes
#: the carrier may stray from the straight line by at most this speed x the time to the nearer fix.
CARRY_SPEED_M_S = 2.0
#: Two fixes farther apart than this speed allows (108 km/h) are a jump, not a walk or a drive: a
#: receiver's outlier, or a probe put down elsewhere: a reading between them is not placed on the
#: straight line but at the nearer fix, m/s.
JUMP_SPEED_M_S = 30.0
#: Fixes (arrival - fix time) kept for the offset estimate: the last two minutes at 1 Hz.
OFFSET_WINDOW = 120
#: |offset| above which a survey says in an event that GNSS time and the readings' time disagree, s.
OFFSET_LARGE_S = 2.0


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
    t_frame: float | None = None   # the arrival in the readings' time scale (see GnssLink.frame_clock)

    @property
    def accuracy_m(self) -> float | None:
        """Rough 1-sigma horizontal error: HDOP x UERE_M (see the module note)."""
        return None if self.hdop is None else self.hdop * UERE_M


@dataclass(frozen=True)
class Position:
    """Where the receiver was at one instant of GNSS time, from the fixes around it."""

    lat_deg: float
    lon_deg: float
    alt_m: float | None
    accuracy_m: float | None   # rough 1-sigma horizontal error: fixes' estimate, gap and timing (see position_on_track)
    fix_utc: float             # the GNSS time the position is for
    quality: int               # the poorer fix quality of the fixes used
    n_sats: int | None         # the fewer satellites of the fixes used
    hdop: float | None         # the larger HDOP of the fixes used
    gap_s: float               # interval between the bracketing fixes, or to the one fix used


@dataclass(frozen=True)
class TimeOffset:
    """Readings' time minus GNSS time: median of (arrival - fix time - declared output delay), with its
    robust spread."""

    offset_s: float
    spread_s: float            # 1.4826 x median absolute deviation: the scatter of one arrival, s
    n: int


def estimate_offset(samples) -> TimeOffset | None:
    """Median and robust spread of (arrival - fix time) samples; None without any."""
    import numpy as np

    a = np.asarray([v for v in samples if v is not None and math.isfinite(v)], dtype=float)
    if a.size == 0:
        return None
    med = float(np.median(a))
    return TimeOffset(med, float(1.4826 * np.median(np.abs(a - med))), int(a.size))


def _min_opt(a, b):
    return b if a is None else a if b is None else min(a, b)


def _max_opt(a, b):
    return b if a is None else a if b is None else max(a, b)


def position_on_track(track, t_s: float, *, max_gap_s: float, timing_u_s: float = 0.0,
                      carry_speed_m_s: float = CARRY_SPEED_M_S,
                      jump_speed_m_s: float = JUMP_SPEED_M_S) -> Position | None:
    """The position at GNSS time t_s from fixes sorted by fix_utc (pure).

    Between two fixes at most max_gap_s apart: linear interpolation, unless they lie farther apart
    than jump_speed_m_s allows (a jump): then the nearer of the two, its accuracy grown by the share
    of the jump it may be off. Else the nearer fix, if it is at most max_gap_s / 2 away. Else
    None: a position that far from any fix is not given out.
    The accuracy combines (root sum of squares) the larger of the fixes' own estimates, how far the
    carrier may have strayed from the straight line (carry_speed_m_s x time to the nearer fix), and
    the timing: the speed between the fixes x timing_u_s (the spread of the offset estimate)."""
    times = [f.fix_utc for f in track]
    i = bisect_right(times, t_s)
    f1 = track[i - 1] if i > 0 else None
    f2 = track[i] if i < len(track) else None
    if f1 is not None and f1.fix_utc == t_s:
        f2 = f1
    if f1 is not None and f2 is not None and f2.fix_utc - f1.fix_utc <= max_gap_s:
        dt = f2.fix_utc - f1.fix_utc
        w = (t_s - f1.fix_utc) / dt if dt > 0 else 0.0
        lat = f1.lat_deg + w * (f2.lat_deg - f1.lat_deg)
        lon = f1.lon_deg + w * (f2.lon_deg - f1.lon_deg)
        if f1.alt_m is not None and f2.alt_m is not None:
            alt = f1.alt_m + w * (f2.alt_m - f1.alt_m)
        else:
            alt = f1.alt_m if f1.alt_m is not None else f2.alt_m
        x, y = to_local_m(f2.lat_deg, f2.lon_deg, f1.lat_deg, f1.lon_deg)
        d = math.hypot(float(x), float(y))
        speed = d / dt if dt > 0 else 0.0
        near = min(t_s - f1.fix_utc, f2.fix_utc - t_s)
        if speed > jump_speed_m_s:       # the nearer fix; wrong by the jump if the other side holds
            f = f1 if w <= 0.5 else f2
            u = None if f.accuracy_m is None else math.hypot(f.accuracy_m, min(w, 1.0 - w) * d)
            return Position(f.lat_deg, f.lon_deg, f.alt_m, u, t_s, f.quality, f.n_sats, f.hdop, dt)
        acc = _max_opt(f1.accuracy_m, f2.accuracy_m)
        u = None if acc is None else math.sqrt(acc ** 2 + (carry_speed_m_s * near) ** 2 + (speed * timing_u_s) ** 2)
        return Position(lat, lon, alt, u, t_s, min(f1.quality, f2.quality), _min_opt(f1.n_sats, f2.n_sats),
                        _max_opt(f1.hdop, f2.hdop), dt)
    near = [f for f in (f1, f2) if f is not None and abs(f.fix_utc - t_s) <= max_gap_s / 2]
    if not near:
        return None
    f = min(near, key=lambda g: abs(g.fix_utc - t_s))
    d = abs(f.fix_utc - t_s)
    acc = f.accuracy_m
    u = None if acc is None else math.hypot(acc, carry_speed_m_s * d)
    return Position(f.lat_deg, f.lon_deg, f.alt_m, u, t_s, f.quality, f.n_sats, f.hdop, d)


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
        self._track: deque[Fix] = deque(maxlen=keep_fixes)     # fixes in time order, for position_on_track
        self._offsets: deque[float] = deque(maxlen=OFFSET_WINDOW)
        self._arrivals: deque[float] = deque(maxlen=16)          # host arrival of recent fixes
        #: host monotonic s -> the readings' UTC of that instant (the meter's clock mapping); the
        #: default is the host's own UTC. Set it before start().
        self.frame_clock: Callable[[float], float | None] = lambda mono: time.time() - time.monotonic() + mono
        #: () -> anything that changes when frame_clock's time scale does (a meter's new clock mapping
        #: after a restart): the offsets gathered before are dropped then.
        self.frame_key: Callable[[], object] = lambda: None
        self._key = None
        #: the receiver's declared output delay, s: from a fix's epoch to its sentences' arrival; taken
        #: out of every (arrival - fix time) sample. Set it before start().
        self.output_delay_s = 0.0

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

    def time_offset(self) -> TimeOffset | None:
        """Readings' time minus GNSS time over the recent fixes (median of arrival - fix time - the
        declared output delay)."""
        with self._lock:
            samples = list(self._offsets)
        return estimate_offset(samples)

    def track(self, t_from_s: float, t_to_s: float) -> list[Fix]:
        """The kept fixes whose GNSS time lies in [t_from_s, t_to_s], in time order."""
        with self._lock:
            out = []
            for f in reversed(self._track):
                if f.fix_utc < t_from_s:
                    break
                if f.fix_utc <= t_to_s:
                    out.append(f)
        out.reverse()
        return out

    def newest_fix_utc(self) -> float | None:
        with self._lock:
            return self._track[-1].fix_utc if self._track else None

    def last_arrival_host(self) -> float:
        """Host monotonic time the newest valid fix arrived (-inf before any)."""
        with self._lock:
            return self._arrivals[-1] if self._arrivals else -math.inf

    def fix_interval_host_s(self) -> float | None:
        """Median host time between recent fix arrivals (how long the next one should take)."""
        with self._lock:
            a = list(self._arrivals)
        if len(a) < 3:
            return None
        d = sorted(b - c for b, c in zip(a[1:], a[:-1]))
        return d[len(d) // 2]

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
            last = self._track[-1].fix_utc if self._track else None
            if last is not None and fix_utc < last - 43200.0:
                fix_utc += 86400.0      # past midnight, before this epoch's RMC brought the new date
        sats = _f(msg.numSV)
        mono = time.monotonic()
        try:
            frame, key = self.frame_clock(mono), self.frame_key()
        except Exception:  # noqa: BLE001 - a clock not ready (no handshake yet) gives no offset sample
            frame = key = None
        fix = Fix(fix_utc, lat, lon, _f(msg.alt), q, None if sats is None else int(sats), _f(msg.HDOP),
                  mono, frame)
        with self._lock:
            self._latest = fix
            self._arrivals.append(mono)
            if fix_utc is not None and (not self._track or fix_utc > self._track[-1].fix_utc):
                self._track.append(fix)
                if frame is not None:
                    if key is not self._key:
                        self._offsets.clear()          # the readings' time scale was mapped anew
                        self._key = key
                    self._offsets.append(frame - fix_utc - self.output_delay_s)
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

