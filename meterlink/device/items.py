"""What a MeterLink hands to its consumers (Connected, Reading, ReadingBatch, SpectrumReading, StatusReport,
LinkEvent) and the counters it keeps (LinkStats). Plain data; meterlink.device.link re-exports them."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any


from meterlink.device.clock import ClockMapping
from meterlink.device.protocol import Axes, Ident, Spectrum, Status


@dataclass(frozen=True)
class Connected:
    """A handshake completed: who the device is and how its clock maps to UTC."""

    ident: Ident
    status: Status | None
    boot: int
    interval_ms: int
    mapping: ClockMapping
    port: str


@dataclass(frozen=True)
class Reading:
    """One three-axis reading, timed by the device clock (tick_ms unwrapped, t_utc epoch s)."""

    boot: int
    seq: int
    tick_ms: int
    t_utc: float
    axes: Axes


@dataclass(frozen=True)
class ReadingBatch:
    """Consecutive readings of one boot as arrays (a link started with ``batched=True``): each row is
    what a Reading would carry; seq rises by one from row to row and no frame between them is missing."""

    boot: int
    seq: Any            # int64 (N,)
    tick_ms: Any        # int64 (N,), unwrapped
    t_utc: Any          # float (N,)
    flags: Any          # int64 (N,)
    range_index: Any    # int64 (N,)
    raw: Any            # int64 (N, 3) [x, y, z]

    def __len__(self) -> int:
        return int(self.seq.size)


@dataclass(frozen=True)
class SpectrumReading:
    boot: int
    seq: int
    tick_ms: int
    t_utc: float
    spectrum: Spectrum


@dataclass(frozen=True)
class StatusReport:
    boot: int
    seq: int
    tick_ms: int
    t_utc: float
    status: Status


@dataclass(frozen=True)
class LinkEvent:
    """Something the link noticed: kind (crc_error, seq_gap, ...), severity info|warning|error."""

    kind: str
    severity: str
    message: str
    t_utc: float
    detail: dict = field(default_factory=dict)


@dataclass
class LinkStats:
    frames: int = 0
    readings: int = 0
    spectra: int = 0
    statuses: int = 0
    crc_errors: int = 0
    length_errors: int = 0
    garbage_bytes: int = 0
    gaps: int = 0
    lost_frames: int = 0
    duplicates: int = 0
    restarts: int = 0
    faults: int = 0
    malformed: int = 0
    port_losses: int = 0
    reconnects: int = 0
    handshakes: int = 0
    unsynced: int = 0
    queue_overflow: int = 0
    backpressure_waits: int = 0      # times the reader waited for the consumer (queue full)
    backpressure_s: float = 0.0      # host seconds spent waiting
