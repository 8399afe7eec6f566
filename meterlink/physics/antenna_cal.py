"""Antenna-factor calibration by the standard-field method (pure): the far field of a transmitting
antenna of known gain, the antenna factor of a receiving antenna from that field and the voltage it
delivers, and the GUM budget of the result.

Standard field: a transmitting antenna of gain G fed with net power P makes, on its boresight at
distance d in the far field, the power density S = P G / (4 pi d^2) = E^2 / Z0, so
E = sqrt(Z0 P G / (4 pi)) / d. With the rounded Z0 = 120 pi ohm this is the handbook
E = sqrt(30 P G) / d; here Z0 = sqrt(mu_0 / epsilon_0) from scipy.constants (about 376.730 ohm, 0.035 %
lower in E than the 120 pi form). The antenna under test, in that field, delivers V into the 50 ohm
analyser (after a cable of known loss): AF = E / V, in dB AF = E(dBuV/m) - V(dBuV).

Far field: the procedure accepts a distance only when d >= 2 D^2 / lambda (the Fraunhofer distance,
D the largest dimension of either antenna) and d >= lambda (the reactive field of a small antenna
falls off within lambda / (2 pi); one wavelength is this project's margin on that, a choice).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from meterlink.physics import units
from meterlink.physics.uncertainty import Budget, Component, combine


def standard_field_e_v_per_m(net_power_w, gain_dbi, distance_m):
    """Boresight far field E (V/m) of a transmitting antenna: sqrt(Z0 P G / (4 pi)) / d."""
    g = units.db_to_ratio_power(gain_dbi)
    return np.sqrt(units.Z0_OHM * np.asarray(net_power_w, dtype=float) * g / (4.0 * math.pi)) / distance_m


def standard_field_power_w(e_v_per_m, gain_dbi, distance_m):
    """Net power that makes the field E at distance d: P = 4 pi (E d)^2 / (Z0 G)."""
    g = units.db_to_ratio_power(gain_dbi)
    return 4.0 * math.pi * (np.asarray(e_v_per_m, dtype=float) * distance_m) ** 2 / (units.Z0_OHM * g)


def far_field_min_distance_m(freq_hz, largest_dimension_m: float):
    """The least distance this procedure takes as far field: max(2 D^2 / lambda, lambda)."""
    lam = units.wavelength_m(freq_hz)
    return np.maximum(2.0 * largest_dimension_m ** 2 / lam, lam)


def measured_af_db_per_m(e_v_per_m, port_dbuv):
    """Antenna factor AF = E / V in dB(1/m): E in dB(uV/m) less V at the antenna's port in dB(uV)."""
    return units.v_per_m_to_dbuv_per_m(e_v_per_m) - np.asarray(port_dbuv, dtype=float)


@dataclass(frozen=True)
class AfReading:
    """One repeat at one frequency: net power into the transmitting antenna before and after the
    analyser's sweep (dBm), and the level of the tone the analyser showed (dBm at its input)."""

    freq_hz: float
    repeat: int
    net_before_dbm: float
    net_after_dbm: float
    analyser_dbm: float


@dataclass(frozen=True)
class AfPoint:
    """The antenna factor at one frequency from its repeats."""

    freq_hz: float
    n: int
    net_power_w: float          # mean over the repeats
    power_spread_db: float      # largest minus smallest net power reading (generator stability, seen)
    e_v_per_m: float            # standard field at the mean net power
    port_dbuv: float            # mean voltage at the antenna's port (analyser level + cable loss)
    af_db_per_m: float          # mean of the repeats' AF
    u_a_db: float               # experimental standard deviation of the mean (JCGM 100:2008 4.2.3)


def af_point(readings, gain_dbi: float, distance_m: float, cable_loss_db: float) -> AfPoint:
    """AF at one frequency from its repeats: each repeat's field from the mean of its two power
    readings, its port voltage from the analyser level plus the cable loss, AF = E - V in dB."""
    rs = list(readings)
    if not rs or len({r.freq_hz for r in rs}) != 1:
        raise ValueError("af_point needs one or more readings at one frequency")
    before = np.array([r.net_before_dbm for r in rs])
    after = np.array([r.net_after_dbm for r in rs])
    p_w = 1e-3 * (units.db_to_ratio_power(before) + units.db_to_ratio_power(after)) / 2.0
    e = standard_field_e_v_per_m(p_w, gain_dbi, distance_m)
    port = units.dbm_to_dbuv(np.array([r.analyser_dbm for r in rs])) + cable_loss_db
    af = measured_af_db_per_m(e, port)
    n = len(rs)
    u_a = float(np.std(af, ddof=1) / math.sqrt(n)) if n > 1 else float("nan")
    both = np.concatenate([before, after])
    return AfPoint(rs[0].freq_hz, n, float(np.mean(p_w)), float(both.max() - both.min()),
                   float(standard_field_e_v_per_m(np.mean(p_w), gain_dbi, distance_m)), float(np.mean(port)),
                   float(np.mean(af)), u_a)


@dataclass(frozen=True)
class AfBudgetInputs:
    """The lab's stated uncertainties of the standard-field set-up (example values; a lab states its own)."""

    power_meter_pct: float = 3.0          # net power, expanded (k = 2), percent of power
    generator_stability_db: float = 0.05  # power change during a reading, rectangular half-width
    tx_gain_db: float = 0.5               # transmitting antenna's gain, expanded (k = 2), from its certificate
    distance_mm: float = 10.0             # antenna-to-antenna distance, rectangular half-width
    gamma_tx_source: float = 0.1          # |reflection coefficient| of the coupler port feeding the antenna
    gamma_tx_antenna: float = 0.2         # of the transmitting antenna
    gamma_rx_antenna: float = 0.3         # of the antenna under test
    gamma_analyser: float = 0.1           # of the analyser input (with its attenuator)
    analyser_level_db: float = 0.5        # analyser absolute level accuracy, expanded (k = 2)
    rx_cable_db: float = 0.1              # loss of the cable to the analyser, expanded (k = 2)
    reflections_db: float = 0.5           # site (anechoic room) reflections, rectangular half-width

    def replace(self, overrides: dict) -> "AfBudgetInputs":
        """These inputs with the named ones replaced; unknown names are refused (ValueError)."""
        return _with_overrides(self, overrides)


def _with_overrides(inputs, overrides: dict):
    """A budget-inputs dataclass with the named fields replaced; unknown names and values that are not
    finite numbers >= 0 are refused (ValueError)."""
    from dataclasses import fields, replace

    known = {f.name for f in fields(inputs)}
    bad = sorted(set(overrides) - known)
    if bad:
        raise ValueError(f"unknown budget input(s) {', '.join(bad)} (known: {', '.join(sorted(known))})")
    for k, v in overrides.items():
        if not (math.isfinite(v) and v >= 0):
            raise ValueError(f"budget input {k} = {v!r}: must be a finite number >= 0")
    return replace(inputs, **{k: float(v) for k, v in overrides.items()})


def mismatch_limit_db(gamma_a: float, gamma_b: float) -> float:
    """Half-width of a power mismatch uncertainty: 20 log10(1 + |G_a||G_b|) dB (U-shaped)."""
    return 20.0 * math.log10(1.0 + abs(gamma_a) * abs(gamma_b))


def af_budget(point: AfPoint, inputs: AfBudgetInputs, distance_m: float, k: float = 2.0
              ) -> tuple[Budget, tuple[str, ...]]:
    """GUM budget (JCGM 100:2008) of one AF value, in dB with a note per row.

    The model in dB is a sum: AF = 10 log10 P + 10 log10 G - 20 log10 d + const - V(dBuV) - cable, so an
    input stated in dB of its own quantity has sensitivity 1 (5.1.3); a power in percent becomes
    10 log10(1 + p/100) dB, a distance 20 log10(1 + dd/d) field dB. Mismatch limits are U-shaped.
    Generator stability: the larger of the stated half-width and half the spread the power meter saw.
    """
    v = inputs
    stab = max(v.generator_stability_db, point.power_spread_db / 2.0)
    rows = [
        (Component("power measurement", 10 * math.log10(1 + v.power_meter_pct / 100), "dB", "normal", 2.0),
         f"net power {v.power_meter_pct:g} % (k = 2) = 10 log10(1 + p) dB of P; c = 1"),
        (Component("generator stability", stab, "dB", "rectangular"),
         f"stated {v.generator_stability_db:g} dB, seen {point.power_spread_db / 2:.3f} dB (half the spread)"),
        (Component("transmitting antenna gain", v.tx_gain_db, "dB", "normal", 2.0),
         "from its certificate (k = 2); c = 1"),
        (Component("distance", 20 * math.log10(1 + v.distance_mm / 1000 / distance_m), "dB", "rectangular"),
         f"d +/- {v.distance_mm:g} mm of {distance_m:g} m; E ~ 1/d"),
        (Component("mismatch, transmitting side", mismatch_limit_db(v.gamma_tx_source, v.gamma_tx_antenna),
                   "dB", "u-shaped"), f"|G| {v.gamma_tx_source:g} and {v.gamma_tx_antenna:g}"),
        (Component("mismatch, receiving side", mismatch_limit_db(v.gamma_rx_antenna, v.gamma_analyser),
                   "dB", "u-shaped"), f"|G| {v.gamma_rx_antenna:g} and {v.gamma_analyser:g}"),
        (Component("analyser level accuracy", v.analyser_level_db, "dB", "normal", 2.0), "expanded, k = 2"),
        (Component("cable to the analyser", v.rx_cable_db, "dB", "normal", 2.0), "its loss, expanded, k = 2"),
        (Component("site reflections", v.reflections_db, "dB", "rectangular"), "anechoic room"),
        (Component("repeatability", point.u_a_db if math.isfinite(point.u_a_db) else 0.0, "dB", "normal", 1.0),
         f"Type A, s(mean) of {point.n} repeats (JCGM 100:2008 4.2.3)"),
    ]
    return combine([c for c, _ in rows], k=k), tuple(n for _, n in rows)


# -- substitution (reference-antenna) method ------------------------------------------------------------------
#
# A reference antenna of known antenna factor stands in a field and its port voltage V_ref is read; the antenna
# under test then replaces it at the same place in the same field and gives V_dut: AF_dut = AF_ref * V_ref / V_dut,
# in dB AF_dut = AF_ref + V_ref - V_dut. Both antennas feed the analyser through the same cable, so its loss
# cancels. The field is the same only as far as the net power into the transmitting antenna is the same: each
# voltage is referred to the net power read with it (E ~ sqrt(P), so a field in dB moves as the power in dB):
# AF_dut = AF_ref + (V_ref - P_ref) - (V_dut - P_dut), all in dB.


@dataclass(frozen=True)
class SubReading:
    """One repeat of the substitution at one frequency: the reference antenna's and the antenna under test's
    tone levels (dBm at the analyser) and the net power into the transmitting antenna with each (dBm)."""

    freq_hz: float
    repeat: int
    ref_net_dbm: float
    ref_dbm: float
    dut_net_dbm: float
    dut_dbm: float


def substitution_af_db_per_m(af_ref_db_per_m, ref_dbm, dut_dbm, ref_net_dbm=0.0, dut_net_dbm=0.0):
    """AF of the antenna under test from the reference antenna's: AF_ref + (V_ref - P_ref) - (V_dut - P_dut), dB."""
    return (np.asarray(af_ref_db_per_m, dtype=float) + (np.asarray(ref_dbm, dtype=float) - ref_net_dbm)
            - (np.asarray(dut_dbm, dtype=float) - dut_net_dbm))


@dataclass(frozen=True)
class SubPoint:
    """The substituted antenna factor at one frequency from its repeats."""

    freq_hz: float
    n: int
    af_ref_db_per_m: float      # the reference antenna's AF used (from its certificate)
    ratio_db: float             # mean of V_ref - V_dut, each referred to its net power (dB)
    power_change_db: float      # largest |P_dut - P_ref| over the repeats (how far the field moved, corrected)
    af_db_per_m: float          # mean of the repeats' AF
    u_a_db: float               # experimental standard deviation of the mean (JCGM 100:2008 4.2.3)


def sub_point(readings, af_ref_db_per_m: float) -> SubPoint:
    """AF at one frequency from the repeats of the substitution."""
    rs = list(readings)
    if not rs or len({r.freq_hz for r in rs}) != 1:
        raise ValueError("sub_point needs one or more readings at one frequency")
    ratio = np.array([(r.ref_dbm - r.ref_net_dbm) - (r.dut_dbm - r.dut_net_dbm) for r in rs])
    af = af_ref_db_per_m + ratio
    n = len(rs)
    u_a = float(np.std(af, ddof=1) / math.sqrt(n)) if n > 1 else float("nan")
    change = max(abs(r.dut_net_dbm - r.ref_net_dbm) for r in rs)
    return SubPoint(rs[0].freq_hz, n, float(af_ref_db_per_m), float(np.mean(ratio)), float(change),
                    float(np.mean(af)), u_a)


@dataclass(frozen=True)
class SubBudgetInputs:
    """The lab's stated uncertainties of the substitution set-up (example values; a lab states its own)."""

    ref_af_db: float = 0.6                 # reference antenna's AF, expanded (k = 2), from its certificate
    positioning_db: float = 0.3            # one antenna replacing the other at the same place: rectangular half-width
    gamma_ref_antenna: float = 0.2         # |reflection coefficient| of the reference antenna
    gamma_dut_antenna: float = 0.3         # of the antenna under test
    gamma_analyser: float = 0.1            # of the analyser input (with its attenuator)
    analyser_linearity_db: float = 0.1     # the analyser's error on the ratio of two levels: rectangular half-width
    power_normalisation_db: float = 0.02   # the power meter's error on the ratio of the two net powers: rectangular

    def replace(self, overrides: dict) -> "SubBudgetInputs":
        """These inputs with the named ones replaced; unknown names are refused (ValueError)."""
        return _with_overrides(self, overrides)


def sub_budget(point: SubPoint, inputs: SubBudgetInputs, k: float = 2.0) -> tuple[Budget, tuple[str, ...]]:
    """GUM budget (JCGM 100:2008) of one substituted AF value, in dB with a note per row.

    The model in dB is a sum, AF_dut = AF_ref + (V_ref - P_ref) - (V_dut - P_dut), so every input stated in dB
    has sensitivity +/-1 (5.1.3) and the contributions add in quadrature (5.1.2). The two mismatches are
    separate terms (each antenna meets the analyser input on its own); the cable's loss cancels and is not a
    term; the analyser's absolute level accuracy cancels too, leaving its linearity over the ratio.
    """
    v = inputs
    rows = [
        (Component("reference antenna factor", v.ref_af_db, "dB", "normal", 2.0),
         "from the reference antenna's certificate (k = 2); c = 1"),
        (Component("repeatability", point.u_a_db if math.isfinite(point.u_a_db) else 0.0, "dB", "normal", 1.0),
         f"Type A, s(mean) of {point.n} repeats (JCGM 100:2008 4.2.3)"),
        (Component("positioning", v.positioning_db, "dB", "rectangular"),
         "the antenna under test at the reference antenna's place: field non-uniformity and placement"),
        (Component("mismatch, reference antenna", mismatch_limit_db(v.gamma_ref_antenna, v.gamma_analyser),
                   "dB", "u-shaped"), f"|G| {v.gamma_ref_antenna:g} and {v.gamma_analyser:g}"),
        (Component("mismatch, antenna under test", mismatch_limit_db(v.gamma_dut_antenna, v.gamma_analyser),
                   "dB", "u-shaped"), f"|G| {v.gamma_dut_antenna:g} and {v.gamma_analyser:g}"),
        (Component("analyser linearity", v.analyser_linearity_db, "dB", "rectangular"),
         "on the ratio V_ref / V_dut (the absolute level cancels)"),
        (Component("net power normalisation", v.power_normalisation_db, "dB", "rectangular"),
         f"power meter on the ratio P_dut / P_ref; the field moved {point.power_change_db:.3f} dB at most"),
    ]
    return combine([c for c, _ in rows], k=k), tuple(n for _, n in rows)
