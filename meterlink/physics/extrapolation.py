"""Extrapolation of a measured broadcast or pilot signal to the emitter's maximum traffic (pure).

Practice of IEC 62232 (and ITU-T K.100, ECC/REC(02)04): a cellular carrier's load varies, but one part
of it is sent at constant power; measure that part selectively and scale it by the ratio of the
carrier's maximum power to that part's power. Each function returns an ExtrapolationFactor holding
the power factor F (E_max = E_measured * sqrt(F)), every input it used and the caveats, so that the
factor is shown beside the measured value and can be re-derived by a reader.

  GSM   the BCCH carrier is always on at full power: F = number of TRX of the cell.
  UMTS  the CPICH is a fixed part of the carrier power: F = P_max / P_CPICH.
  LTE   a cell-specific reference signal resource element (EPRE) is measured: F = N_subcarriers *
        (data-RE power / RS-RE power); with several antenna ports each port's RS is measured and
        the ports add in power.
  NR    the SS/PBCH block's SSS resource element is measured: F = N_subcarriers * (data-RE / SSS-RE
        power) * TDD downlink fraction * traffic-beam / SSB-beam gain ratio (declared by the operator).

An actual-maximum factor F_PR <= 1 (time-averaged power reduction of massive-MIMO sites) multiplies F
only when declared with its source. The formulas are the defining relations of the practice written
from its description, not from a copy of any standard's text; the tests check them against values
worked by hand.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from meterlink.errors import MeterlinkError

NR_BEAM_CAVEAT = ("SS/PBCH blocks are swept over beams: the measurement saw the SSB beam serving this point, "
                  "while traffic beams can be narrower and stronger; the traffic/SSB beam gain ratio is the "
                  "operator's declaration and the result is only as good as it is")


class ExtrapolationError(MeterlinkError):
    """Inputs of an extrapolation that make no sense (non-positive counts, powers or fractions)."""


@dataclass(frozen=True)
class ExtrapolationFactor:
    """A power factor F with its method, inputs, sources and caveats; fields scale by sqrt(F)."""

    technology: str
    method: str
    power_factor: float
    inputs: dict
    source: str
    caveats: tuple[str, ...] = field(default_factory=tuple)

    @property
    def field_factor(self) -> float:
        return math.sqrt(self.power_factor)

    @property
    def factor_db(self) -> float:
        return 10.0 * math.log10(self.power_factor)

    def record(self) -> dict:
        """Everything needed to re-derive the factor, for reports and journals."""
        return {"technology": self.technology, "method": self.method, "power_factor": self.power_factor,
                "field_factor": self.field_factor, "factor_db": self.factor_db, "inputs": dict(self.inputs),
                "source": self.source, "caveats": list(self.caveats)}


def _pos(name: str, v: float, upper: float | None = None) -> float:
    v = float(v)
    if not (math.isfinite(v) and v > 0) or (upper is not None and v > upper):
        bound = f" and at most {upper:g}" if upper is not None else ""
        raise ExtrapolationError(f"extrapolation: {name} = {v:g} must be positive{bound}")
    return v


def _with_actual_maximum(f: ExtrapolationFactor, actual_max_factor: float | None, actual_max_source: str):
    if actual_max_factor is None:
        return f
    fpr = _pos("actual-maximum factor", actual_max_factor, 1.0)
    if not actual_max_source.strip():
        raise ExtrapolationError("extrapolation: an actual-maximum factor needs its source (operator declaration, "
                                 "document) beside it")
    inputs = {**f.inputs, "actual_max_factor": fpr, "actual_max_source": actual_max_source.strip()}
    return ExtrapolationFactor(f.technology, f.method + " x actual-maximum factor", f.power_factor * fpr, inputs,
                               f.source, f.caveats + ("actual-maximum (power reduction) factor applied: the "
                                                      "result is a time-averaged maximum, not the peak",))


def gsm_bcch(n_trx: int, *, actual_max_factor=None, actual_max_source="") -> ExtrapolationFactor:
    """GSM: every TRX can send at the BCCH carrier's power: F = n_TRX."""
    if int(n_trx) != n_trx or n_trx < 1:
        raise ExtrapolationError(f"extrapolation: number of TRX {n_trx} must be a whole number >= 1")
    f = ExtrapolationFactor("GSM", "BCCH x n_TRX", float(n_trx), {"n_trx": int(n_trx)},
                            "IEC 62232 practice: BCCH measured, scaled by the cell's TRX count",
                            ("the BCCH carrier must be identified (constant level over time)",))
    return _with_actual_maximum(f, actual_max_factor, actual_max_source)


def umts_cpich(p_max_w: float, p_cpich_w: float, *, actual_max_factor=None, actual_max_source="") -> ExtrapolationFactor:
    """UMTS: the CPICH is a declared fraction of the carrier's maximum power: F = P_max / P_CPICH."""
    pm, pc = _pos("P_max", p_max_w), _pos("P_CPICH", p_cpich_w)
    if pc > pm:
        raise ExtrapolationError("extrapolation: P_CPICH exceeds P_max")
    f = ExtrapolationFactor("UMTS", "CPICH x P_max/P_CPICH", pm / pc, {"p_max_w": pm, "p_cpich_w": pc},
                            "IEC 62232 practice: CPICH code power measured (code-domain), powers declared by the operator",
                            ("the CPICH must be measured code-selectively, not as channel power",))
    return _with_actual_maximum(f, actual_max_factor, actual_max_source)


def lte_crs(n_subcarriers: int, e_rs_per_port_v_per_m=None, *, data_to_rs_db: float = 0.0,
            actual_max_factor=None, actual_max_source="") -> ExtrapolationFactor:
    """LTE: per-RE reference-signal power times the subcarriers, data-RE/RS-RE ratio applied.

    With e_rs_per_port_v_per_m (one value per antenna port) the ports add in power and the factor is
    relative to the first port's RS (so E_max = E_RS,port0 * sqrt(F))."""
    if int(n_subcarriers) != n_subcarriers or n_subcarriers < 12:
        raise ExtrapolationError(f"extrapolation: {n_subcarriers} subcarriers: a whole number >= 12 (one resource block)")
    ratio = 10.0 ** (float(data_to_rs_db) / 10.0)
    ports = 1.0
    inputs = {"n_subcarriers": int(n_subcarriers), "data_to_rs_db": float(data_to_rs_db)}
    if e_rs_per_port_v_per_m is not None:
        e = [_pos("E_RS of a port", v) for v in e_rs_per_port_v_per_m]
        if not e:
            raise ExtrapolationError("extrapolation: no antenna port's RS field given")
        ports = sum(v * v for v in e) / (e[0] * e[0])
        inputs["e_rs_per_port_v_per_m"] = e
    f = ExtrapolationFactor("LTE", "RS EPRE x N_subcarriers x data/RS ratio (ports in power)",
                            n_subcarriers * ratio * ports, inputs,
                            "IEC 62232 practice: cell-specific RS per resource element measured (decoder or zero span)",
                            ("the RS of each transmitting antenna port must be measured",))
    return _with_actual_maximum(f, actual_max_factor, actual_max_source)


def nr_ssb(n_subcarriers: int, *, data_to_sss_db: float = 0.0, tdd_downlink_fraction: float = 1.0,
           beam_gain_ratio_db: float = 0.0, actual_max_factor=None, actual_max_source="") -> ExtrapolationFactor:
    """NR: SSS EPRE of the SS/PBCH block times subcarriers, data/SSS ratio, TDD downlink fraction and the
    declared traffic-beam over SSB-beam gain; always carries the beam-sweeping caveat."""
    if int(n_subcarriers) != n_subcarriers or n_subcarriers < 12:
        raise ExtrapolationError(f"extrapolation: {n_subcarriers} subcarriers: a whole number >= 12 (one resource block)")
    tdc = _pos("TDD downlink fraction", tdd_downlink_fraction, 1.0)
    pf = n_subcarriers * 10 ** (data_to_sss_db / 10) * tdc * 10 ** (beam_gain_ratio_db / 10)
    f = ExtrapolationFactor("NR", "SSS EPRE x N_subcarriers x data/SSS x TDD fraction x beam gain ratio", pf,
                            {"n_subcarriers": int(n_subcarriers), "data_to_sss_db": float(data_to_sss_db),
                             "tdd_downlink_fraction": tdc, "beam_gain_ratio_db": float(beam_gain_ratio_db)},
                            "IEC 62232 practice: SS/PBCH block SSS per resource element measured (decoder)",
                            (NR_BEAM_CAVEAT,))
    return _with_actual_maximum(f, actual_max_factor, actual_max_source)


def power_ratio(p_max_w: float, p_measured_w: float, source: str) -> ExtrapolationFactor:
    """Any technology measured as channel power: F = P_max / P_during, both declared by the operator
    for the time of the measurement, with the declaration's source."""
    pm, pd = _pos("P_max", p_max_w), _pos("P during the measurement", p_measured_w)
    if pd > pm:
        raise ExtrapolationError("extrapolation: the power during the measurement exceeds P_max")
    if not str(source).strip():
        raise ExtrapolationError("extrapolation: a power ratio needs its source (operator declaration, document)")
    return ExtrapolationFactor("any", "channel power x P_max/P_during", pm / pd,
                               {"p_max_w": pm, "p_measured_w": pd, "source": str(source).strip()},
                               "declared transmitter powers: the field scales with the square root of the power",
                               ("valid only for the powers declared for the time of the measurement",))


def subcarriers(bandwidth_resource_blocks: int) -> int:
    """12 subcarriers per resource block (LTE and NR)."""
    return 12 * int(bandwidth_resource_blocks)
