"""A swept spectrum analyser over SCPI.

Dialect: the SCPI 1999.0 SENSe/INITiate/TRACe subsystems as most swept analysers take them —
FREQ:CENT/SPAN/STAR/STOP, BAND[:RES], BAND:VID, DET[:FUNC] RMS|POS, SWE:TIME, SWE:POIN,
DISP:WIND:TRAC:Y:RLEV, INP:ATT, INIT:CONT OFF + INIT:IMM;*OPC?, FORM ASC|REAL,32,
FORM:BORD SWAP (little-endian), TRAC:DATA? TRACE1. Where a maker spells the detector or the trace
query differently, the few strings to change are the class constants below.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from meterlink.instruments.session import InstrumentError, ScpiSession, _short

DETECTORS = {"rms": "RMS", "peak": "POS"}


@dataclass(frozen=True)
class Sweep:
    """One trace with the settings it was taken with (levels in dBm at the analyser input)."""

    freq_hz: np.ndarray
    level_dbm: np.ndarray
    rbw_hz: float
    vbw_hz: float
    detector: str
    sweep_time_s: float
    ref_level_dbm: float
    attenuation_db: float


class SpectrumAnalyzer:
    """Settings, single sweeps and trace read-out; every setting is followed by an error-queue check."""

    TRACE_QUERY = "TRAC:DATA? TRACE1"
    DETECTOR_COMMAND = "DET"

    def __init__(self, session: ScpiSession):
        self.s = session

    @property
    def address(self) -> str:
        return self.s.address

    def set_center_span(self, center_hz: float, span_hz: float) -> None:
        self.s.configure(f"FREQ:CENT {center_hz:.6f}", f"FREQ:SPAN {span_hz:.6f}")

    def set_start_stop(self, start_hz: float, stop_hz: float) -> None:
        if not 0 <= start_hz < stop_hz:
            raise InstrumentError(f"{self.address}: start {start_hz:g} Hz must be below stop {stop_hz:g} Hz")
        self.s.configure(f"FREQ:STAR {start_hz:.6f}", f"FREQ:STOP {stop_hz:.6f}")

    def set_bandwidths(self, rbw_hz: float, vbw_hz: float | None = None) -> None:
        cmds = [f"BAND {rbw_hz:.6f}"]
        if vbw_hz is not None:
            cmds.append(f"BAND:VID {vbw_hz:.6f}")
        self.s.configure(*cmds)

    def set_detector(self, detector: str) -> None:
        if detector not in DETECTORS:
            raise InstrumentError(f"{self.address}: detector {detector!r} is not one of {', '.join(DETECTORS)}")
        self.s.configure(f"{self.DETECTOR_COMMAND} {DETECTORS[detector]}")

    def set_sweep(self, sweep_time_s: float | None = None, points: int | None = None) -> None:
        cmds = []
        if sweep_time_s is not None:
            cmds.append(f"SWE:TIME {sweep_time_s:.6g}")
        if points is not None:
            cmds.append(f"SWE:POIN {int(points)}")
        if cmds:
            self.s.configure(*cmds)

    def set_levels(self, ref_level_dbm: float, attenuation_db: float) -> None:
        self.s.configure(f"DISP:WIND:TRAC:Y:RLEV {ref_level_dbm:.2f}", f"INP:ATT {attenuation_db:.1f}")

    def settings(self) -> dict:
        """The settings read back from the instrument (what the trace was really taken with)."""
        q = self.s.query_float
        det = self.s.query(f"{self.DETECTOR_COMMAND}?").upper()
        name = next((k for k, v in DETECTORS.items() if det.startswith(v[:3])), None)
        if name is None:
            raise InstrumentError(f"{self.address}: {self.DETECTOR_COMMAND}?: answered {_short(det)!r}, not RMS or POS")
        return {"start_hz": q("FREQ:STAR?"), "stop_hz": q("FREQ:STOP?"), "rbw_hz": q("BAND?"),
                "vbw_hz": q("BAND:VID?"), "detector": name, "sweep_time_s": q("SWE:TIME?"),
                "points": int(q("SWE:POIN?")), "ref_level_dbm": q("DISP:WIND:TRAC:Y:RLEV?"),
                "attenuation_db": q("INP:ATT?")}

    def sweep(self, binary: bool = True) -> Sweep:
        """One single sweep (INIT:CONT OFF; INIT:IMM;*OPC?) and its trace, as REAL,32 block or ASCII."""
        st = self.settings()
        self.s.configure("INIT:CONT OFF", "FORM REAL,32" if binary else "FORM ASC", "FORM:BORD SWAP")
        self.s.wait_complete("INIT:IMM", timeout_s=st["sweep_time_s"] * 2 + self.s.timeout_s)
        if binary:
            vals = self.s.query_block_real32(self.TRACE_QUERY)
        else:
            vals = self.s.query_floats(self.TRACE_QUERY)
        if len(vals) != st["points"]:
            raise InstrumentError(f"{self.address}: {self.TRACE_QUERY}: {len(vals)} values for a "
                                  f"{st['points']}-point sweep")
        freq = np.linspace(st["start_hz"], st["stop_hz"], st["points"])
        return Sweep(freq, np.asarray(vals, dtype=float), st["rbw_hz"], st["vbw_hz"], st["detector"],
                     st["sweep_time_s"], st["ref_level_dbm"], st["attenuation_db"])
