"""A simulated GNSS receiver on a second pty: GGA and RMC at 1 Hz of device time, walking the
invented site in step with the simulated meter's probe.

Positions come from a callable giving the probe's local site metres (x east, y north, z up) at the
fix's own time (or now, for a callable without arguments); they are turned into latitude/longitude
about an invented origin (equirectangular, the same formula as
meterlink.device.gnss.from_local_m). A real receiver sends a fix's sentences some time after the
fix's epoch: output_delay_s (device seconds, default 0) sets that delay. Fault switches: garbage (bad
checksums and noise), no_fix (quality 0, RMC status V), and vanish (the port disappears; it may come
back after down_s).
"""

from __future__ import annotations

import datetime as _dt
import errno
import math
import os
import shutil
import tempfile
import threading
import time
import tty

import numpy as np

from meterlink.device.gnss import from_local_m, nmea_checksum

#: The invented origin of the demo site (the foot of the main mast): not a real transmitter site.
DEMO_ORIGIN = (50.6512, -3.8127, 310.0)


def sentence(body: str) -> bytes:
    """'$' + body + '*' + checksum + CRLF."""
    return f"${body}*{nmea_checksum(body):02X}\r\n".encode("ascii")


def _dm(value_deg: float, lat: bool) -> tuple[str, str]:
    hemi = ("N" if value_deg >= 0 else "S") if lat else ("E" if value_deg >= 0 else "W")
    v = abs(value_deg)
    d = int(v)
    m = (v - d) * 60.0
    if round(m, 5) >= 60.0:
        d, m = d + 1, 0.0
    return (f"{d:02d}{m:08.5f}" if lat else f"{d:03d}{m:08.5f}"), hemi


def gga_rmc(t_utc: float, lat_deg: float, lon_deg: float, alt_m: float, *, fix: bool = True, n_sats: int = 9,
            hdop: float = 0.9) -> bytes:
    """One GGA and one RMC sentence for a fix at t_utc (or their no-fix forms)."""
    t = _dt.datetime.fromtimestamp(t_utc, _dt.timezone.utc)
    hms = t.strftime("%H%M%S") + f".{t.microsecond // 10000:02d}"
    if fix:
        la, ns = _dm(lat_deg, True)
        lo, ew = _dm(lon_deg, False)
        gga = f"GPGGA,{hms},{la},{ns},{lo},{ew},1,{n_sats:02d},{hdop:.1f},{alt_m:.1f},M,49.0,M,,"
        rmc = f"GPRMC,{hms},A,{la},{ns},{lo},{ew},0.5,0.0,{t.strftime('%d%m%y')},,,A"
    else:
        gga = f"GPGGA,{hms},,,,,0,00,99.9,,M,,M,,"
        rmc = f"GPRMC,{hms},V,,,,,,,{t.strftime('%d%m%y')},,,N"
    return sentence(gga) + sentence(rmc)


class SimulatedGnss:
    """Serve NMEA on a pty at a stable path; use as a context manager.

    position() -> (x, y, z) site metres and clock() -> device seconds drive it; following(meter)
    ties both to a SimulatedMeter so that the receiver is where the probe is."""

    def __init__(self, position, clock, *, origin=DEMO_ORIGIN, utc0: float | None = None, seed: int = 0,
                 schedule=(), position_at=None, speed: float = 1.0, output_delay_s: float = 0.0):
        self.position, self.clock = position, clock
        self.position_at = position_at      # t_s -> (x, y, z): where the receiver was at a fix's time
        self.speed = float(speed)           # simulated seconds per host second, to wake in time for each fix
        self.output_delay_s = float(output_delay_s)   # device s from a fix's epoch to sending its sentences
        self.lat0, self.lon0, self.alt0 = (float(v) for v in origin)
        self.utc0 = time.time() if utc0 is None else float(utc0)
        self.rng = np.random.default_rng(seed)
        self.garbage = False
        self.no_fix = False
        self.schedule = sorted(({**e} for e in schedule), key=lambda e: float(e.get("at_s", 0.0)))
        self._dir = tempfile.mkdtemp(prefix="meterlink-gnss-")
        self.port = os.path.join(self._dir, "gnss0")
        self._master = self._slave = None
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread = None
        self._next_s = None
        self._up_at = None
        self.sent = {"fixes": 0, "no_fix": 0, "garbage": 0, "vanished": 0}

    @classmethod
    def following(cls, meter, **kw) -> "SimulatedGnss":
        """A receiver carried with the probe of a SimulatedMeter, on that meter's device clock."""
        def pos():
            return meter.fw.spec.scene.path.position(meter.sim_time_s())
        return cls(pos, meter.sim_time_s, position_at=meter.probe_position_at, speed=meter.speed, **kw)

    # -- lifecycle -----------------------------------------------------------------------------
    def start(self) -> "SimulatedGnss":
        if self._thread is None:
            self._plug()
            self._thread = threading.Thread(target=self._run, name="simulated-gnss", daemon=True)
            self._thread.start()
        return self

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5)
            self._thread = None
        with self._lock:
            self._unplug()
        shutil.rmtree(self._dir, ignore_errors=True)

    def __enter__(self) -> "SimulatedGnss":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    def vanish(self, down_s: float | None = None) -> None:
        """The receiver's port disappears now; back after down_s real seconds, or never (None)."""
        with self._lock:
            self._unplug()
            self.sent["vanished"] += 1
            self._up_at = None if down_s is None else time.monotonic() + float(down_s)

    def geo(self, xyz) -> tuple[float, float, float]:
        lat, lon = from_local_m(xyz[0], xyz[1], self.lat0, self.lon0)
        return float(lat), float(lon), self.alt0 + float(xyz[2])

    # -- internals -----------------------------------------------------------------------------
    def _plug(self) -> None:
        master, slave = os.openpty()
        tty.setraw(slave)
        os.set_blocking(master, False)
        self._master, self._slave = master, slave
        tmp = self.port + ".new"
        os.symlink(os.ttyname(slave), tmp)
        os.replace(tmp, self.port)
        self._up_at = None

    def _unplug(self) -> None:
        if self._master is None:
            return
        try:
            os.unlink(self.port)
        except FileNotFoundError:
            pass
        for fd in (self._master, self._slave):
            os.close(fd)
        self._master = self._slave = None

    def _apply_schedule(self, t_s: float) -> None:
        while self.schedule and float(self.schedule[0].get("at_s", 0.0)) <= t_s:
            e = self.schedule.pop(0)
            kind = e["kind"]
            if kind == "vanish":
                self._unplug()
                self.sent["vanished"] += 1
                down = e.get("down_s")
                self._up_at = None if down is None else time.monotonic() + float(down)
            elif kind in ("garbage", "no_fix"):
                setattr(self, kind, bool(e.get("on", True)))

    def _run(self) -> None:
        wait = 0.005
        while not self._stop.wait(wait):
            with self._lock:
                if self._master is None and self._up_at is not None and time.monotonic() >= self._up_at:
                    self._plug()
                t = float(self.clock())
                self._apply_schedule(t)
                if self._next_s is None:
                    self._next_s = math.floor(t)
                out = bytearray()
                while self._next_s + self.output_delay_s <= t:
                    out += self._epoch(self._next_s)
                    self._next_s += 1.0
                if self._master is not None and out:
                    try:
                        os.write(self._master, bytes(out))
                    except OSError as exc:
                        if exc.errno not in (errno.EAGAIN, errno.EIO):
                            raise
                # a receiver sends its fix output_delay_s after the epoch: wake then (at most every 5 ms of host time)
                wait = min(0.005, max(0.0005, (self._next_s + self.output_delay_s - float(self.clock())) / self.speed))

    def _epoch(self, t_s: float) -> bytes:
        lat, lon, alt = self.geo(self.position_at(t_s) if self.position_at is not None else self.position())
        data = gga_rmc(self.utc0 + t_s, lat, lon, alt, fix=not self.no_fix)
        self.sent["no_fix" if self.no_fix else "fixes"] += 1
        if self.garbage:
            self.sent["garbage"] += 1
            noise = bytes(self.rng.integers(32, 127, 20, dtype=np.uint8))
            # the same sentences with one character changed (checksums no longer match), then noise
            data = data.replace(b",M,", b",X,", 1) + noise + b"\r\n"
        return data
