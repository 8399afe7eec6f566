"""Conformance of a meter against docs/protocol.md, the judging half: the items as data, and evaluate(),
which turns recorded observations into one Result per item with the numbers behind it. Pure: no I/O.

Thresholds for the interval are this project's acceptance choice, not figures from the protocol.
meterlink.device.conformance does the observing (it drives the meter) and calls evaluate().
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from meterlink.device.clock import HALF_TICK, TickUnwrapper
from meterlink.device.commander import Received
from meterlink.errors import MeterlinkError
from meterlink.device.protocol import (PROTOCOL_MAJOR, STATUS_STREAMING, U32_MOD, Boot, Fault, FaultCode,
                                FrameType, Ident, ReaderStats, SensorKind, SettingKey, Status,
                                parse_payload, seq_delta)


STATUS_MAX_GAP_MS = 10_000  # protocol: unsolicited STATUS at least every 10 s of device time while streaming
INTERVAL_MEAN_TOL = 0.005  # our acceptance: mean reading step within 0.5 % of the interval asked for
JITTER_MIN_MS, JITTER_REL = 2.0, 0.01  # our acceptance: rms jitter at most max(2 ms, 1 % of the interval)
MIN_DURATION_S = 12.0  # the stream must outlast one 10 s STATUS period
RESET_CAUSES = {0, 1, 2, 3, 255}
RESTART_SEQ_MAX = 64
READINGS = (FrameType.AXES, FrameType.SPECTRUM)
_NUMBER_KEYS = {SettingKey.INTERVAL_MS, SettingKey.DEVICE_AVERAGING, SettingKey.CLOCK_UTC}
#: Settings read before the check and put back after it: every key but the read-only clock.
RESTORE_KEYS = (SettingKey.INTERVAL_MS, SettingKey.DEVICE_AVERAGING, SettingKey.PROBE_SERIAL, SettingKey.CERT_REF,
                SettingKey.ASSET_TAG)


@dataclass(frozen=True)
class Item:
    """One conformance item: a key, a short title and the rule checked."""

    key: str
    title: str
    rule: str


ITEMS: tuple[Item, ...] = (
    Item("ident", "identification", "IDENT: sensor kind 1-3, texts printable ASCII (0..32 bytes), model and "
         "serial not empty, 0 < min_interval <= max_interval"),
    Item("version", "protocol version", f"IDENT proto_major and every frame's VER equal {PROTOCOL_MAJOR}"),
    Item("framing", "CRC and sequence", "no CRC, length or garbage errors; SEQ +1 per frame within a boot"),
    Item("interval", "sample interval", "reading TICK steps: mean within 0.5 % of the interval, rms jitter "
         "at most max(2 ms, 1 %)"),
    Item("start_stop", "start and stop", "readings follow START's ACK; no reading sent after STOP's ACK"),
    Item("status", "status frames", "STATUS on request; unsolicited at least every 10 s of device time "
         "while streaming"),
    Item("faults", "bad commands", "malformed or unknown commands get FAULT with the documented code, "
         "cmd_type and cmd_seq"),
    Item("ping", "PING and PONG", "PONG carries the PING bytes unchanged (0, 1, 32 and 240 bytes)"),
    Item("settings", "settings", "SETTING_GET of keys 1-6 answers SETTING with the key and value type "
         "of the table, consistent with IDENT and STATUS"),
    Item("boot", "BOOT", "a BOOT is seq 0 with a documented reset cause and IDENT's boot_count; "
         "no restart without BOOT"),
    Item("garbage", "recovery after garbage", "after a burst of random bytes the device still answers WHO"),
)


@dataclass(frozen=True)
class Probe:
    """A bad command sent to provoke a FAULT, and what came back."""

    name: str
    ftype: int
    seq: int
    expected: int
    reply: Fault | None
    other: str = ""  # what came instead of a FAULT, if anything


@dataclass
class Observations:
    """Everything seen in one session; evaluate() reads only this."""

    frames: list[Received] = field(default_factory=list)
    reader: ReaderStats = field(default_factory=ReaderStats)
    wait_boot_s: float = 0.0
    errors: dict[str, str] = field(default_factory=dict)
    ident: Ident | None = None
    ident_index: int = -1
    status_idle: Status | None = None
    settings: dict[int, object] = field(default_factory=dict)
    interval_ms: int = 0
    start_ack: Received | None = None
    stop_ack: Received | None = None
    stream_status: Received | None = None
    stop_wait_ms: int = 0
    stop_end: int = 0
    probes: list[Probe] = field(default_factory=list)
    pings: list[tuple[bytes, bytes | None]] = field(default_factory=list)
    garbage_bytes: int = 0
    garbage_reply: Ident | None = None
    garbage_s: float = 0.0
    restore: "Restore | None" = None


@dataclass(frozen=True)
class Restore:
    """The meter's settings (and streaming state) as found before the check and as read back after it."""

    before: dict
    after: dict
    ok: bool
    evidence: str


@dataclass(frozen=True)
class Result:
    """The outcome of one item: status 'pass', 'fail' or 'skip', and the evidence for it."""

    key: str
    title: str
    status: str
    evidence: str


@dataclass(frozen=True)
class Report:
    port: str
    results: tuple[Result, ...]
    ident: dict | None
    elapsed_s: float
    restore: Restore | None = None

    @property
    def passed(self) -> bool:
        return all(r.status != "fail" for r in self.results)

    @property
    def restored(self) -> bool:
        """True when every setting read before the check was read back unchanged after it."""
        return self.restore is not None and self.restore.ok

    @property
    def failed(self) -> set[str]:
        return {r.key for r in self.results if r.status == "fail"}

    def to_dict(self) -> dict:
        return {"port": self.port, "passed": self.passed, "elapsed_s": round(self.elapsed_s, 3),
                "ident": self.ident, "results": [asdict(r) for r in self.results],
                "restore": asdict(self.restore) if self.restore else None}




def after_ms(ref_tick: int, tick: int) -> int:
    """Device milliseconds from ref_tick to tick (negative if tick is earlier)."""
    d = (tick - ref_tick) % U32_MOD
    return d - U32_MOD if d >= HALF_TICK else d



# ------------------------------------------------------------------------------- evaluating
def _printable(s: str) -> bool:
    return all(0x20 <= ord(ch) <= 0x7E for ch in s)


def _eval_ident(o: Observations):
    i = o.ident
    if i is None:
        return False, f"no IDENT: {o.errors.get('ident', 'WHO not answered')}"
    bad = []
    if i.sensor_kind not in SensorKind._value2member_map_:
        bad.append(f"unknown sensor kind {i.sensor_kind}")
    for name in ("model", "serial", "probe_serial", "cert_ref"):
        if not _printable(getattr(i, name)):
            bad.append(f"{name} not printable ASCII")
    for name in ("model", "serial"):
        if not getattr(i, name):
            bad.append(f"{name} empty")
    if not 0 < i.min_interval_ms <= i.max_interval_ms:
        bad.append(f"interval range {i.min_interval_ms}..{i.max_interval_ms} ms")
    if bad:
        return False, "; ".join(bad)
    lens = "/".join(str(len(getattr(i, n))) for n in ("model", "serial", "probe_serial", "cert_ref"))
    return True, (f"kind {i.sensor_kind} ({SensorKind(i.sensor_kind).name}), text lengths {lens} bytes, "
                  f"intervals {i.min_interval_ms}..{i.max_interval_ms} ms")


def _eval_version(o: Observations):
    vers = {}
    for r in o.frames:
        vers[r.frame.version] = vers.get(r.frame.version, 0) + 1
    others = {v: n for v, n in vers.items() if v != PROTOCOL_MAJOR}
    if o.ident is None:
        return False, "no IDENT to read the version from"
    ok = o.ident.proto_major == PROTOCOL_MAJOR and not others
    ev = f"IDENT {o.ident.proto_major}.{o.ident.proto_minor}; {sum(vers.values())} frames"
    ev += f", VER {others} seen" if others else f" all VER {PROTOCOL_MAJOR}"
    return ok, ev


def _segments(frames: list[Received], slack_ms: int = 0) -> tuple[list[list[Received]], int]:
    """Split frames at BOOT or at a restart without BOOT; also count the latter.

    A reading's TICK is the middle of its integration, so it may trail a reply sent just before it
    by up to half an interval: only a TICK going back by more than slack_ms (the interval) is a restart.
    """
    segs: list[list[Received]] = [[]]
    silent = 0
    for r in frames:
        prev = segs[-1][-1].frame if segs[-1] else None
        if r.frame.type == FrameType.BOOT:
            segs.append([r])
            continue
        if prev is not None and seq_delta(prev.seq, r.frame.seq) != 1 and r.frame.seq < RESTART_SEQ_MAX \
                and after_ms(prev.tick_ms, r.frame.tick_ms) < -slack_ms:
            silent += 1
            segs.append([r])
            continue
        segs[-1].append(r)
    return [s for s in segs if s], silent


def _eval_framing(o: Observations):
    segs, _ = _segments(o.frames, o.interval_ms)
    steps: dict[int, int] = {}
    for s in segs:
        for a, b in zip(s, s[1:]):
            d = seq_delta(a.frame.seq, b.frame.seq)
            steps[d] = steps.get(d, 0) + 1
    st = o.reader
    n_steps = sum(steps.values())
    ok = st.crc_errors == 0 and st.length_errors == 0 and st.garbage_bytes == 0 and set(steps) <= {1} and n_steps > 0
    seq = f"seq +1 each time ({n_steps} steps)" if set(steps) <= {1} else \
        "seq steps " + ", ".join(f"+{d} x{n}" if d < HALF_TICK else f"-{U32_MOD - d} x{n}" for d, n in sorted(steps.items()))
    return ok, (f"{len(o.frames)} frames, {st.crc_errors} CRC errors, {st.length_errors} length errors, "
                f"{st.garbage_bytes} garbage bytes, {seq}")


def _stream_readings(o: Observations) -> list[Received]:
    if o.start_ack is None or o.stop_ack is None:
        return []
    a, b = o.start_ack.frame.seq, o.stop_ack.frame.seq
    span = seq_delta(a, b)
    return [r for r in o.frames if r.frame.type in READINGS and 0 < seq_delta(a, r.frame.seq) < span]


def _eval_interval(o: Observations):
    rd = _stream_readings(o)
    if len(rd) < 3:
        return False, f"only {len(rd)} readings while streaming ({o.errors.get('stream', '')})".rstrip(" ()")
    un = TickUnwrapper()
    ticks = np.array([un.unwrap(r.frame.tick_ms) for r in rd], dtype=float)
    d = np.diff(ticks)
    n = np.rint(d / o.interval_ms)
    one = d[n == 1]
    if one.size < 2:
        return False, f"{len(rd)} readings, no consecutive pair at the {o.interval_ms} ms interval"
    mean, jitter = float(one.mean()), float(one.std())
    host = np.array([r.host_s for r in rd])
    rate = (ticks[-1] - ticks[0]) / 1000 / (host[-1] - host[0]) if host[-1] > host[0] else float("nan")
    ok = abs(mean - o.interval_ms) <= INTERVAL_MEAN_TOL * o.interval_ms and \
        jitter <= max(JITTER_MIN_MS, JITTER_REL * o.interval_ms)
    missed = int(np.sum(n != 1))
    return ok, (f"interval {o.interval_ms} ms: mean {mean:.1f} ms, jitter {jitter:.1f} ms rms over {one.size} "
                f"steps by device ticks" + (f" ({missed} steps skipped as gaps)" if missed else "")
                + f"; device clock ran {rate:.3g}x host time")


def _eval_start_stop(o: Observations):
    if o.start_ack is None or o.stop_ack is None:
        return False, f"no ACK for {'START' if o.start_ack is None else 'STOP'}: {o.errors.get('stream', '')}"
    n_stream = len(_stream_readings(o))
    stop = o.stop_ack
    i0 = next(i for i, r in enumerate(o.frames) if r is stop)
    later = [r for r in o.frames[i0 + 1:o.stop_end] if r.frame.type in READINGS]
    after = [r for r in later if 0 < seq_delta(stop.frame.seq, r.frame.seq) < HALF_TICK]
    ok = n_stream >= 2 and not after and o.stop_wait_ms >= max(3 * o.interval_ms, 1000)
    return ok, (f"{n_stream} readings after START's ACK; {len(after)} sent after STOP's ACK in the next "
                f"{o.stop_wait_ms} ms of device time ({len(later) - len(after)} in flight)")


def _eval_status(o: Observations):
    parts, ok = [], True
    if o.status_idle is None:
        ok = False
        parts.append("no STATUS on request")
    st = None
    if o.stream_status is not None:
        try:
            st = parse_payload(o.stream_status.frame)
        except MeterlinkError:
            st = None
    if not isinstance(st, Status) or not st.flags & STATUS_STREAMING:
        ok = False
        parts.append("STATUS on request while streaming missing or without the streaming flag")
    else:
        parts.append("STATUS on request idle and streaming")
    if o.start_ack is None or o.stop_ack is None:
        return False, "; ".join(parts + ["no stream to watch"])
    t0, t1 = o.start_ack.frame.tick_ms, o.stop_ack.frame.tick_ms
    # "while streaming" ends with the last reading before STOP's ACK: if that ACK was lost (a CRC
    # error), the STOP sent again is answered a reply timeout later, and the device, stopped by
    # the first one, rightly sent no STATUS in between
    i_stop = next((i for i, r in enumerate(o.frames) if r is o.stop_ack), len(o.frames))
    last = [r.frame.tick_ms for r in o.frames[:i_stop] if r.frame.type in READINGS
            and 0 <= after_ms(t0, r.frame.tick_ms) <= after_ms(t0, t1)]
    if last:
        t1 = max(last, key=lambda t: after_ms(t0, t))
    sq = {o.stream_status.frame.seq} if o.stream_status else set()
    ticks = [r.frame.tick_ms for r in o.frames if r.frame.type == FrameType.STATUS and r.frame.seq not in sq
             and 0 <= after_ms(t0, r.frame.tick_ms) <= after_ms(t0, t1)]
    marks = [0] + sorted(after_ms(t0, t) for t in ticks) + [after_ms(t0, t1)]
    gap = max(b - a for a, b in zip(marks, marks[1:]))
    if marks[-1] < STATUS_MAX_GAP_MS or gap > STATUS_MAX_GAP_MS:
        ok = False
    parts.append(f"{len(ticks)} unsolicited over {marks[-1] / 1000:.1f} s of streaming, longest gap {gap / 1000:.1f} s")
    return ok, "; ".join(parts)


def _eval_faults(o: Observations):
    bad = []
    for p in o.probes:
        f = p.reply
        if f is None:
            bad.append(f"{p.name}: {p.other}")
        elif f.code != p.expected or f.cmd_type != (p.ftype & 0xFF) or f.cmd_seq != p.seq:
            bad.append(f"{p.name}: FAULT code {f.code} type 0x{f.cmd_type:02x} seq {f.cmd_seq}, expected "
                       f"{FaultCode(p.expected).name} ({int(p.expected)}) 0x{p.ftype & 0xFF:02x} seq {p.seq}")
    if bad:
        return False, f"{len(o.probes) - len(bad)}/{len(o.probes)} right; " + "; ".join(bad)
    codes = ", ".join(sorted({FaultCode(p.expected).name for p in o.probes}))
    return True, f"{len(o.probes)}/{len(o.probes)} bad commands answered by the right FAULT ({codes})"


def _eval_ping(o: Observations):
    bad = [f"{len(d)} bytes: " + ("no PONG" if e is None else f"PONG of {len(e)} bytes differs")
           for d, e in o.pings if e != d]
    if bad or not o.pings:
        return False, "; ".join(bad) or "no PING sent"
    return True, f"{len(o.pings)} PINGs of {', '.join(str(len(d)) for d, _ in o.pings)} bytes echoed exactly"


def _eval_settings(o: Observations):
    bad = []
    for key in SettingKey:
        v = o.settings.get(key)
        if key not in o.settings:
            bad.append(f"{key.name.lower()}: {o.errors.get(f'setting {key.name.lower()}', 'no reply')}")
        elif isinstance(v, Fault):
            bad.append(f"{key.name.lower()}: FAULT {v.code}")
        elif key in _NUMBER_KEYS and not isinstance(v, int):
            bad.append(f"{key.name.lower()}: number expected")
        elif key not in _NUMBER_KEYS and not (isinstance(v, str) and _printable(v)):
            bad.append(f"{key.name.lower()}: printable text expected")
    s = o.settings
    if isinstance(s.get(SettingKey.DEVICE_AVERAGING), int) and not 1 <= s[SettingKey.DEVICE_AVERAGING] <= 64:
        bad.append(f"device_averaging {s[SettingKey.DEVICE_AVERAGING]} outside 1..64")
    if o.status_idle is not None and s.get(SettingKey.INTERVAL_MS) != o.status_idle.interval_ms:
        bad.append(f"interval_ms {s.get(SettingKey.INTERVAL_MS)!r} but STATUS says {o.status_idle.interval_ms}")
    if o.ident is not None:
        for key, name in ((SettingKey.PROBE_SERIAL, "probe_serial"), (SettingKey.CERT_REF, "cert_ref")):
            if isinstance(s.get(key), str) and s[key] != getattr(o.ident, name):
                bad.append(f"{name} differs from IDENT")
    if bad:
        return False, "; ".join(bad)
    return True, (f"{len(SettingKey)} keys read, types as documented; interval {s[SettingKey.INTERVAL_MS]} ms, "
                  f"averaging {s[SettingKey.DEVICE_AVERAGING]}, clock_utc {s[SettingKey.CLOCK_UTC]}")


def _eval_boot(o: Observations):
    boots = [r for r in o.frames if r.frame.type == FrameType.BOOT]
    _, silent = _segments(o.frames, o.interval_ms)
    bad = []
    for r in boots:
        try:
            b = Boot.unpack(r.frame.payload)
        except MeterlinkError as exc:
            bad.append(str(exc))
            continue
        if r.frame.seq != 0:
            bad.append(f"BOOT with seq {r.frame.seq}")
        if b.reset_cause not in RESET_CAUSES:
            bad.append(f"reset cause {b.reset_cause} undocumented")
    if boots and o.ident is not None and o.ident_index >= 0:
        before = [r for r in boots if o.frames.index(r) < o.ident_index]
        if before and Boot.unpack(before[-1].frame.payload).boot_count != o.ident.boot_count:
            bad.append("BOOT boot_count differs from IDENT's")
    if silent:
        bad.append(f"{silent} restart(s) without BOOT")
    if not boots and o.wait_boot_s > 0:
        bad.append(f"no BOOT within {o.wait_boot_s:g} s (reset the meter while waiting)")
    if bad:
        return False, "; ".join(bad)
    if not boots:
        return None, "no reset during the check; use --wait-boot and reset the meter to observe BOOT"
    causes = ", ".join(str(Boot.unpack(r.frame.payload).reset_cause) for r in boots)
    return True, f"{len(boots)} BOOT frame(s), seq 0, reset cause {causes}, boot_count as IDENT"


def _eval_garbage(o: Observations):
    if o.garbage_reply is None:
        return False, f"{o.garbage_bytes} junk bytes sent, then {o.errors.get('garbage', 'no IDENT')}"
    return True, f"{o.garbage_bytes} junk bytes sent (64 random, 255 zero), WHO answered in {o.garbage_s * 1000:.0f} ms"


_EVAL = {"ident": _eval_ident, "version": _eval_version, "framing": _eval_framing, "interval": _eval_interval,
         "start_stop": _eval_start_stop, "status": _eval_status, "faults": _eval_faults, "ping": _eval_ping,
         "settings": _eval_settings, "boot": _eval_boot, "garbage": _eval_garbage}


def evaluate(o: Observations) -> list[Result]:
    """One Result per item of ITEMS, in order."""
    out = []
    for item in ITEMS:
        ok, ev = _EVAL[item.key](o)
        out.append(Result(item.key, item.title, "skip" if ok is None else ("pass" if ok else "fail"), ev))
    return out


