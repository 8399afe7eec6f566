"""Per-band values of a frequency-selective (dipole + receiver) meter, one per complete sweep (pure).

A sweep is three orientation spectra (x, y, z) of the same (boot, sweep) number. Each is
calibrated with the dipole certificate (:func:`meterlink.physics.calibrate.calibrate_spectrum`), the
three are summed in power (:func:`meterlink.physics.calibrate.combine_orientations`), and each band's
field is the power sum of the lines inside it: E_band^2 = sum of E_i^2 over lines lo <= f_i <= hi.
A line an orientation reports below the receiver's floor (or does not report) is not 0 V/m: it is
"< floor" and counted at the floor, so the band value is an upper bound there (``band_below``).
The total exposure ratio follows the standard's summation rule (:func:`meterlink.physics.exposure.multi_frequency`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from meterlink.physics.calibrate import calibrate_spectrum, combine_orientations
from meterlink.errors import MeterlinkError
from meterlink.physics.exposure import multi_frequency

RATIO_BAND = "exposure_ratio"     # pseudo-band of the derived series holding sqrt(total exposure ratio)


@dataclass(frozen=True)
class SweepValue:
    """One complete sweep: total and per-band RMS field (V/m), overrange marks, exposure ratio, U."""

    t_utc: float
    total_v_per_m: float                       # power sum of every line (below-floor lines at the floor)
    band_v_per_m: dict                         # band name -> E (V/m)
    band_over: dict                            # band name -> True if a line in it was above the receiver range
    over: bool                                 # any line above range: values are lower bounds
    exposure_ratio: float | None               # governing sum of the rule; None where it cannot be evaluated
    u_expanded_db: float                       # largest line U (k = 2)
    n_lines: int                               # lines above the floor in at least one orientation
    band_below: dict | None = None             # band name -> True if a line in it was counted at the floor


class SweepAssembler:
    """Collect orientation spectra and return a :class:`SweepValue` when a sweep is complete."""

    def __init__(self, cert, bands=(), standard: str | None = None, tier: str | None = None):
        self.cert, self.bands = cert, tuple(bands)
        self.standard, self.tier = standard, tier
        self.ratio_error: str | None = None    # why the exposure ratio is not evaluated (first failure)
        self._acc: dict = {}

    def add(self, boot: int, sweep: int, orientation: int, t_utc: float, freq_hz, level_dbuv) -> SweepValue | None:
        """Add one orientation spectrum; the z spectrum completes a sweep whose x and y were seen."""
        if not 0 <= orientation <= 2:
            return None
        key = (boot, sweep)
        acc = self._acc.setdefault(key, {})
        acc[orientation] = (np.asarray(freq_hz, dtype=float), np.asarray(level_dbuv, dtype=float))
        if orientation != 2:
            return None
        self._acc.clear()                      # an older sweep missing an orientation is dropped
        if len(acc) < 3:
            return None
        return self.combine(t_utc, [acc[o] for o in range(3)])

    def combine(self, t_utc: float, spectra) -> SweepValue:
        """Calibrate the three orientation spectra (freq_hz, level_dbuv) and reduce them to band values."""
        f = np.unique(np.concatenate([s[0] for s in spectra]))
        vlo, vhi = self.cert.level_range_dbuv
        results, over_line = [], np.zeros(f.size, dtype=bool)
        below_line, seen = np.zeros(f.size, dtype=bool), np.zeros(f.size, dtype=bool)
        for o, (fo, lo) in enumerate(spectra):
            lv = np.full(f.size, np.nan)       # a line this orientation did not report: below its floor
            lv[np.searchsorted(f, fo)] = lo
            over = lv > vhi
            over_line |= over
            below = ~(lv >= vlo) & ~over        # NaN or under the lowest calibrated level
            below_line |= below
            seen |= ~below
            # above the receiver's range the value is a lower bound: calibrate at the top of the range;
            # below its floor an upper bound: calibrate at the floor
            results.append(calibrate_spectrum(self.cert, f, np.where(over, vhi, np.where(below, vlo, lv)), "xyz"[o]))
        comb = combine_orientations(results)
        e = comb.e_v_per_m
        p = np.where(np.isfinite(e), e, 0.0) ** 2
        bands, band_over, band_below = {}, {}, {}
        for name, lo_hz, hi_hz in self.bands:
            m = (f >= lo_hz) & (f <= hi_hz)
            bands[name] = math.sqrt(float(p[m].sum()))
            band_over[name] = bool(over_line[m].any())
            band_below[name] = bool(below_line[m].any())
        ok = np.isfinite(e) & (e > 0)
        u = float(np.max(comb.u_expanded_db[ok])) if ok.any() else math.nan
        return SweepValue(t_utc, math.sqrt(float(p.sum())), bands, band_over, bool(over_line.any()),
                          self._ratio(f[ok], e[ok]), u, int(seen.sum()), band_below)

    def _ratio(self, f, e) -> float | None:
        if self.standard is None or self.ratio_error is not None:
            return None
        if f.size == 0:
            return 0.0
        try:
            r = multi_frequency(f, standard=self.standard, tier=self.tier, e_v_per_m=e)
        except MeterlinkError as exc:
            self.ratio_error = str(exc)
            return None
        # a line outside the rule or a term that could not be evaluated: the sum would understate
        return r.total if r.complete else None
