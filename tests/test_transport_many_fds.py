"""A port whose descriptors are numbered 1024 or above (a host with hundreds of ports open).

pyserial waits with select(), which refuses such descriptors; the transport reads and writes them
with poll() instead. Here the test process first holds about 1100 descriptors, then a link to a
simulated meter on a real pty must handshake, stream readings in sequence, notice the port
vanishing and reconnect, as on any port.
"""

from __future__ import annotations

import os
import resource
import time

from meterlink.device.link import LinkEvent, MeterLink, Reading, ReadingBatch
from meterlink.device.transport import SerialLink, _high_fd
from meterlink.simulators.pty_meter import SimulatedMeter


def test_a_link_on_high_descriptors_streams_and_reconnects():
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if soft < 2048:
        resource.setrlimit(resource.RLIMIT_NOFILE, (min(2048, hard), hard))
    held = []
    # the simulator first: its own select() loop must keep low descriptors
    with SimulatedMeter("station", meter=0, seed=1, speed=10.0) as sim:
        try:
            while not held or held[-1] < 1100:
                held.append(os.open(os.devnull, os.O_RDONLY))
            probe = SerialLink(sim.port)
            probe.open()
            assert _high_fd(probe._ser) is not None          # this port takes the poll() path
            probe.close()
            link = MeterLink(sim.port, 1000, batched=True, backoff_max_s=0.2).start()
            try:
                seqs, kinds = [], []
                deadline = time.monotonic() + 30
                disconnected = False
                while time.monotonic() < deadline:
                    item = link.get(0.2)
                    if isinstance(item, ReadingBatch):
                        seqs += item.seq.tolist()
                    elif isinstance(item, Reading):
                        seqs.append(item.seq)
                    elif isinstance(item, LinkEvent):
                        kinds.append(item.kind)
                    if len(seqs) >= 20 and not disconnected:
                        before = list(kinds)
                        sim.disconnect(1.0)
                        disconnected = True
                    if "reconnected" in kinds and len(seqs) >= 40:
                        break
            finally:
                link.stop()
        finally:
            for fd in held:
                os.close(fd)
    assert len(seqs) >= 40, (len(seqs), kinds)
    assert "port_lost" in kinds and "reconnected" in kinds, kinds
    assert "internal_error" not in kinds, kinds
    # before the port went: in sequence (STATUS frames take seq numbers too), nothing lost or repeated
    assert all(b > a for a, b in zip(seqs[:20], seqs[1:20]))
    assert not {"seq_gap", "duplicate_frame", "crc_error"} & set(before), before
