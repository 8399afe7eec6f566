"""The recording loader: everything a computation needs about one session, read in one place.

``load_recording`` asks the Store once (session and device, calibrations, temperatures, span
index, packed count, optionally events: Store.recording_rows) and returns a frozen ``Recording``. Its readings and
calibrated values are not loaded: the generators ``times``, ``readings`` and ``values`` hand
them out span by span (chunks of about ``rows`` readings, in id order), so a year at 1 Hz
streams through a few megabytes instead of being held whole.
"""

from __future__ import annotations

import types
from dataclasses import dataclass, field
from typing import Any, Iterator, Mapping

import numpy as np

from meterlink.device.protocol import SensorKind
from meterlink.errors import MeterlinkError
from meterlink.storage.rows import ReadingArrays
from meterlink.storage.spans import in_ranges

#: Readings per chunk handed out by the generators (a few MB of Python rows at a time).
CHUNK_ROWS = 16384


@dataclass(frozen=True)
class ValueChunk:
    """Calibrated values of consecutive readings under one calibration (NULL stored -> NaN)."""

    reading_ids: np.ndarray
    t_utc: np.ndarray
    e_v_per_m: np.ndarray
    axes_v_per_m: np.ndarray       # (N, 3)
    u_expanded_db: np.ndarray
    flags: np.ndarray

    def __len__(self) -> int:
        return int(self.reading_ids.size)


@dataclass(frozen=True)
class Recording:
    """One session as a value: identity, declared frequency, calibration in force, temperatures,
    span list; readings and values stream from ``store`` on demand."""

    session_id: int
    kind: str
    session: Mapping[str, Any]                    # the session row with its device's fields (read-only)
    sensor_kind: int | None
    calibrations: tuple[Mapping[str, Any], ...]   # oldest first
    calibration: Mapping[str, Any] | None         # the one in force (the latest unless one was named)
    certificate: Any                              # the calibration's certificate, parsed; None without one
    freq_hz: float | None                         # declared frequency (session row)
    band: tuple[float, float] | None              # declared band (session row)
    temperatures_c: tuple[float, ...]             # meter temperatures reported, in time order
    spans: tuple[tuple[int, int, int, float, float], ...]   # (id_lo, id_hi, n, t_lo, t_hi) by id
    events: tuple[Mapping[str, Any], ...] | None = None      # with load_recording(events=True)
    packed_n: int = 0                             # readings of the calibration in force packed in field_spans
    store: Any = field(default=None, compare=False, repr=False)

    # -- plain facts --------------------------------------------------------------------------
    @property
    def is_dipole(self) -> bool:
        return self.sensor_kind == SensorKind.DIPOLE_RX

    @property
    def n_readings(self) -> int:
        return int(sum(s[2] for s in self.spans))

    @property
    def t_first(self) -> float | None:
        return min((s[3] for s in self.spans), default=None)

    @property
    def t_last(self) -> float | None:
        return max((s[4] for s in self.spans), default=None)

    @property
    def in_time_order(self) -> bool:
        """Whether id order is time order across spans (a host clock step can break it: then the
        in-memory path, which sorts, is used)."""
        prev = -np.inf
        for s in self.spans:
            if s[3] < prev:
                return False
            prev = s[4]
        return True

    @property
    def id_ranges(self) -> list[tuple[int, int]]:
        """Disjoint, ascending id ranges covering every reading of the session."""
        out: list[list[int]] = []
        for lo, hi, *_ in self.spans:
            if out and lo <= out[-1][1] + 1:
                out[-1][1] = max(out[-1][1], hi)
            else:
                out.append([lo, hi])
        return [(lo, hi) for lo, hi in out]

    def median_temperature_c(self) -> float | None:
        """Median meter temperature (for the certificate's temperature correction), None if none reported."""
        return float(np.median(self.temperatures_c)) if self.temperatures_c else None

    def temperatures(self, cert):
        """Lowest and highest reported temperature against the certificate's range."""
        from meterlink.physics.assessment import Temperatures

        t = self.temperatures_c
        return Temperatures((min(t), max(t)) if t else None, getattr(cert, "temp_range_c", None))

    # -- streams ------------------------------------------------------------------------------
    def times(self, rows: int = CHUNK_ROWS) -> Iterator[np.ndarray]:
        """Reading times (t_utc), chunk by chunk in id order (from the packed values when complete)."""
        if self.calibration is not None and self.packed_n >= self.n_readings > 0:
            for v in self._packed_values(int(self.calibration["id"]), rows):
                yield v.t_utc
            return
        sid = self.session_id
        for got in self.store.row_chunks("select t_utc from readings where id between ? and ? and session_id = ? "
                                         "order by id", lambda a, b: (a, b, sid), self.id_ranges, rows):
            yield np.array(got, dtype=np.float64).reshape(-1)

    def readings(self, rows: int = CHUNK_ROWS) -> Iterator[ReadingArrays]:
        """Raw readings, chunk by chunk in id order."""
        sid = self.session_id
        for got in self.store.row_chunks(
                "select id, boot, seq, tick_ms, t_utc, raw_x, raw_y, raw_z, coalesce(flags, 0), "
                "coalesce(range_index, 0) from readings where id between ? and ? and session_id = ? order by id",
                lambda a, b: (a, b, sid), self.id_ranges, rows):
            ints = np.array([(r[0], r[1], r[2], r[3], r[5], r[6], r[7], r[8], r[9]) for r in got], dtype=np.int64)
            t = np.array([r[4] for r in got], dtype=np.float64)
            yield ReadingArrays(ids=ints[:, 0], boot=ints[:, 1], seq=ints[:, 2], tick_ms=ints[:, 3], t_utc=t,
                                raw=ints[:, 4:7], flags=ints[:, 7], range_index=ints[:, 8])

    def raw_chunks(self, rows: int = CHUNK_ROWS) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray]]:
        """(reading ids, t_utc, raw counts (N, 3)) chunk by chunk: what calibrating needs, nothing more."""
        sid = self.session_id
        for got in self.store.row_chunks("select id, t_utc, raw_x, raw_y, raw_z from readings where id between ? "
                                         "and ? and session_id = ? order by id", lambda a, b: (a, b, sid),
                                         self.id_ranges, rows):
            a = np.array(got, dtype=np.float64)
            yield a[:, 0].astype(np.int64), a[:, 1], a[:, 2:5].astype(np.int64)

    def values(self, calibration_id: int | None = None, rows: int = CHUNK_ROWS) -> Iterator[ValueChunk]:
        """Stored calibrated values of a calibration (the one in force by default), chunk by chunk:
        from its packed rows (field_spans) when it has any, else from its per-reading rows (field_values,
        calibrations made before schema 8). Readings recorded after the calibration have no value in it."""
        cid = self._calibration_id(calibration_id)
        packed = self.packed_n if calibration_id is None else self.store.packed_count(cid)
        if packed:
            yield from self._packed_values(cid, rows)
            return
        sid = self.session_id
        sql = ("select r.id, r.t_utc, v.e_v_per_m, v.ex_v_per_m, v.ey_v_per_m, v.ez_v_per_m, v.u_expanded_db, "
               "v.flags from readings r join field_values v on v.reading_id = r.id and v.calibration_id = ? "
               "where r.id between ? and ? and r.session_id = ? order by r.id")
        for got in self.store.row_chunks(sql, lambda a, b: (cid, a, b, sid), self.id_ranges, rows):
            a = np.array(got, dtype=np.float64)     # NULL -> NaN
            yield ValueChunk(a[:, 0].astype(np.int64), a[:, 1], a[:, 2], a[:, 3:6], a[:, 6],
                             np.nan_to_num(a[:, 7]).astype(np.int64))

    def _packed_values(self, cid: int, rows: int) -> Iterator[ValueChunk]:
        """Packed rows, keeping only readings still in the span index (retention may have removed some)."""
        ranges = self.id_ranges
        for d in self.store.packed_chunks(cid):
            keep = in_ranges(ranges, d["reading_id"])
            if not keep.all():
                d = {name: a[keep] for name, a in d.items()}
            m = d["reading_id"].size
            for a in range(0, m, rows):
                yield ValueChunk(*(d[k][a:a + rows] for k in ("reading_id", "t_utc", "e_v_per_m", "axes_v_per_m",
                                                              "u_expanded_db", "flags")))

    def _calibration_id(self, calibration_id: int | None) -> int:
        if calibration_id is not None:
            if not any(c["id"] == calibration_id for c in self.calibrations):
                raise MeterlinkError(f"session {self.session_id} has no calibration {calibration_id}")
            return int(calibration_id)
        if self.calibration is None:
            raise MeterlinkError(f"session {self.session_id} has no calibrated values yet: apply a certificate first")
        return int(self.calibration["id"])


def load_recording(store, session_id: int, *, calibration_id: int | None = None,
                   events: bool = False) -> Recording:
    """Read what any computation on a session needs in one Store call (Store.recording_rows)."""
    from meterlink.physics.certificate import parse_certificate

    got = store.recording_rows(session_id, calibration_id, events)
    s = got["session"]
    cals = tuple(types.MappingProxyType(c) for c in got["calibrations"])
    if calibration_id is not None and got["calibration"] is None:
        raise MeterlinkError(f"session {session_id} has no calibration {calibration_id}")
    cal = None if got["calibration"] is None else types.MappingProxyType(got["calibration"])
    cert = parse_certificate(cal["certificate_text"], f"calibration {cal['id']}") if cal is not None else None
    temps = tuple(float(t) for t in got["temperatures"] if t is not None)
    spans = tuple(tuple(r) for r in got["spans"])
    band = (s["band_lo_hz"], s["band_hi_hz"]) if s.get("band_lo_hz") and s.get("band_hi_hz") else None
    kind = s.get("device_sensor_kind")
    evs = tuple(got["events"]) if events else None
    packed = got["packed"]
    return Recording(session_id, s["kind"], types.MappingProxyType(dict(s)), None if kind is None else int(kind),
                     cals, cal, cert, s.get("freq_hz"), band, temps, spans, evs, packed, store)
