"""Record from N simulated meters at once in this process and check every reading against the truth logs."""

from __future__ import annotations

import resource
import threading
import time
from pathlib import Path

from farm import Farm
from meterlink.storage.recorder import Recorder
from meterlink.storage.store import Store
from meterlink.simulators.truth import read_truth


def _cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def losses(store: Store, session_id: int, truth_path) -> dict:
    """Compare a session with its simulator's truth: missing, extra and altered readings."""
    r = store.readings(session_id)
    got = [(int(b), int(q), int(t), tuple(int(c) for c in raw)) for b, q, t, raw in zip(r.boot, r.seq, r.tick_ms, r.raw)]
    sent = [(t["boot"], t["seq"], t["tick_ms"], tuple(t["counts"])) for t in read_truth(truth_path)
            if t.get("event") == "reading" and t["fate"] == "sent"]
    last = max((g[1] for g in got), default=-1)
    first = min((g[1] for g in got), default=0)
    expected = [s for s in sent if first <= s[1] <= last]
    gs, es = set(got), set(expected)
    return {"stored": len(got), "expected": len(expected), "missing": len(es - gs), "extra": len(gs - es),
            "duplicates": len(got) - len(gs), "first_seq": first,
            "first_sent_seq": sent[0][1] if sent else None}


def record_many(tmp: Path, n: int = 8, speed: float = 10.0, interval_ms: int = 1000, duration_s: float = 60.0,
                seed: int = 0) -> dict:
    """N meters, one Store, one Recorder thread each; returns counts, CPU and the loss check per meter."""
    tmp = Path(tmp)
    with Farm(n, tmp, speed=speed, seed=seed) as farm:
        store = Store(tmp / "many.db")
        recs = [Recorder(store, port, interval_ms=interval_ms, duration_s=duration_s,
                         host_timeout_s=duration_s / speed * 3 + 30) for port in farm.ports]
        summaries: list = [None] * n
        errors: list = []

        def go(i):
            try:
                summaries[i] = recs[i].run()
            except Exception as exc:  # reported, and fails the check below
                errors.append(f"meter {i}: {type(exc).__name__}: {exc}")

        threads = [threading.Thread(target=go, args=(i,), name=f"bench-recorder-{i}") for i in range(n)]
        c0, w0 = _cpu(), time.monotonic()
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        cpu, wall = _cpu() - c0, time.monotonic() - w0
        farm_cpu = farm.cpu_s()
    checks = [losses(store, s.session_id, farm.truth[i]) if s else None for i, s in enumerate(summaries)]
    integrity = store.db.execute("PRAGMA integrity_check").fetchone()[0]
    store.close()
    readings = sum(c["stored"] for c in checks if c)
    return {"n": n, "wall_s": wall, "host_cpu_s": cpu, "farm_cpu_s": farm_cpu, "readings": readings,
            "checks": checks, "errors": errors, "integrity": integrity,
            "stop_reasons": [s.stop_reason if s else None for s in summaries],
            "lost_frames": [s.lost_frames if s else None for s in summaries]}
