"""Time the sweep-to-result path of a frequency-selective point: one 9 kHz-6 GHz sweep of 100,001 points
turned into per-band channel power, field strength through the antenna certificate, GUM budget, exposure
ratios by the summation rule and shares, against a plain numpy pass over the same array (dBm to W, then a
boolean-mask sum per band), in the same run.

Usage: python bench/bench_selective.py [--quick] [--json]
The target compares our time with the analyser's own sweep time for that span and RBW, estimated by the
common rule of thumb for a swept analyser with a Gaussian resolution filter, T = k * span / RBW^2 with
k = 2.5 (practice, no single published source; analysers quote k between about 2 and 3).
"""

from __future__ import annotations

import os
import statistics
import time

import numpy as np

import _common
from meterlink.physics.certificate import load_certificate
from meterlink.simulators.scenario import load_scenario
from meterlink.simulators.scpi_instruments import Analyzer, SiteAntenna

POINTS = 100_001
START_HZ, STOP_HZ, RBW_HZ = 9e3, 6e9, 100e3
K_SWEEP = 2.5



def ours(freq, level, bands, cert):
    """The library's path: channel powers, E, budgets, summation rule."""
    from meterlink.physics.calibrate import af_db_per_m, cable_loss_db
    from meterlink.physics.exposure import multi_frequency
    from meterlink.physics.selective import (channel_powers_w, e_from_input_power_v_per_m, integration_window_hz,
                                             selective_budget)
    fc = np.array([b.freq_hz for b in bands])
    win = [integration_window_hz(b.freq_hz, b.bandwidth_hz, RBW_HZ) for b in bands]
    p = channel_powers_w(freq, level, RBW_HZ, win)
    e = e_from_input_power_v_per_m(p, af_db_per_m(cert, fc), cable_loss_db(cert, fc))
    u = [selective_budget(cert, float(f)).u_expanded_db for f in fc]
    mf = multi_frequency(fc, standard="icnirp-2020", tier="public", e_v_per_m=e, labels=[b.name for b in bands])
    return p, e, u, mf.total


def baseline(freq, level, windows):
    """A plain numpy pass: dBm to W over the whole array, then a masked sum per band, scaled alike."""
    pw = 1e-3 * 10.0 ** (level / 10.0)
    scale = (freq[1] - freq[0]) / (1.0644670194312262 * RBW_HZ)     # spacing / Gaussian noise bandwidth
    return np.array([pw[(freq >= lo) & (freq <= hi)].sum() for lo, hi in windows]) * scale


def main(argv=None) -> dict:
    ap = _common.parser(__doc__)
    args = ap.parse_args(argv)
    rounds = 7 if args.quick else 31
    from meterlink.physics.selective import integration_window_hz
    from meterlink.survey.selective import load_bands
    from importlib import resources

    bands = load_bands(resources.files("meterlink.simulators.scenarios").joinpath("demo-bands.toml"))
    cert = load_certificate("demo-dipole")
    an = Analyzer(SiteAntenna(load_scenario("demo"), (4.0, -4.0, 1.5)), seed=7)
    an.st.update(start=START_HZ, stop=STOP_HZ, rbw=RBW_HZ, points=POINTS)
    level = an.spectrum_dbm().astype(np.float32).astype(float)     # as read from a REAL,32 block
    freq = np.linspace(START_HZ, STOP_HZ, POINTS)
    windows = [integration_window_hz(b.freq_hz, b.bandwidth_hz, RBW_HZ) for b in bands]
    ours(freq, level, bands, cert)                                  # warm caches (limits tables, imports)
    t_ours, t_base = [], []
    for i in range(rounds):                                         # interleaved, alternating order
        for which in ((0, 1) if i % 2 == 0 else (1, 0)):
            t0 = time.perf_counter()
            if which == 0:
                p, _, _, total = ours(freq, level, bands, cert)
                t_ours.append(time.perf_counter() - t0)
            else:
                pb = baseline(freq, level, windows)
                t_base.append(time.perf_counter() - t0)
    agree = float(np.max(np.abs(p / pb - 1.0)))
    m_ours, m_base = statistics.median(t_ours), statistics.median(t_base)
    sweep_s = K_SWEEP * (STOP_HZ - START_HZ) / RBW_HZ ** 2
    frac = m_ours / sweep_s
    load = os.getloadavg()
    return _common.report(
        "selective", f"{POINTS:,}-point 9 kHz-6 GHz sweep to {len(bands)} bands (channel power, E, budget, "
        f"ICNIRP 2020 summation, total {total:.3f}) in {m_ours * 1e3:.2f} ms median of {rounds} "
        f"(spread {min(t_ours) * 1e3:.2f}-{max(t_ours) * 1e3:.2f} ms)",
        f"plain numpy dBm->W and masked sum per band {m_base * 1e3:.2f} ms median "
        f"(spread {min(t_base) * 1e3:.2f}-{max(t_base) * 1e3:.2f} ms); channel powers agree within {agree:.1e}",
        m_ours / m_base, f"{m_ours / m_base:.2f}x the numpy pass; {100 * frac:.3f} % of the estimated sweep time "
        f"{sweep_s:.2f} s (k={K_SWEEP} span/RBW^2, RBW {RBW_HZ / 1e3:g} kHz)",
        "< 1 % of the instrument's own sweep time", frac < 0.01, args.json,
        load_average=[round(x, 2) for x in load], cpu=_common.cpu_model(), rounds=rounds)


if __name__ == "__main__":
    main()
