"""Imperfection models of the simulated instruments: a diode-detector E-field probe and a dipole receiver.

Pure numpy. Parameters come from a scenario's [probe] and [receiver] tables; the calibration
helper "measures" these models in a simulated lab rather than copying the parameters.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np

_REF_TEMP_C = 23.0


def _triple(v, cast):
    t = tuple(cast(x) for x in v)
    if len(t) != 3:
        raise ValueError(f"expected three per-axis values, got {len(t)}")
    return t


@dataclass(frozen=True)
class ProbeModel:
    """A non-ideal three-axis diode-detector E-field probe; parameters come from a scenario's [probe] table."""

    ref_freq_hz: float
    counts_per_v2m2: float
    knee_v_per_m: tuple[float, float, float]
    offset_counts: tuple[int, int, int]
    noise_counts_rms: float
    full_scale_counts: int
    sensitivity_db: tuple[float, float, float]
    ripple_db: float
    ripple_period_decades: float
    ripple_phase_rad: tuple[float, float, float]
    slope_db_per_decade: float
    temp_coeff_db_per_c: float
    freq_range_hz: tuple[float, float]

    @classmethod
    def from_dict(cls, d: dict) -> "ProbeModel":
        """Build from a [probe] table; unknown keys are ignored (the table also holds serials)."""
        names = {f.name for f in fields(cls)}
        missing = names - set(d)
        if missing:
            raise ValueError(f"[probe] table lacks {', '.join(sorted(missing))}")
        return cls(
            ref_freq_hz=float(d["ref_freq_hz"]),
            counts_per_v2m2=float(d["counts_per_v2m2"]),
            knee_v_per_m=_triple(d["knee_v_per_m"], float),
            offset_counts=_triple(d["offset_counts"], int),
            noise_counts_rms=float(d["noise_counts_rms"]),
            full_scale_counts=int(d["full_scale_counts"]),
            sensitivity_db=_triple(d["sensitivity_db"], float),
            ripple_db=float(d["ripple_db"]),
            ripple_period_decades=float(d["ripple_period_decades"]),
            ripple_phase_rad=_triple(d["ripple_phase_rad"], float),
            slope_db_per_decade=float(d["slope_db_per_decade"]),
            temp_coeff_db_per_c=float(d["temp_coeff_db_per_c"]),
            freq_range_hz=(float(d["freq_range_hz"][0]), float(d["freq_range_hz"][1])),
        )


def axis_gain_db(model: ProbeModel, freq_hz, temp_c=23.0) -> np.ndarray:
    """Field-dB gain of each axis at freq_hz, shape (..., 3); the ripple term is zero at the reference frequency."""
    dec = np.log10(np.asarray(freq_hz, dtype=float) / model.ref_freq_hz)[..., None]
    phase = np.asarray(model.ripple_phase_rad)
    ripple = model.ripple_db * (np.sin(2 * np.pi * dec / model.ripple_period_decades + phase) - np.sin(phase))
    return (np.asarray(model.sensitivity_db) + ripple + model.slope_db_per_decade * dec
            + model.temp_coeff_db_per_c * (np.asarray(temp_c, dtype=float)[..., None] - _REF_TEMP_C))


def detector_counts_float(model: ProbeModel, e_axes_v_per_m, freq_hz, temp_c=23.0) -> np.ndarray:
    """Noise-free, unclipped detector output per axis (counts, float, shape (3,))."""
    e = np.asarray(e_axes_v_per_m, dtype=float).reshape(-1, 3)
    g = 10 ** (axis_gain_db(model, np.asarray(freq_hz, dtype=float).reshape(-1), temp_c) / 20)
    # incoherent sources: detected power adds
    e_eff = np.sqrt(np.sum((e * g) ** 2, axis=0))
    # square law at low level, tending to linear above the knee
    return np.asarray(model.offset_counts) + model.counts_per_v2m2 * e_eff**2 / (1 + e_eff / np.asarray(model.knee_v_per_m))


def probe_counts(model: ProbeModel, e_axes_v_per_m, freq_hz, temp_c=23.0, rng=None,
                 n_average: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """ADC counts (int64, (3,)) and overrange flags (bool, (3,)) for per-source per-axis RMS fields.

    n_average conversions averaged on the device shrink the noise by sqrt(n_average).
    """
    c = detector_counts_float(model, e_axes_v_per_m, freq_hz, temp_c)
    if rng is not None and model.noise_counts_rms > 0:
        c = c + rng.normal(0.0, model.noise_counts_rms / np.sqrt(max(1, int(n_average))), 3)
    fs = model.full_scale_counts
    over = np.abs(c) >= fs
    return np.clip(np.rint(c), -fs, fs).astype(np.int64), over


def _interp_logf(table, freq_hz) -> np.ndarray:
    """Linear interpolation in log10(frequency), held constant beyond the end points."""
    pts = sorted((float(f), float(v)) for f, v in table)
    fx = np.log10([p[0] for p in pts])
    vy = np.array([p[1] for p in pts])
    return np.interp(np.log10(np.asarray(freq_hz, dtype=float)), fx, vy)


@dataclass(frozen=True)
class ReceiverModel:
    """A dipole + cable + receiver chain that reports levels in dBuV at the receiver input."""

    antenna_gain_dbi: list[tuple[float, float]]
    cable_loss_db: list[tuple[float, float]]
    level_error_db: float
    noise_floor_dbuv: float
    noise_db_rms: float
    freq_range_hz: tuple[float, float]

    @classmethod
    def from_dict(cls, d: dict) -> "ReceiverModel":
        """Build from a [receiver] table; point lists are [[freq_hz, value], ...]."""
        try:
            return cls(
                antenna_gain_dbi=[(float(f), float(g)) for f, g in d["antenna_gain_dbi"]],
                cable_loss_db=[(float(f), float(v)) for f, v in d["cable_loss_db"]],
                level_error_db=float(d["level_error_db"]),
                noise_floor_dbuv=float(d["noise_floor_dbuv"]),
                noise_db_rms=float(d["noise_db_rms"]),
                freq_range_hz=(float(d["freq_range_hz"][0]), float(d["freq_range_hz"][1])),
            )
        except KeyError as exc:
            raise ValueError(f"[receiver] table lacks {exc.args[0]}") from None


def true_antenna_factor_db_per_m(model: ReceiverModel, freq_hz) -> np.ndarray:
    """AF from the antenna's gain into 50 ohm, AF = sqrt(4*pi*Z0/(R*G))/lambda (meterlink.physics.units), the
    exact form of the handbook 20 log10(f_MHz) - 29.77 - G(dBi)."""
    from meterlink.physics.units import antenna_factor_db_per_m

    return antenna_factor_db_per_m(_interp_logf(model.antenna_gain_dbi, freq_hz), freq_hz)


def true_cable_loss_db(model: ReceiverModel, freq_hz) -> np.ndarray:
    """Cable loss in dB at freq_hz, interpolated linearly in log-frequency."""
    return _interp_logf(model.cable_loss_db, freq_hz)


def receiver_levels_dbuv(model: ReceiverModel, e_along_dipole_v_per_m, freq_hz, rng=None) -> np.ndarray:
    """Receiver-input levels (dBuV) per source; NaN where below the noise floor."""
    e = np.asarray(e_along_dipole_v_per_m, dtype=float)
    with np.errstate(divide="ignore"):
        e_dbuv_m = 20 * np.log10(e * 1e6)
    v = e_dbuv_m - true_antenna_factor_db_per_m(model, freq_hz) - true_cable_loss_db(model, freq_hz) + model.level_error_db
    if rng is not None and model.noise_db_rms > 0:
        v = v + rng.normal(0.0, model.noise_db_rms, v.shape)
    return np.where(v >= model.noise_floor_dbuv, v, np.nan)
