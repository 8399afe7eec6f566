"""Lab mode of the simulator: a bench whose field, frequency, polarisation and rotator the lab sets.

The lab drives the bench through Python (as it would drive its signal generator and rotator),
never through the meter protocol; the meter keeps speaking the normal protocol on its pty.
The bench realises the asked field with a systematic error of its field standard that the lab
does not know (`field_error_db`), so a calibration recovers the probe only within its budget.
Orientation convention: meterlink.lab.session.orientation_matrix (docs/lab.md).
"""

from __future__ import annotations

import bisect
import dataclasses
import threading
from dataclasses import dataclass

import numpy as np

from meterlink.lab.session import LabError, orientation_matrix
from meterlink.simulators.instruments import probe_counts
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.simulators.scenario import load_scenario


@dataclass(frozen=True)
class BenchState:
    """What the bench applies from a given simulated time on."""

    freq_hz: float = 1e9
    e_v_per_m: float = 0.0            # the field the lab asked for
    direction_world: tuple[float, float, float] = (1.0, 0.0, 0.0)
    rotator_deg: float = 0.0
    tilt_deg: float = 0.0
    chamber_temp_c: float | None = None  # a climatic chamber's setting; None: the site's ambient


class LabBench:
    """A Scene: field(t_s) gives the applied field on the probe axes as set at simulated time t_s."""

    def __init__(self, field_error_db: float = 0.0, setting_sigma_db: float = 0.0, rng=None):
        self.field_error_db, self.setting_sigma_db = float(field_error_db), float(setting_sigma_db)
        self._rng = rng if rng is not None else np.random.default_rng(0)
        self._lock = threading.Lock()
        self._times: list[float] = [float("-inf")]
        self._states: list[tuple[BenchState, float]] = [(BenchState(), 1.0)]

    def set(self, state: BenchState, at_s: float) -> None:
        """The bench applies `state` from simulated time at_s on (times must not go back)."""
        err = self.field_error_db + (self._rng.normal(0.0, self.setting_sigma_db) if self.setting_sigma_db else 0.0)
        with self._lock:
            at_s = max(float(at_s), self._times[-1])
            self._times.append(at_s)
            self._states.append((state, 10 ** (err / 20)))

    def temp_c_at(self, t_s: float) -> float | None:
        """The probe's temperature at t_s if the chamber sets it (the firmware asks), else None."""
        return self.state_at(t_s)[0].chamber_temp_c

    def state_at(self, t_s: float) -> tuple[BenchState, float]:
        """The state in force at t_s and the factor actual/asked field."""
        with self._lock:
            i = bisect.bisect_right(self._times, t_s) - 1
            return self._states[i]

    def actual_field(self, t_s: float) -> tuple[float, np.ndarray]:
        """(freq_hz, field vector in bench coordinates) really applied at t_s."""
        st, factor = self.state_at(t_s)
        u = np.asarray(st.direction_world, dtype=float)
        n = np.linalg.norm(u)
        u = u / n if n > 0 else np.array([1.0, 0.0, 0.0])
        return st.freq_hz, st.e_v_per_m * factor * u

    def field(self, t_s: float) -> tuple[np.ndarray, np.ndarray]:
        st, _ = self.state_at(t_s)
        f, e = self.actual_field(t_s)
        return np.array([f]), (e[None, :] @ orientation_matrix(st.rotator_deg, st.tilt_deg))


def lab_scenario(scenario="demo", temp_c: float = 23.0, probe_overrides: dict | None = None):
    """A scenario for the lab: constant ambient temperature, optionally a changed (drifted) probe."""
    sc = load_scenario(scenario) if isinstance(scenario, str) else scenario
    site = {**sc.site, "temp_mean_c": float(temp_c), "temp_daily_amp_c": 0.0}
    probe = dataclasses.replace(sc.probe, **(probe_overrides or {}))
    return dataclasses.replace(sc, site=site, probe=probe)


class LabMeter:
    """The simulated meter on a pty, sitting on a LabBench; apply() is the lab's control of the set-up."""

    def __init__(self, scenario="demo", *, temp_c: float = 23.0, probe_overrides=None, field_error_db=0.0,
                 seed: int = 0, speed: float = 50.0, **meter_kw):
        rng = np.random.default_rng(seed)
        self.scenario = lab_scenario(scenario, temp_c, probe_overrides)
        self.bench = LabBench(field_error_db, rng=rng.spawn(1)[0])
        self.meter = SimulatedMeter(self.scenario, seed=seed, speed=speed, scene=self.bench, **meter_kw)
        self.chamber_temp_c: float | None = None

    @property
    def port(self) -> str:
        return self.meter.port

    def apply(self, freq_hz, e_v_per_m, direction_world=(1.0, 0.0, 0.0), rotator_deg=0.0, tilt_deg=0.0) -> int:
        """Set the bench now; returns the device tick (ms) from which readings see the new set-up.

        The tick and the bench's switch-over time are taken at one instant with the device clock
        held: read apart, the device ran on between them and readings of the old set-up carried
        ticks the lab took for the new one (a race, about one run in 26 at speed 100).
        """
        state = BenchState(float(freq_hz), float(e_v_per_m), tuple(map(float, direction_world)),
                           float(rotator_deg), float(tilt_deg), self.chamber_temp_c)
        tick, _ = self.meter.at_device_now(lambda t_s: self.bench.set(state, t_s))
        return tick

    def set_temperature(self, temp_c: float | None) -> None:
        """The climatic chamber around the probe (None: off, the site's ambient); from the next apply()."""
        self.chamber_temp_c = None if temp_c is None else float(temp_c)

    def start(self) -> "LabMeter":
        self.meter.start()
        return self

    def stop(self) -> None:
        self.meter.stop()

    def __enter__(self) -> "LabMeter":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()


class InProcessLab:
    """The same bench and probe without a pty: apply() then read(n) gives counts directly (fast path)."""

    def __init__(self, scenario="demo", *, temp_c: float = 23.0, probe_overrides=None, field_error_db=0.0,
                 seed: int = 0, device_averaging: int | None = None):
        rng = np.random.default_rng(seed)
        self.scenario = lab_scenario(scenario, temp_c, probe_overrides)
        self.temp_c = float(temp_c)
        self.bench = LabBench(field_error_db, rng=rng.spawn(1)[0])
        self._rng = rng
        self.averaging = int(device_averaging or self.scenario.device.get("device_averaging", 1))
        self._t = 0.0
        self.chamber_temp_c: float | None = None

    def set_temperature(self, temp_c: float | None) -> None:
        """The climatic chamber around the probe (None: off, the lab's ambient)."""
        self.chamber_temp_c = None if temp_c is None else float(temp_c)

    def apply(self, freq_hz, e_v_per_m, direction_world=(1.0, 0.0, 0.0), rotator_deg=0.0, tilt_deg=0.0) -> None:
        self._t += 1.0
        self.bench.set(BenchState(float(freq_hz), float(e_v_per_m), tuple(map(float, direction_world)),
                                  float(rotator_deg), float(tilt_deg)), self._t)

    def read(self, n: int) -> np.ndarray:
        """n readings of the probe in the current set-up, counts (n, 3)."""
        f, e = self.bench.field(self._t)
        out = []
        for _ in range(int(n)):
            t_c = self.temp_c if self.chamber_temp_c is None else self.chamber_temp_c
            c, over = probe_counts(self.scenario.probe, e, f, t_c, self._rng, self.averaging)
            if over.any():   # as the meter flags it; the lab cannot use the step
                raise LabError(f"meter over range at this step (counts {', '.join(str(int(x)) for x in c)})")
            out.append(c)
        return np.array(out, dtype=float)


__all__ = ["BenchState", "LabBench", "LabMeter", "InProcessLab", "lab_scenario"]
