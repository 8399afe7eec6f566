"""Analysis of lab readings: zero, linearity table and detector-law fit, calibration factors, isotropy (pure).

Type A evaluation (JCGM 100:2008 4.2.2-4.2.3): the experimental standard deviation of the mean
s(q_mean) = s(q_k) / sqrt(n), taken on the indicated field in dB.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares

from meterlink.physics.calibrate import calibrate_axes, linearise
from meterlink.physics.certificate import AxisCalibration
from meterlink.lab.session import AXES, LabError

#: A reading leaves the square-law region where it departs from the fitted square law by this much.
SQUARE_LAW_THRESHOLD_DB = 0.2


def type_a_db(fields_v_per_m) -> float:
    """Experimental standard deviation of the mean of repeated field readings, in field dB."""
    x = 20 * np.log10(np.asarray(fields_v_per_m, dtype=float))
    if x.size < 2:
        return 0.0
    return float(np.std(x, ddof=1) / math.sqrt(x.size))


def of(results, procedure, **match):
    """Results of one procedure whose step attributes equal `match`."""
    return [r for r in results if r.step.procedure == procedure
            and all(getattr(r.step, k) == v for k, v in match.items())]


def zero_counts(results) -> np.ndarray:
    """Mean counts per axis with no field applied."""
    z = of(results, "zero")
    if not z:
        raise LabError("no zero readings (field off) in the session")
    return np.mean(np.vstack([r.counts for r in z]), axis=0)


def axis_tables(results, zero, ref_freq_hz: float) -> list[AxisCalibration]:
    """Per axis, the linearisation table at the reference frequency (flat frequency response for now)."""
    out = []
    for i, a in enumerate(AXES):
        rs = sorted(of(results, "linearity", axis=a, role="table"), key=lambda r: r.step.e_ref_v_per_m)
        if len(rs) < 2:
            raise LabError(f"axis {a}: fewer than 2 linearity table levels")
        lv = tuple(float(r.step.e_ref_v_per_m) for r in rs)
        net = tuple(float(np.mean(r.counts[:, i]) - zero[i]) for r in rs)
        if any(b <= a_ for a_, b in zip(net, net[1:])) or net[0] <= 0:
            raise LabError(f"axis {a}: counts above zero do not rise with the level ({', '.join(f'{c:.0f}' for c in net)})")
        out.append(AxisCalibration(a, float(zero[i]), net, lv, (ref_freq_hz / 10, ref_freq_hz * 10), (0.0, 0.0)))
    return out


@dataclass(frozen=True)
class DetectorFit:
    """Fitted detector law c = a E^2 / (1 + E / E_knee) of one axis, and where square law ends."""

    axis: str
    a_counts_per_v2m2: float
    knee_v_per_m: float
    square_law_end_fit_v_per_m: float      # where the fit departs from a E^2 by the threshold
    square_law_end_measured_v_per_m: float  # first measured level departing by the threshold (inf: none)
    exponent: tuple[float, ...]             # local log-log slope d ln c / d ln E at each level
    residual_rms_db: float


def fit_detector(axis: str, levels, net_counts, threshold_db: float = SQUARE_LAW_THRESHOLD_DB) -> DetectorFit:
    """Least-squares fit in log counts of a square-law-to-linear transition (a common simple diode model)."""
    e, c = np.asarray(levels, float), np.asarray(net_counts, float)
    lc = np.log(c)

    def resid(p):
        return p[0] + 2 * np.log(e) - np.log1p(e / np.exp(p[1])) - lc

    a0 = float(np.log(np.mean(c[:3] / e[:3] ** 2)))
    sol = least_squares(resid, [a0, math.log(float(e[-1]))])
    a, knee = math.exp(sol.x[0]), math.exp(sol.x[1])
    end_fit = knee * (10 ** (threshold_db / 10) - 1)
    dev = 10 * np.log10(c / (math.exp(a0) * e**2))    # field dB of the square-law reading vs the level
    beyond = np.nonzero(np.abs(dev) > threshold_db)[0]
    end_meas = float(e[beyond[0]]) if beyond.size else float("inf")
    expo = np.gradient(lc, np.log(e))
    rms = float(np.sqrt(np.mean(resid(sol.x) ** 2)) * 10 / math.log(10))   # ln counts -> field dB
    return DetectorFit(axis, a, knee, end_fit, end_meas, tuple(float(x) for x in expo), rms)


@dataclass(frozen=True)
class Linearity:
    """Deviation of the linearised reading from the reference at the check levels of one axis."""

    axis: str
    levels_v_per_m: tuple[float, ...]
    deviation_db: tuple[float, ...]
    u_a_db: tuple[float, ...]
    fit: DetectorFit

    @property
    def max_abs_db(self) -> float:
        return max((abs(d) for d in self.deviation_db), default=0.0)


def linearity(results, tables) -> list[Linearity]:
    """Check levels linearised with the table built from the table levels; deviation 20 log10(E_ind/E_ref)."""
    out = []
    for i, ax in enumerate(tables):
        lv, dv, ua = [], [], []
        for r in sorted(of(results, "linearity", axis=ax.name, role="check"), key=lambda r: r.step.e_ref_v_per_m):
            e_ind = linearise(ax, r.counts[:, i])[0]
            lv.append(r.step.e_ref_v_per_m)
            dv.append(float(20 * np.log10(np.mean(e_ind) / r.step.e_ref_v_per_m)))
            ua.append(type_a_db(e_ind))
        fit = fit_detector(ax.name, ax.field, ax.counts_above_zero)
        out.append(Linearity(ax.name, tuple(lv), tuple(dv), tuple(ua), fit))
    return out


@dataclass(frozen=True)
class FrequencyResponse:
    """Calibration factors CF = E_reference / E_indicated per axis and for the total, linear and dB."""

    freq_hz: np.ndarray           # (m,)
    cf_axes: np.ndarray           # (m, 3) linear
    u_a_axes_db: np.ndarray       # (m, 3) Type A of each factor
    cf_total: np.ndarray          # (m,) linear; NaN where no total step was taken
    u_a_total_db: np.ndarray      # (m,)

    @property
    def cf_axes_db(self) -> np.ndarray:
        return 20 * np.log10(self.cf_axes)

    @property
    def cf_total_db(self) -> np.ndarray:
        return 20 * np.log10(self.cf_total)


def frequency_response(results, tables) -> FrequencyResponse:
    """CF(f) per axis (field along that sensor) and total (field along the handle), tables at the reference frequency."""
    freqs = sorted({r.step.freq_hz for r in of(results, "frequency")})
    if len(freqs) < 2:
        raise LabError("frequency response needs steps at 2 frequencies or more")
    m = len(freqs)
    cf, ua = np.full((m, 3), np.nan), np.full((m, 3), np.nan)
    cft, uat = np.full(m, np.nan), np.full(m, np.nan)
    for j, f in enumerate(freqs):
        for i, ax in enumerate(tables):
            rs = of(results, "frequency", freq_hz=f, axis=ax.name)
            if not rs:
                raise LabError(f"frequency {f:g} Hz: no step with the field along axis {ax.name}")
            e_ind = linearise(ax, rs[0].counts[:, i])[0]
            if not np.all(np.isfinite(e_ind)) or np.any(e_ind <= 0):
                raise LabError(f"frequency {f:g} Hz, axis {ax.name}: reading outside the linearity table")
            cf[j, i] = rs[0].step.e_ref_v_per_m / float(np.mean(e_ind))
            ua[j, i] = type_a_db(e_ind)
        tot = of(results, "frequency", freq_hz=f, axis="")
        if tot:
            e = np.sqrt(sum(linearise(ax, tot[0].counts[:, i])[0] ** 2 for i, ax in enumerate(tables)))
            cft[j] = tot[0].step.e_ref_v_per_m / float(np.mean(e))
            uat[j] = type_a_db(e)
    return FrequencyResponse(np.array(freqs), cf, ua, cft, uat)


@dataclass(frozen=True)
class Isotropy:
    """Indicated total field over a rotation about the handle, in both conventions (labelled)."""

    freq_hz: float
    tilt_deg: float
    angles_deg: np.ndarray
    e_v_per_m: np.ndarray
    u_a_db: float

    @property
    def deviation_db(self) -> np.ndarray:
        """20 log10(E / mean E) at each angle."""
        return 20 * np.log10(self.e_v_per_m / np.mean(self.e_v_per_m))

    @property
    def plus_minus_db(self) -> float:
        """Convention 1: +/- dB about the mean (largest deviation from the mean)."""
        return float(np.max(np.abs(self.deviation_db)))

    @property
    def max_min_db(self) -> float:
        """Convention 2: max/min ratio in dB, 20 log10(E_max / E_min)."""
        return float(20 * np.log10(np.max(self.e_v_per_m) / np.min(self.e_v_per_m)))


def isotropy(results, cert) -> list[Isotropy]:
    """Isotropy per (frequency, tilt), readings calibrated with `cert` (the new certificate)."""
    groups = sorted({(r.step.freq_hz, r.step.tilt_deg) for r in of(results, "isotropy")})
    out = []
    for f, t in groups:
        rs = sorted(of(results, "isotropy", freq_hz=f, tilt_deg=t), key=lambda r: r.step.rotator_deg)
        if len(rs) < 3:
            raise LabError(f"isotropy at {f:g} Hz, tilt {t:g} deg: fewer than 3 rotator angles")
        e, ua = [], []
        for r in rs:
            res = calibrate_axes(cert, r.counts, f, today=cert.cal_date)
            e.append(float(np.mean(res.e_v_per_m)))
            ua.append(type_a_db(res.e_v_per_m))
        out.append(Isotropy(f, t, np.array([r.step.rotator_deg for r in rs]), np.array(e), float(max(ua))))
    return out


@dataclass(frozen=True)
class TemperatureResponse:
    """Indicated field against chamber temperature at one frequency and level, and the fitted slope."""

    freq_hz: float
    temp_c: np.ndarray
    change_db: np.ndarray         # 20 log10(indicated / reference field), uncorrected for temperature
    u_a_db: np.ndarray
    coeff_db_per_c: float         # d(change_db)/dT: the certificate's temperature coefficient
    u_coeff_db_per_c: float       # standard uncertainty of the slope

    def fitted_db(self, temp_c) -> np.ndarray:
        """The straight line through the points (ordinary least squares)."""
        t = np.asarray(temp_c, dtype=float)
        return float(np.mean(self.change_db)) + self.coeff_db_per_c * (t - float(np.mean(self.temp_c)))


def temperature_response(results, cert, chamber_halfwidth_c: float = 0.5) -> TemperatureResponse | None:
    """Slope of the indicated field (field dB) against chamber temperature; None without such steps.

    Readings are calibrated with `cert` but not corrected for temperature. Ordinary least squares
    of change_db on temp_c; u(slope) is the larger of the residual standard error (three or more
    temperatures) and the Type A scatter carried through the fit, combined with the chamber's
    setting uncertainty (rectangular half-width, degC) acting across the span.
    """
    rs = sorted(of(results, "temperature"), key=lambda r: r.step.temp_c)
    if not rs:
        return None
    freqs = {r.step.freq_hz for r in rs}
    if len(freqs) > 1:
        raise LabError("temperature steps at more than one frequency: keep one (the reference frequency)")
    t, y, ua = [], [], []
    for r in rs:
        if not math.isfinite(r.step.temp_c):
            raise LabError("a temperature step without its chamber temperature (temp_c)")
        res = calibrate_axes(cert, r.counts, r.step.freq_hz, today=cert.cal_date)
        t.append(float(r.step.temp_c))
        y.append(float(20 * np.log10(np.mean(res.e_v_per_m) / r.step.e_ref_v_per_m)))
        ua.append(type_a_db(res.e_v_per_m))
    t, y, ua = np.array(t), np.array(y), np.array(ua)
    if np.ptp(t) < 5.0:
        raise LabError(f"temperature steps span {np.ptp(t):.1f} degC: at least 5 degC is needed for a slope")
    dt = t - t.mean()
    sxx = float(dt @ dt)
    b = float(dt @ (y - y.mean()) / sxx)
    u_scatter = float(math.sqrt(np.sum((dt * ua) ** 2)) / sxx)
    if t.size > 2:
        resid = y - (y.mean() + b * dt)
        u_scatter = max(u_scatter, float(math.sqrt(resid @ resid / (t.size - 2) / sxx)))
    u_chamber = abs(b) * math.sqrt(2.0) * (chamber_halfwidth_c / math.sqrt(3.0)) / float(np.ptp(t))
    return TemperatureResponse(float(next(iter(freqs))), t, y, ua, b, math.hypot(u_scatter, u_chamber))
