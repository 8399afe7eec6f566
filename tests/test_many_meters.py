"""Eight simulated meters recorded at once by one host process (one Store, one Recorder each).

The meters run in a child process on ptys (bench/sim_farm.py); every reading a device sent,
between the first and last stored for it, must be stored exactly once with its tick and counts.
"""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))

from many import record_many  # noqa: E402


def test_eight_meters_at_once_lose_nothing(tmp_path):
    r = record_many(tmp_path, n=8, speed=10.0, interval_ms=1000, duration_s=40.0, seed=5)
    assert not r["errors"], r["errors"]
    assert r["integrity"] == "ok"
    assert r["stop_reasons"] == ["duration reached"] * 8, r["stop_reasons"]
    for i, c in enumerate(r["checks"]):
        assert c is not None, i
        assert c["stored"] >= 40, (i, c)
        assert (c["missing"], c["extra"], c["duplicates"]) == (0, 0, 0), (i, c)
        assert c["first_seq"] == c["first_sent_seq"], (i, c)   # nothing skipped at the head of the stream
    assert r["lost_frames"] == [0] * 8
    # the CPU is measured (and reported by bench_many_meters); here only that it is sane
    assert 0 < r["host_cpu_s"] < r["wall_s"] * 2
