"""One reader thread for many ports (meterlink/device/mux.py): nothing lost, the same link events.

Real ptys: twenty bench/loadgen.py meters streaming at 10 readings/s are read by one PortMux, and
every reading each link delivered is checked against its generator's truth. A simulated meter whose
port vanishes and comes back gives, read through the mux, the same sequence of link events as a
link reading on its own thread (today's path) run alongside on a second simulator.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

from meterlink.device.link import LinkEvent, MeterLink, Reading, ReadingBatch
from meterlink.device.mux import PortMux
from meterlink.simulators.pty_meter import SimulatedMeter

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))

from loadfarm import LoadFarm  # noqa: E402

LINK_KINDS = {"handshake", "port_lost", "port_silent", "reconnected", "gave_up", "seq_gap", "duplicate_frame",
              "crc_error", "length_error", "garbage", "malformed", "device_restart", "internal_error", "backpressure"}


def _drain(link, got: dict) -> None:
    while (item := link.get(0.0)) is not None:
        if isinstance(item, ReadingBatch):
            for b, s, t, xyz in zip([item.boot] * len(item.seq), item.seq.tolist(), item.tick_ms.tolist(),
                                    item.raw.tolist()):
                got["readings"].append((b, s, t % (1 << 32), *xyz))
        elif isinstance(item, Reading):
            a = item.axes
            got["readings"].append((item.boot, item.seq, item.tick_ms % (1 << 32), a.x, a.y, a.z))
        elif isinstance(item, LinkEvent):
            got["events"].append(item.kind)


def test_twenty_ports_on_one_reader_thread_lose_nothing(tmp_path):
    mux = PortMux().start()
    with LoadFarm(20, tmp_path, procs=1, seed=3) as farm:
        links = [MeterLink(p, 100, batched=True, read_pause_s=0.2, mux=mux) for p in farm.ports]
        got = [{"readings": [], "events": []} for _ in links]
        for link in links:
            link.start(require_open=False)
        deadline = time.monotonic() + 60
        held = False
        while time.monotonic() < deadline:
            for link, g in zip(links, got):
                _drain(link, g)
            held = held or (mux.n_links == 20 and not any(link._thread.is_alive() for link in links))
            if held and all(len(g["readings"]) >= 30 for g in got):
                break
            time.sleep(0.05)
        for link in links:
            link.request_stop()
        for link in links:
            link.stop()
        mux.stop()
        for link, g in zip(links, got):
            _drain(link, g)
    assert held, "the links never all handed their ports to the one reader thread"
    for i, g in enumerate(got):
        assert len(g["readings"]) >= 30, (i, len(g["readings"]), g["events"])
        t = np.load(farm.truth[i])
        sent = list(zip(t["boot"].tolist(), t["seq"].tolist(), t["tick_ms"].tolist(), *t["raw"].T.tolist()))
        lo, hi = g["readings"][0][1], g["readings"][-1][1]
        expected = [s for s in sent if lo <= s[1] <= hi]
        assert g["readings"] == expected, i                     # each once, in order, tick and counts intact
        assert not (LINK_KINDS - {"handshake"}) & set(g["events"]), (i, g["events"])
        assert g["events"].count("handshake") == 1, (i, g["events"])


def _vanish(mux: PortMux | None, seed: int) -> tuple[list[str], int]:
    """Stream, unplug the port for 1 s, stream again: the link events in order, and readings after."""
    with SimulatedMeter("station", meter=0, seed=seed, speed=10.0) as sim:
        link = MeterLink(sim.port, 1000, batched=True, backoff_max_s=0.2, read_pause_s=0.05, mux=mux).start()
        got = {"readings": [], "events": []}
        unplugged_at = None
        deadline = time.monotonic() + 40
        try:
            while time.monotonic() < deadline:
                _drain(link, got)
                if unplugged_at is None and len(got["readings"]) >= 15:
                    if mux is not None:
                        assert not link._thread.is_alive()     # streaming: read by the mux, not its own thread
                    unplugged_at = len(got["readings"])
                    sim.disconnect(1.0)
                if unplugged_at is not None and "reconnected" in got["events"] \
                        and len(got["readings"]) >= unplugged_at + 15:
                    break
                time.sleep(0.05)
        finally:
            link.stop()
        _drain(link, got)
    return [k for k in got["events"] if k in LINK_KINDS], len(got["readings"]) - (unplugged_at or 0)


def test_a_port_vanishing_gives_the_same_link_events_through_the_mux():
    mux = PortMux().start()
    try:
        through_mux, after_mux = _vanish(mux, seed=5)
    finally:
        mux.stop()
    own_thread, after_own = _vanish(None, seed=5)
    assert through_mux == own_thread, (through_mux, own_thread)
    # (a seq_gap may come between: the simulated device goes on counting while its port is gone)
    assert through_mux[:2] == ["handshake", "port_lost"] and through_mux[-2:] == ["handshake", "reconnected"], \
        through_mux
    assert after_mux >= 15 and after_own >= 15
