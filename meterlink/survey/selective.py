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
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from meterlink.cautions import SAFETY_LINE
from meterlink.errors import MeterlinkError, read_input_toml
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
    doc = read_input_toml(path, "band", BandFileError)
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
#: pilot-based methods: they scale the pilot's own level, which needs a decoder and which a swept channel power is
#: not; they apply only with that level declared as measured by a decoder-capable instrument (PILOT_KEYS)
_PILOT = {"umts-cpich": ("UMTS", "the CPICH code power", {"p_max_w", "p_cpich_w"}, set()),
          "lte-rs": ("LTE", "the reference signal per resource element", {"n_subcarriers"}, {"data_to_rs_db"}),
          "nr-ssb": ("NR", "the SSS per resource element of the SS/PBCH block", {"n_subcarriers"},
                     {"data_to_sss_db", "tdd_downlink_fraction", "beam_gain_ratio_db"})}
#: the pilot as a decoder-capable instrument measured it at the point: its field (V/m; for lte-rs one value per
#: transmitting antenna port may be given, added in power), its expanded uncertainty (k = 2, dB) and the instrument
PILOT_KEYS = {"pilot_e_v_per_m", "pilot_u_db", "pilot_instrument"}
_ACTUAL_MAX = {"actual_max_factor", "actual_max_source"}
PILOT_CAVEAT = ("the maximum is the pilot's field, measured by a decoder-capable instrument and declared with the "
                "point, scaled by the factor; the swept channel power is the field measured now")
LTE_SUBCARRIER_HZ = 15e3
CARRIER_MAX_HZ = 300e3


def _pilot_inputs(d: dict, where: str, method: str) -> dict:
    """The declared pilot measurement, checked: positive field(s), an uncertainty in (0, 20] dB, the instrument."""
    from meterlink.physics.extrapolation import ExtrapolationError

    e = d["pilot_e_v_per_m"]
    many = isinstance(e, (list, tuple))
    if many and method != "lte-rs":
        raise ExtrapolationError(f"{where}: pilot_e_v_per_m is one field for {method} (a list is for the "
                                 "antenna ports of lte-rs)")
    vals = e if many else [e]
    if not vals or any(isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or not
                       0 < v < 1e4 for v in vals):
        raise ExtrapolationError(f"{where}: pilot_e_v_per_m must be a field in V/m above 0 (or, for lte-rs, a "
                                 "list of one per antenna port)")
    u = d["pilot_u_db"]
    if isinstance(u, bool) or not isinstance(u, (int, float)) or not math.isfinite(u) or not 0 < u <= 20:
        raise ExtrapolationError(f"{where}: pilot_u_db (expanded uncertainty of the pilot, k = 2) must be in 0..20 dB")
    who = d["pilot_instrument"]
    if not isinstance(who, str) or not who.strip():
        raise ExtrapolationError(f"{where}: pilot_instrument must name the decoder-capable instrument (and its "
                                 "calibration) that measured the pilot")
    total = math.sqrt(sum(float(v) ** 2 for v in vals))
    out = {"pilot_e_v_per_m": total, "pilot_u_db": float(u), "pilot_instrument": who.strip()[:200]}
    if many:
        out["pilot_e_per_port_v_per_m"] = [float(v) for v in vals]
    return out


def _pilot_factor(band: Band, method: str, d: dict, where: str):
    from dataclasses import replace

    from meterlink.physics.extrapolation import ExtrapolationError, lte_crs, nr_ssb, umts_cpich

    tech = _PILOT[method][0]
    if band.technology and band.technology.upper() != tech:
        raise ExtrapolationError(f"{where}: {method} is for {tech}, and the band file gives technology "
                                 f"{band.technology!r}")
    am = {"actual_max_factor": d.get("actual_max_factor"), "actual_max_source": str(d.get("actual_max_source", ""))}
    if method == "umts-cpich":
        f = umts_cpich(d["p_max_w"], d["p_cpich_w"], **am)
    elif method == "lte-rs":
        n = d["n_subcarriers"]
        if band.bandwidth_hz > 0 and n * LTE_SUBCARRIER_HZ > band.bandwidth_hz * 1.0001:
            raise ExtrapolationError(f"{where}: {n} subcarriers of 15 kHz ({n * LTE_SUBCARRIER_HZ / 1e6:g} MHz) do not "
                                     f"fit in the band's {band.bandwidth_hz / 1e6:g} MHz")
        f = lte_crs(n, data_to_rs_db=float(d.get("data_to_rs_db", 0.0)), **am)
    else:
        f = nr_ssb(d["n_subcarriers"], data_to_sss_db=float(d.get("data_to_sss_db", 0.0)),
                   tdd_downlink_fraction=float(d.get("tdd_downlink_fraction", 1.0)),
                   beam_gain_ratio_db=float(d.get("beam_gain_ratio_db", 0.0)), **am)
    return replace(f, method=f.method + " (pilot from a decoder-capable instrument)",
                   inputs={**f.inputs, **_pilot_inputs(d, where, method)}, caveats=f.caveats + (PILOT_CAVEAT,))


def check_extrapolation(spec: dict, bands) -> dict:
    """Band name -> ExtrapolationFactor from a plan's declarations; a one-line error names the band and the
    problem (unknown band or method, missing or unknown input, a method the swept band cannot support).

    A pilot-based method (umts-cpich, lte-rs, nr-ssb) applies only with the pilot's level declared as measured by
    a decoder-capable instrument (PILOT_KEYS); its factor then holds that pilot, and the band's field at maximum
    is the pilot's field scaled by the factor (assess_point)."""
    from meterlink.physics.extrapolation import ExtrapolationError, gsm_bcch, power_ratio

    by_name = {b.name: b for b in bands}
    out = {}
    for name, d in spec.items():
        where = f"extrapolation of band {name!r}"
        if name not in by_name:
            raise ExtrapolationError(f"{where}: no such band in the band file (bands: {', '.join(by_name)})")
        method = d.get("method")
        keys = set(d) - {"method"}
        if method in _PILOT:
            if not keys & PILOT_KEYS:
                raise ExtrapolationError(f"{where}: {method} scales {_PILOT[method][1]}, which a swept channel power "
                                         "does not give (it needs a decoder): declare the pilot as a decoder-capable "
                                         "instrument measured it (pilot_e_v_per_m, pilot_u_db, pilot_instrument), or "
                                         "method \"power-ratio\" with the operator's powers")
            need, optional = _PILOT[method][2] | PILOT_KEYS, _PILOT[method][3] | _ACTUAL_MAX
        elif method in _METHODS:
            need, optional = _METHODS[method]
        else:
            raise ExtrapolationError(f"{where}: method {method!r} is not one of "
                                     f"{', '.join(list(_METHODS) + list(_PILOT))}")
        if need - keys or keys - need - optional:
            bad = sorted(need - keys) or sorted(keys - need - optional)
            raise ExtrapolationError(f"{where}: {'missing' if need - keys else 'unknown'} input {bad[0]!r} "
                                     f"(method {method} takes {', '.join(sorted(need | optional))})")
        try:
            if method in _PILOT:
                out[name] = _pilot_factor(by_name[name], method, d, where)
            elif method == "gsm-bcch":
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


def load_extrapolation(path, bands) -> dict:
    """check_extrapolation of a TOML file of [\"BAND NAME\"] tables (the same tables as a plan's
    [point.extrapolation."BAND NAME"]); each failure is one line naming the file."""
    where = str(path)
    doc = read_input_toml(path, "extrapolation", BandFileError)
    if not doc or not all(isinstance(v, dict) for v in doc.values()):
        raise BandFileError(f"{where}: expected one table per band name, e.g. [\"Pole LTE 800\"] with method = ...")
    try:
        return check_extrapolation(doc, bands)
    except MeterlinkError as exc:
        raise BandFileError(f"{where}: {exc}") from None


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


def check_bands_in_range(bands, cert, cert_name) -> None:
    """Refuse, in one line, a band that the antenna certificate does not cover (range.freq_hz): its antenna
    factor and cable loss there would be the table's edge or an extrapolation, with no uncertainty for it.
    ``bands`` holds objects or dicts with freq_hz and bandwidth_hz."""
    lo, hi = cert.freq_range_hz
    for b in bands:
        get = b.get if isinstance(b, dict) else lambda k, b=b: getattr(b, k)
        f, bw, name = float(get("freq_hz")), float(get("bandwidth_hz") or 0.0), get("name")
        if f - bw / 2 < lo or f + bw / 2 > hi:
            span = f"{f / 1e6:g} MHz" if bw == 0 else f"{(f - bw / 2) / 1e6:g}-{(f + bw / 2) / 1e6:g} MHz"
            raise MeterlinkError(f"band {name!r} ({span}) lies outside the range of the antenna certificate "
                                 f"{cert_name} ({lo / 1e6:g}-{hi / 1e6:g} MHz): its antenna factor there is not "
                                 "calibrated; use a certificate that covers every band")


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


def field_at_max(r: BandResult, f) -> tuple[float, float, list[str]]:
    """A band's field at maximum, the expanded uncertainty (dB) it carries, and notes.

    With a declared pilot (a pilot-based method) the maximum is the pilot's field times sqrt(F), with the pilot's
    own uncertainty; it is never taken below the channel field measured now (a load cannot go above the maximum),
    and a pilot above the whole channel beyond both uncertainties is flagged (another cell, another point, or a
    mistyped value). Otherwise the measured channel field times sqrt(F), with the band's own uncertainty."""
    if "pilot_e_v_per_m" not in f.inputs:
        return r.e_v_per_m * f.field_factor, r.u_expanded_db, []
    pilot, u_p = float(f.inputs["pilot_e_v_per_m"]), float(f.inputs["pilot_u_db"])
    notes = []
    if not r.e_v_per_m > 0 or 20 * math.log10(pilot / r.e_v_per_m) > r.u_expanded_db + u_p:
        notes.append(f"{r.name}: the declared pilot ({pilot:.4g} V/m) exceeds the channel field swept here "
                     f"({r.e_v_per_m:.4g} V/m) beyond both uncertainties: check the pilot's cell, point and value")
    e_max = pilot * f.field_factor
    if e_max < r.e_v_per_m:
        notes.append(f"{r.name}: the pilot scaled to maximum ({e_max:.4g} V/m) is below the channel field measured "
                     f"now ({r.e_v_per_m:.4g} V/m); the measured field is kept as the maximum (check the declared "
                     "inputs)")
        return r.e_v_per_m, r.u_expanded_db, notes
    return e_max, u_p, notes


def assess_point(results: list[BandResult], standard: str, tier: str, factors=None) -> dict:
    """Per-band E and exposure ratio, total by the standard's summation rule, shares; with extrapolation
    factors (name -> ExtrapolationFactor) the same at maximum traffic beside the measured values (a band with a
    declared pilot takes its maximum from the pilot, field_at_max)."""
    from meterlink.physics.exposure import multi_frequency

    f = np.array([r.freq_hz for r in results])
    e = np.array([r.e_v_per_m for r in results])
    names = [r.name for r in results]
    mf = multi_frequency(f, standard=standard, tier=tier, e_v_per_m=e, labels=names)
    out = {"standard": standard, "tier": tier, "summation_rule": mf.source, "check_status": mf.status,
           "total_exposure_ratio": mf.total, "governing": list(mf.governing) if mf.governing else None,
           "messages": list(mf.messages), "cautions": SAFETY_LINE, "bands": []}
    ex = None
    at_max = {}
    if factors:
        for r in results:
            if r.name in factors:
                e_x, u_x, notes = field_at_max(r, factors[r.name])
                at_max[r.name] = (e_x, u_x)
                out["messages"].extend(notes)
        e_x = np.array([at_max[n][0] if n in at_max else e[i] for i, n in enumerate(names)])
        ex = multi_frequency(f, standard=standard, tier=tier, e_v_per_m=e_x, labels=names)
        out["total_exposure_ratio_at_max"] = ex.total
    for i, r in enumerate(results):
        row = {k: v for k, v in asdict(r).items() if k != "traces"}
        row["exposure_ratio"] = float(mf.emitter_ratio[i])
        row["share"] = float(mf.share[i])
        u = r.u_expanded_db
        row["e_interval_v_per_m"] = [r.e_v_per_m * 10 ** (-u / 20), r.e_v_per_m * 10 ** (u / 20)]
        if ex is not None and r.name in factors:
            row["extrapolation"] = factors[r.name].record()
            row["e_at_max_v_per_m"], row["u_at_max_db"] = at_max[r.name]
            row["exposure_ratio_at_max"] = float(ex.emitter_ratio[i])
        out["bands"].append(row)
    return out
