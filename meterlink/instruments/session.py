"""One SCPI session over pyvisa's pure-Python backend ('@py'): open by VISA address, query with
timeouts, read the error queue after each configuration, and fail with a one-line InstrumentError
that names the address and the command (never a pyvisa traceback).

Standard commands only (IEEE 488.2 common commands and the SCPI 1999.0 SYSTem:ERRor? queue).
"""

from __future__ import annotations

import math
import struct

from meterlink.errors import MeterlinkError
from meterlink.safetext import clean_text

DEFAULT_TIMEOUT_S = 5.0
#: Error-queue entries read before giving up: a queue that never empties is itself a fault.
MAX_QUEUE_ENTRIES = 32


class InstrumentError(MeterlinkError):
    """An instrument that cannot be opened, times out, answers nonsense, reports SCPI errors or goes away."""


def _short(text, n: int = 60) -> str:
    return clean_text(str(text))[:n]


class ScpiSession:
    """A VISA resource with text I/O, the error queue and binary block read-out."""

    def __init__(self, address: str, *, timeout_s: float = DEFAULT_TIMEOUT_S, termination: str = "\n"):
        self.address = address
        self.timeout_s = float(timeout_s)
        self.termination = termination
        self._rm = None
        self._res = None
        self.idn = ""

    # -- opening and closing -------------------------------------------------
    def open(self) -> "ScpiSession":
        """Open the resource with the '@py' backend and read *IDN?."""
        try:
            import pyvisa
        except ImportError:
            raise InstrumentError("SCPI instruments need pyvisa and pyvisa-py: pip install 'meterlink[scpi]'") from None
        try:
            self._rm = pyvisa.ResourceManager("@py")
            self._res = self._rm.open_resource(self.address, open_timeout=int(self.timeout_s * 1000))
        except Exception as exc:  # pyvisa raises many types (VisaIOError, ValueError, OSError): one line each
            self._close_quietly()
            raise InstrumentError(f"{self.address}: cannot open: {_short(exc, 120)}") from None
        self._res.timeout = int(self.timeout_s * 1000)
        self._res.read_termination = self.termination
        self._res.write_termination = self.termination
        try:
            self.idn = self.query("*IDN?")
        except InstrumentError as exc:
            self._close_quietly()
            raise InstrumentError(f"{self.address}: cannot open: *IDN?{str(exc).split('*IDN?', 1)[-1]}") from None
        if self.idn.count(",") < 3:
            self._close_quietly()
            raise InstrumentError(f"{self.address}: *IDN? answered {_short(self.idn)!r}, not maker,model,serial,firmware")
        return self

    def _close_quietly(self) -> None:
        for thing in (self._res, self._rm):
            try:
                if thing is not None:
                    thing.close()
            except Exception:  # closing a dead socket may raise; nothing is left to save
                pass
        self._res = self._rm = None

    def close(self) -> None:
        self._close_quietly()

    def __enter__(self) -> "ScpiSession":
        return self.open() if self._res is None else self

    def __exit__(self, *exc) -> None:
        self.close()

    # -- I/O -------------------------------------------------------------------
    def _fail(self, command: str, exc: Exception) -> InstrumentError:
        text = str(exc)
        if "TMO" in text or "imeout" in text:
            why = f"no answer within {self._res.timeout / 1000 if self._res is not None else self.timeout_s:g} s"
        elif "CONN" in text or "closed" in text.lower() or isinstance(exc, (ConnectionError, BrokenPipeError)):
            why = "the connection was lost"
        else:
            why = _short(text, 100)
        return InstrumentError(f"{self.address}: {command}: {why}")

    def _need_open(self, command: str):
        if self._res is None:
            raise InstrumentError(f"{self.address}: {command}: session is not open")
        return self._res

    def write(self, command: str) -> None:
        res = self._need_open(command)
        try:
            res.write(command)
        except Exception as exc:
            raise self._fail(command, exc) from None

    def query(self, command: str) -> str:
        """Send a query and return its answer as stripped text (UTF-8 errors shown, never raised)."""
        res = self._need_open(command)
        try:
            res.write(command)
            raw = res.read_raw()
        except Exception as exc:
            raise self._fail(command, exc) from None
        return raw.decode("utf-8", "replace").strip()

    def query_float(self, command: str) -> float:
        """A query whose answer is one finite number."""
        text = self.query(command)
        try:
            v = float(text)
        except ValueError:
            raise InstrumentError(f"{self.address}: {command}: answered {_short(text)!r}, not a number") from None
        if not math.isfinite(v) or abs(v) >= 9.9e37:  # 9.91e37 is SCPI's NaN
            raise InstrumentError(f"{self.address}: {command}: answered {_short(text)!r}, not a finite number")
        return v

    def query_floats(self, command: str) -> list[float]:
        """A query answering comma-separated numbers (an ASCII trace)."""
        text = self.query(command)
        try:
            vals = [float(x) for x in text.split(",")]
        except ValueError:
            raise InstrumentError(f"{self.address}: {command}: answered {_short(text)!r}, "
                                  "not comma-separated numbers") from None
        if not all(math.isfinite(v) for v in vals):
            raise InstrumentError(f"{self.address}: {command}: the answer holds non-finite numbers")
        return vals

    def query_block_real32(self, command: str, byte_order: str = "<") -> list[float]:
        """A query answering an IEEE 488.2 definite-length block (#<n><len><data>) of 32-bit floats."""
        res = self._need_open(command)
        try:
            res.write(command)
            head = res.read_bytes(2)
            if head[:1] != b"#" or not head[1:2].isdigit() or head[1:2] == b"0":
                rest = b""
                try:
                    rest = res.read_raw()
                except Exception:  # the garbage may have no terminator: what we hold is enough to say
                    pass
                raise InstrumentError(f"{self.address}: {command}: answered {_short((head + rest).decode('latin-1'))!r}, "
                                      "not a definite-length binary block")
            ndig = int(head[1:2])
            length_text = res.read_bytes(ndig)
            if not length_text.isdigit():
                raise InstrumentError(f"{self.address}: {command}: block length {_short(length_text.decode('latin-1'))!r} "
                                      "is not a number")
            n = int(length_text)
            data = res.read_bytes(n) if n else b""
            tail = res.read_bytes(1)  # the message terminator after the block
        except InstrumentError:
            raise
        except Exception as exc:
            raise self._fail(command, exc) from None
        if n % 4:
            raise InstrumentError(f"{self.address}: {command}: block of {n} bytes is not whole 32-bit floats")
        if tail != self.termination.encode()[-1:]:
            raise InstrumentError(f"{self.address}: {command}: block not followed by the message terminator")
        vals = list(struct.unpack(f"{byte_order}{n // 4}f", data))
        if not all(math.isfinite(v) for v in vals):
            raise InstrumentError(f"{self.address}: {command}: the block holds non-finite numbers")
        return vals

    # -- errors and synchronisation -------------------------------------------
    def errors(self) -> list[str]:
        """Drain SYST:ERR? until '0,...'; the entries that were errors."""
        found = []
        for _ in range(MAX_QUEUE_ENTRIES):
            text = self.query("SYST:ERR?")
            code, _, msg = text.partition(",")
            try:
                n = int(code)
            except ValueError:
                raise InstrumentError(f"{self.address}: SYST:ERR?: answered {_short(text)!r}, not <code>,<message>") from None
            if n == 0:
                return found
            found.append(f"{n},{_short(msg.strip(), 80)}")
        raise InstrumentError(f"{self.address}: SYST:ERR?: the error queue did not empty after {MAX_QUEUE_ENTRIES} reads")

    def configure(self, *commands: str) -> None:
        """Send settings, then drain the error queue; any entry fails naming the commands."""
        for c in commands:
            self.write(c)
        errs = self.errors()
        if errs:
            raise InstrumentError(f"{self.address}: {'; '.join(commands)}: instrument reports {' | '.join(errs)}")

    def wait_complete(self, command: str, timeout_s: float) -> None:
        """Send command followed by *OPC? and wait (up to timeout_s) for its '1'."""
        res = self._need_open(command)
        old = res.timeout
        res.timeout = int(max(timeout_s, self.timeout_s) * 1000)
        try:
            text = self.query(f"{command};*OPC?")
        finally:
            if self._res is not None:
                self._res.timeout = old
        if text != "1":
            raise InstrumentError(f"{self.address}: {command};*OPC?: answered {_short(text)!r}, not 1")


def open_session(address: str, **kw) -> ScpiSession:
    """An opened ScpiSession (the caller closes it, or uses it in a with-block)."""
    return ScpiSession(address, **kw).open()
