"""A band outside the antenna certificate's frequency range is refused in one line, before any sweep
(meterlink selective) and when a stored point is computed again (meterlink reevaluate): the antenna
factor there would be the table's edge value or an extrapolation, with no uncertainty for it."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from meterlink.errors import MeterlinkError
from meterlink.physics.certificate import load_certificate
from meterlink.survey.selective import check_bands_in_range, load_bands

ROOT = Path(__file__).resolve().parent.parent
BANDS = ROOT / "simulators" / "scenarios" / "demo-bands.toml"
DIPOLE = ROOT / "calibration" / "demo-dipole.toml"


def _narrowed(tmp_path: Path) -> Path:
    """The packaged dipole certificate with its valid range cut to 200 MHz .. 6 GHz (its tables unchanged)."""
    text = DIPOLE.read_text()
    assert "freq_hz = [30000000.0, 6000000000.0]" in text
    out = tmp_path / "dipole-200M.toml"
    out.write_text(text.replace("freq_hz = [30000000.0, 6000000000.0]", "freq_hz = [200000000.0, 6000000000.0]", 1))
    return out


def test_bands_inside_the_range_pass_and_one_outside_is_named(tmp_path):
    bands = load_bands(BANDS)
    assert any(b.freq_hz < 200e6 for b in bands)          # the demo site's FM carriers at 94.3 and 101.8 MHz
    check_bands_in_range(bands, load_certificate(DIPOLE), "demo-dipole")       # 30 MHz .. 6 GHz covers all
    with pytest.raises(MeterlinkError, match=r"band 'Tor FM A' \(94\.3 MHz\) lies outside .* \(200-6000 MHz\)"):
        check_bands_in_range(bands, load_certificate(_narrowed(tmp_path)), "narrow")
    # a band whose occupied width crosses the edge: 6 GHz +- 10 MHz against a range ending at 6 GHz
    with pytest.raises(MeterlinkError, match=r"5990-6010 MHz"):
        check_bands_in_range([{"name": "edge", "freq_hz": 6.0e9, "bandwidth_hz": 20e6}],
                             load_certificate(DIPOLE), "demo-dipole")


def test_selective_refuses_before_touching_the_analyser(tmp_path):
    journal = tmp_path / "point.jsonl"
    # nothing listens on this address: a refusal after connecting would be an instrument error instead
    r = subprocess.run([sys.executable, "-m", "meterlink", "selective", "TCPIP::127.0.0.1::9::SOCKET",
                        "--bands", str(BANDS), "--journal", str(journal), "--antenna-cert",
                        str(_narrowed(tmp_path)), "--timeout", "1"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 2, r.stderr
    assert r.stderr.count("\n") == 1 and "Traceback" not in r.stderr
    assert "band 'Tor FM A' (94.3 MHz) lies outside" in r.stderr
    assert not journal.exists()
