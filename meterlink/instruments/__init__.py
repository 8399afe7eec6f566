"""SCPI instruments through pyvisa (pure-Python backend): spectrum analyser, signal generator, power meter
and rotator, each a thin wrapper over one ScpiSession that turns every failure into a one-line error."""

from meterlink.instruments.session import InstrumentError, ScpiSession, open_session

__all__ = ["InstrumentError", "ScpiSession", "open_session"]
