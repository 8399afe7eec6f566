"""Messages that used to mislead: each is one line that names the real problem (run as a user runs them)."""

import subprocess
import sys

import pytest

from meterlink.storage.store import Store

PNG = b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR" + bytes(64)


def cli(*argv):
    p = subprocess.run([sys.executable, "-m", "meterlink", *map(str, argv)], capture_output=True, text=True,
                       timeout=120)
    return p.returncode, p.stdout, p.stderr


def one_line(err: str) -> str:
    assert "Traceback" not in err and "usage:" not in err, err
    assert len(err.strip().splitlines()) == 1, err
    return err.strip()


def test_a_certificate_given_as_an_existing_png_is_called_not_a_certificate(tmp_path):
    db = tmp_path / "m.db"
    with Store(db) as s:
        s.begin_session("record")
    png = tmp_path / "levels.png"
    png.write_bytes(PNG)
    code, _, err = cli("recalibrate", "--db", db, "--certificate", png)
    line = one_line(err)
    assert code == 2 and str(png) in line and "not a certificate file" in line
    assert "no such" not in line and "does not exist" not in line


def test_a_station_file_that_is_a_png_is_called_not_a_station_file(tmp_path):
    png = tmp_path / "x.png"
    png.write_bytes(PNG)
    code, _, err = cli("monitor", "--config", png)
    line = one_line(err)
    assert code == 2 and str(png) in line and "not a station file" in line and "UnicodeDecodeError" not in line


def test_a_bad_frequency_in_a_station_file_is_said_once(tmp_path):
    station = tmp_path / "s.toml"
    station.write_text('format = "meterlink-station/1"\n[station]\nname = "Orrin Hill"\ndatabase = "s.db"\n'
                       '[assessment]\nstandard = "icnirp-2020"\ntier = "public"\nfreq = "abc"\n'
                       '[[meter]]\nname = "a"\nport = "/dev/null"\ncertificate = "demo-probe"\n', encoding="utf-8")
    code, _, err = cli("monitor", "--config", station)
    line = one_line(err)
    assert code == 2 and line.count("not a frequency") == 1 and "assessment.freq" in line and str(station) in line


@pytest.mark.parametrize("argv", [["limits", "-5MHz"], ["limits", "--tier", "public", "-5MHz"],
                                  ["limits", "-1e6", "--json"]])
def test_a_negative_frequency_is_explained_not_met_with_usage(argv):
    code, out, err = cli(*argv)
    line = one_line(err)
    assert code == 2 and out == "" and "must be positive" in line and argv[-1 if argv[-1] != "--json" else -2] in line


def test_limits_still_takes_options_after_the_frequency():
    code, out, err = cli("limits", "900MHz", "--standard", "icnirp-2020", "--tier", "public", "--json")
    assert code == 0, err


def test_assess_with_an_unknown_certificate_writes_nothing(tmp_path):
    import hashlib

    db = tmp_path / "m.db"
    with Store(db) as s:
        s.begin_session("record")
    before = hashlib.sha256(db.read_bytes()).hexdigest()
    code, _, err = cli("assess", "--db", db, "--standard", "icnirp-2020", "--tier", "public",
                       "--certificate", "no-such-cert")
    assert code == 2 and "no-such-cert" in one_line(err)
    with Store(db, readonly=True) as s:
        assert s.events() == []          # no 'assessment_rule' event left behind
    assert hashlib.sha256(db.read_bytes()).hexdigest() == before
