"""Raw detector readings -> calibrated field strength, vectorised and pure.

Out-of-range choices (documented in docs/calibration-format.md):
- frequency outside the certificate: the correction is clamped to the table edge, FREQ_OUT flagged;
- level above an axis table: NaN and ABOVE_RANGE (clamping would understate exposure);
- counts at or below the zero: 0 V/m on that axis, BELOW_RANGE on the axis;
- between the zero and the lowest table point: the lowest calibrated field (an upper bound), BELOW_RANGE;
- broadband probe, frequency unknown (None) or a band (lo, hi): per axis the largest correction in
  the band (the largest reading), FREQ_ASSUMED flagged, the band spread added to the uncertainty.
"""

from __future__ import annotations

import datetime as _dt
import functools
from dataclasses import dataclass

import numpy as np

from meterlink.physics import units
from meterlink.physics.certificate import FORMAT, KIND_PROBE, AxisCalibration, ProbeCertificate
from meterlink.physics.interp import MonotoneCubic
from meterlink.physics.response import _band_grid, _corr_at, band_correction_spread_db  # noqa: F401 (re-exported)
from meterlink.physics.uncertainty import Component, measurement_budget

BELOW_RANGE = 1 << 0
ABOVE_RANGE = 1 << 1
FREQ_OUT = 1 << 2
FREQ_ASSUMED = 1 << 3
EXPIRED = 1 << 4
NEAR_FIELD = 1 << 5
FLAG_NAMES = {BELOW_RANGE: "below range", ABOVE_RANGE: "above range", FREQ_OUT: "frequency out of range",
              FREQ_ASSUMED: "frequency assumed (worst case)", EXPIRED: "certificate expired",
              NEAR_FIELD: "near field: no plane-wave H/S"}


def flag_names(flags: int) -> list[str]:
    """Human names of the bits set in a flags value."""
    return [name for bit, name in FLAG_NAMES.items() if int(flags) & bit]


@dataclass(frozen=True)
class AxisResult:
    """Calibrated isotropic-probe readings: per-axis and total field, H and S, U and flags."""

    axes_v_per_m: np.ndarray     # (N, 3); plane-wave equivalent (NaN in the near field) for an H probe
    e_v_per_m: np.ndarray        # (N,)
    h_a_per_m: np.ndarray        # (N,) plane-wave equivalent; NaN in the near field
    s_w_per_m2: np.ndarray       # (N,) plane-wave equivalent; NaN in the near field
    u_expanded_db: np.ndarray    # (N,) k = 2
    flags: np.ndarray            # (N,) bitmask
    axis_flags: np.ndarray       # (N, 3) bitmask
    warnings: tuple[str, ...]


@dataclass(frozen=True)
class SpectrumResult:
    """Calibrated dipole spectrum (one orientation, or several combined in power)."""

    orientation: str
    freq_hz: np.ndarray
    e_dbuv_per_m: np.ndarray
    e_v_per_m: np.ndarray
    h_a_per_m: np.ndarray
    s_w_per_m2: np.ndarray
    u_expanded_db: np.ndarray
    flags: np.ndarray
    warnings: tuple[str, ...]


@functools.lru_cache(maxsize=64)  # AxisCalibration is frozen and made of tuples, so hashable
def _lin(ax: AxisCalibration) -> MonotoneCubic:
    """Monotone log-log interpolant (PCHIP): log(counts above zero) -> log(field at the reference frequency)."""
    return MonotoneCubic(np.log(ax.counts_above_zero), np.log(ax.field))


def linearise(ax: AxisCalibration, counts) -> tuple[np.ndarray, np.ndarray]:
    """Counts -> field at the reference frequency for one axis, with per-reading flags."""
    net = np.asarray(counts, dtype=float) - ax.zero_counts
    out = np.zeros(net.shape)
    flags = np.zeros(net.shape, dtype=np.int64)
    c0, c1 = ax.counts_above_zero[0], ax.counts_above_zero[-1]
    inside = (net >= c0) & (net <= c1)
    if inside.all():  # the usual case: no masked copies
        return np.exp(_lin(ax)(np.log(net))), flags
    out[inside] = np.exp(_lin(ax)(np.log(net[inside])))
    low = net < c0
    # the value at the table's first point, by the same log/exp path as inside it: field[0] itself
    # can differ from exp(log(field[0])) in the last bit, which would make the curve step down there
    out[low & (net > 0)] = np.exp(_lin(ax)(np.log(c0)))
    flags[low] |= BELOW_RANGE
    out[net > c1] = np.nan
    flags[net > c1] |= ABOVE_RANGE
    return out, flags


def expected_counts(ax: AxisCalibration, field) -> np.ndarray:
    """Inverse of linearise inside the table: field at the reference frequency -> raw counts (float)."""
    f = np.asarray(field, dtype=float)
    if np.any((f < ax.field[0]) | (f > ax.field[-1])):
        raise ValueError("field outside the axis table; no inverse there")
    lin = _lin(ax)
    lo = np.full(f.shape, np.log(ax.counts_above_zero[0]))
    hi = np.full(f.shape, np.log(ax.counts_above_zero[-1]))
    target = np.log(f)
    for _ in range(80):          # bisection on a monotone interpolant: exact to double precision
        mid = 0.5 * (lo + hi)
        below = lin(mid) < target
        lo, hi = np.where(below, mid, lo), np.where(below, hi, mid)
    return np.exp(0.5 * (lo + hi)) + ax.zero_counts


def frequency_correction_db(cert: ProbeCertificate, freq_hz) -> tuple[np.ndarray, int]:
    """Per-axis correction (3,) and flags for a declared frequency, a (lo, hi) band or None."""
    lo, hi = cert.freq_range_hz
    if freq_hz is None or np.ndim(freq_hz) == 1:
        band = cert.freq_range_hz if freq_hz is None else (float(freq_hz[0]), float(freq_hz[1]))
        if band[1] < band[0]:
            raise ValueError(f"frequency band {band[0]:g}..{band[1]:g} Hz has low > high")
        flags = FREQ_ASSUMED | (FREQ_OUT if band[0] < lo or band[1] > hi else 0)
        grid = _band_grid(cert, band) if band[1] >= lo and band[0] <= hi else np.array([np.clip(band[0], lo, hi)])
        return np.array([_corr_at(ax, grid).max() for ax in cert.axes]), flags
    f = float(freq_hz)
    flags = FREQ_OUT if (f < lo * (1 - 1e-12) or f > hi * (1 + 1e-12)) else 0
    return np.array([float(_corr_at(ax, f)) for ax in cert.axes]), flags


def _expiry(cert, today):
    from meterlink.physics.certificate import certificate_status
    on = today or _dt.date.today()
    return tuple(certificate_status(cert, on)), (EXPIRED if cert.due_date and on > cert.due_date else 0)


def calibrate_axes(cert: ProbeCertificate, counts, freq_hz, temp_c=None, near_field=False,
                   today: _dt.date | None = None) -> AxisResult:
    """Calibrate N three-axis readings (counts shape (N, 3)) of an isotropic probe."""
    c = np.atleast_2d(np.asarray(counts))
    if c.ndim != 2 or c.shape[1] != 3:
        raise ValueError(f"counts must have shape (N, 3), got {np.shape(counts)}")
    n = c.shape[0]
    warnings, exp_flag = _expiry(cert, today)
    key = _freq_key(freq_hz)
    corr, fflags = _freq_correction_cached(cert, key) if key is not _UNCACHED else frequency_correction_db(cert, freq_hz)
    corr = np.array(corr)
    if temp_c is not None:      # the indicated field drifts by coeff dB/degC about the reference temperature
        corr = corr - cert.temp_coeff_db_per_c * (float(temp_c) - cert.temp_ref_c)
    axes = np.empty((n, 3))
    axis_flags = np.empty((n, 3), dtype=np.int64)
    for i, ax in enumerate(cert.axes):
        axes[:, i], axis_flags[:, i] = linearise(ax, c[:, i])
    axes *= 10.0 ** (corr / 20.0)
    total = np.sqrt(np.einsum("ij,ij->i", axes, axes))  # sqrt(x² + y² + z²) per reading
    flags = np.full(n, fflags | exp_flag, dtype=np.int64)
    fx, fy, fz = axis_flags.T  # column by column: numpy reductions along a length-3 axis are slow
    flags |= (fx | fy | fz) & ABOVE_RANGE
    lo, hi = cert.level_range
    flags[(total < lo) | ((fx & fy & fz & BELOW_RANGE) != 0)] |= BELOW_RANGE  # all clamped: only a bound
    flags[total > hi] |= ABOVE_RANGE
    if cert.quantity == "H":
        h, e = total, units.h_to_e(total)
        axes = axes * units.Z0_OHM
    else:
        e, h = total, units.e_to_h(total)
    s = units.e_to_s(e)
    nf = np.broadcast_to(np.asarray(near_field, dtype=bool), (n,))
    if nf.any():
        if cert.quantity == "H":     # E of an H probe is only a plane-wave equivalent
            e = np.where(nf, np.nan, e)
            axes = np.where(nf[:, None], np.nan, axes)
        else:
            h = np.where(nf, np.nan, h)
        s = np.where(nf, np.nan, s)
        flags[nf] |= NEAR_FIELD
    t_key = None if temp_c is None else float(temp_c)
    u = (_u_expanded_cached(cert, key, t_key) if key is not _UNCACHED
         else measurement_budget(cert, freq_hz, None, temp_c).u_expanded_db)
    return AxisResult(axes, e, h, s, np.full(n, u), flags, axis_flags, warnings)


# A monitor calibrates one reading at a time with the same certificate and declared frequency:
# the per-axis frequency correction and the budget depend on nothing else, so they are kept.
_UNCACHED = object()


def _freq_key(freq_hz):
    """A hashable form of a declared frequency (number, (lo, hi) band or None), else _UNCACHED."""
    if freq_hz is None:
        return None
    if np.ndim(freq_hz) == 0:
        return float(freq_hz)
    if np.ndim(freq_hz) == 1 and len(freq_hz) == 2:
        return (float(freq_hz[0]), float(freq_hz[1]))
    return _UNCACHED


@functools.lru_cache(maxsize=256)
def _freq_correction_cached(cert, key) -> tuple[tuple[float, ...], int]:
    corr, flags = frequency_correction_db(cert, key)
    return tuple(float(c) for c in corr), flags


@functools.lru_cache(maxsize=256)
def _u_expanded_cached(cert, key, temp_c) -> float:
    return measurement_budget(cert, key, None, temp_c).u_expanded_db


def af_db_per_m(cert, freq_hz) -> np.ndarray:
    """Antenna factor (dB/m), linear in log-frequency, clamped to the table ends."""
    return np.interp(np.log10(freq_hz), np.log10(cert.af_freq_hz), cert.af_db_per_m)


def cable_loss_db(cert, freq_hz) -> np.ndarray:
    """Cable loss (dB), linear in log-frequency, clamped to the table ends."""
    return np.interp(np.log10(freq_hz), np.log10(cert.cable_freq_hz), cert.cable_loss_db)


def calibrate_spectrum(cert, freq_hz, level_dbuv, orientation: str = "x", near_field=False,
                       today: _dt.date | None = None) -> SpectrumResult:
    """E(dBuV/m) = V(dBuV) + AF(dB/m) + cable loss(dB) + receiver level correction, per frequency."""
    f = np.atleast_1d(np.asarray(freq_hz, dtype=float))
    v = np.broadcast_to(np.asarray(level_dbuv, dtype=float), f.shape)
    warnings, exp_flag = _expiry(cert, today)
    e_db = v + af_db_per_m(cert, f) + cable_loss_db(cert, f) + cert.receiver_level_correction_db
    flags = np.full(f.shape, exp_flag, dtype=np.int64)
    lo, hi = cert.freq_range_hz
    flags[(f < lo * (1 - 1e-12)) | (f > hi * (1 + 1e-12))] |= FREQ_OUT
    vlo, vhi = cert.level_range_dbuv
    flags[~(v >= vlo)] |= BELOW_RANGE         # NaN (below the receiver's floor) counts as below range
    flags[v > vhi] |= ABOVE_RANGE
    e_db = np.where(v > vhi, np.nan, e_db)
    u = np.array([measurement_budget(cert, float(fi)).u_expanded_db for fi in f])
    return _spectrum(orientation, f, e_db, u, flags, warnings, near_field)


def floor_e_v_per_m(cert, freq_hz) -> np.ndarray:
    """Field (V/m) at the receiver's lowest calibrated level, one orientation: what a line reported
    as below the floor is at most (an upper bound, not zero)."""
    f = np.atleast_1d(np.asarray(freq_hz, dtype=float))
    return calibrate_spectrum(cert, f, np.full(f.shape, cert.level_range_dbuv[0])).e_v_per_m


def _spectrum(orientation, f, e_db, u, flags, warnings, near_field) -> SpectrumResult:
    e = units.dbuv_per_m_to_v_per_m(e_db)
    nf = np.broadcast_to(np.asarray(near_field, dtype=bool), f.shape)
    flags = flags | np.where(nf, NEAR_FIELD, 0)
    h = np.where(nf, np.nan, units.e_to_h(e))
    s = np.where(nf, np.nan, units.e_to_s(e))
    return SpectrumResult(orientation, f, e_db, e, h, s, u, flags, warnings)


def combine_orientations(results) -> SpectrumResult:
    """Power sum of orientation spectra on the same frequencies: E^2 = Ex^2 + Ey^2 + Ez^2.

    A NaN level (below the receiver floor) contributes nothing but keeps its BELOW_RANGE flag; U is
    the largest of the orientations' (common practice, the components being nearly equal).
    """
    results = list(results)
    f = results[0].freq_hz
    if any(r.freq_hz.shape != f.shape or not np.allclose(r.freq_hz, f) for r in results):
        raise ValueError("orientation spectra must share their frequencies")
    p = sum(np.nan_to_num(r.e_v_per_m, nan=0.0) ** 2 for r in results)
    above = np.bitwise_or.reduce([r.flags & ABOVE_RANGE for r in results], axis=0).astype(bool)
    e_db = np.where(above | (p <= 0), np.nan, units.v_per_m_to_dbuv_per_m(np.sqrt(np.where(p > 0, p, 1.0))))
    flags = np.bitwise_or.reduce([r.flags for r in results], axis=0)
    u = np.max([r.u_expanded_db for r in results], axis=0)
    warnings = tuple(dict.fromkeys(w for r in results for w in r.warnings))
    nf = np.bitwise_or.reduce([r.flags & NEAR_FIELD for r in results], axis=0).astype(bool)
    return _spectrum("".join(r.orientation for r in results), f, e_db, u, flags, warnings, nf)


def identity_certificate(ref_freq_hz: float = 1e9, counts_per_v2m2: float = 1000.0,
                         freq_range_hz=(1e8, 6e9), level_range_v_per_m=(0.1, 300.0)) -> ProbeCertificate:
    """No correction at all: nominal square law counts = k*E^2, zero offset 0, flat response, isotropy 0."""
    fld = tuple(float(x) for x in np.geomspace(level_range_v_per_m[0], level_range_v_per_m[1], 8))
    cnt = tuple(counts_per_v2m2 * x * x for x in fld)
    fq = (float(freq_range_hz[0]), float(freq_range_hz[1]))
    ax = [AxisCalibration(a, 0.0, cnt, fld, fq, (0.0, 0.0)) for a in "xyz"]
    zero_u = tuple(Component(n, 0.0, "dB", "normal", 2.0)
                   for n in ("reference_field", "linearity", "frequency_response"))
    return ProbeCertificate("nominal", "none", "none", "identity", _dt.date(2000, 1, 1), _dt.date(9999, 1, 1),
                            "E", float(ref_freq_hz), fq, tuple(map(float, level_range_v_per_m)), 23.0, 0.0, 0.0,
                            0.0, tuple(ax), zero_u, FORMAT, KIND_PROBE)


__all__ = ["AxisResult", "SpectrumResult", "calibrate_axes", "calibrate_spectrum", "combine_orientations",
           "identity_certificate", "linearise", "floor_e_v_per_m", "expected_counts", "frequency_correction_db", "flag_names"]
