"""A bench made of a lab controller (signal generator, rotator) and a meter read over its serial link.

The controller's apply(...) returns the device tick (ms) from which readings see the new set-up
(None if it cannot tell: then `settle_readings` readings are discarded). Only readings whose
whole integration time lies after that tick are kept: a reading's TICK is the middle of its
integration, so it must be at least half an interval later. The controller must take that tick
at the same instant as it switches (meterlink.simulators.lab.LabMeter.apply holds the device clock for it).
"""

from __future__ import annotations

import time

import numpy as np

from meterlink.device.clock import HALF_TICK
from meterlink.errors import LinkError
from meterlink.lab.session import LabError
from meterlink.device.link import Connected, LinkEvent, MeterLink, Reading
from meterlink.device.protocol import AXIS_OVER_X, U32_MOD

OVER_ANY = AXIS_OVER_X | (AXIS_OVER_X << 1) | (AXIS_OVER_X << 2)


def tick_after_ms(tick_ms: float, ref_ms: float) -> float:
    """Device ms from ref to tick across the 32-bit TICK wrap (negative: tick is earlier).

    The link hands out unwrapped ticks, the controller the device's raw one: compared plainly,
    after a wrap every old reading would look later than the set-up.
    """
    d = (tick_ms - ref_ms) % U32_MOD
    return d - U32_MOD if d >= HALF_TICK else d


class MeterBench:
    """apply() sets the lab's controller; read(n) takes n fresh readings from the MeterLink."""

    def __init__(self, controller, link: MeterLink, timeout_s: float = 10.0, settle_readings: int = 2):
        self.controller, self.link = controller, link
        self.timeout_s, self.settle_readings = float(timeout_s), int(settle_readings)
        self.interval_ms: int | None = None
        self._after_tick: float | None = None
        self._skip = 0

    def wait_connected(self) -> Connected:
        """Wait for the link's handshake; LinkError on timeout or a link error."""
        deadline = time.monotonic() + self.timeout_s
        while time.monotonic() < deadline:
            item = self.link.get(0.05)
            if isinstance(item, Connected):
                self.interval_ms = item.interval_ms
                return item
            if isinstance(item, LinkEvent) and item.severity == "error":
                raise LinkError(f"lab meter: {item.message}")
        raise LinkError(f"lab meter on {self.link.port}: no handshake within {self.timeout_s:g} s")

    def apply(self, freq_hz, e_v_per_m, direction_world, rotator_deg, tilt_deg) -> None:
        tick = self.controller.apply(freq_hz, e_v_per_m, direction_world, rotator_deg, tilt_deg)
        self._after_tick = None if tick is None else float(tick) + (self.interval_ms or 0) / 2
        # interval unknown: a reading timed after the tick may still have begun before it
        self._skip = self.settle_readings if tick is None or not self.interval_ms else 0

    def set_temperature(self, temp_c: float | None) -> None:
        """The lab controller's climatic chamber (temperature steps); LabError if it has none."""
        setter = getattr(self.controller, "set_temperature", None)
        if setter is None:
            raise LabError("the lab controller has no climatic chamber (set_temperature)")
        setter(temp_c)

    def read(self, n: int) -> np.ndarray:
        out = []
        deadline = time.monotonic() + self.timeout_s
        while len(out) < n:
            if time.monotonic() >= deadline:
                raise LinkError(f"lab meter on {self.link.port}: only {len(out)} of {n} readings within "
                                f"{self.timeout_s:g} s")
            item = self.link.get(0.05)
            if isinstance(item, Connected):
                self.interval_ms = item.interval_ms
            if not isinstance(item, Reading):
                continue
            if self._after_tick is not None and tick_after_ms(item.tick_ms, self._after_tick) < 0:
                continue
            if self._skip:
                self._skip -= 1
                continue
            if item.axes.flags & OVER_ANY:
                raise LabError(f"meter over range at this step (counts {item.axes.x}, {item.axes.y}, {item.axes.z})")
            out.append((item.axes.x, item.axes.y, item.axes.z))
        return np.array(out, dtype=float)
