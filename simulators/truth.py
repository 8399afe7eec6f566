"""Ground-truth log of the simulated meter: one JSON line per boot and per reading the device produced."""

from __future__ import annotations

import json
import threading


class TruthLog:
    """Append JSON lines to a file; thread-safe; flushes every line so a test can read it live."""

    def __init__(self, path):
        self._f = open(path, "a", encoding="utf-8")
        self._lock = threading.Lock()

    def write(self, record: dict) -> None:
        with self._lock:
            if self._f.closed:
                return
            self._f.write(json.dumps(record, separators=(",", ":")) + "\n")
            self._f.flush()

    def close(self) -> None:
        with self._lock:
            self._f.close()


def read_truth(path) -> list[dict]:
    """All records of a truth log (for tests and analysis)."""
    with open(path, encoding="utf-8") as f:
        return [json.loads(line) for line in f if line.strip()]
