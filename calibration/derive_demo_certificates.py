"""Derive the demo certificates by "measuring" the simulated demo probe and dipole in a simulated lab.

The lab applies reference fields (with its own field-setting error), averages repeated readings of
the simulator's noisy models, and rounds like a certificate. It never reads the model parameters.
Run from the checkout:  .venv/bin/python calibration/derive_demo_certificates.py
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
import sys
import tomllib
from importlib import resources
from pathlib import Path

import numpy as np

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from meterlink.physics.calibrate import linearise  # noqa: E402
from meterlink.physics.certificate import AxisCalibration, DipoleCertificate, ProbeCertificate, dump_certificate  # noqa: E402
from meterlink.physics.uncertainty import Component  # noqa: E402
from meterlink.physics.units import antenna_factor_db_per_m  # noqa: E402
from meterlink.simulators import instruments as sim  # noqa: E402

LAB = "Quillmoor Field Metrology Laboratory (invented)"
CAL_DATE, DUE_DATE = dt.date(2026, 6, 15), dt.date(2027, 6, 15)
SEED = 20260615
REPEATS = 10
LAB_TEMP_C = 23.0
#: Climatic-chamber temperatures of the temperature step (degC): the certificate's stated range,
#: over which its coefficient (a straight line between them) and its uncertainty hold.
CHAMBER_TEMPS_C = (5.0, 40.0)
REF_FIELD_SIGMA_DB = 0.15       # the lab's field-setting error (TEM cell / horn) per setting, unknown to it
REF_FIELD_BIAS_SIGMA_DB = 0.25  # and its systematic error, drawn once per lab run
GEN_SIGMA_DB = 0.08             # the lab's signal-generator level error
PROBE_LEVELS_V_PER_M = (0.1, 0.15, 0.2, 0.3, 0.5, 0.7, 1.0, 1.5, 2.0, 3.0, 5.0, 7.0, 10.0, 15.0, 20.0, 25.0, 30.0)
PROBE_FREQS_HZ = tuple(x * 1e6 for x in (30, 50, 100, 200, 300, 500, 700, 1000, 1500, 2000, 2500, 3000, 4000,
                                          5000, 6000))
DIPOLE_FREQS_HZ = PROBE_FREQS_HZ
FREQ_RESPONSE_FIELD_V_PER_M = 5.0


def _scenario() -> dict:
    text = resources.files("meterlink.simulators.scenarios").joinpath("demo.toml").read_text(encoding="utf-8")
    return tomllib.loads(text)


def _up(x: float, step: float) -> float:
    """Round up to a multiple of step, as a certificate states an uncertainty or a bound."""
    return round(math.ceil(x / step - 1e-9) * step, 10)


class _FieldSource:
    """The lab's reference field: what it actually produces when it sets `nominal` (errors unknown to it)."""

    def __init__(self, rng):
        self.rng, self.bias_db = rng, rng.normal(0.0, REF_FIELD_BIAS_SIGMA_DB)

    def __call__(self, nominal):
        return nominal * 10 ** ((self.bias_db + self.rng.normal(0.0, REF_FIELD_SIGMA_DB)) / 20)


def _mean_counts(model, rng, e_axes, freq_hz, temp_c=LAB_TEMP_C):
    reads = [sim.probe_counts(model, np.asarray(e_axes, float)[None, :], [freq_hz], temp_c, rng)[0]
             for _ in range(REPEATS)]
    return np.mean(reads, axis=0)


def _unit(a):
    v = np.zeros(3)
    v[a] = 1.0
    return v


def measure_probe(model: sim.ProbeModel, rng, serial: str, number: str) -> ProbeCertificate:
    """Zero, linearity at the reference frequency, frequency response, temperature, isotropy."""
    ref, _applied = model.ref_freq_hz, _FieldSource(rng)
    zero = np.mean([sim.probe_counts(model, np.zeros((1, 3)), [ref], LAB_TEMP_C, rng)[0] for _ in range(50)], axis=0)
    zero = np.round(zero, 1)
    lin = []
    for a in range(3):
        counts = [_mean_counts(model, rng, _applied(e) * _unit(a), ref)[a] - zero[a]
                  for e in PROBE_LEVELS_V_PER_M]
        lin.append(AxisCalibration("xyz"[a], float(zero[a]), tuple(float(round(c)) for c in counts),
                                   PROBE_LEVELS_V_PER_M, (ref / 10, ref * 10), (0.0, 0.0)))
    # linearity check at levels between the table points
    check = np.sqrt(np.multiply(PROBE_LEVELS_V_PER_M[:-1], PROBE_LEVELS_V_PER_M[1:]))
    dev = []
    for a in range(3):
        for e in check:
            got = linearise(lin[a], [_mean_counts(model, rng, _applied(e) * _unit(a), ref)[a]])[0][0]
            dev.append(abs(20 * math.log10(got / e)))
    axes = []
    for a in range(3):
        corr = []
        for f in PROBE_FREQS_HZ:
            c = _mean_counts(model, rng, _applied(FREQ_RESPONSE_FIELD_V_PER_M) * _unit(a), f)[a]
            corr.append(round(20 * math.log10(FREQ_RESPONSE_FIELD_V_PER_M / linearise(lin[a], [c])[0][0]), 2) + 0.0)
        axes.append(dataclasses.replace(lin[a], freq_hz=PROBE_FREQS_HZ, correction_db=tuple(corr)))
    # temperature: climatic chamber at the two ends of the stated range, same applied field
    t_lo, t_hi = CHAMBER_TEMPS_C
    slopes = []
    for a in range(3):
        e_set = FREQ_RESPONSE_FIELD_V_PER_M * _unit(a)
        lo = linearise(axes[a], [_mean_counts(model, rng, e_set, ref, t_lo)[a]])[0][0]
        hi = linearise(axes[a], [_mean_counts(model, rng, e_set, ref, t_hi)[a]])[0][0]
        slopes.append(20 * math.log10(hi / lo) / (t_hi - t_lo))
    coeff = round(float(np.mean(slopes)), 3)
    coeff_hw = _up(max(abs(s - coeff) for s in slopes) + 0.002, 0.001)
    # isotropy: the probe turned through 36 orientations in a fixed field, at two frequencies
    iso = 0.0
    dirs = rng.normal(size=(36, 3))
    dirs /= np.linalg.norm(dirs, axis=1)[:, None]
    for f in (ref, 2.45e9):
        tot = []
        for d in dirs:
            c = _mean_counts(model, rng, FREQ_RESPONSE_FIELD_V_PER_M * np.abs(d), f)
            e = [linearise(axes[a], [c[a]])[0][0] * 10 ** (np.interp(np.log10(f), np.log10(PROBE_FREQS_HZ),
                                                                       axes[a].correction_db) / 20) for a in range(3)]
            tot.append(20 * math.log10(math.sqrt(sum(x * x for x in e))))
        iso = max(iso, float(np.max(np.abs(np.array(tot) - np.mean(tot)))))
    us = (Component("reference_field", 0.7, "dB", "normal", 2.0),
          Component("linearity", max(0.1, _up(max(dev), 0.05)), "dB", "rectangular"),
          Component("frequency_response", 0.6, "dB", "normal", 2.0),
          Component("repeatability", 0.05, "dB", "normal", 1.0))
    return ProbeCertificate("ML-EP3 three-axis E-field probe (simulated)", serial, LAB, number, CAL_DATE, DUE_DATE,
                            "E", ref, (PROBE_FREQS_HZ[0], PROBE_FREQS_HZ[-1]), (0.1, 30.0), LAB_TEMP_C, coeff,
                            coeff_hw, max(0.1, _up(iso, 0.05)), tuple(axes), us, temp_range_c=CHAMBER_TEMPS_C)


def _bare_receiver(model: sim.ReceiverModel, with_cable: bool) -> sim.ReceiverModel:
    """The same receiver fed from the lab's generator: no antenna (AF = 0 dB/m), with or without the cable."""
    lo, hi = 1e6, 1e11
    af0 = [(f, float(antenna_factor_db_per_m(0.0, f))) for f in (lo, hi)]   # the gain that makes AF = 0 dB/m
    cable = model.cable_loss_db if with_cable else [(lo, 0.0), (hi, 0.0)]
    return dataclasses.replace(model, antenna_gain_dbi=af0, cable_loss_db=cable)


def _mean_level(model, rng, e_v_per_m, f):
    return float(np.mean(sim.receiver_levels_dbuv(model, np.full(REPEATS, e_v_per_m), np.full(REPEATS, f), rng)))


def measure_dipole(model: sim.ReceiverModel, rng, serial: str, number: str) -> DipoleCertificate:
    """Receiver level with a generator, cable loss through the receiver, then the antenna factor in a field."""
    gen_dbuv = 80.0
    bare, cabled = _bare_receiver(model, False), _bare_receiver(model, True)
    _applied = _FieldSource(rng)

    def gen(level_dbuv):
        return 10 ** ((level_dbuv + rng.normal(0.0, GEN_SIGMA_DB) - 120) / 20)

    errs = [_mean_level(bare, rng, gen(gen_dbuv), f) - gen_dbuv for f in DIPOLE_FREQS_HZ]
    level_corr = round(-float(np.mean(errs)), 2) + 0.0
    floor = next(lv for lv in range(40, -30, -1) if not np.isfinite(_mean_level(bare, rng, gen(lv), 1e9)))
    cable = [round(gen_dbuv - (_mean_level(cabled, rng, gen(gen_dbuv), f) + level_corr), 2) for f in DIPOLE_FREQS_HZ]
    e_nom_dbuv_m = 100.0
    af = []
    for f, cl in zip(DIPOLE_FREQS_HZ, cable):
        v = _mean_level(model, rng, _applied(10 ** ((e_nom_dbuv_m - 120) / 20)), f)
        af.append(round(e_nom_dbuv_m - v - cl - level_corr, 1))
    us = (Component("antenna_factor", 1.0, "dB", "normal", 2.0),
          Component("cable_loss", 0.1, "dB", "normal", 2.0),
          Component("receiver_level", 2 * GEN_SIGMA_DB + 0.1, "dB", "normal", 2.0),
          Component("mismatch", 0.3, "dB", "u-shaped"))
    return DipoleCertificate("ML-DP1 tuned dipole set (simulated)", serial, "ML-RX1 receiver (simulated)", "RX-7731",
                             LAB, number, CAL_DATE, DUE_DATE, (DIPOLE_FREQS_HZ[0], DIPOLE_FREQS_HZ[-1]),
                             (float(floor + 6), 120.0), DIPOLE_FREQS_HZ, tuple(af), DIPOLE_FREQS_HZ, tuple(cable),
                             level_corr, us, temp_range_c=CHAMBER_TEMPS_C)


def derive() -> dict[str, str]:
    """TOML text of both demo certificates, keyed by file name (deterministic: seeded rng)."""
    sc = _scenario()
    rng = np.random.default_rng(SEED)
    probe = measure_probe(sim.ProbeModel.from_dict(sc["probe"]), rng, sc["probe"]["serial"], sc["probe"]["cert_ref"])
    dip = measure_dipole(sim.ReceiverModel.from_dict(sc["receiver"]), rng, sc["receiver"]["serial"],
                         sc["receiver"]["cert_ref"])
    return {"demo-probe.toml": dump_certificate(probe), "demo-dipole.toml": dump_certificate(dip)}


def main() -> int:
    out = Path(__file__).resolve().parent
    for name, text in derive().items():
        (out / name).write_text(text, encoding="utf-8")
        print(f"wrote {out / name}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
