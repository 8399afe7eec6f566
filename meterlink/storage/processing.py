"""Stored raw readings -> calibrated series, with provenance (which certificate made which values).

Raw counts are never changed: applying a certificate adds a `calibrations` row (name, SHA-256 and
full text of the certificate, declared frequency) and its values, packed per run of readings
(field_spans; storage/streamed.py says why), so a session can be recomputed with a later certificate
and the earlier results stay in the database.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import time
from dataclasses import dataclass

import numpy as np

from meterlink import __version__
from meterlink.physics.assessment import Temperatures
from meterlink.physics.calibrate import calibrate_axes, calibrate_spectrum
from meterlink.physics.certificate import DipoleCertificate, ProbeCertificate, dump_certificate, load_certificate
from meterlink.errors import MeterlinkError
from meterlink.device.protocol import SensorKind
from meterlink.storage.store import Store

ORIENTATIONS = "xyz?"


@dataclass(frozen=True)
class FieldSeries:
    """Calibrated values of one probe session under one calibration, ordered by time."""

    session_id: int
    calibration_id: int
    certificate_name: str
    reading_ids: np.ndarray
    t_utc: np.ndarray
    e_v_per_m: np.ndarray
    axes_v_per_m: np.ndarray
    h_a_per_m: np.ndarray
    s_w_per_m2: np.ndarray
    u_expanded_db: np.ndarray
    flags: np.ndarray
    warnings: tuple[str, ...]
    quantity: str = "E"
    temperatures: Temperatures | None = None   # reported meter temperatures against the certificate's range

    def __len__(self) -> int:
        return int(self.reading_ids.size)


@dataclass(frozen=True)
class SpectrumSeries:
    """Calibrated dipole sweeps: per sweep the orientations summed in power, per frequency."""

    session_id: int
    calibration_id: int
    certificate_name: str
    freq_hz: np.ndarray          # (F,) union of the frequencies seen
    t_utc: np.ndarray            # (K,) time of each complete or partial sweep
    e_v_per_m: np.ndarray        # (K, F) power sum of the orientations seen; NaN where none saw the line
    u_expanded_db: np.ndarray    # (F,) largest U seen at that frequency
    flags: np.ndarray            # (F,) OR of the flags at that frequency
    orientations: np.ndarray     # (K,) number of orientations in each sweep
    warnings: tuple[str, ...]
    n_seen: np.ndarray | None = None   # (K, F) orientations that saw each line above the floor
    temperatures: Temperatures | None = None   # reported meter temperatures against the certificate's range


def session_sensor_kind(store: Store, session_id: int) -> int:
    """Sensor kind of the session's device (E probe, H probe or dipole receiver)."""
    kind = store.session(session_id).get("device_sensor_kind")
    if kind is None:
        raise MeterlinkError(f"session {session_id} has no identified device")
    return int(kind)


def _declared(store: Store, session_id: int, freq_hz, band):
    s = store.session(session_id)
    if freq_hz is None and band is None:
        freq_hz = s.get("freq_hz")
        if s.get("band_lo_hz") and s.get("band_hi_hz"):
            band = (s["band_lo_hz"], s["band_hi_hz"])
    return freq_hz, band


def _session_temperature(store: Store, session_id: int) -> float | None:
    """Median probe temperature reported during the session (for the temperature correction)."""
    temps = [t for t in store.status_temperatures(session_id) if t is not None]
    return float(np.median(temps)) if temps else None


def session_temperatures(store: Store, session_id: int, cert) -> Temperatures:
    """The lowest and highest meter temperature of a session (status reports) and the certificate's range."""
    temps = [float(t) for t in store.status_temperatures(session_id) if t is not None]
    return Temperatures((min(temps), max(temps)) if temps else None, getattr(cert, "temp_range_c", None))


def apply_certificate(store: Store, session_id: int, cert: ProbeCertificate | DipoleCertificate | str,
                      *, freq_hz: float | None = None, band: tuple[float, float] | None = None,
                      near_field: bool = False, today: _dt.date | None = None):
    """Calibrate every raw reading of a session with cert and store the results as a new calibration."""
    if isinstance(cert, str):
        cert = load_certificate(cert)
    name = f"{cert.model} {cert.serial} ({cert.certificate_number})"
    text = dump_certificate(cert)
    kind = session_sensor_kind(store, session_id)
    is_dipole = isinstance(cert, DipoleCertificate)
    if is_dipole != (kind == SensorKind.DIPOLE_RX):
        raise MeterlinkError(f"certificate {name} is for a {'dipole' if is_dipole else 'probe'}, "
                             f"session {session_id} was recorded with a "
                             f"{'dipole receiver' if kind == SensorKind.DIPOLE_RX else 'probe'}")
    freq_hz, band = _declared(store, session_id, freq_hz, band)
    cal = {"session_id": session_id, "certificate_name": name,
           "certificate_sha256": hashlib.sha256(text.encode()).hexdigest(), "certificate_text": text,
           "applied_utc": time.time(), "freq_hz": freq_hz,
           "band_lo_hz": band[0] if band else None, "band_hi_hz": band[1] if band else None,
           "software_version": __version__}
    if is_dipole:
        lines = store.spectrum_lines(session_id)
        cal_id = store.add_calibration(cal)
        if len(lines["line_id"]):
            res = calibrate_spectrum(cert, lines["freq_hz"], lines["level_dbuv"], near_field=near_field,
                                     today=today)
            store.add_spectrum_values(cal_id, lines["line_id"], res.e_v_per_m, res.u_expanded_db, res.flags)
        return spectrum_series(store, session_id, cal_id)
    r = store.readings(session_id)
    freq_arg = band if band is not None else freq_hz
    res = calibrate_axes(cert, r.raw, freq_arg, _session_temperature(store, session_id), near_field, today)
    cal_id = store.add_calibration(cal)
    store.add_field_values(cal_id, r.ids, res.e_v_per_m, res.axes_v_per_m, res.h_a_per_m, res.s_w_per_m2,
                           res.u_expanded_db, res.flags, t_utc=r.t_utc)
    return FieldSeries(session_id, cal_id, name, r.ids, r.t_utc, res.e_v_per_m, res.axes_v_per_m,
                       res.h_a_per_m, res.s_w_per_m2, res.u_expanded_db, res.flags, res.warnings, cert.quantity,
                       session_temperatures(store, session_id, cert))


def _calibration(store: Store, session_id: int, calibration_id: int | None) -> dict:
    cals = store.calibrations(session_id)
    if not cals:
        raise MeterlinkError(f"session {session_id} has no calibrated values yet: apply a certificate first")
    if calibration_id is None:
        return cals[-1]
    for c in cals:
        if c["id"] == calibration_id:
            return c
    raise MeterlinkError(f"session {session_id} has no calibration {calibration_id}")


def _cal_certificate(cal: dict):
    from meterlink.physics.certificate import parse_certificate

    return parse_certificate(cal["certificate_text"], f"calibration {cal['id']}")


def _warnings_of(cal: dict, today: _dt.date | None = None) -> tuple[str, ...]:
    from meterlink.physics.certificate import certificate_status

    return tuple(certificate_status(_cal_certificate(cal), today or _dt.date.today()))


def field_series(store: Store, session_id: int, calibration_id: int | None = None) -> FieldSeries:
    """The stored calibrated values of a probe session (latest calibration unless one is named)."""
    cal = _calibration(store, session_id, calibration_id)
    v = store.field_values(cal["id"])
    return FieldSeries(session_id, cal["id"], cal["certificate_name"], v["reading_id"], v["t_utc"],
                       v["e_v_per_m"], v["axes_v_per_m"], v["h_a_per_m"], v["s_w_per_m2"],
                       v["u_expanded_db"], v["flags"], _warnings_of(cal),
                       temperatures=session_temperatures(store, session_id, _cal_certificate(cal)))


def spectrum_series(store: Store, session_id: int, calibration_id: int | None = None) -> SpectrumSeries:
    """Stored dipole values, each sweep's orientations summed in power per frequency."""
    cal = _calibration(store, session_id, calibration_id)
    v = store.spectrum_values(cal["id"])
    freqs = np.unique(v["freq_hz"]) if len(v["freq_hz"]) else np.zeros(0)
    keys = list(zip(v["boot"].tolist(), v["sweep"].tolist()))
    sweeps = list(dict.fromkeys(keys))
    k_index = {k: i for i, k in enumerate(sweeps)}
    p = np.zeros((len(sweeps), freqs.size))
    seen = np.zeros_like(p, dtype=bool)
    n_seen = np.zeros(p.shape, dtype=np.int64)
    t = np.full(len(sweeps), np.nan)
    orient = [set() for _ in sweeps]
    u = np.zeros(freqs.size)
    flags = np.zeros(freqs.size, dtype=np.int64)
    fi = np.searchsorted(freqs, v["freq_hz"])
    for j, key in enumerate(keys):
        k = k_index[key]
        e = v["e_v_per_m"][j]
        if np.isfinite(e):
            p[k, fi[j]] += e * e
            seen[k, fi[j]] = True
            n_seen[k, fi[j]] += 1
        t[k] = v["t_utc"][j] if np.isnan(t[k]) else min(t[k], v["t_utc"][j])
        orient[k].add(int(v["orientation"][j]))
        u[fi[j]] = max(u[fi[j]], v["u_expanded_db"][j])
        flags[fi[j]] |= int(v["flags"][j])
    e_total = np.where(seen, np.sqrt(p), np.nan)
    return SpectrumSeries(session_id, cal["id"], cal["certificate_name"], freqs, t, e_total, u, flags,
                          np.array([len(o) for o in orient]), _warnings_of(cal), n_seen,
                          session_temperatures(store, session_id, _cal_certificate(cal)))


def certificate_for_session(store: Store, session_id: int):
    """The packaged certificate whose serial matches the session's probe, or None."""
    from meterlink.physics.certificate import packaged_certificates

    s = store.session(session_id)
    serial = (s.get("device_probe_serial") or "").strip()
    if not serial:
        return None
    for name in packaged_certificates():
        cert = load_certificate(name)
        if cert.serial == serial:
            return cert
    return None


def calibrated_series(store: Store, session_id: int, certificate=None, *, freq_hz=None, band=None,
                      near_field: bool = False):
    """A session's calibrated series: with `certificate` apply it anew; else reuse the latest
    calibration; else apply the packaged certificate matching the probe serial."""
    if certificate is not None:
        return apply_certificate(store, session_id, certificate, freq_hz=freq_hz, band=band, near_field=near_field)
    is_dipole = session_sensor_kind(store, session_id) == SensorKind.DIPOLE_RX
    if store.calibrations(session_id) and freq_hz is None and band is None and not near_field:
        return spectrum_series(store, session_id) if is_dipole else field_series(store, session_id)
    cert = certificate_for_session(store, session_id)
    if cert is None:
        raise MeterlinkError(f"session {session_id} has no calibration and no packaged certificate matches its "
                             f"probe: give --certificate FILE")
    return apply_certificate(store, session_id, cert, freq_hz=freq_hz, band=band, near_field=near_field)


def latest_session(store: Store, kinds: tuple[str, ...] | None = None) -> int:
    """Id of the newest session (of the given kinds); MeterlinkError if there is none."""
    rows = [s for s in store.sessions() if kinds is None or s["kind"] in kinds]
    if not rows:
        raise MeterlinkError(f"no sessions in {str(store.path)!r}")
    return int(rows[-1]["id"])
