"""Predicted exposure on a 500 x 500 grid from 20 declared sources (prediction_compliance.exposure_grid).

Sources are synthetic (seeded): 16 sectors with patterns and tilts, 4 omni collinears with the
cylindrical model, 700 MHz-3.5 GHz, summed by the icnirp-2020 public rule. Two baselines run in
the same process on the same points: a plain Python loop (math module, same model, same sum) and
a plain numpy pass over the grid per source (the same model written as one expression per source,
with no validation, rule lookup or bookkeeping). Printed: medians of process CPU time over
interleaved runs with their spread (wall times too: the machine is shared), the load average and
the CPU model; the three results are compared and must agree to 1e-9. The Python loop covers the
grid once, in as many slices of rows as there are timed runs, each slice run between a library
run and a numpy run, so that a change of load during the minutes it takes hits all three alike.
The library is faster than the numpy pass because it works in cache-sized blocks of rows, into
reused buffers, with each source's constants folded together.
"""

from __future__ import annotations

import math
import os
import statistics
import time

import numpy as np

import _common
from meterlink.physics.prediction import Pattern, Source, transition_distance_m
from meterlink.physics.prediction_compliance import exposure_grid, rule_terms

STANDARD, TIER, Z_M, GF = "icnirp-2020", "public", 1.5, 2.56


def make_sources(rng) -> list[Source]:
    out = []
    for i in range(20):
        f = float(rng.choice([700e6, 800e6, 900e6, 1.8e9, 2.1e9, 2.6e9, 3.5e9]))
        x, y = (float(v) for v in rng.uniform(-150, 150, 2))
        if i < 16:
            pat = Pattern(float(rng.choice([33.0, 65.0, 90.0])), float(rng.uniform(5, 12)),
                          float(rng.uniform(0, 6)), float(rng.uniform(0, 3)))
            out.append(Source(f"s{i}", float(rng.uniform(10, 80)), float(rng.uniform(14, 19)), f, x, y,
                              float(rng.uniform(15, 40)), float(rng.uniform(0, 360)), pat))
        else:
            out.append(Source(f"c{i}", float(rng.uniform(20, 60)), float(rng.uniform(6, 10)), f, x, y,
                              float(rng.uniform(3, 8)), array_length_m=float(rng.uniform(2, 4))))
    return out


def _params(sources):
    """Per source: the plain constants both baselines use (S equivalent of the governing term)."""
    out = []
    for s in sources:
        (t,) = rule_terms(s, STANDARD, TIER)[:1]   # one whole-body term above 30 MHz for this rule
        p = s.pattern
        bw = p.h_beamwidth_deg if p else 360.0
        r_t = transition_distance_m(s.gain_lin, s.array_length_m, bw) if s.array_length_m else 0.0
        out.append((s, t.s_equiv_w_per_m2, r_t, bw))
    return out


def python_loop(sources, xs, ys):
    """The same model and sum, one point and one source at a time (math module only)."""
    params = _params(sources)
    out = [[0.0] * len(xs) for _ in ys]
    for iy, y in enumerate(ys):
        row = out[iy]
        for ix, x in enumerate(xs):
            total = 0.0
            for s, s_lim, r_t, bw in params:
                dx, dy, dz = x - s.x_m, y - s.y_m, Z_M - s.height_m
                rh2 = dx * dx + dy * dy
                r2 = max(rh2 + dz * dz, 0.01)
                p = s.pattern
                g_db = 0.0
                if p is not None:
                    az = (math.degrees(math.atan2(dx, dy)) - s.azimuth_deg + 180.0) % 360.0 - 180.0
                    a_h = min(12.0 * (az / p.h_beamwidth_deg) ** 2, p.front_to_back_db) if p.h_beamwidth_deg < 360 else 0.0
                    tilt = p.electrical_tilt_deg + p.mechanical_tilt_deg * math.cos(math.radians(az))
                    off = math.degrees(math.atan2(dz, math.sqrt(rh2))) + tilt
                    a_v = min(12.0 * (off / p.v_beamwidth_deg) ** 2, p.side_lobe_db)
                    g_db = -min(a_h + a_v, p.front_to_back_db)
                sd = GF * s.eirp_w / (4.0 * math.pi) * 10.0 ** (g_db / 10.0) / r2
                if s.array_length_m is not None:
                    rh = max(math.sqrt(rh2), 0.1)
                    if rh < r_t and abs(dz) <= s.array_length_m / 2:
                        sd = GF * s.power_w * (360.0 / bw) / (2.0 * math.pi * rh * s.array_length_m)
                total += sd / s_lim
            row[ix] = 100.0 * total
    return np.array(out)


def numpy_per_source(sources, xs, ys):
    """The same model as one numpy expression per source over the whole grid (written as a careful
    numpy user would: exp not a power of ten, the azimuth offset from turned coordinates, the
    elevation as arctan(dz/rh), which numpy computes faster than arctan2 of a scalar and an array)."""
    X, Y = np.meshgrid(xs, ys)
    total = np.zeros(X.shape)
    ln10_10 = math.log(10.0) / 10.0
    for s, s_lim, r_t, bw in _params(sources):
        dx, dy, dz = X - s.x_m, Y - s.y_m, Z_M - s.height_m
        rh2 = dx * dx + dy * dy
        rh = np.sqrt(rh2)
        p = s.pattern
        sd = GF * s.eirp_w / (4.0 * np.pi) / np.maximum(rh2 + dz * dz, 0.01)
        if p is not None:
            a0 = math.radians(s.azimuth_deg)
            u, v = dx * math.sin(a0) + dy * math.cos(a0), dx * math.cos(a0) - dy * math.sin(a0)
            az = np.arctan2(v, u)
            with np.errstate(divide="ignore"):      # arctan2(dz, rh) for rh >= 0, the faster way
                elev = np.arctan(dz / rh)
            off = (elev + math.radians(p.electrical_tilt_deg)
                   + math.radians(p.mechanical_tilt_deg) * u / np.where(rh > 0, rh, 1.0))
            att = np.minimum(np.minimum(12.0 / math.radians(p.h_beamwidth_deg) ** 2 * az * az, p.front_to_back_db)
                             + np.minimum(12.0 / math.radians(p.v_beamwidth_deg) ** 2 * off * off, p.side_lobe_db),
                             p.front_to_back_db)
            sd = sd * np.exp(-ln10_10 * att)
        if s.array_length_m is not None and abs(dz) <= s.array_length_m / 2:
            rhc = np.maximum(rh, 0.1)
            sd = np.where(rhc < r_t, GF * s.power_w * (360.0 / bw) / (2.0 * np.pi * rhc * s.array_length_m), sd)
        total += sd / s_lim
    return 100.0 * total


def _timed(fns, n, slices):
    """Run the functions in turn n times, and one slice of the Python loop after each round
    (interleaved, so a change of machine load hits all alike); per function: median, min and max
    of its process CPU time, median wall time, last result; for the loop: total CPU and wall time
    over its slices and the rows it computed, in order. CPU time, not wall time: other processes on
    this shared machine do not count in it."""
    cpu = [[] for _ in fns]
    wall = [[] for _ in fns]
    outs = [None] * len(fns)
    py_cpu = py_wall = 0.0
    py_rows = []
    for i in range(n):
        for k, fn in enumerate(fns):
            c, w = time.process_time(), time.perf_counter()
            outs[k] = fn()
            cpu[k].append(time.process_time() - c)
            wall[k].append(time.perf_counter() - w)
        c, w = time.process_time(), time.perf_counter()
        py_rows.append(slices(i))
        py_cpu += time.process_time() - c
        py_wall += time.perf_counter() - w
    timed = [(statistics.median(c), min(c), max(c), statistics.median(w), o) for c, w, o in zip(cpu, wall, outs)]
    return timed, (py_cpu, py_wall, np.concatenate(py_rows))


def main(argv=None) -> list[dict]:
    """Library grid vs a plain Python loop and vs a plain numpy pass per source."""
    args = _common.parser(__doc__).parse_args(argv)
    n = 120 if args.quick else 500
    rng = np.random.default_rng(19)
    sources = make_sources(rng)
    half, step = 200.0, 400.0 / (n - 1)
    xs = np.linspace(-half, half, n)

    def lib():
        return exposure_grid(sources, standard=STANDARD, tier=TIER, half_width_m=half, step_m=step, z_m=Z_M,
                             ground_factor=GF).percent

    lib()   # warm the reference-level caches once, as any second call would find them
    reps = 3 if args.quick else 7
    edges = np.linspace(0, n, reps + 1).round().astype(int)
    ((t_lib, lib_lo, lib_hi, w_lib, grid), (t_np, np_lo, np_hi, w_np, grid_np)), (t_py, w_py, grid_py) = _timed(
        [lib, lambda: numpy_per_source(sources, xs, xs)], reps,
        lambda i: python_loop(sources, list(xs), list(xs[edges[i]:edges[i + 1]])).reshape(-1, n))
    assert grid.shape == (n, n)
    agree_np = float(np.max(np.abs(grid - grid_np) / np.maximum(grid_np, 1e-12)))
    agree_py = float(np.max(np.abs(grid - grid_py) / np.maximum(grid_py, 1e-12)))
    assert agree_np < 1e-9 and agree_py < 1e-9, (agree_np, agree_py)
    load = os.getloadavg()
    common = dict(grid=f"{n}x{n}", sources=len(sources), clock="process CPU time", lib_s=t_lib,
                  lib_spread_s=[lib_lo, lib_hi], wall_s={"lib": w_lib, "numpy": w_np, "python": w_py},
                  numpy_s=t_np, numpy_spread_s=[np_lo, np_hi], python_s=t_py, loadavg=load, cpu=_common.cpu_model(),
                  max_rel_diff_numpy=agree_np, max_rel_diff_python=agree_py)
    env = f"load average {load[0]:.2f}/{load[1]:.2f}, CPU {_common.cpu_model()}"
    fig = (f"exposure_grid {n}x{n} from {len(sources)} sources ({STANDARD} {TIER} sum): median {t_lib * 1000:.0f} ms "
           f"CPU of {reps} (spread {lib_lo * 1000:.0f}-{lib_hi * 1000:.0f} ms; wall {w_lib * 1000:.0f} ms); {env}")
    full = n >= 500
    r1 = _common.report(
        "predict-vs-python", fig, f"plain Python loop over the same {n * n} points x {len(sources)} sources, same "
        f"model and sum: {t_py:.1f} s CPU (once over the grid, in {reps} interleaved slices)", t_py / t_lib, f"{t_py / t_lib:.0f}x faster than the loop",
        ">= 50x faster than a plain Python loop", (t_py / t_lib >= 50) if full else None, args.json, **common)
    r2 = _common.report(
        "predict-vs-numpy", fig, f"plain numpy pass over the grid per source, same model: median {t_np * 1000:.0f} ms CPU "
        f"(spread {np_lo * 1000:.0f}-{np_hi * 1000:.0f} ms)", t_lib / t_np, f"{t_lib / t_np:.2f}x the numpy pass's time",
        "within 3x of a single numpy pass per source", (t_lib / t_np <= 3) if full else None, args.json, **common)
    return [r1, r2]


if __name__ == "__main__":
    main()
