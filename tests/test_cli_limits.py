"""The ``meterlink limits`` command, through meterlink.cli.main and once as a subprocess.

Expected numbers are typed from 47 CFR 1.1310 Table 1 (read in the e-CFR text) and
ICNIRP 2020 Table 6 (read in a handbook reproduction), as in tests/test_limits.py; values of
tables not yet checked against a primary text are only used to show that they say so.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys

import pytest

from meterlink.cli import SAFETY_LINE, main



@pytest.fixture(autouse=True)
def _wide_terminal(monkeypatch):
    """The tables as on a wide terminal unless a test asks for 80 columns (pytest-xdist workers get 80)."""
    monkeypatch.setenv("COLUMNS", "200")

def _flat(text: str) -> str:
    return " ".join(text.split())


def test_table_output_carries_values_and_cautions(capsys):
    assert main(["limits", "900MHz", "--standard", "fcc-1310", "--tier", "occupational"]) == 0
    out = _flat(capsys.readouterr().out)
    # 47 CFR 1.1310 Table 1 (A), 300-1500 MHz: S = f/300 mW/cm2 = 3 mW/cm2 = 30 W/m2, 6 min.
    assert "30 " in out and "6 min" in out
    assert "check [1]: checked against 47 CFR 1.1310 Table 1 (A)" in out
    assert "not yet checked" not in out  # every value shown here was checked
    assert _flat(SAFETY_LINE) in out
    assert "50 % of its E level is at 25 %" in out


FORBIDDEN = ("from memory", "shared reference", "reference-levels", "verified")


def test_every_row_shows_its_check_status_in_text(capsys):
    assert main(["limits", "900MHz"]) == 0
    raw = capsys.readouterr().out
    out = _flat(raw)
    # Checked tables name their text; the rest are visibly marked in neutral words, with the advice.
    assert "checked against 47 CFR 1.1310 Table 1 (B)" in out
    assert "checked against ICNIRP 2020 Table 6" in out
    assert "not yet checked against the primary text" in out
    assert "confirm them against it before relying on them" in out
    assert not [w for w in FORBIDDEN if w in out.lower()]
    # Every row carries a key (the last column: a row starts with its standard id), and every key is
    # explained under the table.
    rows = [ln for ln in raw.splitlines() if re.match(r"(eu|fcc|hc|icnirp|ieee)-", ln)]
    keys = {re.search(r"(\[\d+\])$", ln).group(1) for ln in rows}
    assert len(rows) >= 10 and len(keys) >= 3 and all(f"check {k}:" in out for k in keys)


def test_derived_cells_are_marked(capsys, monkeypatch):
    # 47 CFR 1.1310 Table 1 (B) gives only S = 1.0 mW/cm2 at 1900 MHz; E is sqrt(10*Z0) = 61.38 V/m.
    monkeypatch.setenv("COLUMNS", "200")
    assert main(["limits", "1.9GHz", "--standard", "fcc-1310", "--tier", "public"]) == 0
    out = _flat(capsys.readouterr().out)
    assert "~61.38" in out and "derived" in out and "general population/uncontrolled" in out


def test_json_all_standards(capsys):
    assert main(["limits", "2.45GHz", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["frequency_hz"] == 2.45e9 and data["safety"] == SAFETY_LINE
    by = {(lv["standard"], lv["tier"], lv["kind"]): lv for lv in data["levels"]}
    # 47 CFR 1.1310 Table 1 (A), 1500-100,000 MHz: 5 mW/cm2 = 50 W/m2; ICNIRP 2020 Table 6 public >2-6 GHz: 40 W/m2.
    assert by[("fcc-1310", "occupational", "whole_body")]["s_w_per_m2"] == 50
    assert by[("icnirp-2020", "public", "local")]["s_w_per_m2"] == 40
    assert all(lv["kind"] != "brief_energy" for lv in data["levels"])


def test_json_carries_the_check_status_of_every_value(capsys):
    assert main(["limits", "1MHz", "--json"]) == 0
    raw = capsys.readouterr().out
    assert not [w for w in FORBIDDEN if w in raw.lower()]
    data = json.loads(raw)
    by = {(lv["standard"], lv["tier"], lv["kind"]): lv for lv in data["levels"]}
    fcc = by[("fcc-1310", "public", "whole_body")]
    assert fcc["fully_checked"] and fcc["status"].startswith("checked against 47 CFR 1.1310 Table 1 (B)")
    assert fcc["e_checked"] == fcc["h_checked"] == fcc["s_checked"] == fcc["averaging_checked"] != ""
    sc6 = by[("hc-sc6-2015", "public", "whole_body")]
    assert not sc6["fully_checked"] and sc6["status"] == "not yet checked against the primary text"
    assert sc6["h_checked"] == "" and sc6["averaging_checked"] == ""
    peak = by[("eu-2013-35", "occupational", "peak")]  # only its low E action level was read
    assert peak["e_checked"] and not peak["h_checked"] and "not yet checked" in peak["status"]
    assert "not yet checked against the primary text" in data["check_note"]


def test_kind_filter(capsys):
    assert main(["limits", "1MHz", "--kind", "peak", "--json"]) == 0
    levels = json.loads(capsys.readouterr().out)["levels"]
    assert levels and {lv["kind"] for lv in levels} == {"peak"}
    assert {(lv["standard"], lv["tier"], lv["e_v_per_m"]) for lv in levels} >= {("icnirp-2020", "public", 83)}


@pytest.mark.parametrize("argv,fragment", [
    (["limits", "banana"], "not a frequency"),
    (["limits", "1GHz", "--standard", "nope"], "unknown standard"),
    (["limits", "1kHz", "--standard", "icnirp-2020"], "is outside"),
    (["limits", "200GHz", "--standard", "fcc-1310"], "is outside"),
    (["limits", "1GHz", "--tier", "workers"], "unknown tier"),
    (["limits", "1GHz", "--kind", "brief"], "unknown kind"),
    (["limits", "1GHz", "--standard", "eu-1999", "--tier", "occupational"], "no whole_body table"),
])
def test_bad_input_is_one_line_exit_2(capsys, argv, fragment):
    assert main(argv) == 2
    captured = capsys.readouterr()
    assert captured.out == ""
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and fragment in lines[0] and lines[0].startswith("meterlink limits: error:")


def test_subprocess_json():
    proc = subprocess.run([sys.executable, "-m", "meterlink", "limits", "900MHz", "--json"],
                          capture_output=True, text=True, timeout=60, check=False)
    assert proc.returncode == 0, proc.stderr
    data = json.loads(proc.stdout)
    lv = next(x for x in data["levels"] if (x["standard"], x["tier"], x["kind"]) == ("fcc-1310", "public", "whole_body"))
    # 47 CFR 1.1310 Table 1 (B), 300-1500 MHz: f/1500 mW/cm2 = 0.6 mW/cm2 = 6 W/m2.
    assert lv["s_w_per_m2"] == pytest.approx(6.0) and lv["source"].endswith("Table 1 (B)")


def test_brief_exposure_energy_density(capsys):
    """ICNIRP 2020 Table 7 as encoded (not yet checked against the text, and shown so), public
    2-6 GHz: U = 40 K(t) kJ/m2 with K(t) = 0.36 (0.05 + 0.95 sqrt(t/360)); at t = 60 s,
    6.305 kJ/m2; at 360 s it equals the checked Table 6 level, 40 W/m2 x 360 s."""
    import json
    import math

    from meterlink.cli import main

    assert main(["limits", "3.5GHz", "--standard", "icnirp-2020", "--tier", "public", "--brief", "60", "--json"]) == 0
    brief = json.loads(capsys.readouterr().out)["brief_exposure"]
    k = 0.36 * (0.05 + 0.95 * math.sqrt(60 / 360))
    assert brief[0]["u_j_per_m2"] == pytest.approx(40e3 * k, rel=1e-4)   # JSON: 5 significant digits
    assert brief[0]["status"] == "not yet checked against the primary text"
    assert main(["limits", "3.5GHz", "--standard", "icnirp-2020", "--tier", "public", "--brief", "360", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["brief_exposure"][0]["u_j_per_m2"] == pytest.approx(40 * 360)
    assert main(["limits", "3.5GHz", "--brief", "900"]) == 2
    err = capsys.readouterr().err
    assert "outside 0 < t <= 360 s" in err and len(err.strip().splitlines()) == 1


def test_chart_is_written_as_png(tmp_path, capsys):
    from meterlink.cli import main

    out = tmp_path / "levels.png"
    assert main(["limits", "900MHz", "--standard", "fcc-1310", "--chart", str(out), "--json"]) == 0
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and out.stat().st_size > 10_000
    assert main(["limits", "900MHz", "--chart", str(tmp_path / "no" / "dir.png")]) == 2
    assert "cannot write chart" in capsys.readouterr().err


def test_an_80_column_terminal_gets_every_number_whole_and_no_line_too_long(capsys, monkeypatch):
    """On 80 columns the table names tiers by id and sources by a key explained below; no number is cut."""
    monkeypatch.setenv("COLUMNS", "80")
    assert main(["limits", "900MHz"]) == 0
    out = capsys.readouterr().out
    assert max(len(line.rstrip()) for line in out.splitlines()) <= 80
    # ICNIRP 2020 Table 5, 400-2000 MHz whole body: 1.375 f^0.5 = 41.25 V/m at 900 MHz (public)
    assert "41.25" in out and "icnirp-2020" in out and "…" not in out
    assert "FCC 47 CFR 1.1310, Table 1 (B)" in _flat(out)
