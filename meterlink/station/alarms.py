"""Alarm rules on a running average: threshold, hysteresis, minimum duration (pure state machine).

A rule compares the running average over its window (complete windows only) with a threshold in
V/m, percent of the field reference level (100 E / E_ref) or percent of the power-density
reference level (100 S / S_ref with the plane-wave S = E^2 / Z0). An episode starts when the value
has stayed at or above ``threshold`` for ``min_duration_s`` (its start time is the first crossing),
and ends at the first value below ``clear`` (<= threshold: the hysteresis band). Incomplete windows
change nothing. Each episode yields three events: start, peak and end.

Where the station's standard prescribes no averaging time (e.g. ICNIRP 1998 below 100 kHz), a rule
in percent of a reference level is fed each instantaneous value instead of its window's average:
a time average would compare with the level something the standard does not (see
:func:`percent_rules_instantaneous`).
"""

from __future__ import annotations

from dataclasses import dataclass

from meterlink.station.hooks import iso_ms
from meterlink.station.stationfile import AlarmRule
from meterlink.physics.units import Z0_OHM

IDLE, PENDING, ACTIVE = "idle", "pending", "active"
UNIT_LABEL = {"v_per_m": "V/m", "pct_field": "% of E ref", "pct_power": "% of S ref"}


def rule_value(unit: str, e_v_per_m: float, e_ref_v_per_m: float | None, s_ref_w_per_m2: float | None) -> float:
    """The running-average field expressed in a rule's unit."""
    if unit == "v_per_m":
        return e_v_per_m
    if unit == "pct_field":
        return 100.0 * e_v_per_m / e_ref_v_per_m
    if unit == "pct_power":
        return 100.0 * (e_v_per_m * e_v_per_m / Z0_OHM) / s_ref_w_per_m2
    raise ValueError(f"unknown alarm unit {unit!r}")


@dataclass(frozen=True)
class AlarmEvent:
    """One episode event: kind is 'start', 'peak' or 'end'; times are UTC seconds."""

    kind: str
    rule: str
    meter: str
    band: str
    t_utc: float
    value: float
    unit: str
    threshold: float
    clear: float
    window_s: float
    episode_start_utc: float
    peak_t_utc: float
    peak_value: float
    basis: str = "average"          # "average" over window_s, or "instantaneous"

    def message(self) -> str:
        u = UNIT_LABEL[self.unit]
        if self.kind == "start":
            what = "instantaneous value" if self.basis == "instantaneous" else f"{self.window_s:g} s average"
            return (f"alarm {self.rule} on {self.meter}: {what} {self.value:.4g} {u} "
                    f">= {self.threshold:g} {u}")
        if self.kind == "peak":
            return f"alarm {self.rule} on {self.meter}: peak {self.peak_value:.4g} {u}"
        return (f"alarm {self.rule} on {self.meter}: cleared, {self.value:.4g} {u} < {self.clear:g} {u} "
                f"after {self.t_utc - self.episode_start_utc:.0f} s")

    def detail(self) -> dict:
        """Fields for an event's detail ('kind' is named 'phase', 't_utc' 'at_utc')."""
        ren = {"kind": "phase", "t_utc": "at_utc"}
        return {ren.get(k, k): getattr(self, k) for k in self.__dataclass_fields__}

    def environment(self, station: str = "") -> dict[str, str]:
        """The event as METERLINK_ALARM_* variables for an external command: times as ISO 8601 UTC
        with milliseconds (``*_UTC``) and as POSIX seconds to the millisecond (``*_EPOCH_S``)."""
        env = {}
        for k, v in self.detail().items():
            key = f"METERLINK_ALARM_{k.upper()}"
            if k.endswith("_utc"):
                env[key] = "" if v is None else iso_ms(v)
                env[key[:-4] + "_EPOCH_S"] = "" if v is None else f"{v:.3f}"
            else:
                env[key] = repr(v) if isinstance(v, float) else str(v)
        if station:
            env["METERLINK_ALARM_STATION"] = station
        return env


class AlarmMachine:
    """State of one rule on one series; ``update`` takes each running-average value in order."""

    def __init__(self, rule: AlarmRule, meter: str, band: str = "total", instantaneous: bool = False):
        self.rule, self.meter, self.band = rule, meter, band
        #: fed instantaneous values: a percent-of-level rule where the standard has no averaging time
        self.instantaneous = bool(instantaneous) and rule.unit != "v_per_m"
        self.state = IDLE
        self.t_on: float | None = None
        self.peak_t: float | None = None
        self.peak_v: float | None = None
        self.last_t: float | None = None

    def _event(self, kind: str, t: float, v: float) -> AlarmEvent:
        r = self.rule
        return AlarmEvent(kind, r.name, self.meter, self.band, t, v, r.unit, r.threshold, r.clear, r.window_s,
                          self.t_on, self.peak_t, self.peak_v, "instantaneous" if self.instantaneous else "average")

    def update(self, t_utc: float, value: float, complete: bool = True) -> list[AlarmEvent]:
        """Feed one value (in the rule's unit) at time t_utc; returns the episode events it causes."""
        if self.last_t is not None and t_utc <= self.last_t:
            return []
        self.last_t = t_utc
        if not complete or value != value:
            return []
        r = self.rule
        if self.state == IDLE:
            if value < r.threshold:
                return []
            self.state, self.t_on, self.peak_t, self.peak_v = PENDING, t_utc, t_utc, value
        elif self.state == PENDING:
            if value < r.threshold:
                self.state = IDLE
                self.t_on = self.peak_t = self.peak_v = None
                return []
        if value > self.peak_v:
            self.peak_t, self.peak_v = t_utc, value
        if self.state == PENDING:
            if t_utc - self.t_on >= r.min_duration_s:
                self.state = ACTIVE
                return [self._event("start", t_utc, value)]
            return []
        if value < r.clear:            # ACTIVE
            out = [self._event("peak", self.peak_t, self.peak_v), self._event("end", t_utc, value)]
            self.state = IDLE
            self.t_on = self.peak_t = self.peak_v = None
            return out
        return []

    def snapshot(self) -> tuple:
        """(state, t_on, peak_t, peak_value, last_t) for persistence."""
        return (self.state, self.t_on, self.peak_t, self.peak_v, self.last_t)

    def restore(self, state: str, t_on, peak_t, peak_v, last_t) -> None:
        self.state, self.t_on, self.peak_t, self.peak_v, self.last_t = state, t_on, peak_t, peak_v, last_t


def percent_rules_instantaneous(standard: str, tier: str, freq) -> bool:
    """True where the standard prescribes no averaging time at a frequency or anywhere in a (lo, hi)
    band: percent-of-level alarms there compare instantaneous values, never an invented average."""
    from meterlink.physics.assessment import averaging_time_s
    from meterlink.errors import MeterlinkError

    try:
        if isinstance(freq, tuple):
            return averaging_time_s(standard, tier, band=freq) is None
        return averaging_time_s(standard, tier, freq_hz=float(freq)) is None
    except MeterlinkError:
        return False


def command_call(argv: tuple[str, ...], ev: AlarmEvent, station: str = "") -> tuple[list[str], dict[str, str]]:
    """(argument list, alarm variables) of an external command for an event: argv plus phase, rule,
    meter, time (POSIX s to the ms), value and unit. No shell is involved: data stays data.
    meterlink.station.hooks runs it with only these variables, PATH and LANG in its environment."""
    args = [*argv, ev.kind, ev.rule, ev.meter, f"{ev.t_utc:.3f}", f"{ev.value:.6g}", ev.unit]
    return args, ev.environment(station)
