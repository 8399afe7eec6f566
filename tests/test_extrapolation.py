"""Extrapolation to maximum traffic against values worked by hand from the defining relations.

No numeric worked example of the published guidance (IEC 62232, ITU-T K.100, ECC/REC(02)04, national
measurement recommendations) could be read from its text when this was written: the stored copies reached
showed only front matter and introductions. One published relation could be read, the GSM one (test below,
source named beside it); the other expected values are computed by hand from the defining formulas in
meterlink/physics/extrapolation.py, with the arithmetic shown.
"""

from __future__ import annotations

import math

import pytest

from meterlink.physics.extrapolation import (NR_BEAM_CAVEAT, ExtrapolationError, gsm_bcch, lte_crs, nr_ssb,
                                             power_ratio, subcarriers, umts_cpich)


def test_gsm_four_trx():
    # E_BCCH = 1.0 V/m, 4 TRX: E_max = 1.0 * sqrt(4) = 2.0 V/m
    f = gsm_bcch(4)
    assert f.power_factor == 4 and 1.0 * f.field_factor == pytest.approx(2.0)
    assert f.record()["inputs"] == {"n_trx": 4}


def test_umts_cpich_ten_percent():
    # The relation as the "EMF-Messprojekt Berlin" report describes it (read in a reproduction): the CPICH
    # field is scaled by a factor formed from the CPICH power as set and the installation's maximum transmit
    # power. It gives no numbers; the values below are worked by hand.
    # P_max 20 W (43 dBm), CPICH 2 W (33 dBm): F = 10 (10 dB); 0.5 V/m -> 0.5 * 3.16228 = 1.58114 V/m
    f = umts_cpich(20.0, 2.0)
    assert f.factor_db == pytest.approx(10.0)
    assert 0.5 * f.field_factor == pytest.approx(1.58114, abs=1e-5)


def test_lte_20_mhz_one_and_two_ports():
    # 20 MHz = 100 RB = 1200 subcarriers; E_RS 0.1 V/m: E_max = 0.1 * sqrt(1200) = 3.46410 V/m
    n = subcarriers(100)
    assert n == 1200
    assert 0.1 * lte_crs(n).field_factor == pytest.approx(3.46410, abs=1e-5)
    # two ports measured 0.1 and 0.05 V/m: E_max^2 = 1200 * (0.01 + 0.0025) = 15 -> 3.87298 V/m
    f = lte_crs(n, [0.1, 0.05])
    assert 0.1 * f.field_factor == pytest.approx(math.sqrt(15.0), abs=1e-9)
    # RS boosted 3 dB over the data REs: F = 1200 * 10^(-0.3) = 601.43
    assert lte_crs(n, data_to_rs_db=-3.0).power_factor == pytest.approx(601.43, abs=0.01)


def test_nr_100_mhz_with_declared_factors_and_caveat():
    # 100 MHz at 30 kHz SCS = 273 RB = 3276 subcarriers; TDD downlink 0.75; traffic beam 6 dB over SSB beam;
    # actual-maximum factor 0.25: F = 3276 * 0.75 * 10^0.6 * 0.25 = 3276 * 0.75 = 2457; * 3.98107 = 9781.5; * 0.25
    # = 2445.4; E_SSS 0.05 V/m -> 0.05 * sqrt(2445.4) = 2.4726 V/m
    f = nr_ssb(subcarriers(273), tdd_downlink_fraction=0.75, beam_gain_ratio_db=6.0,
               actual_max_factor=0.25, actual_max_source="operator declaration (invented example)")
    assert f.power_factor == pytest.approx(2445.4, abs=0.1)
    assert 0.05 * f.field_factor == pytest.approx(2.4726, abs=1e-4)
    assert NR_BEAM_CAVEAT in f.caveats and f.record()["inputs"]["actual_max_source"]


def test_nonsense_inputs_are_refused():
    with pytest.raises(ExtrapolationError):
        gsm_bcch(0)
    with pytest.raises(ExtrapolationError):
        umts_cpich(2.0, 20.0)
    with pytest.raises(ExtrapolationError):
        nr_ssb(3276, tdd_downlink_fraction=1.5)
    with pytest.raises(ExtrapolationError, match="source"):
        lte_crs(1200, actual_max_factor=0.5)


def test_gsm_sectors_by_the_published_relation():
    # Final report "Entwicklung geeigneter Mess- und Berechnungsverfahren zur Ermittlung der Exposition der
    # Bevölkerung durch elektromagnetische Felder in der Umgebung von Mobilfunk Basisstationen" (research
    # project for the German Federal Environment Ministry, BMU), annex page A5, eq. (5.4), typed from the text:
    #   E_max,gesamt = sqrt( sum_{i=1..n} E_i,max^2 * N_i ),  N_i channels of sector i, E_i,max its BCCH field:
    # "the total of a sector is the BCCH field times the square root of the sector's channel count, and the
    # sectors' totals add geometrically". Its example station (ch. 2.5, figure 2.5.18) has three sectors of two
    # channels; the BCCH fields here are invented inputs: 0.30, 0.20, 0.10 V/m, N = 2 each. By the relation:
    # sqrt(2 * (0.09 + 0.04 + 0.01)) = sqrt(0.28) = 0.529150 V/m.
    sectors = [(0.30, 2), (0.20, 2), (0.10, 2)]
    e = math.sqrt(sum((e_bcch * gsm_bcch(n).field_factor) ** 2 for e_bcch, n in sectors))
    assert e == pytest.approx(0.529150, abs=1e-6)
    # the same report (same page): when the operator runs below the maximum power applied for, "the ratio of
    # both transmit powers is to be included": 0.529150 V/m at 10 W of 20 W -> x sqrt(2) = 0.748331 V/m
    assert e * power_ratio(20.0, 10.0, "operator declaration (invented example)").field_factor == pytest.approx(
        0.748331, abs=1e-6)


def test_power_ratio_needs_its_source_and_sane_powers():
    with pytest.raises(ExtrapolationError, match="source"):
        power_ratio(20.0, 10.0, " ")
    with pytest.raises(ExtrapolationError, match="exceeds"):
        power_ratio(10.0, 20.0, "declared")
