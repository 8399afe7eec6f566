"""The simulated firmware's answers to host commands (docs/protocol.md, host-to-device frames): identify,
start/stop, interval, status, settings, clock, ping, and the FAULT frame for anything malformed.

Kept apart from the reading machinery in simulators/firmware.py; HostCommands reads and changes the
state of the Firmware it serves and sends through it.
"""

from __future__ import annotations

from meterlink.errors import ProtocolError
from meterlink.device.protocol import (
    MAX_TEXT, PROTOCOL_MAJOR, PROTOCOL_MINOR, U32_MOD, Ack, Echo, Fault, FaultCode, FrameType, Ident, SensorKind,
    Setting, SettingKey, parse_payload,
)

_FIXED_LEN = {FrameType.WHO: 0, FrameType.START: 0, FrameType.STOP: 0, FrameType.STATUS_QUERY: 0,
              FrameType.SET_INTERVAL: 4, FrameType.SETTING_GET: 1, FrameType.CLOCK_SET: 6}
_HOST_TYPES = {FrameType.WHO, FrameType.START, FrameType.STOP, FrameType.SET_INTERVAL, FrameType.STATUS_QUERY,
               FrameType.SETTING_GET, FrameType.SETTING_PUT, FrameType.CLOCK_SET, FrameType.PING}


class HostCommands:
    """Answers the host's commands for one Firmware (which owns the state this reads and changes)."""

    def __init__(self, fw):
        self.fw = fw

    def fault(self, code: int, frame, now_ms: int, text: str) -> None:
        fw = self.fw
        if fw.quirks["wrong_fault_code"]:
            code = FaultCode.UNKNOWN_TYPE if code == FaultCode.BAD_FRAME else FaultCode.BAD_FRAME
        fw._send(Fault(code, frame.type & 0xFF, frame.seq, text[:MAX_TEXT]), now_ms)

    def handle(self, frame, now_ms: int) -> None:
        fw = self.fw
        if frame.version != PROTOCOL_MAJOR:
            return self.fault(FaultCode.BAD_VERSION, frame, now_ms, f"version {frame.version}")
        if frame.type not in _HOST_TYPES:
            if not fw.quirks["silent_unknown"]:
                self.fault(FaultCode.UNKNOWN_TYPE, frame, now_ms, "type")
            return None
        ft = FrameType(frame.type)
        if ft in _FIXED_LEN and len(frame.payload) != _FIXED_LEN[ft]:
            return self.fault(FaultCode.BAD_LENGTH, frame, now_ms, "length")
        try:
            msg = parse_payload(frame)
        except ProtocolError:
            code = FaultCode.BAD_VALUE if ft == FrameType.CLOCK_SET else FaultCode.BAD_FRAME
            return self.fault(code, frame, now_ms, "payload")
        ack = Ack(frame.type, frame.seq)
        if ft == FrameType.WHO:
            fw._send(self.ident(), now_ms)
        elif ft == FrameType.START:
            fw.start_streaming(now_ms)
            fw._send(ack, now_ms)
            fw._flags_changed(now_ms)
        elif ft == FrameType.STOP:
            fw.streaming = fw.streaming and bool(fw.quirks["ignore_stop"])
            fw._send(ack, now_ms)
            fw._flags_changed(now_ms)
        elif ft == FrameType.SET_INTERVAL:
            if self.set_interval(msg.interval_ms, now_ms):
                fw._send(ack, now_ms)
            else:
                self.fault(FaultCode.BAD_VALUE, frame, now_ms, "interval")
        elif ft == FrameType.STATUS_QUERY:
            fw._send(fw._status(now_ms), now_ms)
        elif ft == FrameType.SETTING_GET:
            v = self.setting(msg.key, now_ms)
            if v is None:
                return self.fault(FaultCode.UNKNOWN_KEY, frame, now_ms, f"key {msg.key}")
            fw._send(Setting(msg.key, v), now_ms)
        elif ft == FrameType.SETTING_PUT:
            self.setting_put(frame, msg, now_ms)
        elif ft == FrameType.CLOCK_SET:
            fw.clock = (msg.utc_s * 1000 + msg.utc_ms, now_ms)
            fw._send(ack, now_ms)
            fw._flags_changed(now_ms)
        elif ft == FrameType.PING:
            data = msg.data
            if fw.quirks["pong_alter"] and data:
                data = data[:-1] + bytes([data[-1] ^ 0x20])
            fw._send(Echo(data), now_ms, FrameType.PONG)
        return None

    def ident(self) -> Ident:
        fw = self.fw
        dev = fw.sc.device
        version = tuple(int(v) for v in dev.get("fw", (1, 0, 0)))
        kind = SensorKind.E_PROBE if fw.sensor == "probe" else SensorKind.DIPOLE_RX
        model = str(dev.get("model", "SIM")) + ("" if fw.sensor == "probe" else "-RX")
        q = fw.quirks
        kind = kind if q["ident_kind"] is None else int(q["ident_kind"])
        model = model if q["ident_model"] is None else str(q["ident_model"])
        major = PROTOCOL_MAJOR if q["ident_proto_major"] is None else int(q["ident_proto_major"])
        return Ident(major, PROTOCOL_MINOR, *version, kind, fw.boot_count, fw.min_interval_ms,
                     fw.max_interval_ms, model, fw.spec.serial, fw.texts[SettingKey.PROBE_SERIAL],
                     fw.texts[SettingKey.CERT_REF])

    def set_interval(self, interval_ms: int, now_ms: int) -> bool:
        fw = self.fw
        if not fw.min_interval_ms <= interval_ms <= fw.max_interval_ms:
            return False
        fw.interval_ms = int(interval_ms)
        if fw.streaming:
            fw._next_end = now_ms + fw.interval_ms
        return True

    def setting(self, key: int, now_ms: int):
        fw = self.fw
        if key == SettingKey.INTERVAL_MS:
            return fw.interval_ms
        if key == SettingKey.DEVICE_AVERAGING:
            return fw.averaging
        if key in fw.texts:
            return fw.texts[key]
        if key == SettingKey.CLOCK_UTC:
            return 0 if not fw.clock else (fw.clock[0] + now_ms - fw.clock[1]) // 1000 % U32_MOD
        return None

    def setting_put(self, frame, msg, now_ms: int) -> None:
        fw = self.fw
        key, v = msg.key, msg.value
        if self.setting(key, now_ms) is None:
            return self.fault(FaultCode.UNKNOWN_KEY, frame, now_ms, f"key {key}")
        if key == SettingKey.CLOCK_UTC:
            return self.fault(FaultCode.READ_ONLY, frame, now_ms, "clock: use CLOCK_SET")
        if key in fw.texts:
            if not isinstance(v, str):
                return self.fault(FaultCode.BAD_VALUE, frame, now_ms, "text expected")
            fw.texts[key] = v
        elif isinstance(v, str):
            return self.fault(FaultCode.BAD_VALUE, frame, now_ms, "number expected")
        elif key == SettingKey.INTERVAL_MS:
            if not self.set_interval(v, now_ms):
                return self.fault(FaultCode.BAD_VALUE, frame, now_ms, "interval")
        elif key == SettingKey.DEVICE_AVERAGING:
            if not 1 <= v <= 64:
                return self.fault(FaultCode.BAD_VALUE, frame, now_ms, "averaging 1..64")
            fw.averaging = int(v)
        fw._send(Setting(key, self.setting(key, now_ms)), now_ms)
        return None
