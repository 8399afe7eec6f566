"""Fifty meters at 10 readings/s on one `meterlink monitor` process: nothing lost on the batched path.

The meters are bench/loadgen.py processes on real ptys; the monitor is a real process stopped with
SIGTERM. Every reading a meter sent, between the first and the last stored for it, must be stored
exactly once with its tick and counts (the generator's truth), the file must be sound and the stop
clean. Speed is bench/bench_many_meters.py's business, not this test's.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))

from station_load import run_station  # noqa: E402


def test_fifty_meters_on_one_monitor_lose_nothing(tmp_path):
    r = run_station(tmp_path, 50, intervals=1, interval_s=6.0, settle_s=2.0)
    assert r["monitor_rc"] == 0
    assert r["integrity"] == "ok"
    assert len(r["checks"]) == 50
    for i, c in enumerate(r["checks"]):
        assert c["stored"] >= 50, (i, c)                  # several seconds of 10 readings/s each
        assert (c["missing"], c["extra"], c["duplicates"]) == (0, 0, 0), (i, c)
    assert r["loss"] == 0
    assert r["events"].get("handshake", 0) >= 50
    for kind in ("seq_gap", "internal_error", "readings_dropped", "crc_error"):
        assert kind not in r["events"], (kind, r["events"])
