"""A probe's frequency response from its certificate: the correction at a frequency, its spread over a band.

Shared by calibrate (the correction applied) and uncertainty (the band spread as a rectangular
term), so that neither imports the other: the physics core stays a tree.
"""

from __future__ import annotations

import numpy as np

# ax is a certificate.AxisCalibration, cert a certificate.ProbeCertificate; not imported even for typing,
# since certificate imports uncertainty, which imports this module.


def _corr_at(ax, freq_hz) -> np.ndarray:
    """Frequency correction (dB), linear in log-frequency, clamped to the table ends."""
    # clip first: the same clamped result, and no log of zero or of a negative (absurd) frequency
    f = np.clip(np.asarray(freq_hz, dtype=float), ax.freq_hz[0], ax.freq_hz[-1])
    return np.interp(np.log10(f), np.log10(ax.freq_hz), ax.correction_db)


def _band_grid(cert, band) -> np.ndarray:
    lo, hi = max(band[0], cert.freq_range_hz[0]), min(band[1], cert.freq_range_hz[1])
    pts = [f for ax in cert.axes for f in ax.freq_hz if lo <= f <= hi]
    return np.unique(np.concatenate([np.geomspace(lo, hi, 64), pts]))


def band_correction_spread_db(cert, band) -> float:
    """Largest over axes of (max - min) correction across the band: the rectangular half-width used."""
    grid = _band_grid(cert, band)
    return float(max(np.ptp(_corr_at(ax, grid)) for ax in cert.axes))
