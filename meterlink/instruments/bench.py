"""Signal generator, power meter and rotator over SCPI.

Dialects: the generator and power meter speak the SCPI 1999.0 SOURce/OUTPut and SENSe/CALibration/
FETCh subsystems (FREQ, POW, OUTP ON|OFF; CAL:ZERO:AUTO ONCE, SENS:FREQ, READ?), as most makers take
them. A rotator (turntable, positioner) has no standard command set; this class speaks a small SCPI-
styled one: POS:ANGL <deg>, POS:ANGL?, *OPC? after the move. A maker's own positioner needs its strings
swapped in the class constants.
"""

from __future__ import annotations

from meterlink.instruments.session import InstrumentError, ScpiSession


class SignalGenerator:
    """CW frequency, level (dBm) and RF output."""

    def __init__(self, session: ScpiSession):
        self.s = session

    def set(self, freq_hz: float, level_dbm: float) -> None:
        self.s.configure(f"FREQ {freq_hz:.3f}", f"POW {level_dbm:.2f}")

    def rf(self, on: bool) -> None:
        self.s.configure(f"OUTP {'ON' if on else 'OFF'}")

    def state(self) -> tuple[float, float, bool]:
        """(freq_hz, level_dbm, rf_on) read back."""
        on = self.s.query("OUTP?")
        if on not in ("0", "1", "ON", "OFF"):
            raise InstrumentError(f"{self.s.address}: OUTP?: answered {on[:40]!r}, not 0 or 1")
        return self.s.query_float("FREQ?"), self.s.query_float("POW?"), on in ("1", "ON")


class PowerMeter:
    """Zeroing, frequency correction and readings in dBm."""

    ZERO_TIMEOUT_S = 30.0

    def __init__(self, session: ScpiSession):
        self.s = session

    def zero(self) -> None:
        self.s.wait_complete("CAL:ZERO:AUTO ONCE", timeout_s=self.ZERO_TIMEOUT_S)
        errs = self.s.errors()
        if errs:
            raise InstrumentError(f"{self.s.address}: CAL:ZERO:AUTO ONCE: instrument reports {' | '.join(errs)}")

    def set_frequency(self, freq_hz: float) -> None:
        self.s.configure("UNIT:POW DBM", f"SENS:FREQ {freq_hz:.3f}")

    def read_dbm(self) -> float:
        return self.s.query_float("READ?")


class Rotator:
    """Azimuth angle of a turntable or antenna positioner, degrees."""

    MOVE_TIMEOUT_S = 60.0

    def __init__(self, session: ScpiSession):
        self.s = session

    def move(self, angle_deg: float) -> None:
        self.s.wait_complete(f"POS:ANGL {angle_deg:.2f}", timeout_s=self.MOVE_TIMEOUT_S)
        errs = self.s.errors()
        if errs:
            raise InstrumentError(f"{self.s.address}: POS:ANGL {angle_deg:.2f}: instrument reports {' | '.join(errs)}")

    def angle_deg(self) -> float:
        return self.s.query_float("POS:ANGL?")
