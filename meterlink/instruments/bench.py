"""Signal generator, power meter and rotator over SCPI.

Dialects: the generator and power meter speak the SCPI 1999.0 SOURce/OUTPut and SENSe/CALibration/
FETCh subsystems (FREQ, POW, OUTP ON|OFF; CAL:ZERO:AUTO ONCE, SENS:FREQ, READ?), as most makers take
them. A rotator (turntable, positioner) has no standard command set; this class speaks a small SCPI-
styled one: POS:ANGL <deg>, POS:ANGL?, *OPC? after the move; a multi-axis positioner also takes
POS:DIR x,y,z and POS:TILT <deg>. A maker's own positioner needs its strings
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

    def __init__(self, session: ScpiSession, move_timeout_s: float = 60.0):
        self.s = session
        self.move_timeout_s = float(move_timeout_s)

    def move(self, angle_deg: float) -> None:
        self.s.wait_complete(f"POS:ANGL {angle_deg:.2f}", timeout_s=self.move_timeout_s)
        errs = self.s.errors()
        if errs:
            raise InstrumentError(f"{self.s.address}: POS:ANGL {angle_deg:.2f}: instrument reports {' | '.join(errs)}")

    def angle_deg(self) -> float:
        return self.s.query_float("POS:ANGL?")

    def place(self, direction, tilt_deg: float) -> None:
        """A multi-axis positioner: the field's direction in the probe holder's axes (POS:DIR x,y,z) and the
        holder's tilt (POS:TILT deg); a plain turntable answers these with an error, and the operator places."""
        x, y, z = (float(v) for v in direction)
        self.s.wait_complete(f"POS:DIR {x:.6f},{y:.6f},{z:.6f};POS:TILT {float(tilt_deg):.2f}",
                             timeout_s=self.move_timeout_s)
        errs = self.s.errors()
        if errs:
            raise InstrumentError(f"{self.s.address}: POS:DIR/POS:TILT: instrument reports {' | '.join(errs)}")
