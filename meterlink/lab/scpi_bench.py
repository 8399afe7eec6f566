"""A lab controller made of SCPI instruments: a signal generator (with whatever amplifier follows it), a power
meter on a coupler reading the net power into the field generator, and a rotator turning the probe.

apply() levels the generator until the power meter shows the net power the session's field method needs
for the wanted field (meterlink.lab.fieldgen), turns the rotator, and asks the operator to place the probe
when the step's direction or tilt changes. It returns None: the time of the switch is not known to the
meter's clock, so MeterBench discards its settle readings after each step.

Bench file (TOML, docs/instruments.md):
    [instruments]  generator, power_meter, rotator = VISA addresses; meter_port = the meter's serial port;
                   positioner = true when the rotator also places the probe (else the operator is asked)
    [chain]        coupling_db (net power = power meter reading + coupling), path_gain_db (nominal gain from
                   the generator to the field generator: first guess only), max_level_dbm (never set above),
                   timeout_s (answers), move_timeout_s (a rotator move)
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from meterlink.errors import read_input_toml
from meterlink.instruments.bench import PowerMeter, Rotator, SignalGenerator
from meterlink.instruments.session import open_session
from meterlink.lab.session import LabError

LEVEL_TOLERANCE_DB = 0.02
MAX_LEVELLING_STEPS = 6


@dataclass(frozen=True)
class BenchFile:
    generator: str
    power_meter: str
    rotator: str
    meter_port: str
    coupling_db: float
    path_gain_db: float = 0.0
    max_level_dbm: float = 10.0
    timeout_s: float = 5.0
    move_timeout_s: float = 60.0
    positioner: bool = False        # the rotator also places the probe (POS:DIR, POS:TILT); else the operator


def load_bench(path) -> BenchFile:
    """Read a bench file; every problem names the file and the key."""
    where = str(path)
    doc = read_input_toml(path, "bench", LabError)
    inst, chain = doc.get("instruments"), doc.get("chain")
    if not isinstance(inst, dict) or not isinstance(chain, dict):
        raise LabError(f"{where}: needs [instruments] and [chain] tables")

    def text(key):
        v = inst.get(key)
        if not isinstance(v, str) or not v.strip():
            raise LabError(f"{where}: instruments.{key}: a VISA address (or port) as text")
        return v.strip()

    def num(key, lo, hi, default=None):
        v = chain.get(key, default)
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not (math.isfinite(v) and lo <= v <= hi):
            raise LabError(f"{where}: chain.{key}: a number in {lo:g}..{hi:g}")
        return float(v)
    return BenchFile(text("generator"), text("power_meter"), text("rotator"), text("meter_port"),
                     num("coupling_db", -10.0, 80.0), num("path_gain_db", -60.0, 80.0, 0.0),
                     num("max_level_dbm", -100.0, 30.0, 10.0), num("timeout_s", 0.1, 120.0, 5.0),
                     num("move_timeout_s", 0.1, 3600.0, 60.0), _flag(inst, "positioner", where))


def _flag(d: dict, key: str, where: str) -> bool:
    v = d.get(key, False)
    if not isinstance(v, bool):
        raise LabError(f"{where}: instruments.{key}: true or false")
    return v


class ScpiController:
    """apply(freq, e, direction, rotator_deg, tilt_deg) on SCPI instruments; use as a context manager."""

    def __init__(self, bench: BenchFile, method, place=None):
        self.bench, self.method, self.place = bench, method, place
        self.sessions = []
        self._placed = None
        self.levels: list[dict] = []     # every levelling: wanted and reached net power, generator level

    def __enter__(self) -> "ScpiController":
        b = self.bench
        try:
            for addr in (b.generator, b.power_meter, b.rotator):
                self.sessions.append(open_session(addr, timeout_s=b.timeout_s))
        except Exception:
            self.__exit__()
            raise
        self.gen, self.pm, self.rot = (SignalGenerator(self.sessions[0]), PowerMeter(self.sessions[1]),
                                       Rotator(self.sessions[2], move_timeout_s=b.move_timeout_s))
        self.gen.rf(False)
        self.pm.zero()
        return self

    def __exit__(self, *exc) -> None:
        for s in self.sessions[:1]:
            try:
                SignalGenerator(s).rf(False)      # leave no field on
            except Exception:  # the generator may be the instrument that failed; closing is all that is left
                pass
        for s in self.sessions:
            s.close()
        self.sessions = []

    def apply(self, freq_hz, e_v_per_m, direction_world, rotator_deg, tilt_deg):
        where = (tuple(round(float(v), 6) for v in direction_world), float(tilt_deg))
        if where != self._placed:
            self.gen.rf(False)
            if self.bench.positioner:
                self.rot.place(direction_world, tilt_deg)
            elif self.place is not None:
                self.place(direction_world, tilt_deg)
            self._placed = where
        self.rot.move(float(rotator_deg))
        if not e_v_per_m > 0:
            self.gen.rf(False)
            return None
        want_w = float(self.method.power_for(float(e_v_per_m)))
        if not (math.isfinite(want_w) and want_w > 0):
            raise LabError(f"field method {self.method.kind}: no net power for {e_v_per_m:g} V/m over SCPI")
        want_dbm = 10 * math.log10(want_w / 1e-3)
        self.pm.set_frequency(freq_hz)
        level = want_dbm - self.bench.path_gain_db
        self._set(freq_hz, level)
        self.gen.rf(True)
        for _ in range(MAX_LEVELLING_STEPS):
            got = self.pm.read_dbm() + self.bench.coupling_db
            err = want_dbm - got
            if abs(err) <= LEVEL_TOLERANCE_DB:
                self.levels.append({"freq_hz": freq_hz, "want_dbm": want_dbm, "net_dbm": got, "gen_dbm": level})
                return None
            level += err
            self._set(freq_hz, level)
        raise LabError(f"{self.bench.generator}: net power {got:.2f} dBm, not {want_dbm:.2f} dBm after "
                       f"{MAX_LEVELLING_STEPS} levelling steps at {freq_hz / 1e6:g} MHz")

    def _set(self, freq_hz, level_dbm):
        if level_dbm > self.bench.max_level_dbm:
            self.gen.rf(False)
            raise LabError(f"{self.bench.generator}: {level_dbm:.2f} dBm needed at {freq_hz / 1e6:g} MHz is above "
                           f"the bench's max_level_dbm {self.bench.max_level_dbm:g}")
        self.gen.set(freq_hz, level_dbm)


class ScpiMeterBench:
    """MeterBench for a controller that cannot tell the meter's tick of the switch (SCPI instruments):
    after each apply() every reading that arrives within `quiet_s` is set aside (queued or in flight on
    the serial line, it may have seen the old set-up) and the next `settle_readings` are discarded
    (their integration may span the switch)."""

    def __init__(self, controller, link, timeout_s: float = 10.0, settle_readings: int = 2, quiet_s: float = 0.1):
        from meterlink.lab.meter import MeterBench

        self._mb = MeterBench(controller, link, timeout_s=timeout_s, settle_readings=settle_readings)
        self.link, self.quiet_s = link, float(quiet_s)
        self.discarded = 0
        self.last_counts = None

    def wait_connected(self):
        return self._mb.wait_connected()

    def apply(self, freq_hz, e_v_per_m, direction_world, rotator_deg, tilt_deg) -> None:
        import time

        from meterlink.device.link import Connected, Reading

        self._mb.apply(freq_hz, e_v_per_m, direction_world, rotator_deg, tilt_deg)
        deadline = time.monotonic() + self.quiet_s
        while (left := deadline - time.monotonic()) > 0:
            item = self.link.get(left)
            if isinstance(item, Connected):
                self._mb.interval_ms = item.interval_ms
            elif isinstance(item, Reading):
                self.discarded += 1

    def read(self, n: int):
        self.last_counts = self._mb.read(n)
        return self.last_counts
