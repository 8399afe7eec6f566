"""Byte-level emulation of the meter firmware (docs/protocol.md), transport-free.

feed(data) takes host bytes; poll(now_ms) returns what the device has sent by device time now_ms
(milliseconds since the simulation started; the frames' TICK restarts at 0 on every reset).
Readings due in the past are produced in order with their own ticks.
"""

from __future__ import annotations

import math

import numpy as np

from meterlink.device.protocol import (
    AXIS_OVER_X, AXIS_UNDER_X, STATUS_BATTERY_LOW, STATUS_CLOCK_SET,
    STATUS_OVERRANGE, STATUS_STREAMING, STATUS_UNDERRANGE, U32_MOD, Axes, Boot, FrameReader, FrameType, SettingKey, Spectrum, Status, encode_message,
)
from meterlink.simulators.commands import HostCommands
from meterlink.simulators.instruments import probe_counts, receiver_levels_dbuv

STATUS_PERIOD_MS = 5000  # unsolicited STATUS while streaming (the spec asks for at least every 10 s)
_READING_TYPES = {FrameType.AXES, FrameType.SPECTRUM, FrameType.STATUS}
DEFAULT_FAULTS = {"drop": 0.0, "corrupt": 0.0, "garbage": 0.0, "garbage_max_bytes": 8, "frames": "readings",
                  "schedule": ()}
# Rule-breaking switches for conformance checks of the host; all off by default.
#   seq_step: seq advance per frame; bad_crc: fraction of frames sent with a broken CRC;
#   silent_unknown: no FAULT for an unknown type; no_boot: no BOOT frame after reset;
#   wrong_fault_code: every FAULT carries a wrong code; no_status: no periodic STATUS while streaming;
#   interval_error: readings come every interval * (1 + e); interval_jitter_ms: rms random spread
#   of the reading period; ignore_stop: STOP is acknowledged but streaming goes on;
#   ident_model / ident_kind / ident_proto_major: replace those IDENT fields;
#   deaf_after_garbage_ms: after any junk bytes from the host, ignore its frames for that long;
#   pong_alter: PONG returns the PING bytes with the last one changed;
#   flood: readings come this many times per interval (a device flooding its host).
DEFAULT_QUIRKS = {"seq_step": 1, "bad_crc": 0.0, "silent_unknown": False, "no_boot": False,
                  "wrong_fault_code": False, "no_status": False, "interval_error": 0.0, "interval_jitter_ms": 0.0,
                  "ignore_stop": False, "ident_model": None, "ident_kind": None, "ident_proto_major": None,
                  "deaf_after_garbage_ms": 0, "pong_alter": False, "flood": 1}


class Firmware:
    """The device state machine: one meter of a scenario with a probe or a dipole receiver."""

    def __init__(self, scenario, *, meter: int = 0, sensor: str = "probe", rng: np.random.Generator | None = None,
                 faults: dict | None = None, quirks: dict | None = None, truth=None, start_tick_ms: int = 0):
        if sensor not in ("probe", "dipole"):
            raise ValueError(f"sensor {sensor!r}: expected 'probe' or 'dipole'")
        if not 0 <= meter < len(scenario.meters):
            raise ValueError(f"meter {meter}: scenario {scenario.name} has {len(scenario.meters)} meter(s)")
        self.sc, self.spec, self.sensor = scenario, scenario.meters[meter], sensor
        rng = rng if rng is not None else np.random.default_rng(0)
        self._rng, self._frng = rng, rng.spawn(1)[0]  # measurement noise and fault decisions kept apart
        self.faults = {**DEFAULT_FAULTS, **scenario.faults, **(faults or {})}
        unknown = set(self.faults) - set(DEFAULT_FAULTS)
        if unknown:
            raise ValueError(f"unknown fault switch {sorted(unknown)[0]!r}")
        self.quirks = {**DEFAULT_QUIRKS, **(quirks or {})}
        unknown = set(self.quirks) - set(DEFAULT_QUIRKS)
        if unknown:
            raise ValueError(f"unknown quirk {sorted(unknown)[0]!r}")
        self.truth = truth
        self.link_up = True
        dev = scenario.device
        self.min_interval_ms, self.max_interval_ms = int(dev["min_interval_ms"]), int(dev["max_interval_ms"])
        info = scenario.probe_info if sensor == "probe" else scenario.receiver_info
        self.texts = {SettingKey.PROBE_SERIAL: str(info.get("serial", "")), SettingKey.CERT_REF: str(info.get("cert_ref", "")),
                      SettingKey.ASSET_TAG: self.spec.asset_tag}
        self._restarts = sorted(float(e["at_s"]) * 1000 for e in self.faults["schedule"] if e.get("kind") == "restart")
        self.stats = {"frames_sent": 0, "frames_dropped": 0, "frames_corrupted": 0, "frames_unplugged": 0,
                      "garbage_bytes": 0, "commands_received": 0, "bad_crcs_seen": 0, "boots": 0}
        self.boot_count = int(dev.get("boot_count", 1)) - 1
        self.now_ms = 0
        self._out = bytearray()
        self.commands = HostCommands(self)
        self._reset(0, cause=0, tick_base=start_tick_ms)

    # ----------------------------------------------------------------- state
    def _reset(self, now_ms: int, cause: int, tick_base: int = 0, boot_count: int | None = None) -> None:
        dev = self.sc.device
        # a reflashed or replaced unit may come back with a boot count it used before
        self.boot_count = (self.boot_count + 1) & 0xFFFF if boot_count is None else int(boot_count) & 0xFFFF
        self.boot_world_ms, self.tick_base, self.seq = now_ms, tick_base, 0
        self.streaming = False
        self.interval_ms = int(dev.get("interval_ms", 1000))
        self.averaging = int(dev.get("device_averaging", 1))
        self.clock = None  # (utc_ms, world_ms) once CLOCK_SET; lost at reset (no backed-up RTC)
        self.reader, self._crc_base = FrameReader(), 0
        self._deaf_until = -1
        self._inbox: list = []
        self._next_end = self._next_status = None
        self._sweep, self._orient = 0, 0
        self._last_flags = None
        self._range_flags = 0
        self.stats["boots"] += 1
        if self.truth:
            self.truth.write({"event": "boot", "boot": self.boot_count, "t_s": now_ms / 1000, "cause": cause})
        if not self.quirks["no_boot"]:
            self._send(Boot(self.boot_count, cause), now_ms)

    def tick_ms(self, now_ms: int | None = None) -> int:
        """The device's TICK at device time now_ms (default: the last poll)."""
        now = self.now_ms if now_ms is None else now_ms
        return (now - self.boot_world_ms + self.tick_base) % U32_MOD

    def restart(self, now_ms: int, cause: int = 3, boot_count: int | None = None) -> None:
        """Device reset at device time now_ms: seq and tick back to 0, BOOT, not streaming; boot_count, if
        given, is the count the device comes back with (a reused one: a reflash, a wrapped counter)."""
        self._catch_up(now_ms)
        self._reset(now_ms, cause, boot_count=boot_count)

    # ----------------------------------------------------------------- I/O
    def feed(self, data: bytes) -> None:
        """Host bytes arriving; complete frames are acted on at the next poll."""
        deaf_ms = int(self.quirks["deaf_after_garbage_ms"])
        for item in self.reader.feed(data):
            if hasattr(item, "kind"):
                if deaf_ms:
                    self._deaf_until = self.now_ms + deaf_ms
            elif self.now_ms >= self._deaf_until:
                self._inbox.append(item)
        self.stats["bad_crcs_seen"] = self._crc_base + self.reader.stats.crc_errors

    def poll(self, now_ms: int) -> bytes:
        """Advance the device to now_ms; return the bytes it sent meanwhile."""
        now_ms = max(int(now_ms), self.now_ms)
        self._catch_up(now_ms)
        inbox, self._inbox = self._inbox, []
        for frame in inbox:
            self.stats["commands_received"] += 1
            self.commands.handle(frame, now_ms)
        self.now_ms = now_ms
        out, self._out = bytes(self._out), bytearray()
        return out

    def _catch_up(self, now_ms: int) -> None:
        """Produce every reading, periodic STATUS and scheduled restart due by now_ms, in time order."""
        while True:
            cands = []
            if self.streaming:
                cands += [(self._next_end, 0), (self._next_status, 1)]
            if self._restarts:
                cands.append((self._restarts[0], 2))
            if not cands:
                return
            t, what = min(cands)
            if t > now_ms:
                return
            t = int(t)
            if what == 0:
                self._reading(t)
                self._next_end = t + self._period_ms()
            elif what == 1:
                if self.quirks["no_status"]:
                    self._next_status = t + STATUS_PERIOD_MS
                else:
                    self._send_status(t)
            else:
                self._restarts.pop(0)
                self._reset(t, cause=1)

    def start_streaming(self, now_ms: int) -> None:
        """START: readings every interval from now on, unsolicited STATUS every STATUS_PERIOD_MS."""
        if not self.streaming:
            self.streaming = True
            self._next_end, self._next_status = now_ms + self._period_ms(), now_ms + STATUS_PERIOD_MS

    def _period_ms(self) -> int:
        """Time to the next reading: the interval, unless a quirk bends it."""
        q = self.quirks
        p = self.interval_ms * (1.0 + float(q["interval_error"])) / max(1.0, float(q["flood"]))
        if q["interval_jitter_ms"]:
            p += float(q["interval_jitter_ms"]) * float(self._frng.standard_normal())
        return max(1, int(round(p)))

    def _send(self, msg, world_ms: int, ftype: int | None = None, tick_ms: int | None = None) -> str:
        """Frame and emit one message through the fault switches; returns its fate."""
        t = ftype if ftype is not None else msg.TYPE
        tick = self.tick_ms(world_ms) if tick_ms is None else tick_ms
        frame = bytearray(encode_message(msg, self.seq, tick, t))
        self.seq = (self.seq + int(self.quirks["seq_step"])) % U32_MOD
        f, r = self.faults, self._frng
        applies = f["frames"] == "all" or t in _READING_TYPES
        if not self.link_up:
            self.stats["frames_unplugged"] += 1
            return "unplugged"
        if applies and f["drop"] and r.random() < f["drop"]:
            self.stats["frames_dropped"] += 1
            return "dropped"
        fate = "sent"
        if applies and f["corrupt"] and r.random() < f["corrupt"]:
            i = int(r.integers(2, len(frame)))
            frame[i] ^= int(r.integers(1, 256))
            self.stats["frames_corrupted"] += 1
            fate = "corrupted"
        elif self.quirks["bad_crc"] and r.random() < self.quirks["bad_crc"]:
            frame[-1] ^= 0x5A
            self.stats["frames_corrupted"] += 1
            fate = "corrupted"
        if applies and f["garbage"] and r.random() < f["garbage"]:
            n = int(r.integers(1, int(f["garbage_max_bytes"]) + 1))
            junk = r.integers(0, 0xA6, n, dtype=np.uint8).tobytes()  # never 0xA7: no false sync start
            self._out += junk
            self.stats["garbage_bytes"] += n
        self._out += frame
        self.stats["frames_sent"] += 1
        return fate

    # ----------------------------------------------------------------- environment
    def _temp_c(self, t_s: float) -> float:
        chamber = getattr(self.spec.scene, "temp_c_at", None)  # a lab bench's climatic chamber, if set
        if chamber is not None and (t := chamber(t_s)) is not None:
            return float(t)
        site = self.sc.site
        h = float(site.get("start_time_of_day_h", 0.0)) + t_s / 3600
        return float(site.get("temp_mean_c", 20.0)) + float(site.get("temp_daily_amp_c", 0.0)) * math.cos(
            2 * math.pi * (h - 15.0) / 24)

    def _status(self, world_ms: int) -> Status:
        dev = self.sc.device
        if self.spec.mains_powered:
            mv, pct = 5000, 255
        else:
            full, empty = float(dev.get("battery_full_mv", 4150)), float(dev.get("battery_empty_mv", 3300))
            mv = max(empty, full - float(dev.get("battery_drain_mv_per_h", 0.0)) * world_ms / 3.6e6)
            pct = int(round(100 * (mv - empty) / (full - empty)))
        flags = self._range_flags
        flags |= STATUS_STREAMING if self.streaming else 0
        flags |= STATUS_CLOCK_SET if self.clock else 0
        flags |= STATUS_BATTERY_LOW if pct < 15 else 0
        temp = int(round(self._temp_c(world_ms / 1000) * 100))
        return Status(int(mv), pct, temp, flags, self.interval_ms, self.boot_count)

    def _send_status(self, world_ms: int) -> None:
        st = self._status(world_ms)
        self._last_flags = st.flags
        self._next_status = world_ms + STATUS_PERIOD_MS
        self._send(st, world_ms)

    def _flags_changed(self, world_ms: int) -> None:
        if self._status(world_ms).flags != self._last_flags:
            self._send_status(world_ms)

    # ----------------------------------------------------------------- readings
    def _reading(self, end_ms: int) -> None:
        mid_ms = end_ms - self.interval_ms // 2  # TICK of a reading = middle of its integration time
        t_s = mid_ms / 1000
        scene = self.spec.scene
        freq, e_axes = scene.field(t_s)
        temp = self._temp_c(t_s)
        tick, seq = self.tick_ms(mid_ms), self.seq
        rec = {"event": "reading", "boot": self.boot_count, "seq": seq, "tick_ms": tick, "t_s": t_s}
        if self.sensor == "probe":
            pm = self.sc.probe
            counts, over = probe_counts(pm, e_axes, freq, temp, self._rng, self.averaging)
            sig = np.abs(counts - np.asarray(pm.offset_counts))
            under = sig < 2 * pm.noise_counts_rms
            flags = sum(AXIS_OVER_X << i for i in range(3) if over[i]) + sum(AXIS_UNDER_X << i for i in range(3) if under[i])
            msg = Axes(flags, 0, int(counts[0]), int(counts[1]), int(counts[2]))
            self._range_flags = (STATUS_OVERRANGE if over.any() else 0) | (STATUS_UNDERRANGE if under.all() else 0)
            rec.update(type="AXES", counts=[int(c) for c in counts], axis_flags=flags)
        else:
            o = self._orient
            levels = receiver_levels_dbuv(self.sc.receiver, np.abs(e_axes[:, o]), freq, self._rng)
            idx = [i for i in np.argsort(-np.nan_to_num(levels, nan=-1e9)) if not np.isnan(levels[i])][:Spectrum.MAX_PAIRS]
            pairs = tuple(sorted((int(round(freq[i] / 1000)), int(np.clip(round(levels[i] * 100), -32768, 32767)))
                                 for i in idx))
            msg = Spectrum(o, self._sweep & 0xFFFF, pairs)
            rec.update(type="SPECTRUM", orientation=o, sweep=self._sweep & 0xFFFF, n_pairs=len(pairs))
            self._orient = (o + 1) % 3
            if self._orient == 0:
                self._sweep += 1
        e_src = np.sqrt(np.sum(e_axes**2, axis=1))
        names = [tx.name for tx in getattr(scene, "transmitters", ())] or [f"source{i}" for i in range(len(freq))]
        path = getattr(scene, "path", None)
        rec.update(e_total_v_per_m=float(np.sqrt(np.sum(e_axes**2))),
                   e_axes_v_per_m=[float(v) for v in np.sqrt(np.sum(e_axes**2, axis=0))],
                   sources=[{"name": n, "freq_hz": float(f), "e_v_per_m": float(e)} for n, f, e in zip(names, freq, e_src)],
                   position_m=[float(v) for v in path.position(t_s)] if path is not None else None,
                   temp_c=temp)
        rec["fate"] = self._send(msg, end_ms, tick_ms=tick)
        if self.truth:
            self.truth.write(rec)
        self._flags_changed(end_ms)

    # ----------------------------------------------------------------- commands


__all__ = ["Firmware", "DEFAULT_FAULTS", "DEFAULT_QUIRKS", "STATUS_PERIOD_MS"]
