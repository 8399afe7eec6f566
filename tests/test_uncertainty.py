"""GUM budgets (JCGM 100:2008 'Evaluation of measurement data - Guide to the expression of uncertainty')."""

import math

import pytest

from meterlink.physics.certificate import load_certificate
from meterlink.physics.uncertainty import Component, combine, measurement_budget


def test_divisors():
    # JCGM 100:2008 4.3.7: rectangular half-width a -> u = a/sqrt(3); 4.3.9: triangular a/sqrt(6);
    # U-shaped (arcsine) a/sqrt(2) (JCGM 101:2008 6.4.6); normal U with coverage factor k -> U/k (4.3.4).
    assert Component("r", 1.0, "dB", "rectangular").standard_db() == pytest.approx(1 / math.sqrt(3))
    assert Component("t", 1.0, "dB", "triangular").standard_db() == pytest.approx(1 / math.sqrt(6))
    assert Component("u", 1.0, "dB", "u-shaped").standard_db() == pytest.approx(1 / math.sqrt(2))
    assert Component("n", 1.0, "dB", "normal", k=2.0).standard_db() == pytest.approx(0.5)
    assert Component("s", 1.0, "dB", "rectangular", sensitivity=-2.0).standard_db() == pytest.approx(2 / math.sqrt(3))


def test_quadrature_and_k2():
    # JCGM 100:2008 5.1.2 (uncorrelated inputs: root-sum-square of c_i u(x_i)) and 6.2.1 (U = k u_c),
    # k = 2 for about 95 % coverage (6.3.3).
    b = combine([Component("a", 0.6, "dB", "normal", 2.0), Component("b", math.sqrt(3) * 0.4, "dB", "rectangular")])
    assert b.u_c_db == pytest.approx(0.5)              # sqrt(0.3^2 + 0.4^2)
    assert b.k == 2.0 and b.u_expanded_db == pytest.approx(1.0)
    assert [r.name for r in b.rows] == ["a", "b"]
    assert b.rows[1].divisor == pytest.approx(math.sqrt(3)) and b.rows[1].u_db == pytest.approx(0.4)
    # dB -> percent: field 100*(10^(U/20)-1), power 100*(10^(U/10)-1) (decibel definitions, IEC 60027-3)
    assert b.u_expanded_pct_field == pytest.approx(12.20, abs=0.01)
    assert b.u_expanded_pct_power == pytest.approx(25.89, abs=0.01)


def test_percent_components_convert_on_their_larger_side():
    # +/-10 % of a field is a factor 0.9..1.1: 20 log10(1.1) = 0.828 dB up, 20 log10(0.9) = -0.915 dB
    # down (decibel definitions, IEC 60027-3). The larger side, 0.915 dB, is the half-width in dB;
    # the upper side alone would understate it by 0.087 dB. For power, 10 log10(0.9) = -0.458 dB.
    c = Component("p", 10.0, "%", "normal", 1.0)
    assert c.value_db("field") == pytest.approx(0.9151, abs=1e-4)
    assert c.value_db("field") == pytest.approx(-20 * math.log10(0.9))
    assert c.value_db("power") == pytest.approx(0.4576, abs=1e-4)
    assert combine([c], domain="power").u_c_db == pytest.approx(0.4576, abs=1e-4)
    # 30 % rectangular (a common probe-isotropy figure): |20 log10(0.7)| = 3.098 dB, / sqrt(3) = 1.789 dB
    assert Component("r", 30.0, "%", "rectangular").standard_db() == pytest.approx(3.098 / math.sqrt(3), abs=1e-3)
    with pytest.raises(ValueError, match="below 100 %"):
        Component("x", 100.0, "%")


def test_expanded_uncertainty_in_percent_both_sides():
    # U = 1 dB: field +12.20 % / -10.87 %, power +25.89 % / -20.57 % (10^(1/20) = 1.1220,
    # 10^(-1/20) = 0.8913, 10^(1/10) = 1.2589, 10^(-1/10) = 0.7943).
    b = combine([Component("a", 1.0, "dB", "normal", 2.0)])
    assert b.u_expanded_pct_field == pytest.approx(12.20, abs=0.01)
    assert b.u_expanded_pct_field_lower == pytest.approx(10.87, abs=0.01)
    assert b.u_expanded_pct_power == pytest.approx(25.89, abs=0.01)
    assert b.u_expanded_pct_power_lower == pytest.approx(20.57, abs=0.01)


@pytest.mark.parametrize("bad", [dict(unit="dBm"), dict(distribution="cauchy"), dict(value=-1.0),
                                 dict(value=float("nan")), dict(k=0.0)])
def test_component_rejects_bad_input(bad):
    args = dict(name="x", value=1.0, unit="dB", distribution="normal", k=2.0) | bad
    with pytest.raises(ValueError):
        Component(**args)


def test_probe_budget_terms():
    cert = load_certificate("demo-probe")
    at_point = measurement_budget(cert, 1e9, 5.0, 23.0)
    names = [r.name for r in at_point.rows]
    assert {"reference_field", "linearity", "frequency_response", "isotropy", "temperature",
            "frequency interpolation"} <= set(names)
    rows = {r.name: r for r in at_point.rows}
    assert rows["frequency interpolation"].u_db == 0.0           # 1 GHz is a table point
    assert rows["temperature"].u_db == 0.0                        # at the reference temperature
    assert rows["isotropy"].u_db == pytest.approx(cert.isotropy_db / math.sqrt(3))
    between = measurement_budget(cert, 1.2e9, 5.0, 23.0)
    assert {r.name: r for r in between.rows}["frequency interpolation"].u_db > 0
    warm = measurement_budget(cert, 1e9, 5.0, 33.0)
    assert {r.name: r for r in warm.rows}["temperature"].u_db == pytest.approx(
        cert.temp_coeff_halfwidth_db_per_c * 10 / math.sqrt(3))
    unknown_t = measurement_budget(cert, 1e9, 5.0, None)
    assert unknown_t.u_c_db > warm.u_c_db > at_point.u_c_db
    band = measurement_budget(cert, (8e8, 2.2e9))
    everything = measurement_budget(cert, None)
    assert everything.u_c_db >= band.u_c_db > at_point.u_c_db
    # the budget reproduces its own quadrature sum
    assert at_point.u_c_db == pytest.approx(math.sqrt(sum(r.u_db**2 for r in at_point.rows)))


def test_dipole_budget_terms():
    cert = load_certificate("demo-dipole")
    b = measurement_budget(cert, 300e6)
    assert {"antenna_factor", "cable_loss", "receiver_level", "mismatch"} <= {r.name for r in b.rows}
    assert 0.5 < b.u_expanded_db < 2.5
    extra = measurement_budget(cert, 300e6, extra=[Component("site", 1.0, "dB", "rectangular")])
    assert extra.u_c_db == pytest.approx(math.hypot(b.u_c_db, 1 / math.sqrt(3)))


def _dipole_with_af_table(cert, freq_hz, af_db):
    import dataclasses

    return dataclasses.replace(cert, af_freq_hz=tuple(freq_hz), af_db_per_m=tuple(af_db))


def _af_interp_term(budget):
    return next(r for r in budget.rows if r.name == "antenna factor interpolation")


def test_af_interpolation_follows_the_antenna_factor_relation_not_its_20_log_f_rise():
    # AF = 9.73 / (lambda sqrt(G)) for a 50-ohm receiver (the antenna-factor relation; in dB
    # AF = 20 log10(f_MHz) - 29.77 - G_dBi, as units.antenna_factor_db_per_m states it): an antenna of constant
    # gain has an AF that rises 15.56 dB from 1 to 6 GHz (20 log10 6), which interpolation in log f follows
    # exactly. Half that step (7.78 dB) was taken as the half-width before; the gain did not change, so 0.
    from meterlink.physics.units import antenna_factor_db_per_m

    cert = load_certificate("demo-dipole")
    f = [1e9, 6e9]
    const_gain = _dipole_with_af_table(cert, f, [antenna_factor_db_per_m(2.15, x) for x in f])
    assert const_gain.af_db_per_m[1] - const_gain.af_db_per_m[0] == pytest.approx(20 * math.log10(6), abs=1e-9)
    assert _af_interp_term(measurement_budget(const_gain, 3.5e9)).value == pytest.approx(0.0, abs=1e-9)
    # the gain falls by 2 dB between the points (2.15 dBi -> 0.15 dBi): half of that, 1 dB, is the half-width
    falling = _dipole_with_af_table(cert, f, [antenna_factor_db_per_m(2.15, 1e9), antenna_factor_db_per_m(0.15, 6e9)])
    assert _af_interp_term(measurement_budget(falling, 3.5e9)).value == pytest.approx(1.0, abs=1e-9)
