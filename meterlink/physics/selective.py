"""Frequency-selective measurement with a spectrum analyser and a calibrated antenna (pure).

Channel power: with an rms detector each trace point shows the power passed by the resolution filter,
i.e. the signal's power density times the filter's noise bandwidth B_n (a noise-like signal), or a
CW carrier weighted by the filter's power response. Summing the points over a band and multiplying by
(point spacing / B_n) gives the power in the band for both: sum_i P_i * df / B_n -> integral of the
displayed power / B_n = total power, because B_n is by definition the integral of the filter's power
response normalised to its peak. The peak bin alone would understate a wideband signal by B_signal/B_n.

Field from power: an analyser input of P into R (50 ohm) is a voltage V = sqrt(P R); the field is
E = V * AF * cable-loss factor (AF in 1/m, loss as a field ratio). Three orthogonal orientations of a
single-axis antenna add in power: E = sqrt(Ex^2 + Ey^2 + Ez^2).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from meterlink.errors import MeterlinkError
from meterlink.physics.uncertainty import Budget, Component, measurement_budget
from meterlink.physics.units import R_50_OHM

#: Noise bandwidth / 3 dB bandwidth of a Gaussian filter: integral of exp(-4 ln2 x^2) dx = sqrt(pi/(4 ln2)).
GAUSSIAN_NBW_FACTOR = math.sqrt(math.pi / (4.0 * math.log(2.0)))
#: Points each side of an emitter's occupied band taken into the sum, in RBWs: the Gaussian power
#: response is down to exp(-4 ln2 * 4) = 1.5e-5 (-48 dB) two RBWs off.
EDGE_RBW = 2.0


class SelectiveError(MeterlinkError):
    """A trace or band that cannot give a channel power (too few points, band outside the sweep)."""


def integration_window_hz(center_hz: float, bandwidth_hz: float, rbw_hz: float) -> tuple[float, float]:
    """The span summed for one emitter: its occupied band plus EDGE_RBW resolution bandwidths each side."""
    half = bandwidth_hz / 2.0 + EDGE_RBW * rbw_hz
    return center_hz - half, center_hz + half


def channel_power_w(freq_hz, level_dbm, rbw_hz: float, lo_hz: float, hi_hz: float,
                    nbw_factor: float = GAUSSIAN_NBW_FACTOR) -> float:
    """Power (W) in [lo_hz, hi_hz] from an rms-detector trace: sum(P_i) * spacing / (nbw_factor * RBW)."""
    f = np.asarray(freq_hz, dtype=float)
    lv = np.asarray(level_dbm, dtype=float)
    if f.ndim != 1 or f.shape != lv.shape or f.size < 2:
        raise SelectiveError("a trace needs matching frequency and level arrays of at least 2 points")
    if not (rbw_hz > 0 and nbw_factor > 0):
        raise SelectiveError(f"RBW {rbw_hz:g} Hz: must be positive")
    df = (f[-1] - f[0]) / (f.size - 1)
    if lo_hz < f[0] - df / 2 or hi_hz > f[-1] + df / 2:
        raise SelectiveError(f"band {lo_hz:g}-{hi_hz:g} Hz is not inside the sweep {f[0]:g}-{f[-1]:g} Hz")
    if df > rbw_hz:
        raise SelectiveError(f"point spacing {df:g} Hz is wider than the RBW {rbw_hz:g} Hz: "
                             "a carrier could fall between points; use more points or a wider RBW")
    sel = (f >= lo_hz) & (f <= hi_hz)
    p_w = 1e-3 * 10.0 ** (lv[sel] / 10.0)
    return float(np.sum(p_w) * df / (nbw_factor * rbw_hz))


def channel_powers_w(freq_hz, level_dbm, rbw_hz: float, windows_hz,
                     nbw_factor: float = GAUSSIAN_NBW_FACTOR) -> np.ndarray:
    """channel_power_w for many bands of one wide sweep: one conversion to W and one cumulative sum,
    then each band is two binary searches (a 100,001-point sweep with any number of bands)."""
    f = np.asarray(freq_hz, dtype=float)
    lv = np.asarray(level_dbm, dtype=float)
    w = np.asarray(windows_hz, dtype=float).reshape(-1, 2)
    if f.ndim != 1 or f.shape != lv.shape or f.size < 2:
        raise SelectiveError("a trace needs matching frequency and level arrays of at least 2 points")
    df = (f[-1] - f[0]) / (f.size - 1)
    if df > rbw_hz:
        raise SelectiveError(f"point spacing {df:g} Hz is wider than the RBW {rbw_hz:g} Hz")
    if np.any(w[:, 0] < f[0] - df / 2) or np.any(w[:, 1] > f[-1] + df / 2):
        raise SelectiveError(f"a band is not inside the sweep {f[0]:g}-{f[-1]:g} Hz")
    c = np.concatenate(([0.0], np.cumsum(np.power(10.0, lv / 10.0) * 1e-3)))
    lo = np.searchsorted(f, w[:, 0], side="left")
    hi = np.searchsorted(f, w[:, 1], side="right")
    return (c[hi] - c[lo]) * df / (nbw_factor * rbw_hz)


def e_from_input_power_v_per_m(p_w, af_db_per_m, cable_loss_db, r_ohm: float = R_50_OHM):
    """Field (V/m) giving input power p_w through an antenna of factor AF and a cable of loss L:
    E = sqrt(P R) * 10^(AF/20) * 10^(L/20)."""
    p = np.asarray(p_w, dtype=float)
    return np.sqrt(p * r_ohm) * 10.0 ** ((np.asarray(af_db_per_m) + np.asarray(cable_loss_db)) / 20.0)


def combine_orientations(e_axes_v_per_m) -> np.ndarray:
    """Total field from three orthogonal single-axis readings (last axis): root-sum-square."""
    e = np.asarray(e_axes_v_per_m, dtype=float)
    return np.sqrt(np.sum(e * e, axis=-1))


@dataclass(frozen=True)
class ChainSpec:
    """Figures of the analyser chain that the antenna certificate does not hold (dB, as stated by the maker).

    The defaults are typical swept-analyser figures, an assumption to be replaced by the datasheet's."""

    analyser_level_db: float = 0.5          # absolute level accuracy, half-width (rectangular)
    rbw_detector_db: float = 0.2            # RBW noise-bandwidth and rms-detector error, half-width (rectangular)
    repeatability_db: float = 0.0           # measured scatter (normal, k=1), if known


def selective_budget(cert, freq_hz: float, chain: ChainSpec = ChainSpec(), k: float = 2.0) -> Budget:
    """GUM budget of one band: the antenna certificate's antenna factor, cable and mismatch (its receiver
    level term is replaced by the analyser's level accuracy), interpolation, and the RBW/detector term."""
    extra = [Component("analyser level accuracy", chain.analyser_level_db, "dB", "rectangular"),
             Component("RBW noise bandwidth and detector", chain.rbw_detector_db, "dB", "rectangular")]
    if chain.repeatability_db > 0:
        extra.append(Component("repeatability", chain.repeatability_db, "dB", "normal", 1.0))
    own = tuple(c for c in cert.uncertainties if c.name != "receiver_level")
    return measurement_budget(dataclasses.replace(cert, uncertainties=own), freq_hz, k=k, extra=extra)
