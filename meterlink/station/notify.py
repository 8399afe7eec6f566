"""The service manager's readiness and watchdog protocol (sd_notify) over $NOTIFY_SOCKET, no dependency.

A datagram of ``KEY=VALUE`` lines sent to the AF_UNIX socket named in ``NOTIFY_SOCKET`` (a path,
or ``@name`` for the abstract namespace). ``WATCHDOG_USEC`` (and ``WATCHDOG_PID``, when it names
this process) set the watchdog interval; pings go at a quarter of it, so one late loop turn never
trips it. Without ``NOTIFY_SOCKET`` (not started by systemd) every call does nothing.
"""

from __future__ import annotations

import os
import socket
import time
from typing import Mapping


class Notifier:
    """READY=1 once, WATCHDOG=1 from the main loop (rate-limited), STOPPING=1 at the end."""

    def __init__(self, environ: Mapping[str, str] | None = None):
        env = os.environ if environ is None else environ
        addr = env.get("NOTIFY_SOCKET", "")
        self.address = ("\0" + addr[1:]) if addr.startswith("@") else addr
        self.watchdog_s: float | None = None
        usec, pid = env.get("WATCHDOG_USEC", ""), env.get("WATCHDOG_PID", "")
        if usec.isdigit() and int(usec) > 0 and (not pid or pid == str(os.getpid())):
            self.watchdog_s = int(usec) / 1e6
        self._next_ping = 0.0
        self._sock: socket.socket | None = None

    @property
    def enabled(self) -> bool:
        return bool(self.address)

    def send(self, *lines: str) -> bool:
        """Send one datagram; False when there is no socket or it failed (never raises)."""
        if not self.address:
            return False
        try:
            if self._sock is None:
                self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)
            self._sock.sendto("\n".join(lines).encode("utf-8"), self.address)
            return True
        except OSError:
            return False

    def ready(self, status: str = "") -> bool:
        return self.send("READY=1", f"MAINPID={os.getpid()}", *((f"STATUS={status}",) if status else ()))

    def watchdog(self) -> bool:
        """Ping the watchdog if a quarter of its interval has passed since the last ping."""
        if self.watchdog_s is None:
            return False
        now = time.monotonic()
        if now < self._next_ping:
            return False
        self._next_ping = now + self.watchdog_s / 4.0
        return self.send("WATCHDOG=1")

    def stopping(self, status: str = "") -> bool:
        return self.send("STOPPING=1", *((f"STATUS={status}",) if status else ()))

    def close(self) -> None:
        if self._sock is not None:
            self._sock.close()
            self._sock = None
