"""Per-band values of dipole sweeps: lines below the receiver's floor are upper bounds, not zero."""

import math

import pytest

from meterlink.physics.calibrate import floor_e_v_per_m
from meterlink.physics.certificate import load_certificate
from meterlink.station.spectral import SweepAssembler


def test_a_line_below_the_floor_in_two_orientations_counts_at_the_floor():
    # One 900 MHz line seen in x only, 40 dB above the floor. In y and z the receiver reports
    # nothing: each is "< floor", at most the floor field E_f. The orientation sum
    # E^2 = Ex^2 + Ey^2 + Ez^2 is then at most Ex^2 + 2 E_f^2 - not Ex^2, which would count the
    # unseen orientations as 0 V/m. Ex is 100 (= 10^(40/20)) times E_f: E_band = E_f sqrt(100^2 + 2).
    cert = load_certificate("demo-dipole")
    vlo = cert.level_range_dbuv[0]
    ef = float(floor_e_v_per_m(cert, 900e6)[0])
    asm = SweepAssembler(cert, bands=(("gsm900", 880e6, 960e6), ("empty", 1e9, 2e9)))
    assert asm.add(0, 1, 0, 0.0, [900e6], [vlo + 40.0]) is None
    assert asm.add(0, 1, 1, 0.0, [], []) is None
    v = asm.add(0, 1, 2, 0.0, [], [])
    assert v.band_v_per_m["gsm900"] == pytest.approx(ef * math.sqrt(100.0**2 + 2.0), rel=1e-9)
    assert v.band_below["gsm900"] and not v.band_below["empty"]
    assert v.band_v_per_m["empty"] == 0.0 and v.n_lines == 1
