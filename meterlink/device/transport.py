"""Byte transports for the meter link: the one module that imports pyserial.

A port string picks the transport the way pyserial does: a device path (``/dev/ttyACM0``,
``COM3``) or a URL (``socket://host:port``, ``rfc2217://host:port``, ``loop://``,
``spy://PORT`` for a hex dump of all traffic).
"""

from __future__ import annotations

from dataclasses import dataclass

from meterlink.errors import LinkError

DEFAULT_BAUD = 115200


class Link:
    """A byte stream to a device: open, read with a timeout, write, close."""

    port: str = ""

    def open(self) -> None:
        raise NotImplementedError

    def read(self, max_bytes: int = 4096, timeout_s: float = 0.1) -> bytes:
        """Up to max_bytes, returning early with whatever arrived once timeout_s has passed."""
        raise NotImplementedError

    def write(self, data: bytes) -> None:
        raise NotImplementedError

    def close(self) -> None:
        raise NotImplementedError

    def fileno(self) -> int | None:
        """The descriptor a poller can wait on for this link's input, or None (read it from a thread)."""
        return None

    def read_ready(self, max_bytes: int) -> bytes:
        """After the poller saw fileno() readable: what is there (b"" if nothing after all)."""
        raise NotImplementedError

    @property
    def is_open(self) -> bool:
        raise NotImplementedError

    def __enter__(self) -> "Link":
        self.open()
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _high_fd(ser) -> int | None:
    """The descriptor of a local port when it or pyserial's pipes are numbered 1024 or above (a host with
    hundreds of ports open), else None.

    pyserial waits with select(), which cannot take such a descriptor (FD_SETSIZE); these ports are
    read and written here with poll() instead. Ports below stay on pyserial's own path.
    """
    fd = getattr(ser, "fd", None)
    if not isinstance(fd, int) or fd < 0:
        return None
    # pyserial's select() also waits on its own abort pipes, which may be the ones numbered that high
    fds = [fd, *(getattr(ser, a, None) for a in ("pipe_abort_read_r", "pipe_abort_write_r"))]
    return fd if max(f for f in fds if isinstance(f, int)) >= 1024 else None


def _poll_read(fd: int, max_bytes: int, timeout_s: float) -> bytes:
    """Up to max_bytes, waiting at most timeout_s for the first; b"" if none came. A port that reports
    readiness and gives nothing (the other end gone) raises OSError, as pyserial's read would fail."""
    import os
    import select

    p = select.poll()
    p.register(fd, select.POLLIN)
    if not p.poll(max(0, int(timeout_s * 1000))):
        return b""
    try:
        data = os.read(fd, max_bytes)
    except BlockingIOError:
        return b""
    if not data:
        raise OSError("device reports readiness to read but returned no data (device disconnected?)")
    return data


def _poll_write(fd: int, data: bytes, timeout_s: float) -> None:
    """Write all of data, waiting with poll() while the port's buffer is full (OSError after timeout_s)."""
    import os
    import select
    import time

    view = memoryview(data)
    deadline = time.monotonic() + timeout_s
    p = select.poll()
    p.register(fd, select.POLLOUT)
    while view:
        try:
            view = view[os.write(fd, view):]
            continue
        except BlockingIOError:
            pass
        left = deadline - time.monotonic()
        if left <= 0 or not p.poll(int(left * 1000) + 1):
            raise OSError("write timeout")


# pyserial classes whose fileno() is the very descriptor their read() reads from (non-blocking)
_FD_MODULES = ("serial.serialposix", "serial.urlhandler.protocol_socket")


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__


class SerialLink(Link):
    """A pyserial port or URL; every failure is a LinkError naming the port."""

    def __init__(self, port: str, baudrate: int = DEFAULT_BAUD):
        if not port or not str(port).strip():
            raise LinkError("no serial port given")
        self.port = str(port)
        self.baudrate = baudrate
        self._ser = None
        self._timeout_s = 0.0
        self._extra = bytearray()

    def open(self) -> None:
        import serial

        if self.is_open:
            return
        try:
            self._ser = serial.serial_for_url(self.port, baudrate=self.baudrate, timeout=0,
                                              write_timeout=2.0)
            self._timeout_s = 0.0
        except (serial.SerialException, OSError, ValueError) as exc:
            self._ser = None
            raise LinkError(f"cannot open port {self.port!r}: {_one_line(exc)}") from None

    def read(self, max_bytes: int = 4096, timeout_s: float = 0.1) -> bytes:
        import serial

        ser = self._require()
        if not self._extra:
            try:
                self._extra += self._read_some(ser, max_bytes, timeout_s)
            except (serial.SerialException, OSError, TypeError, AttributeError) as exc:
                # TypeError/AttributeError: pyserial internals after the descriptor vanished under it
                self._drop()
                raise LinkError(f"port {self.port!r} lost: {_one_line(exc)}") from None
        # some URL handlers (loop://) hand back more than asked for: keep the rest for the next read
        data = bytes(self._extra[:max_bytes])
        del self._extra[:max_bytes]
        return data

    def _read_some(self, ser, max_bytes: int, timeout_s: float) -> bytes:
        fd = _high_fd(ser)
        if fd is not None:
            return _poll_read(fd, max_bytes, timeout_s)
        waiting = ser.in_waiting
        if waiting:
            return ser.read(min(waiting, max_bytes))
        timeout_s = max(0.0, round(timeout_s, 3))
        if timeout_s != self._timeout_s:  # a change reconfigures the port: only when needed
            ser.timeout = self._timeout_s = timeout_s
        data = ser.read(1)
        if data and max_bytes > 1:
            waiting = ser.in_waiting
            if waiting:
                data += ser.read(min(waiting, max_bytes - 1))
        return data

    def write(self, data: bytes) -> None:
        import serial

        ser = self._require()
        try:
            fd = _high_fd(ser)
            if fd is not None:
                _poll_write(fd, data, 2.0)
            else:
                ser.write(data)
            ser.flush()
        except (serial.SerialException, OSError, TypeError, AttributeError) as exc:
            self._drop()
            raise LinkError(f"port {self.port!r} lost: {_one_line(exc)}") from None

    def close(self) -> None:
        self._drop()

    def fileno(self) -> int | None:
        """The descriptor of a local port (pyserial opens it non-blocking) or of a socket:// URL; None for
        the URL handlers that have none (loop://, spy://, rfc2217://, which wrap their own reads)."""
        ser = self._ser
        if ser is None or type(ser).__module__ not in _FD_MODULES:
            return None
        try:
            fd = ser.fileno()
        except Exception:  # noqa: BLE001 - a handler without a usable descriptor: read it from a thread
            return None
        return fd if isinstance(fd, int) and fd >= 0 else None

    def read_ready(self, max_bytes: int) -> bytes:
        """One non-blocking read of the descriptor; the other end gone is a LinkError as in read()."""
        import os

        if self._extra:
            return self.read(max_bytes, 0.0)
        fd = self.fileno()
        if fd is None:
            raise LinkError(f"port {self.port!r} is not open")
        try:
            data = os.read(fd, max_bytes)
        except BlockingIOError:
            return b""
        except OSError as exc:   # worded as pyserial's read words it
            self._drop()
            raise LinkError(f"port {self.port!r} lost: read failed: {_one_line(exc)}") from None
        if not data:   # readable yet empty: end of file, as pyserial's own read reports it
            self._drop()
            raise LinkError(f"port {self.port!r} lost: device reports readiness to read but returned no data "
                            "(device disconnected or multiple access on port?)")
        return data

    @property
    def is_open(self) -> bool:
        return self._ser is not None and bool(self._ser.is_open)

    def _require(self):
        if self._ser is None:
            raise LinkError(f"port {self.port!r} is not open")
        return self._ser

    def _drop(self) -> None:
        self._extra.clear()
        ser, self._ser = self._ser, None
        if ser is not None:
            try:
                ser.close()
            except Exception:  # closing a port that already vanished: nothing left to do
                pass


@dataclass(frozen=True)
class PortInfo:
    """One serial port as the operating system reports it."""

    device: str
    description: str
    hwid: str


def list_ports() -> list[PortInfo]:
    """Serial ports pyserial can see on this machine, sorted by device name."""
    from serial.tools import list_ports as lp

    return sorted((PortInfo(p.device, p.description or "", p.hwid or "") for p in lp.comports()),
                  key=lambda p: p.device)


def open_link(port: str, baudrate: int = DEFAULT_BAUD) -> SerialLink:
    """Open a SerialLink on a device path or URL; LinkError if it cannot be opened."""
    link = SerialLink(port, baudrate)
    link.open()
    return link

