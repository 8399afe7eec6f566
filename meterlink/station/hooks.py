"""External commands that alarms call (hooks): bounded in time, confined, never in the way of acquisition.

Each hook runs as an argument list (no shell) in a new session, so it leads its own process
group; a watcher thread waits for it and, past its timeout, sends SIGTERM to the whole group,
then SIGKILL after ``TERM_GRACE_S``, so a hook's children go with it. The hook sees only
``PATH`` (``HOOK_PATH``), ``LANG=C.UTF-8`` and the variables the alarm gives it, never the
daemon's own environment. The ingest loop only starts hooks and collects finished outcomes
(``outcomes()``, never blocking); ``shutdown(wait_s)`` bounds the time a stop spends on hooks.
See docs/monitoring.md, "Alarm commands".
"""

from __future__ import annotations

import datetime as _dt
import os
import queue
import signal
import subprocess
import threading
import time
from dataclasses import dataclass
from typing import Mapping, Sequence

HOOK_PATH = "/usr/local/bin:/usr/bin:/bin"
DEFAULT_TIMEOUT_S = 10.0
TERM_GRACE_S = 2.0          # SIGTERM -> SIGKILL of a timed-out hook's group
STOP_WAIT_S = 5.0           # at shutdown, running hooks get this long before their groups are killed
MAX_RUNNING = 8             # more at once are refused (and recorded), so a flapping alarm cannot fork-bomb


def iso_ms(t_utc: float) -> str:
    """POSIX seconds as ISO 8601 UTC with milliseconds, e.g. '2001-09-09T01:46:40.123Z'."""
    ms = int(round(t_utc * 1000.0))
    d = _dt.datetime.fromtimestamp(ms // 1000, _dt.timezone.utc)
    return f"{d:%Y-%m-%dT%H:%M:%S}.{ms % 1000:03d}Z"


def hook_environment(extra: Mapping[str, str]) -> dict[str, str]:
    """The whole environment of a hook: PATH, LANG and the alarm's own variables."""
    env = {"PATH": HOOK_PATH, "LANG": "C.UTF-8"}
    env.update({str(k): str(v) for k, v in extra.items()})
    return env


@dataclass(frozen=True)
class HookOutcome:
    """How one hook ended. kind: 'exited', 'timeout', 'killed_at_stop', 'not_started' or 'skipped'."""

    kind: str
    label: str
    argv0: str
    pid: int | None
    returncode: int | None
    duration_s: float
    timeout_s: float
    error: str = ""


class HookRunner:
    """Start hooks and watch them; thread-safe; outcomes are collected by the caller's loop."""

    def __init__(self, max_running: int = MAX_RUNNING, term_grace_s: float = TERM_GRACE_S):
        self.max_running, self.term_grace_s = max_running, term_grace_s
        self._done: queue.SimpleQueue[HookOutcome] = queue.SimpleQueue()
        self._running: dict[int, tuple[subprocess.Popen, threading.Thread]] = {}
        self._lock = threading.Lock()
        self._stopping = threading.Event()

    @property
    def running(self) -> int:
        with self._lock:
            return len(self._running)

    def start(self, argv: Sequence[str], env: Mapping[str, str], timeout_s: float = DEFAULT_TIMEOUT_S,
              label: str = "") -> int | None:
        """Start one hook; returns its pid, or None (not started: the outcome says why)."""
        argv = [str(a) for a in argv]
        if not argv:
            return None
        t0 = time.monotonic()
        with self._lock:
            busy = len(self._running) >= self.max_running or self._stopping.is_set()
        if busy:
            why = "stopping" if self._stopping.is_set() else f"{self.max_running} hooks already running"
            self._done.put(HookOutcome("skipped", label, argv[0], None, None, 0.0, timeout_s, why))
            return None
        try:
            p = subprocess.Popen(argv, env=hook_environment(env), cwd="/", stdin=subprocess.DEVNULL,
                                 stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, close_fds=True,
                                 start_new_session=True)
        except (OSError, ValueError) as exc:     # ValueError: a NUL inside an argument or variable
            why = (exc.strerror if isinstance(exc, OSError) else None) or str(exc)
            self._done.put(HookOutcome("not_started", label, argv[0], None, None, 0.0, timeout_s, why))
            return None
        th = threading.Thread(target=self._watch, args=(p, t0, timeout_s, label, argv[0]),
                              name=f"meterlink-hook-{p.pid}", daemon=True)
        with self._lock:
            self._running[p.pid] = (p, th)
        th.start()
        return p.pid

    def _watch(self, p: subprocess.Popen, t0: float, timeout_s: float, label: str, argv0: str) -> None:
        kind = "exited"
        try:
            try:
                p.wait(timeout_s)
            except subprocess.TimeoutExpired:
                kind = "killed_at_stop" if self._stopping.is_set() else "timeout"
                # the leader is not reaped before SIGKILL, so its pid (= the group id) cannot be reused
                _killpg(p.pid, signal.SIGTERM)
                self._stopping.wait(self.term_grace_s)
                _killpg(p.pid, signal.SIGKILL)
                p.wait()
            else:
                if self._stopping.is_set() and p.returncode == -signal.SIGKILL:
                    kind = "killed_at_stop"
        finally:
            with self._lock:
                self._running.pop(p.pid, None)
            self._done.put(HookOutcome(kind, label, argv0, p.pid, p.returncode, time.monotonic() - t0, timeout_s))

    def outcomes(self) -> list[HookOutcome]:
        """Outcomes of hooks that ended since the last call (never blocks)."""
        out = []
        while True:
            try:
                out.append(self._done.get_nowait())
            except queue.Empty:
                return out

    def shutdown(self, wait_s: float = STOP_WAIT_S) -> list[HookOutcome]:
        """Refuse new hooks, give running ones up to wait_s, kill the groups of the rest; their outcomes."""
        deadline = time.monotonic() + max(0.0, wait_s)
        with self._lock:
            threads = [th for _, th in self._running.values()]
        for th in threads:
            th.join(max(0.0, deadline - time.monotonic()))
        self._stopping.set()                          # also cuts a timed-out hook's SIGTERM grace short
        with self._lock:
            left = list(self._running.values())
        for p, _ in left:
            _killpg(p.pid, signal.SIGKILL)
        for _, th in left:
            th.join(2.0)
        return self.outcomes()


def _killpg(pgid: int, sig: int) -> None:
    try:
        os.killpg(pgid, sig)
    except (ProcessLookupError, PermissionError):
        pass
