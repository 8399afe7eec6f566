"""Record a meter's stream into the database: every raw reading, status and link event.

The link thread acquires; this loop consumes its queue and writes through a BatchWriter
(commits at most one second apart). The duration is measured on the device clock: the time
span of the readings stored, not host time. A host-time safety timeout bounds the run.
"""

from __future__ import annotations

import sqlite3
import threading
import time
from collections import Counter
from dataclasses import dataclass, field
from typing import Callable

from meterlink.errors import MeterlinkError
from meterlink.device.link import Connected, LinkEvent, MeterLink, Reading, SpectrumReading, StatusReport
from meterlink.storage.store import BatchWriter, Store, epoch_row
from meterlink.device.transport import Link


class NoMeterError(MeterlinkError):
    """No meter completed the handshake on the port: nothing was recorded."""


class NotStoringError(MeterlinkError):
    """The database could not be written (a full disk): the recording stopped with what was stored kept."""


@dataclass(frozen=True)
class RecordSummary:
    """What one recording produced."""

    session_id: int
    db_path: str
    port: str
    model: str
    serial: str
    probe_serial: str
    firmware: str
    readings: int
    spectra: int
    statuses: int
    events_by_kind: dict = field(default_factory=dict)
    lost_frames: int = 0
    device_span_s: float = 0.0
    host_elapsed_s: float = 0.0
    clock_rate_ratio: float | None = None
    stop_reason: str = ""

    def as_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


def reading_row(r: Reading, epoch: int = 0) -> dict:
    a = r.axes
    return {"boot": r.boot, "seq": r.seq, "tick_ms": r.tick_ms, "t_utc": r.t_utc, "raw_x": a.x, "raw_y": a.y,
            "raw_z": a.z, "flags": a.flags, "range_index": a.range_index, "epoch": epoch}


def status_row(s: StatusReport) -> dict:
    st = s.status
    return {"boot": s.boot, "seq": s.seq, "tick_ms": s.tick_ms, "t_utc": s.t_utc, "battery_mv": st.battery_mv,
            "battery_pct": None if st.battery_pct > 100 else st.battery_pct,
            "temperature_degc": st.temp_centi_c / 100.0, "flags": st.flags, "interval_ms": st.interval_ms}


def spectrum_row(s: SpectrumReading, epoch: int = 0) -> dict:
    sp = s.spectrum
    return {"boot": s.boot, "seq": s.seq, "tick_ms": s.tick_ms, "t_utc": s.t_utc, "epoch": epoch,
            "orientation": sp.orientation,
            "sweep": sp.sweep, "lines": [(khz * 1000.0, centi / 100.0) for khz, centi in sp.pairs]}


class Recorder:
    """Consume a MeterLink into a Store session until a device-time duration, a host timeout or stop()."""

    def __init__(self, store: Store, port: str, *, interval_ms: int = 1000, duration_s: float | None = None,
                 host_timeout_s: float | None = None, kind: str = "record", freq_hz: float | None = None,
                 band_hz: tuple[float, float] | None = None, notes: str = "",
                 link_factory: Callable[[], Link] | None = None, on_item: Callable[[object], None] | None = None,
                 store_retry_s: float = 5.0, **link_options):
        self.store, self.port = store, port
        self.duration_s = duration_s
        if host_timeout_s is None and duration_s is not None:
            host_timeout_s = 2.0 * duration_s + 30.0  # a device clock at the host's rate needs duration_s
        self.host_timeout_s = host_timeout_s
        self.session_args = dict(kind=kind, port=port, interval_ms=interval_ms, freq_hz=freq_hz, notes=notes,
                                 band_lo_hz=band_hz[0] if band_hz else None, band_hi_hz=band_hz[1] if band_hz else None)
        self.link = MeterLink(port, interval_ms, link_factory=link_factory, **link_options)
        self.on_item = on_item
        self.stop_event = threading.Event()
        self.session_id: int | None = None
        self._ident = None
        self._t_first: float | None = None
        self._t_last: float | None = None
        self._counts = Counter()
        self._ratio: float | None = None
        self._epoch = 0
        self.store_retry_s = store_retry_s
        self.not_stored = 0                   # readings received that could not be stored (a full disk)
        self.session_left_open = False
        self._no_meter = ""                   # why the first handshake failed, if it did

    def stop(self) -> None:
        self.stop_event.set()

    def run(self) -> RecordSummary:
        """Open the port (LinkError if it cannot), record, and return the summary.

        NoMeterError if no meter ever completed the handshake (the empty session is removed);
        NotStoringError if the database could not be written for store_retry_s (what was stored is
        kept, the session closed, the readings that could not be stored counted in the message).
        """
        self.link.start(require_open=True)
        self.session_id = self.store.begin_session(**self.session_args)
        writer = BatchWriter(self.store, self.session_id)
        t0 = time.monotonic()
        reason = "stopped"
        failing_since: float | None = None
        try:
            while True:
                if self.stop_event.is_set():
                    break
                if self.host_timeout_s is not None and time.monotonic() - t0 > self.host_timeout_s:
                    reason = "host safety timeout"
                    writer.add_event("host_timeout", "warning", f"stopped by the host safety timeout of "
                                     f"{self.host_timeout_s:g} s before {self.duration_s} s of device time")
                    break
                item = self.link.get(0.1)
                if item is None:
                    if self.link.finished.is_set() and self.link.queue.empty():
                        reason = "link ended"
                        break
                else:
                    self._consume(item, writer)
                    if self._ident is None and isinstance(item, LinkEvent) and item.severity == "error":
                        self._no_meter = item.message
                        if item.kind == "port_lost":  # the first handshake failed: nobody answers on this port
                            reason = "no meter"
                            break
                    if self._span_reached():
                        reason = "duration reached"
                        break
                try:
                    writer.flush_if_due()   # after a failure, due again max_age_s later: the retry
                except sqlite3.DatabaseError:
                    pass                    # the batch is kept; writer.failures counts
                if writer.failures:
                    failing_since = failing_since or time.monotonic()
                    if time.monotonic() - failing_since >= self.store_retry_s:
                        reason = "database not writable"
                        break
                else:
                    failing_since = None
        except KeyboardInterrupt:
            reason = "interrupted"
        finally:
            self.link.stop()
            while (item := self.link.get(0.0)) is not None:  # never drop what was acquired
                self._consume(item, writer)
            self._finish(writer, reason)
        return self._summary(reason, time.monotonic() - t0)

    def _finish(self, writer: BatchWriter, reason: str) -> None:
        """Store what is left and close the session; remove it if no meter ever answered."""
        sid = self.session_id
        if self._ident is None:  # no handshake: nothing was recorded, so no session is left behind
            writer.take()
            with self.store.write() as conn:
                conn.execute("delete from epochs where session_id = ?", (sid,))
                conn.execute("delete from events where session_id = ?", (sid,))
                conn.execute("delete from sessions where id = ?", (sid,))
            raise NoMeterError(f"no meter answered on {self.port}: {self._no_meter or reason}")
        error = None
        for attempt in range(3):
            try:
                writer.flush()
                break
            except sqlite3.DatabaseError as exc:
                error = exc
                self.store.make_room()
                time.sleep(0.2 * (attempt + 1))  # back-off: a lock held by another writer may clear meanwhile
        else:
            # the last batch cannot be stored: say exactly what is lost, and still close the session
            lost = writer.take()
            self.not_stored = len(lost["readings"])
        for attempt in range(2):
            try:
                self.store.end_session(sid, clock_rate_ratio=self._ratio)
                break
            except sqlite3.DatabaseError as exc:
                error = error or exc
                self.store.make_room()
        else:
            self.session_left_open = True
        if reason == "database not writable" or self.not_stored:
            stored = self.store.count("readings", sid)
            lost = (f"{self.not_stored} reading(s) received since could not be stored" if self.not_stored
                    else "every reading received was stored")
            raise NotStoringError(
                f"database {str(self.store.path)!r} cannot be written ({error or writer.last_error}): recording "
                f"stopped; session {sid} keeps the {stored} reading(s) stored, {lost}"
                + ("; the session could not be closed" if self.session_left_open else ""))

    def _span_reached(self) -> bool:
        if self.duration_s is None or self._t_first is None or self._t_last is None:
            return False
        return self._t_last - self._t_first >= self.duration_s

    def _consume(self, item, writer: BatchWriter) -> None:
        if isinstance(item, Reading):
            writer.add_reading(reading_row(item, self._epoch))
            self._counts["readings"] += 1
            self._span(item.t_utc)
        elif isinstance(item, SpectrumReading):
            writer.add_spectrum(spectrum_row(item, self._epoch))
            self._counts["spectra"] += 1
            self._span(item.t_utc)
        elif isinstance(item, StatusReport):
            writer.add_status(status_row(item))
            self._counts["statuses"] += 1
        elif isinstance(item, LinkEvent):
            writer.add_event(item.kind, item.severity, item.message, item.t_utc, **item.detail)
            if item.kind == "clock_drift":
                self._ratio = item.detail.get("rate_ratio")
        elif isinstance(item, Connected):
            self._on_connected(item, writer)
        if self.on_item is not None:
            self.on_item(item)

    def _span(self, t: float) -> None:
        self._t_first = t if self._t_first is None else min(self._t_first, t)
        self._t_last = t if self._t_last is None else max(self._t_last, t)

    def _on_connected(self, c: Connected, writer: BatchWriter) -> None:
        """A handshake: a new epoch, so that a meter reusing a boot count is never taken for stored readings."""
        try:
            writer.flush()
        except sqlite3.DatabaseError:
            pass  # kept in the writer; the loop sees its failures
        i = c.ident
        self._ident = i
        try:
            dev = self.store.device_id(i.model, i.serial, i.probe_serial, i.cert_ref, i.sensor_kind,
                                       f"{i.fw_major}.{i.fw_minor}.{i.fw_patch}", f"{i.proto_major}.{i.proto_minor}")
        except sqlite3.DatabaseError:
            dev = None  # a full disk: the readings still get their epoch; the loop stops on the write failures
        row = epoch_row(self.session_id, c.boot, "handshake", dev)
        self._epoch = row["id"]
        writer.add_epoch(row)
        try:
            self.store.update_session(self.session_id, device_id=dev, interval_ms=c.interval_ms, clock_boot=c.boot,
                                      clock_tick0_ms=c.mapping.tick0_ms, clock_utc0_s=c.mapping.utc0_s)
        except sqlite3.DatabaseError:
            pass

    def _summary(self, reason: str, host_s: float) -> RecordSummary:
        sid = self.session_id
        events = self.store.events(sid)
        by_kind = Counter(e["kind"] for e in events)
        lost = sum(int(e["detail"].get("lost", 0)) for e in events if e["kind"] == "seq_gap")
        i = self._ident
        span = (self._t_last - self._t_first) if self._t_first is not None else 0.0
        return RecordSummary(
            session_id=sid, db_path=str(self.store.path), port=self.port,
            model=i.model if i else "", serial=i.serial if i else "", probe_serial=i.probe_serial if i else "",
            firmware=f"{i.fw_major}.{i.fw_minor}.{i.fw_patch}" if i else "",
            readings=self.store.count("readings", sid), spectra=self.store.count("spectra", sid),
            statuses=self.store.count("status", sid), events_by_kind=dict(sorted(by_kind.items())),
            lost_frames=lost, device_span_s=span, host_elapsed_s=host_s, clock_rate_ratio=self._ratio,
            stop_reason=reason)

