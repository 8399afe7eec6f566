"""Station-file parsing: a valid file round-trips into the model; each mistake is one line naming file and key."""

from __future__ import annotations

import pytest

from meterlink.station.stationfile import StationFileError, load_station, parse_station

GOOD = """
format = "meterlink-station/1"
[station]
name = "Kestle Down"
database = "k.db"
[assessment]
standard = "icnirp-2020"
tier = "public"
freq = "94.3 MHz"
[[meter]]
name = "m1"
port = "/dev/ttyACM0"
certificate = "demo-probe"
[[alarm]]
name = "a1"
unit = "pct_field"
threshold = 50
clear = 40
min_duration_s = 60
"""


def test_good_file(tmp_path):
    p = tmp_path / "s.toml"
    p.write_text(GOOD)
    st = load_station(p)
    assert st.name == "Kestle Down" and st.database == tmp_path / "k.db"
    assert st.freq_hz == pytest.approx(94.3e6)
    assert st.windows_s == (360.0, 1800.0, 86400.0)
    a = st.alarms[0]
    assert (a.window_s, a.threshold, a.clear, a.min_duration_s) == (360.0, 50.0, 40.0, 60.0)
    assert st.meter_freq(st.meters[0]) == pytest.approx(94.3e6)


@pytest.mark.parametrize("old,new,key", [
    ('tier = "public"\n', "", "assessment.tier: missing"),
    ('threshold = 50', 'threshold = "50"', "alarm[0].threshold: expected num"),
    ('clear = 40', 'clear = 60', "alarm[0].clear: must not exceed threshold"),
    ('unit = "pct_field"', 'unit = "dB"', "alarm[0].unit: expected one of"),
    ('port = "/dev/ttyACM0"', 'port = "/dev/ttyACM0"\nspeed = 3', "meter[0].speed: unknown key"),
    ('freq = "94.3 MHz"', 'freq = "fast"', "assessment.freq: not a frequency"),
    ('freq = "94.3 MHz"', 'freq = "94.3 MHz"\nwindows_s = [100]', "assessment.windows_s: window 100 s is not a whole"),
    ('name = "a1"', 'name = "a1"\nmeters = ["m9"]', "alarm[0].meters[0]: no meter named 'm9'"),
    ('name = "a1"', 'name = "a1"\ncommand = "notify --all"', "alarm[0].command: expected list"),
    # issue 13 item 10: an alarm on a 600 s average when the station computes 360, 1800 and 86400 s
    # could never fire (the monitor compares alarms only with the windows it computes)
    ('name = "a1"', 'name = "a1"\nwindow_s = 600', "alarm[0].window_s: 600 s is not one of the station's "
                                                  "averaging windows (assessment.windows_s = [360, 1800, 86400])"),
    ('name = "a1"', 'name = "a1"\nwindow_s = 360.5', "alarm[0].window_s: 360.5 s is not one of"),
])
def test_errors_are_one_line_naming_the_key(tmp_path, old, new, key):
    p = tmp_path / "bad.toml"
    assert old in GOOD
    p.write_text(GOOD.replace(old, new, 1))
    with pytest.raises(StationFileError) as ei:
        load_station(p)
    msg = str(ei.value)
    assert "\n" not in msg and msg.startswith(str(p)) and key in msg


def test_alarm_on_one_of_the_station_windows_is_accepted(tmp_path):
    p = tmp_path / "s.toml"
    p.write_text(GOOD.replace('name = "a1"', 'name = "a1"\nwindow_s = 1800', 1))
    assert load_station(p).alarms[0].window_s == 1800.0


def test_not_toml_and_missing_file(tmp_path):
    with pytest.raises(StationFileError, match="not valid TOML"):
        parse_station("format = ", tmp_path / "x.toml")
    with pytest.raises(StationFileError, match="absent.toml: no such station file"):
        load_station(tmp_path / "absent.toml")


def test_cli_prints_one_line(tmp_path, capsys):
    from meterlink.cli import main
    p = tmp_path / "bad.toml"
    p.write_text(GOOD.replace('tier = "public"\n', ""))
    assert main(["monitor", "--config", str(p)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "assessment.tier: missing" in err
