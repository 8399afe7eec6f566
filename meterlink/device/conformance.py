"""Conformance check of a connected meter against docs/protocol.md: the items as data, results with evidence.

observe() drives one session over a Link (identify, read settings, stream, stop, send bad commands,
ping, send a garbage burst) and keeps every frame with its arrival time; evaluate() turns those
observations into one Result per item, each with the numbers behind it. Thresholds for the
interval are this project's acceptance choice, not figures from the protocol.

The check changes the meter (interval, streaming); whatever happens, also on a failed item, an
error or an interrupt, restore() puts back every writable setting and the streaming state as
found before, then reads them back: the Report says whether the meter was left as found.
"""

from __future__ import annotations

import struct
import time
from dataclasses import asdict

import numpy as np

from meterlink.device.clock import HALF_TICK
from meterlink.device.commander import Commander, DeviceFault, NoReply, Received
from meterlink.errors import MeterlinkError
from meterlink.device.conformance_checks import (  # noqa: F401  (re-exported: the items and results)
    ITEMS, MIN_DURATION_S, READINGS as _READINGS, RESTORE_KEYS, Item, Observations, Probe, Report, Restore, Result,
    after_ms as _after, evaluate,
)
from meterlink.device.protocol import (MAX_PAYLOAD, PROTOCOL_MAJOR, STATUS_STREAMING, U32_MOD, Fault, FaultCode,
                                FrameType, Ident, SettingKey, SettingPut, parse_payload, seq_delta)



# ------------------------------------------------------------------------------- observing
def _index(c: Commander, rx: Received) -> int:
    return next(i for i in range(len(c.frames) - 1, -1, -1) if c.frames[i] is rx)


def _phase(obs: Observations, name: str, fn) -> None:
    try:
        fn()
    except (MeterlinkError, ValueError) as exc:  # NoReply, DeviceFault, ProtocolError, LinkError
        obs.errors[name] = str(exc)


def fault_probes(ident: Ident | None) -> list[tuple[str, int, bytes, int, int]]:
    """(name, frame type, payload, VER, expected fault code) of each bad command sent."""
    probes = [
        ("unknown type 0x3E", 0x3E, b"", PROTOCOL_MAJOR, FaultCode.UNKNOWN_TYPE),
        ("SET_INTERVAL of 2 bytes", FrameType.SET_INTERVAL, b"\x10\x27", PROTOCOL_MAJOR, FaultCode.BAD_LENGTH),
        ("SETTING_GET key 250", FrameType.SETTING_GET, b"\xfa", PROTOCOL_MAJOR, FaultCode.UNKNOWN_KEY),
        ("SETTING_PUT clock_utc", FrameType.SETTING_PUT, SettingPut(SettingKey.CLOCK_UTC, 0).pack(),
         PROTOCOL_MAJOR, FaultCode.READ_ONLY),
        ("SETTING_PUT value type 9", FrameType.SETTING_PUT, bytes([SettingKey.ASSET_TAG, 9]), PROTOCOL_MAJOR,
         FaultCode.BAD_FRAME),
        ("CLOCK_SET 1000 ms", FrameType.CLOCK_SET, struct.pack("<IH", 0, 1000), PROTOCOL_MAJOR, FaultCode.BAD_VALUE),
        ("WHO with VER 2", FrameType.WHO, b"", PROTOCOL_MAJOR + 1, FaultCode.BAD_VERSION),
    ]
    if ident is not None and ident.max_interval_ms < U32_MOD - 1:
        probes.append((f"SET_INTERVAL {ident.max_interval_ms + 1} ms", FrameType.SET_INTERVAL,
                       struct.pack("<I", ident.max_interval_ms + 1), PROTOCOL_MAJOR, FaultCode.BAD_VALUE))
    return probes


def _probe(c: Commander, name: str, ftype: int, payload: bytes, version: int, expected: int) -> Probe:
    """Send a bad command (twice at most) and take the first ACK or command FAULT that follows."""
    def reply(f) -> bool:
        if f.type == FrameType.FAULT:
            return len(f.payload) >= 6 and f.payload[0] != FaultCode.SENSOR
        return f.type in (FrameType.ACK, FrameType.IDENT)

    seq = -1
    for _ in range(2):
        start = len(c.frames)
        seq = c.send(ftype, payload, version=version)
        rx = c.wait_for(reply, c.reply_timeout_s, start)
        if rx is None:
            continue
        try:
            msg = parse_payload(rx.frame)
        except MeterlinkError as exc:
            return Probe(name, ftype, seq, expected, None, f"malformed reply ({exc})")
        if isinstance(msg, Fault):
            return Probe(name, ftype, seq, expected, msg)
        return Probe(name, ftype, seq, expected, None, f"{FrameType(rx.frame.type).name} instead of FAULT")
    return Probe(name, ftype, seq, expected, None, "no reply (silence)")


def observe(c: Commander, *, duration_s: float = MIN_DURATION_S, interval_ms: int = 200,
            wait_boot_s: float = 0.0, rng: np.random.Generator | None = None) -> Observations:
    """Run the check session over an open Commander and return what was seen; the meter is put back
    as found at the end, also when a phase fails or the check is interrupted (obs.restore)."""
    rng = rng if rng is not None else np.random.default_rng(0)
    obs = Observations(frames=c.frames, reader=c.reader.stats, wait_boot_s=wait_boot_s)
    try:
        _session(c, obs, duration_s, interval_ms, wait_boot_s, rng)
    finally:
        obs.restore = restore(c, obs)
    return obs


def restore(c: Commander, obs: Observations) -> Restore:
    """Put back every writable setting and the streaming state found before the check; read them back."""
    before: dict = {k.name.lower(): v for k, v in obs.settings.items()
                    if k in RESTORE_KEYS and isinstance(v, (int, str)) and not isinstance(v, bool)}
    unread = [k.name.lower() for k in RESTORE_KEYS if k not in obs.settings]   # no reply: cannot be put back
    if obs.status_idle is not None:
        before["streaming"] = bool(obs.status_idle.flags & STATUS_STREAMING)
    after: dict = {}
    problem = ""
    try:
        for key in RESTORE_KEYS:
            name = key.name.lower()
            if name in before and c.get_setting(key) != before[name]:
                if key == SettingKey.INTERVAL_MS:
                    c.set_interval(int(before[name]))
                else:
                    c.put_setting(key, before[name])
        for key in RESTORE_KEYS:   # read back what is in force now
            if key.name.lower() in before:
                after[key.name.lower()] = c.get_setting(key)
        if "streaming" in before:
            if bool(c.status().flags & STATUS_STREAMING) != before["streaming"]:
                c.command(FrameType.START if before["streaming"] else FrameType.STOP)
            after["streaming"] = bool(c.status().flags & STATUS_STREAMING)
    except MeterlinkError as exc:   # no reply, a refusal or a malformed reply: say so, never hide it
        problem = str(exc)
    differ = [f"{k} {after.get(k, '?')!r} (was {v!r})" for k, v in before.items() if after.get(k) != v]
    ok = bool(before) and not differ and not unread and not problem
    found = ", ".join(f"{k} {v!r}" for k, v in before.items())
    if ok:
        evidence = f"put back as found and read back: {found}"
    else:
        evidence = "NOT left as found: " + "; ".join(
            ([f"differs: {', '.join(differ)}"] if differ else [])
            + ([f"not read before the check: {', '.join(unread)}"] if unread else [])
            + ([problem] if problem else []) + ([] if before else ["nothing could be read before the check"]))
    return Restore(before, after, ok, evidence)


def _session(c: Commander, obs: Observations, duration_s: float, interval_ms: int, wait_boot_s: float,
             rng: np.random.Generator) -> None:
    """The check's exchanges, in order; observe() wraps them so that the meter is always restored."""
    if wait_boot_s > 0:
        c.wait_for(lambda f: f.type == FrameType.BOOT, wait_boot_s)
    c.drain(0.05, max_s=1.0)   # a meter found streaming is never quiet

    def ident():
        obs.ident = c.who()
        obs.ident_index = len(c.frames) - 1
        obs.status_idle = c.status()
        if obs.status_idle.flags & STATUS_STREAMING:
            c.command(FrameType.STOP)
    _phase(obs, "ident", ident)

    for key in SettingKey:
        try:
            obs.settings[key] = c.get_setting(key)
        except DeviceFault as exc:
            obs.settings[key] = exc.fault
        except MeterlinkError as exc:  # no reply or a malformed one: the key stays absent
            obs.errors[f"setting {key.name.lower()}"] = str(exc)

    lo, hi = (obs.ident.min_interval_ms, obs.ident.max_interval_ms) if obs.ident else (interval_ms, interval_ms)
    obs.interval_ms = iv = int(min(max(interval_ms, lo), hi)) or 1

    def stream():
        c.set_interval(iv)
        obs.start_ack = start = c.command(FrameType.START)
        obs.stream_status = c.request(FrameType.STATUS_QUERY)
        dur_ms = int(duration_s * 1000)
        got = c.wait_for(lambda f: _after(start.frame.tick_ms, f.tick_ms) >= dur_ms, 2 * duration_s + 10,
                         _index(c, start))
        if got is None:
            raise NoReply(f"device time did not reach {duration_s:g} s after START within {2 * duration_s + 10:g} s")
        obs.stop_ack = stop = c.command(FrameType.STOP)
        want_ms = max(3 * iv, 1000)
        deadline = time.monotonic() + want_ms / 1000 * 2 + 5
        while time.monotonic() < deadline:
            obs.stop_wait_ms = _after(stop.frame.tick_ms, c.ping(b"").frame.tick_ms)
            if obs.stop_wait_ms >= want_ms:
                break
            c.pump(0.05)
        obs.stop_end = len(c.frames)
        still = [r for r in c.frames[obs.stop_end - 20:obs.stop_end] if r.frame.type in _READINGS
                 and 0 < seq_delta(stop.frame.seq, r.frame.seq) < HALF_TICK]
        if still:
            # the device ignored STOP: slow it to its longest interval so that a flood of readings
            # does not spoil the items checked after this one (the start/stop item fails on its own)
            try:
                c.set_interval(obs.ident.max_interval_ms if obs.ident else 3_600_000)
            except MeterlinkError:
                pass
    _phase(obs, "stream", stream)

    for args in fault_probes(obs.ident):
        obs.probes.append(_probe(c, *args))

    for n in (0, 1, 32, MAX_PAYLOAD):
        data = rng.integers(0, 256, n, dtype=np.uint8).tobytes()
        try:
            obs.pings.append((data, c.ping(data).frame.payload))
        except MeterlinkError:
            obs.pings.append((data, None))

    burst = rng.integers(0, 256, 64, dtype=np.uint8).tobytes() + bytes(255)  # zeros end any false frame
    obs.garbage_bytes = len(burst)
    t0 = time.monotonic()
    c.send_raw(burst)
    try:
        obs.garbage_reply = c.who()
    except MeterlinkError as exc:
        obs.errors["garbage"] = str(exc)
    obs.garbage_s = time.monotonic() - t0
    c.drain(0.02)


def run_checks(link, *, duration_s: float = MIN_DURATION_S, interval_ms: int = 200, wait_boot_s: float = 0.0,
               seed: int = 0) -> Report:
    """Observe and evaluate a meter on an open Link."""
    if duration_s < MIN_DURATION_S:
        raise MeterlinkError(f"duration {duration_s:g} s: at least {MIN_DURATION_S:g} s of device time is needed")
    t0 = time.monotonic()
    c = Commander(link)
    obs = observe(c, duration_s=duration_s, interval_ms=interval_ms, wait_boot_s=wait_boot_s,
                  rng=np.random.default_rng(seed))
    ident = asdict(obs.ident) if obs.ident else None
    return Report(link.port, tuple(evaluate(obs)), ident, time.monotonic() - t0, obs.restore)
