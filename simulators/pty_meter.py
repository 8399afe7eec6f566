"""The simulated meter served on a pseudo-terminal, reachable at a stable path like a real port.

The port is a symlink in a private temporary directory pointing at the current pty slave; a
disconnect closes the pty and removes the link, and the return re-creates both at the same path,
as a replugged USB adapter would. A background thread runs the firmware on an accelerated clock.
"""

from __future__ import annotations

import bisect
import dataclasses
import errno
import os
import select
import shutil
import tempfile
import threading
import time
import tty

import numpy as np

from meterlink.simulators.firmware import Firmware
from meterlink.simulators.scenario import load_scenario
from meterlink.simulators.scene import Path
from meterlink.simulators.truth import TruthLog

_MAX_PENDING = 1 << 16  # bytes kept for a host that does not read; beyond this output is lost


class SimulatedMeter:
    """Run one simulated meter of a scenario on a pty; use as a context manager."""

    def __init__(self, scenario="demo", *, sensor="probe", meter=0, seed=0, speed=1.0,
                 faults=None, quirks=None, truth_path=None, start_tick_ms=0, scene=None, port_path=None):
        if not speed > 0:
            raise ValueError(f"speed {speed}: must be positive")
        sc = load_scenario(scenario) if isinstance(scenario, str) else scenario
        if scene is not None and 0 <= meter < len(sc.meters):  # lab mode: the meter sits in a scene the caller controls (simulators/lab.py)
            specs = list(sc.meters)
            specs[meter] = dataclasses.replace(specs[meter], scene=scene)
            sc = dataclasses.replace(sc, meters=tuple(specs))
        self.speed = float(speed)
        self._truth = TruthLog(truth_path) if truth_path else None
        self.fw = Firmware(sc, meter=meter, sensor=sensor, rng=np.random.default_rng(seed), faults=faults,
                           quirks=quirks, truth=self._truth, start_tick_ms=start_tick_ms)
        self._disconnects = sorted((float(e["at_s"]) * 1000, float(e.get("down_s", 1.0)))
                                   for e in self.fw.faults["schedule"] if e.get("kind") == "disconnect")
        # port_path: serve at a path of the caller's (a second simulator behind the same path, as a
        # replacement unit plugged into the same adapter); the caller's directory is left in place
        self._dir = tempfile.mkdtemp(prefix="meterlink-sim-")
        self.port = str(port_path) if port_path is not None else os.path.join(self._dir, f"meter{meter}")
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._master = self._slave = None
        self._pending = bytearray()
        self._up_at = None  # real monotonic time at which a disconnected port returns
        self._thread = None
        self._t0 = None
        self._path0 = getattr(self.fw.spec.scene, "path", None)
        self._moves: list[tuple[float, Path]] = []      # (simulated s, path from then on), for probe_position_at
        self._lost_bytes = 0

    # ----------------------------------------------------------------- lifecycle
    def start(self) -> "SimulatedMeter":
        """Create the port and start the device thread."""
        if self._thread is None:
            self._plug()
            self._t0 = time.monotonic()
            self._thread = threading.Thread(target=self._run, name="simulated-meter", daemon=True)
            self._thread.start()
        return self

    def stop(self) -> None:
        """Stop the thread, close the pty and remove the port; safe to call twice."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5)
            self._thread = None
        with self._lock:
            self._unplug()
        if self._truth:
            self._truth.close()
        shutil.rmtree(self._dir, ignore_errors=True)

    def __enter__(self) -> "SimulatedMeter":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    # ----------------------------------------------------------------- controls
    def disconnect(self, down_s: float) -> None:
        """The port vanishes now and comes back at the same path after down_s real seconds."""
        with self._lock:
            self._unplug()
            self._up_at = time.monotonic() + float(down_s)

    def restart(self, boot_count: int | None = None) -> None:
        """Device reset: seq and tick back to 0, BOOT, not streaming; boot_count reuses a count if given."""
        with self._lock:
            self.fw.restart(self._now_ms(), boot_count=boot_count)

    def device_tick_ms(self) -> int:
        """The device's current TICK (ms since its last boot, wrapping at 2^32)."""
        with self._lock:
            return self.fw.tick_ms(self._now_ms())

    def at_device_now(self, action):
        """Run action(t_s) with the device clock held: returns (TICK, result) of that one instant.

        Every reading already produced lies before t_s and none is produced meanwhile, so a scene
        change the action makes at t_s is seen by exactly the readings timed at t_s or later.
        """
        with self._lock:
            now = max(self._now_ms(), self.fw.now_ms)
            return self.fw.tick_ms(now), action(now / 1000)

    def sim_time_s(self) -> float:
        """Simulated seconds since start(): the time at which scenes are evaluated."""
        return self._now_ms() / 1000

    def move_to(self, position_m=None) -> tuple[int, int]:
        """Hold the probe at position_m (x, y, z in site metres) from now on, as a technician would;
        None resumes the scenario's walk. Readings already due keep the old position. Returns
        (boot count, sequence number) of the first frame sent after the move: a host that lags
        behind the device can tell the readings taken before the move from those after it."""
        with self._lock:
            out = self.fw.poll(self._now_ms())
            if self._master is not None:
                self._pending += out
            spec = self.fw.spec
            if not hasattr(spec.scene, "path"):
                raise ValueError("move_to: this meter's scene has no probe position")
            base = getattr(self, "_walk", None) or spec.scene.path
            self._walk = base
            path = base if position_m is None else Path.fixed([float(v) for v in position_m])
            self.fw.spec = dataclasses.replace(spec, scene=dataclasses.replace(spec.scene, path=path))
            self._moves.append((self.fw.now_ms / 1000, path))     # the truth: this path from this instant on
            return int(self.fw.boot_count), int(self.fw.seq)

    def probe_position_at(self, t_s: float):
        """Where the probe was at simulated time t_s (x, y, z site metres): the scenario's path, or the
        place of the last move_to before t_s. The truth a positioned reading is checked against."""
        with self._lock:
            moves = self._moves
            i = bisect.bisect_right([m[0] for m in moves], float(t_s))
            path = moves[i - 1][1] if i > 0 else self._path0
            return path.position(float(t_s)) if path is not None else None

    def sim_time_of_tick(self, tick_ms: int) -> float:
        """Simulated seconds of a TICK of the current boot (readings' t_device_s x 1000)."""
        return (int(tick_ms) - self.fw.tick_base + self.fw.boot_world_ms) / 1000

    @property
    def connected(self) -> bool:
        return self._master is not None

    @property
    def stats(self) -> dict:
        """Frames sent, dropped, corrupted, garbage bytes, commands received, bad CRCs seen, ..."""
        with self._lock:
            return {**self.fw.stats, "bytes_lost_unread": self._lost_bytes}

    # ----------------------------------------------------------------- internals
    def _now_ms(self) -> int:
        return 0 if self._t0 is None else int((time.monotonic() - self._t0) * 1000 * self.speed)

    def _plug(self) -> None:
        master, slave = os.openpty()
        tty.setraw(slave)  # as pyserial would; no echo, no line discipline
        os.set_blocking(master, False)
        self._master, self._slave = master, slave
        tmp = self.port + ".new"
        os.symlink(os.ttyname(slave), tmp)
        os.replace(tmp, self.port)  # atomic: the path never points at a stale pty
        self.fw.link_up = True
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
        self._pending.clear()
        self.fw.link_up = False
        self.fw.reader = type(self.fw.reader)()  # a half-received command dies with the link

    def _run(self) -> None:
        while not self._stop.is_set():
            master = self._master
            if master is None:
                self._stop.wait(0.002)
            else:
                want_write = [master] if self._pending else []
                try:
                    r, _, _ = select.select([master], want_write, [], 0.002)
                except (OSError, ValueError):
                    r = []
            with self._lock:
                now = self._now_ms()
                if self._master is None and self._up_at is not None and time.monotonic() >= self._up_at:
                    self._plug()
                while self._disconnects and self._disconnects[0][0] <= now:
                    _, down_s = self._disconnects.pop(0)
                    self.fw.poll(int(now))
                    self._unplug()
                    self._up_at = time.monotonic() + down_s / self.speed
                if self._master is not None and self._master == master and r:
                    self._read_host()
                out = self.fw.poll(now)
                if self._master is not None and out:
                    self._pending += out
                    if len(self._pending) > _MAX_PENDING:
                        extra = len(self._pending) - _MAX_PENDING
                        self._lost_bytes += extra
                        del self._pending[:extra]
                if self._master is not None and self._pending:
                    self._write_host()

    def _read_host(self) -> None:
        try:
            data = os.read(self._master, 4096)
        except OSError as exc:
            if exc.errno in (errno.EAGAIN, errno.EIO):
                return
            raise
        if data:
            self.fw.feed(data)

    def _write_host(self) -> None:
        try:
            n = os.write(self._master, self._pending)
        except OSError as exc:
            if exc.errno in (errno.EAGAIN, errno.EIO):
                return
            raise
        del self._pending[:n]
