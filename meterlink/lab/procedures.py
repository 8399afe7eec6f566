"""Procedures: step plans, running them on a bench, importing hand-taken readings from CSV.

A bench is anything with apply(freq_hz, e_v_per_m, direction_world, rotator_deg, tilt_deg) and
read(n) -> counts (n, 3) taken after the set-up settled: the simulator's lab (in process), a
meter on a serial link with a lab controller (meterlink.lab.meter.MeterBench), or a real lab.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path
from typing import Callable, Protocol

import numpy as np

from meterlink.lab.session import (AXES, PROCEDURES, LabError, LabSession, Step, StepResult, axis_direction_world,
                                   diagonal_direction_world)

#: Levels of the linearity table (V/m) and the check levels between them (geometric means).
TABLE_LEVELS_V_PER_M = (0.1, 0.15, 0.2, 0.3, 0.5, 0.7, 1.0, 1.5, 2.0, 3.0, 5.0, 7.0, 10.0, 15.0, 20.0, 25.0, 30.0)
FREQS_HZ = tuple(x * 1e6 for x in (30, 50, 100, 200, 300, 500, 700, 1000, 1500, 2000, 2500, 3000, 4000, 5000, 6000))
FREQ_LEVEL_V_PER_M = 5.0
ISOTROPY_STEP_DEG = 15.0


#: Chamber temperatures of the temperature-coefficient steps (degC): a common span for field use.
TEMPS_C = (5.0, 15.0, 23.0, 30.0, 40.0)


class Bench(Protocol):
    def apply(self, freq_hz, e_v_per_m, direction_world, rotator_deg, tilt_deg) -> None: ...

    def read(self, n: int) -> np.ndarray: ...

    # optional: set_temperature(temp_c | None), a climatic chamber (None: off, the lab's ambient),
    # in force from the next apply(); needed only by temperature steps


def zero_plan(ref_freq_hz: float) -> list[Step]:
    return [Step("zero", ref_freq_hz, 0.0)]


def linearity_plan(session: LabSession, levels=TABLE_LEVELS_V_PER_M, checks: bool = True) -> list[Step]:
    """Per axis, the field along that sensor at the reference frequency: table levels and check levels."""
    lv = sorted(float(x) for x in levels)
    chk = [math.sqrt(a * b) for a, b in zip(lv, lv[1:])] if checks else []
    out = []
    for a in AXES:
        for e, role in sorted([(e, "table") for e in lv] + [(e, "check") for e in chk]):
            out.append(Step("linearity", session.ref_freq_hz, e, axis_direction_world(a), axis=a, role=role,
                            net_power_w=session.method.power_for(e)))
    return out


def frequency_plan(session: LabSession, freqs=FREQS_HZ, level_v_per_m=FREQ_LEVEL_V_PER_M) -> list[Step]:
    """At each frequency: the field along each sensor, then along the handle (all three: total factor)."""
    out = []
    for f in sorted(float(x) for x in freqs):
        p = session.method.power_for(level_v_per_m)
        out += [Step("frequency", f, level_v_per_m, axis_direction_world(a), axis=a, net_power_w=p) for a in AXES]
        out.append(Step("frequency", f, level_v_per_m, diagonal_direction_world(), net_power_w=p))
    return out


def isotropy_plan(session: LabSession, freqs_hz=(2.45e9,), level_v_per_m=FREQ_LEVEL_V_PER_M,
                  step_deg=ISOTROPY_STEP_DEG, tilts_deg=(0.0,)) -> list[Step]:
    """The probe turned about its handle through a full circle, field across the handle (bench x)."""
    angles = np.arange(0.0, 360.0 - 1e-9, float(step_deg))
    return [Step("isotropy", float(f), level_v_per_m, (1.0, 0.0, 0.0), float(r), float(t),
                 net_power_w=session.method.power_for(level_v_per_m))
            for f in freqs_hz for t in tilts_deg for r in angles]


def temperature_plan(session: LabSession, temps_c=TEMPS_C, level_v_per_m=FREQ_LEVEL_V_PER_M) -> list[Step]:
    """At the reference frequency, the field along the handle at each chamber temperature."""
    p = session.method.power_for(level_v_per_m)
    return [Step("temperature", session.ref_freq_hz, level_v_per_m, diagonal_direction_world(), net_power_w=p,
                 temp_c=float(t)) for t in temps_c]


def full_plan(session: LabSession, freqs=FREQS_HZ, levels=TABLE_LEVELS_V_PER_M, iso_freqs=(2.45e9,),
              iso_step_deg=ISOTROPY_STEP_DEG, iso_tilts=(0.0,)) -> list[Step]:
    """Zero, linearity, frequency response and isotropy, in that order."""
    return (zero_plan(session.ref_freq_hz) + linearity_plan(session, levels) + frequency_plan(session, freqs)
            + isotropy_plan(session, iso_freqs, step_deg=iso_step_deg, tilts_deg=iso_tilts))


def run_plan(plan, bench: Bench, repeats: int = 5,
             progress: Callable[[int, int, Step], None] | None = None) -> list[StepResult]:
    """Apply each step, take `repeats` readings (zero steps take 4x as many), return the results."""
    out = []
    chamber: float | None = None
    for i, st in enumerate(plan):
        want = st.temp_c if math.isfinite(st.temp_c) else None
        if want != chamber:
            _set_temperature(bench, want)
            chamber = want
        bench.apply(st.freq_hz, st.e_ref_v_per_m, st.direction_world, st.rotator_deg, st.tilt_deg)
        n = repeats * (4 if st.procedure == "zero" else 1)
        counts = np.asarray(bench.read(n), dtype=float)
        if counts.shape != (n, 3):
            raise LabError(f"bench returned readings of shape {counts.shape}, expected ({n}, 3)")
        out.append(StepResult(st, counts))
        if progress:
            progress(i + 1, len(plan), st)
    if chamber is not None:
        _set_temperature(bench, None)
    bench.apply(plan[-1].freq_hz if plan else 1e9, 0.0, (1.0, 0.0, 0.0), 0.0, 0.0)   # field off at the end
    return out


def _set_temperature(bench, temp_c: float | None) -> None:
    setter = getattr(bench, "set_temperature", None)
    if setter is None:
        raise LabError("the plan has temperature steps, but this bench has no climatic chamber (set_temperature)")
    setter(temp_c)


# ---------------------------------------------------------------------------- CSV import

REQUIRED = ("procedure", "freq_hz", "counts_x", "counts_y", "counts_z")
OPTIONAL = ("e_ref_v_per_m", "net_power_w", "axis", "role", "rotator_deg", "tilt_deg", "dir_x", "dir_y", "dir_z",
            "temp_c")


def import_csv(path, session: LabSession) -> list[StepResult]:
    """Readings taken by hand: one CSV row per reading; consecutive rows of the same set-up form a step.

    Columns (docs/lab.md): procedure, freq_hz, counts_x, counts_y, counts_z, and e_ref_v_per_m or
    net_power_w (the field then follows from the session's method); optionally axis, role,
    rotator_deg, tilt_deg, dir_x, dir_y, dir_z. Any problem raises LabError naming file and line.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise LabError(f"{p}: cannot read ({exc.strerror})") from None
    except UnicodeDecodeError:
        raise LabError(f"{p}: not UTF-8 text") from None
    try:
        rows = list(csv.reader(text.splitlines()))
    except csv.Error as exc:
        raise LabError(f"{p}: not valid CSV ({exc})") from None
    rows = [r for r in rows if r and any(c.strip() for c in r) and not r[0].lstrip().startswith("#")]
    if not rows:
        raise LabError(f"{p}: empty file, expected a header line and readings")
    head = [h.strip().lower() for h in rows[0]]
    missing = [c for c in REQUIRED if c not in head]
    if missing:
        raise LabError(f"{p}: missing column(s) {', '.join(missing)}")
    if "e_ref_v_per_m" not in head and "net_power_w" not in head:
        raise LabError(f"{p}: missing column e_ref_v_per_m or net_power_w (one is needed for the reference field)")
    unknown = [h for h in head if h not in REQUIRED + OPTIONAL]
    if unknown:
        raise LabError(f"{p}: unknown column(s) {', '.join(unknown)}")
    if len(rows) < 2:
        raise LabError(f"{p}: no readings after the header")
    idx = {h: i for i, h in enumerate(head)}
    groups: list[tuple[Step, list]] = []
    for n, r in enumerate(rows[1:], start=2):
        if len(r) != len(head):
            raise LabError(f"{p}: line {n}: {len(r)} fields, the header has {len(head)}")
        cell = lambda c: r[idx[c]].strip() if c in idx else ""   # noqa: E731

        def num(c, default=float("nan")):
            v = cell(c)
            if v == "":
                return default
            try:
                x = float(v)
            except ValueError:
                raise LabError(f"{p}: line {n}: {c} {v!r} is not a number") from None
            if not math.isfinite(x):
                raise LabError(f"{p}: line {n}: {c} {v!r} is not finite")
            return x

        proc = cell("procedure").lower()
        if proc not in PROCEDURES:
            raise LabError(f"{p}: line {n}: procedure {cell('procedure')!r} (expected {', '.join(PROCEDURES)})")
        axis = cell("axis").lower()
        if axis not in ("",) + AXES:
            raise LabError(f"{p}: line {n}: axis {cell('axis')!r} (expected x, y, z or empty)")
        freq = num("freq_hz")
        if not freq > 0:
            raise LabError(f"{p}: line {n}: freq_hz must be > 0")
        e_in, p_in = num("e_ref_v_per_m"), num("net_power_w")
        if proc == "zero":
            e_ref = 0.0
        else:
            if not (math.isfinite(e_in) or math.isfinite(p_in)):
                raise LabError(f"{p}: line {n}: needs e_ref_v_per_m or net_power_w")
            if math.isfinite(e_in) and e_in <= 0 or math.isfinite(p_in) and p_in < 0:
                raise LabError(f"{p}: line {n}: reference field must be > 0 and net power >= 0")
            try:
                e_ref = session.reference_field(e_in, p_in)
            except LabError as exc:
                raise LabError(f"{p}: line {n}: {exc}") from None
        if any(c in idx for c in ("dir_x", "dir_y", "dir_z")):
            d = (num("dir_x", 0.0), num("dir_y", 0.0), num("dir_z", 0.0))
        else:
            d = axis_direction_world(axis) if axis else (diagonal_direction_world()
                                                         if proc in ("frequency", "temperature") else (1.0, 0.0, 0.0))
        temp = num("temp_c")
        if proc == "temperature" and not math.isfinite(temp):
            raise LabError(f"{p}: line {n}: a temperature step needs temp_c (the chamber's degC)")
        st = Step(proc, freq, e_ref, d, num("rotator_deg", 0.0), num("tilt_deg", 0.0), axis,
                  cell("role").lower() or ("table" if proc == "linearity" else ""), p_in, temp)
        c = [num(f"counts_{a}") for a in AXES]
        if any(math.isnan(x) for x in c):
            raise LabError(f"{p}: line {n}: counts_x, counts_y and counts_z are all needed")
        if groups and _same(groups[-1][0], st):
            groups[-1][1].append(c)
        else:
            groups.append((st, [c]))
    return [StepResult(st, np.array(c, dtype=float)) for st, c in groups]


def _same(a: Step, b: Step) -> bool:
    key = lambda s: (s.procedure, s.freq_hz, s.e_ref_v_per_m, s.direction_world, s.rotator_deg, s.tilt_deg,  # noqa: E731
                     s.axis, s.role, None if math.isnan(s.temp_c) else s.temp_c)
    return key(a) == key(b)


def export_csv(results, path) -> None:
    """Write results in the import format (one row per reading)."""
    cols = ["procedure", "axis", "role", "freq_hz", "e_ref_v_per_m", "net_power_w", "rotator_deg", "tilt_deg",
            "dir_x", "dir_y", "dir_z", "temp_c", "counts_x", "counts_y", "counts_z"]
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(cols)
        for r in results:
            s = r.step
            pw = "" if math.isnan(s.net_power_w) else repr(s.net_power_w)
            tc = "" if math.isnan(s.temp_c) else repr(s.temp_c)
            for c in r.counts:
                w.writerow([s.procedure, s.axis, s.role, repr(s.freq_hz), repr(s.e_ref_v_per_m), pw, repr(s.rotator_deg),
                            repr(s.tilt_deg), *map(repr, s.direction_world), tc, *map(repr, map(float, c))])


def results_json(results) -> list[dict]:
    """JSON-ready form of results (the --json output of a run)."""
    return [{"procedure": r.step.procedure, "axis": r.step.axis, "role": r.step.role, "freq_hz": r.step.freq_hz,
             "e_ref_v_per_m": r.step.e_ref_v_per_m, "rotator_deg": r.step.rotator_deg, "tilt_deg": r.step.tilt_deg,
             "direction_world": list(r.step.direction_world),
             "net_power_w": None if math.isnan(r.step.net_power_w) else r.step.net_power_w,
             "temp_c": None if math.isnan(r.step.temp_c) else r.step.temp_c,
             "counts": r.counts.tolist()} for r in results]


