"""Streamed recalibration and assessment statistics of a probe session (bounded memory).

The in-memory functions of processing.py load a whole session; these read it chunk by chunk
through a Recording (recording.py) and give the same results: calibrating is elementwise, and the
running averages carry their state across chunks (physics.streaming).

Where calibrated values live (schema 13): packed per run of readings in field_spans, and nowhere
else (Store.add_field_values). E, the axes and the times are float64 arrays; uncertainty and flags
one element when constant; H is packed only where it is not E / Z0 to the last bit (an H probe, a
near-field row), and S never: the readers rebuild H = E / Z0 and S = E^2 / Z0 (NaN in near-field
rows) bit for bit. Calibrations made before schema 13 keep their per-reading rows in field_values
and are read from there. Why, measured on 2026-12-04 (shared 2-core machine, load average 3-8):
- size, used pages of the file before and after one recalibrate of 7 days at 1 Hz (604,800
  readings): 132 bytes per reading when values went both per reading and packed, 40 bytes now;
  the per-reading rows alone take 94 (bench_streaming.py, 30 days);
- time, 30 days at 1 Hz (2.59 M readings, bench_streaming.py --only recalibrate --runs 5): 4.8 s,
  against 15.3 s for the issue's baseline (select + numpy + executemany of the per-reading rows,
  0.31x) and 5.3 s for a baseline writing the same packed rows (0.92x, pairs 0.65-1.50); on 7 days,
  2.7 s before (both tables) and 1.5 s now (medians of 3, not paired);
- reading back, 7 days: Recording.values 0.02-0.04 s from the packed rows, 2.0 s through the join of
  per-reading rows with readings; Store.field_values (the in-memory path) 0.14 s against 3.5 s.
No reader looks a value up by reading: assess and the session report stream whole runs, the in-memory
path loads a whole calibration. Recomputing from the raw counts on demand (measured on 30 days under schema 8: 3.7 s, the select alone 3.3 s,
against 0.3 s for the packed rows) would also lose provenance: stored values are those computed
once, under the software version and certificate status of the day they were applied.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import math
import time
from dataclasses import dataclass

import numpy as np

from meterlink import __version__
from meterlink.errors import MeterlinkError
from meterlink.physics.calibrate import ABOVE_RANGE, BELOW_RANGE, FREQ_ASSUMED, FREQ_OUT, calibrate_axes
from meterlink.physics.certificate import DipoleCertificate, certificate_status, dump_certificate
from meterlink.physics.streaming import FieldAccumulator, FieldStats, IntervalMedian
from meterlink.storage.recording import CHUNK_ROWS, Recording


class NotStreamable(Exception):
    """The session must take the in-memory path (a dipole session, or readings out of time order)."""


@dataclass(frozen=True)
class Recalibrated:
    """What a streamed recalibration wrote: the calibration's id, and a summary of its values."""

    session_id: int
    calibration_id: int
    certificate_name: str
    n_values: int
    e_rms_v_per_m: float | None
    warnings: tuple[str, ...]
    quantity: str


@dataclass(frozen=True)
class SeriesFacts:
    """What assessment.assess_field_stats reads of a series besides its values."""

    session_id: int
    calibration_id: int
    certificate_name: str
    warnings: tuple[str, ...]
    temperatures: object


def recalibrate(store, rec: Recording, cert, *, freq_hz=None, band=None, near_field: bool = False,
                today: _dt.date | None = None, rows: int = CHUNK_ROWS) -> Recalibrated:
    """Calibrate every raw reading of a probe session with cert, storing one executemany per chunk."""
    name = f"{cert.model} {cert.serial} ({cert.certificate_number})"
    if isinstance(cert, DipoleCertificate) or rec.is_dipole:
        if isinstance(cert, DipoleCertificate) != rec.is_dipole:
            raise MeterlinkError(f"certificate {name} is for a {'probe' if rec.is_dipole else 'dipole'}, "
                                 f"session {rec.session_id} was recorded with a "
                                 f"{'dipole receiver' if rec.is_dipole else 'probe'}")
        raise NotStreamable("dipole sessions are calibrated in memory (their spectra are small)")
    if rec.sensor_kind is None:
        raise MeterlinkError(f"session {rec.session_id} has no identified device")
    if freq_hz is None and band is None:
        freq_hz, band = rec.freq_hz, rec.band
    text = dump_certificate(cert)
    row = {"session_id": rec.session_id, "certificate_name": name,
           "certificate_sha256": hashlib.sha256(text.encode()).hexdigest(), "certificate_text": text,
           "applied_utc": time.time(), "freq_hz": freq_hz,
           "band_lo_hz": band[0] if band else None, "band_hi_hz": band[1] if band else None,
           "software_version": __version__}
    freq_arg = band if band is not None else freq_hz
    temp = rec.median_temperature_c()
    warnings = calibrate_axes(cert, np.zeros((0, 3), np.int64), freq_arg, temp, near_field, today).warnings
    cal_id = store.add_calibration(row)
    n, p_sum = 0, 0.0
    try:
        for ids, t, raw in rec.raw_chunks(rows):
            res = calibrate_axes(cert, raw, freq_arg, temp, near_field, today)
            store.add_field_values(cal_id, ids, res.e_v_per_m, res.axes_v_per_m, res.h_a_per_m, res.s_w_per_m2,
                                   res.u_expanded_db, res.flags, t_utc=t)
            ok = np.isfinite(res.e_v_per_m)
            n += int(ok.sum())
            p_sum += float(np.sum(res.e_v_per_m[ok] ** 2))
    except BaseException:
        store.drop_calibration(cal_id)       # no half-written calibration is left to be taken as the latest
        raise
    return Recalibrated(rec.session_id, cal_id, name, n, math.sqrt(p_sum / n) if n else None, tuple(warnings),
                        cert.quantity)


def series_facts(rec: Recording, today: _dt.date | None = None) -> SeriesFacts:
    """Certificate name, status warnings and temperatures of the calibration in force."""
    cal = rec.calibration
    if cal is None:
        raise MeterlinkError(f"session {rec.session_id} has no calibrated values yet: apply a certificate first")
    warnings = tuple(certificate_status(rec.certificate, today or _dt.date.today()))
    return SeriesFacts(rec.session_id, int(cal["id"]), cal["certificate_name"], warnings,
                       rec.temperatures(rec.certificate))


def interval_median(rec: Recording, rows: int = CHUNK_ROWS) -> IntervalMedian:
    """First pass over the reading times alone: the median interval (the hold time) and the record's
    first and last time. NotStreamable if the times are not in id order."""
    if not rec.in_time_order:
        raise NotStreamable("readings out of time order")
    med = IntervalMedian(rec.n_readings)
    prev = -np.inf
    for t in rec.times(rows):
        if t.size and (t[0] < prev or np.any(np.diff(t) < 0)):
            raise NotStreamable("readings out of time order")
        prev = t[-1] if t.size else prev
        med.feed(t)
    return med


def field_accumulator(med: IntervalMedian, window_s) -> FieldAccumulator:
    return FieldAccumulator(window_s, med.median_s(), med.first if med.first is not None else 0.0,
                            med.last if med.last is not None else 0.0, above_bit=ABOVE_RANGE, below_bit=BELOW_RANGE,
                            freq_out_bit=FREQ_OUT, freq_assumed_bit=FREQ_ASSUMED)


def field_stats(rec: Recording, window_s, *, rows: int = CHUNK_ROWS, sinks=()) -> FieldStats:
    """Assessment statistics of the calibration in force, in two streamed passes (times, then values).

    Each of ``sinks`` is called with every ValueChunk too (a CSV writer, a plot envelope). The hold
    time comes from the intervals of all readings; the in-memory path takes those of the readings
    with a finite value, the same set unless a calibration left some values NULL."""
    acc = field_accumulator(interval_median(rec, rows), window_s)
    return feed_values(rec, acc, rows=rows, sinks=sinks)


def feed_values(rec: Recording, acc: FieldAccumulator, *, rows: int = CHUNK_ROWS, sinks=()) -> FieldStats:
    for v in rec.values(rows=rows):
        acc.feed(v.t_utc, v.e_v_per_m, v.u_expanded_db, v.flags)
        for sink in sinks:
            sink(v)
    return acc.result()
