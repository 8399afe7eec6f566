"""Device time: unwrap the u32 millisecond tick, map it to UTC, and track its drift (pure).

The mapping is fixed at the handshake: t_utc = utc0 + (tick - tick0) / 1000, with tick unwrapped.
Drift is the least-squares slope of device time against host monotonic time over recent pairs,
so one late read by the host does not move it. A device restart resets the mapping.
"""

from __future__ import annotations

from collections import deque
from itertools import chain
from dataclasses import dataclass

import numpy as np

TICK_MOD = 1 << 32
HALF_TICK = 1 << 31


@dataclass(frozen=True)
class ClockMapping:
    """How device ticks of one boot map to UTC: utc0 (epoch s) corresponds to tick0 (unwrapped ms)."""

    boot: int
    tick0_ms: int
    utc0_s: float


class TickUnwrapper:
    """Turn a stream of u32 ticks into a non-decreasing-ish int; a backward step > 2^31 ms is a wrap."""

    def __init__(self) -> None:
        self._last_raw: int | None = None
        self._wraps = 0

    def unwrap(self, tick_u32: int) -> int:
        tick_u32 %= TICK_MOD
        if self._last_raw is not None:
            back = self._last_raw - tick_u32
            if back > HALF_TICK:
                self._wraps += 1
            elif -back > HALF_TICK and self._wraps > 0:
                self._wraps -= 1  # a late frame from just before the wrap
        self._last_raw = tick_u32
        return self._wraps * TICK_MOD + tick_u32

    def peek(self, tick_u32: int) -> int:
        """Unwrapped value of tick_u32 without advancing the state."""
        tick_u32 %= TICK_MOD
        wraps = self._wraps
        if self._last_raw is not None:
            back = self._last_raw - tick_u32
            if back > HALF_TICK:
                wraps += 1
            elif -back > HALF_TICK and wraps > 0:
                wraps -= 1
        return wraps * TICK_MOD + tick_u32


def drift_ratio(host_s: np.ndarray, device_s: np.ndarray) -> float | None:
    """Least-squares slope d(device time)/d(host time); None with fewer than 3 pairs or no spread."""
    host_s = np.asarray(host_s, dtype=float)
    device_s = np.asarray(device_s, dtype=float)
    if host_s.size < 3:
        return None
    h = host_s - host_s.mean()
    den = float(np.dot(h, h))
    if den <= 0.0:
        return None
    return float(np.dot(h, device_s - device_s.mean()) / den)


class DeviceClock:
    """Device clock of one instrument across boots: unwrap ticks, map to UTC, estimate drift."""

    def __init__(self, window: int = 256) -> None:
        self.mapping: ClockMapping | None = None
        self._unwrap = TickUnwrapper()
        self._pairs: deque[tuple[float, float]] = deque(maxlen=window)
        self._latest_utc = float("-inf")

    def sync(self, boot: int, tick_u32: int, utc_s: float) -> ClockMapping:
        """Fix the mapping for a new handshake: tick_u32 was taken at utc_s (host UTC).

        A new boot's mapping never starts before the last time already given out, so the readings
        of one session stay in time order across restarts, even from a device whose clock ran fast
        (or a simulator running faster than real time).
        """
        self._unwrap = TickUnwrapper()
        self._pairs.clear()
        self.mapping = ClockMapping(boot, self._unwrap.unwrap(tick_u32), max(float(utc_s), self._latest_utc))
        return self.mapping

    def restart(self) -> None:
        """Forget the mapping after a device restart; the next sync() starts afresh."""
        self.mapping = None
        self._unwrap = TickUnwrapper()
        self._pairs.clear()

    def unwrap(self, tick_u32: int) -> int:
        """Unwrapped milliseconds for a device tick of the current boot."""
        return self._unwrap.unwrap(tick_u32)

    def utc_of(self, tick_ms: int) -> float:
        """UTC epoch seconds of an unwrapped device tick; ValueError before sync()."""
        if self.mapping is None:
            raise ValueError("device clock not synchronised")
        t = self.mapping.utc0_s + (tick_ms - self.mapping.tick0_ms) / 1000.0
        if t > self._latest_utc:
            self._latest_utc = t
        return t

    def observe(self, host_monotonic_s: float, tick_ms: int) -> None:
        """Record that unwrapped tick_ms arrived at host_monotonic_s, for the drift estimate."""
        self._pairs.append((float(host_monotonic_s), tick_ms / 1000.0))

    def utc_at_host(self, host_monotonic_s: float) -> float | None:
        """The readings' UTC (this boot's mapping) of the instant host_monotonic_s: the host time is
        fitted against device time over the recent pairs (host = a + b x device; least squares for
        b, since the host's arrival times carry the noise and the device's ticks do not, refitted
        without the arrivals more than 3 robust deviations off the line; the median for a, so that
        a few late reads do not move it), then inverted. It lags the device by the
        link's median delivery delay. None before a mapping or with fewer than 3 pairs."""
        m = self.mapping
        pairs = tuple(self._pairs)          # one copy: the link thread appends meanwhile
        if m is None or len(pairs) < 3:
            return None
        arr = np.array(pairs, dtype=float)
        host, dev = arr[:, 0], arr[:, 1]
        b = drift_ratio(dev, host)          # host seconds per device second
        if b is None or not b > 0:
            return None
        res = host - b * dev                # a late read pulls the slope: refit without the far-off ones
        dev_abs = np.abs(res - np.median(res))
        keep = dev_abs <= max(3.0 * 1.4826 * float(np.median(dev_abs)), 1e-6)
        if 3 <= int(keep.sum()) < keep.size:
            host, dev = host[keep], dev[keep]
            b = drift_ratio(dev, host)
            if b is None or not b > 0:
                return None
        d0 = float(dev.mean())
        a = float(np.median(host - b * (dev - d0)))
        dev_s = d0 + (float(host_monotonic_s) - a) / b
        return m.utc0_s + (dev_s * 1000.0 - m.tick0_ms) / 1000.0

    def observe_many(self, host_monotonic_s: float, ticks_ms: list[int]) -> None:
        """As observe() for each unwrapped tick in turn, all arrived at host_monotonic_s (one read)."""
        h = float(host_monotonic_s)
        self._pairs.extend([(h, tk / 1000.0) for tk in ticks_ms])

    @property
    def n_pairs(self) -> int:
        return len(self._pairs)

    def rate_ratio(self) -> float | None:
        """Device seconds per host second (1.0 = perfect); None until enough pairs."""
        n = len(self._pairs)
        if n < 3:
            return None
        # the pairs flattened in one pass (np.array over a deque of tuples costs about 3x as much)
        arr = np.fromiter(chain.from_iterable(self._pairs), float, 2 * n).reshape(n, 2)
        return drift_ratio(arr[:, 0], arr[:, 1])

    def drift_ppm(self) -> float | None:
        """Device clock rate error against the host in parts per million (+ = device fast)."""
        r = self.rate_ratio()
        return None if r is None else (r - 1.0) * 1e6
