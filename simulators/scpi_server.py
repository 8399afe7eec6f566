"""A SCPI server on loopback TCP (raw socket, VISA address TCPIP::127.0.0.1::PORT::SOCKET) that serves one
simulated instrument's command table, with fault switches: no answer, garbage answer, an error in the
queue, and a disconnect in the middle of a sweep.

Messages end in '\\n'; one message may hold several commands separated by ';' (IEEE 488.2 compound
messages); the answers of the queries in one message go back joined by ';', binary blocks as they are.
"""

from __future__ import annotations

import socket
import threading
from dataclasses import dataclass

FAULTS = ("timeout", "garbage", "scpi_error", "disconnect")


class ScpiFault(Exception):
    """Raised by a command handler for a SCPI error: code and message go into the error queue."""

    def __init__(self, code: int, message: str):
        super().__init__(f"{code},\"{message}\"")
        self.code = code


class Disconnect(Exception):
    """Raised by a handler to drop the connection (the 'disconnect mid-sweep' fault)."""


@dataclass
class Faults:
    """Fault switches, flipped at any time from the test or the command line."""

    timeout: bool = False       # queries get no answer at all
    garbage: bool = False       # queries get junk bytes instead of their answer
    scpi_error: bool = False    # every configuration command also queues -222 "Data out of range"
    disconnect: bool = False    # the connection is closed at the next INIT (mid-sweep)


class Instrument:
    """Base of a simulated instrument: a command table and an error queue."""

    IDN = "meterlink,SIMULATED,0,1.0"

    def __init__(self):
        self.errors: list[str] = []
        self.faults = Faults()
        self.lock = threading.Lock()

    def handle(self, header: str, arg: str, query: bool):
        """Answer one command: a str or bytes for a query, None otherwise; ScpiFault for an error."""
        h = header.upper()
        if h == "*IDN" and query:
            return self.IDN
        if h == "*OPC" and query:
            return "1"
        if h in ("*RST", "*CLS") and not query:
            if h == "*CLS":
                self.errors.clear()
            return None
        if h in ("SYST:ERR", "SYST:ERR:NEXT", "SYSTEM:ERROR") and query:
            return self.errors.pop(0) if self.errors else '0,"No error"'
        return self.command(h, arg, query)

    def command(self, header: str, arg: str, query: bool):  # overridden
        raise ScpiFault(-113, "Undefined header")


def number(arg: str, lo: float, hi: float) -> float:
    """A numeric argument in [lo, hi], else the SCPI error for it."""
    try:
        v = float(arg.split()[0])
    except (ValueError, IndexError):
        raise ScpiFault(-104, "Data type error") from None
    if not lo <= v <= hi:
        raise ScpiFault(-222, "Data out of range")
    return v


def _split(message: str):
    """'A 1;B?' -> [('A', '1', False), ('B', '', True)] (a ':' after ';' is a root-path prefix)."""
    out = []
    for part in message.split(";"):
        part = part.strip()
        if not part:
            continue
        head, _, arg = part.partition(" ")
        head = head.lstrip(":")
        query = head.endswith("?")
        out.append((head.rstrip("?"), arg.strip(), query))
    return out


class ScpiServer:
    """Serves one Instrument on 127.0.0.1:port (0 = a free port) until close()."""

    def __init__(self, instrument: Instrument, port: int = 0, host: str = "127.0.0.1"):
        self.instrument = instrument
        self.sock = socket.create_server((host, port))
        self.port = self.sock.getsockname()[1]
        self.address = f"TCPIP::{host}::{self.port}::SOCKET"
        self._stop = threading.Event()
        self._conns: list[socket.socket] = []
        self._thread = threading.Thread(target=self._accept, name=f"scpi-{self.port}", daemon=True)

    def start(self) -> "ScpiServer":
        self._thread.start()
        return self

    def close(self) -> None:
        self._stop.set()
        for s in [self.sock, *self._conns]:
            try:
                s.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass
            s.close()
        self._thread.join(timeout=2)

    def __enter__(self) -> "ScpiServer":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.close()

    def _accept(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self.sock.accept()
            except OSError:
                return
            self._conns.append(conn)
            threading.Thread(target=self._serve, args=(conn,), daemon=True).start()

    def _serve(self, conn: socket.socket) -> None:
        buf = b""
        try:
            while not self._stop.is_set():
                data = conn.recv(65536)
                if not data:
                    return
                buf += data
                while b"\n" in buf:
                    line, buf = buf.split(b"\n", 1)
                    reply = self._message(line.decode("latin-1"))
                    if reply is not None:
                        conn.sendall(reply)
        except (Disconnect, OSError):
            return
        finally:
            try:
                conn.close()
            finally:
                if conn in self._conns:
                    self._conns.remove(conn)

    def _message(self, line: str) -> bytes | None:
        inst = self.instrument
        answers: list[bytes] = []
        any_query = False
        with inst.lock:
            for head, arg, query in _split(line):
                any_query |= query
                if head.upper() in ("INIT", "INIT:IMM") and inst.faults.disconnect:
                    raise Disconnect()
                try:
                    out = inst.handle(head, arg, query)
                except ScpiFault as exc:
                    inst.errors.append(str(exc))
                    continue
                if not query and inst.faults.scpi_error and not head.startswith("*"):
                    inst.errors.append('-222,"Data out of range"')
                if query and out is not None:
                    answers.append(out if isinstance(out, bytes) else str(out).encode())
        if not any_query:
            return None
        if inst.faults.timeout:
            return None
        if inst.faults.garbage:
            return b"\x07\xfe?ERR\x00junk\n"
        return b";".join(answers) + b"\n"
