"""A frequency-selective survey point: sweep each band with a spectrum analyser, integrate the channel
power over each emitter's band, turn it into field strength through the antenna certificate, judge it
by the standard's summation rule, and keep every band's result on disk as soon as it is measured.

Bands come from a TOML file of [[band]] tables (name, freq_hz, bandwidth_hz, technology, optional rbw_hz;
see docs/selective.md). A lost instrument stops the point with a one-line error after the measured
bands and an event with the exact counts are in the journal.
"""

from __future__ import annotations

import json
import math
import time
import tomllib
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from meterlink.cautions import SAFETY_LINE
from meterlink.errors import MeterlinkError, read_input_text
from meterlink.instruments.session import InstrumentError
from meterlink.physics.calibrate import af_db_per_m, cable_loss_db
from meterlink.physics.selective import (ChainSpec, channel_power_w, combine_orientations,
                                         e_from_input_power_v_per_m, integration_window_hz, selective_budget)

ORIENTATIONS = {"isotropic": ("isotropic",), "three": ("x", "y", "z")}
MAX_POINTS = 100_001


class BandFileError(MeterlinkError):
    """A band file that cannot be used."""


@dataclass(frozen=True)
class Band:
    """One emitter's band: centre, occupied bandwidth (0 for a carrier) and the RBW to sweep it with."""

    name: str
    freq_hz: float
    bandwidth_hz: float
    technology: str = ""
    rbw_hz: float | None = None

    def rbw(self) -> float:
        """The given RBW, else a tenth of the occupied band within 10 kHz-1 MHz (100 kHz for a carrier)."""
        if self.rbw_hz:
            return self.rbw_hz
        return min(max(self.bandwidth_hz / 10.0, 10e3), 1e6) if self.bandwidth_hz > 0 else 100e3


def load_bands(path) -> list[Band]:
    """Bands from a TOML file; each failure names the file, the band and the key."""
    where = str(path)
    try:
        doc = tomllib.loads(read_input_text(path, "band", BandFileError))
    except tomllib.TOMLDecodeError as exc:
        raise BandFileError(f"{where}: not valid TOML ({exc})".replace("\n", " ")) from None
    rows = doc.get("band")
    if not isinstance(rows, list) or not rows:
        raise BandFileError(f"{where}: no [[band]] tables")
    out = []
    for i, r in enumerate(rows, 1):
        def num(key, lo, hi, required=True):
            v = r.get(key)
            if v is None and not required:
                return None
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not (lo <= v <= hi) or not math.isfinite(v):
                raise BandFileError(f"{where}: band {i}: {key} must be a number in {lo:g}..{hi:g}")
            return float(v)
        name = r.get("name")
        if not isinstance(name, str) or not name.strip():
            raise BandFileError(f"{where}: band {i}: name must be text")
        out.append(Band(name.strip()[:80], num("freq_hz", 9e3, 300e9), num("bandwidth_hz", 0.0, 2e9),
                        str(r.get("technology", ""))[:20], num("rbw_hz", 1.0, 10e6, required=False)))
    return out


#: extrapolation methods a plan may declare for a swept band, and the inputs each takes
_METHODS = {"gsm-bcch": ({"n_trx"}, {"actual_max_factor", "actual_max_source"}),
            "power-ratio": ({"p_max_w", "p_measured_w", "source"}, set())}
#: pilot-based methods that need the pilot's own level (a decoder), which a swept channel power does not give
_PILOT = {"umts-cpich": "the CPICH code power", "lte-rs": "the reference signal per resource element",
          "nr-ssb": "the SSS per resource element of the SS/PBCH block"}
CARRIER_MAX_HZ = 300e3


def check_extrapolation(spec: dict, bands) -> dict:
    """Band name -> ExtrapolationFactor from a plan's declarations; a one-line error names the band and the
    problem (unknown band or method, missing or unknown input, a method the swept band cannot support)."""
    from meterlink.physics.extrapolation import ExtrapolationError, gsm_bcch, power_ratio

    by_name = {b.name: b for b in bands}
    out = {}
    for name, d in spec.items():
        where = f"extrapolation of band {name!r}"
        if name not in by_name:
            raise ExtrapolationError(f"{where}: no such band in the band file (bands: {', '.join(by_name)})")
        method = d.get("method")
        if method in _PILOT:
            raise ExtrapolationError(f"{where}: {method} scales {_PILOT[method]}, which a swept channel power does "
                                     "not give (it needs a decoder); declare method \"power-ratio\" with the "
                                     "operator's powers instead")
        if method not in _METHODS:
            raise ExtrapolationError(f"{where}: method {method!r} is not one of {', '.join(_METHODS)}")
        need, optional = _METHODS[method]
        keys = set(d) - {"method"}
        if need - keys or keys - need - optional:
            bad = sorted(need - keys) or sorted(keys - need - optional)
            raise ExtrapolationError(f"{where}: {'missing' if need - keys else 'unknown'} input {bad[0]!r} "
                                     f"(method {method} takes {', '.join(sorted(need | optional))})")
        try:
            if method == "gsm-bcch":
                if by_name[name].bandwidth_hz > CARRIER_MAX_HZ:
                    raise ExtrapolationError(f"{where}: gsm-bcch needs the BCCH carrier swept alone (bandwidth at "
                                             f"most {CARRIER_MAX_HZ / 1e3:g} kHz), not a {by_name[name].bandwidth_hz / 1e6:g} MHz band")
                out[name] = gsm_bcch(d["n_trx"], actual_max_factor=d.get("actual_max_factor"),
                                     actual_max_source=str(d.get("actual_max_source", "")))
            else:
                out[name] = power_ratio(d["p_max_w"], d["p_measured_w"], d["source"])
        except (TypeError, ValueError):
            raise ExtrapolationError(f"{where}: inputs must be numbers (and the source text)") from None
    return out


@dataclass
class BandResult:
    """One band measured in each orientation: channel powers (dBm at the analyser input) and fields."""

    name: str
    freq_hz: float
    bandwidth_hz: float
    technology: str
    rbw_hz: float
    window_hz: tuple[float, float]
    p_dbm: dict = field(default_factory=dict)           # orientation -> channel power
    e_axes_v_per_m: dict = field(default_factory=dict)  # orientation -> field seen
    e_v_per_m: float = float("nan")
    u_expanded_db: float = float("nan")
    budget: list = field(default_factory=list)
    af_db_per_m: float = float("nan")                   # antenna factor and cable loss at the centre, as applied
    cable_loss_db: float = float("nan")
    traces: dict = field(default_factory=dict)          # orientation -> the sweep as taken (Trace), kept for storing


class Journal:
    """JSON lines written and flushed as each band is measured: nothing measured is lost on a failure."""

    def __init__(self, path):
        self.path = Path(path)
        try:
            self.f = self.path.open("a", encoding="utf-8")
        except OSError as exc:
            raise MeterlinkError(f"{self.path}: cannot write the point journal: {exc.strerror}") from None

    def write(self, record: dict) -> None:
        self.f.write(json.dumps(record, default=float) + "\n")
        self.f.flush()

    def close(self) -> None:
        self.f.close()


@dataclass(frozen=True)
class Trace:
    """One sweep as the analyser gave it: a linear frequency axis and float32 levels (dBm at its input)."""

    start_hz: float
    stop_hz: float
    rbw_hz: float
    detector: str
    sweep_time_s: float
    level_dbm: np.ndarray
    t_utc: float

    @property
    def freq_hz(self) -> np.ndarray:
        return np.linspace(self.start_hz, self.stop_hz, self.level_dbm.size)


def _sweep_band(analyser, band: Band, sweep_time_s: float):
    rbw = band.rbw()
    lo, hi = integration_window_hz(band.freq_hz, band.bandwidth_hz, rbw)
    points = min(MAX_POINTS, max(101, int(math.ceil((hi - lo) / (rbw / 4.0))) + 1))
    analyser.set_start_stop(max(lo, 0.0), hi)
    analyser.set_bandwidths(rbw, 3 * rbw)
    analyser.set_detector("rms")
    analyser.set_sweep(sweep_time_s, points)
    sw = analyser.sweep(binary=True)
    return sw, (lo, hi)


def measure_point(analyser, bands, cert, *, antenna: str = "isotropic", orient=None, chain: ChainSpec = ChainSpec(),
                  sweep_time_s: float = 0.1, journal: Journal | None = None) -> list[BandResult]:
    """Sweep every band in every orientation (orient(axis) is called before each orientation's sweeps),
    then combine. Each channel power goes to the journal as soon as it is measured."""
    if antenna not in ORIENTATIONS:
        raise MeterlinkError(f"antenna {antenna!r}: one of {', '.join(ORIENTATIONS)}")
    results = [BandResult(b.name, b.freq_hz, b.bandwidth_hz, b.technology, b.rbw(),
                          integration_window_hz(b.freq_hz, b.bandwidth_hz, b.rbw())) for b in bands]
    axes = ORIENTATIONS[antenna]
    done, total = 0, len(axes) * len(bands)
    for axis in axes:
        if orient is not None:
            orient(axis)
        for b, r in zip(bands, results):
            try:
                sw, win = _sweep_band(analyser, b, sweep_time_s)
            except InstrumentError as exc:
                if journal is not None:
                    journal.write({"event": "instrument_error", "message": str(exc), "sweeps_measured": done,
                                   "sweeps_not_measured": total - done, "band": b.name, "orientation": axis})
                raise
            p_w = channel_power_w(sw.freq_hz, sw.level_dbm, sw.rbw_hz, *win)
            r.af_db_per_m, r.cable_loss_db = float(af_db_per_m(cert, b.freq_hz)), float(cable_loss_db(cert, b.freq_hz))
            e = float(e_from_input_power_v_per_m(p_w, r.af_db_per_m, r.cable_loss_db))
            r.traces[axis] = Trace(float(sw.freq_hz[0]), float(sw.freq_hz[-1]), float(sw.rbw_hz), sw.detector,
                                   float(sw.sweep_time_s), np.asarray(sw.level_dbm, dtype=np.float32), time.time())
            r.p_dbm[axis] = 10 * math.log10(p_w / 1e-3) if p_w > 0 else float("-inf")
            r.e_axes_v_per_m[axis] = e
            done += 1
            if journal is not None:
                journal.write({"band": b.name, "orientation": axis, "freq_hz": b.freq_hz, "rbw_hz": sw.rbw_hz,
                               "points": int(sw.freq_hz.size), "window_hz": list(win), "p_dbm": r.p_dbm[axis],
                               "e_v_per_m": e})
    for r in results:
        r.e_v_per_m = float(combine_orientations([r.e_axes_v_per_m[a] for a in axes]))
        bud = selective_budget(cert, r.freq_hz, chain)
        r.u_expanded_db = bud.u_expanded_db
        r.budget = [{"name": row.name, "value": row.value, "unit": row.unit, "distribution": row.distribution,
                     "u_db": row.u_db} for row in bud.rows]
    return results


def assess_point(results: list[BandResult], standard: str, tier: str, factors=None) -> dict:
    """Per-band E and exposure ratio, total by the standard's summation rule, shares; with extrapolation
    factors (name -> ExtrapolationFactor) the same at maximum traffic beside the measured values."""
    from meterlink.physics.exposure import multi_frequency

    f = np.array([r.freq_hz for r in results])
    e = np.array([r.e_v_per_m for r in results])
    names = [r.name for r in results]
    mf = multi_frequency(f, standard=standard, tier=tier, e_v_per_m=e, labels=names)
    out = {"standard": standard, "tier": tier, "summation_rule": mf.source, "check_status": mf.status,
           "total_exposure_ratio": mf.total, "governing": list(mf.governing) if mf.governing else None,
           "messages": list(mf.messages), "cautions": SAFETY_LINE, "bands": []}
    ex = None
    if factors:
        fe = np.array([factors[n].field_factor if n in factors else 1.0 for n in names])
        ex = multi_frequency(f, standard=standard, tier=tier, e_v_per_m=e * fe, labels=names)
        out["total_exposure_ratio_at_max"] = ex.total
    for i, r in enumerate(results):
        row = {k: v for k, v in asdict(r).items() if k != "traces"}
        row["exposure_ratio"] = float(mf.emitter_ratio[i])
        row["share"] = float(mf.share[i])
        u = r.u_expanded_db
        row["e_interval_v_per_m"] = [r.e_v_per_m * 10 ** (-u / 20), r.e_v_per_m * 10 ** (u / 20)]
        if ex is not None and r.name in factors:
            row["extrapolation"] = factors[r.name].record()
            row["e_at_max_v_per_m"] = r.e_v_per_m * factors[r.name].field_factor
            row["exposure_ratio_at_max"] = float(ex.emitter_ratio[i])
        out["bands"].append(row)
    return out
