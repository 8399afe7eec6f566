"""meterlink device: settings and clock over the simulated meter's pty, changes logged in a real SQLite file.

Keys, value types, ranges and fault codes are those of docs/protocol.md (Settings keys, FAULT codes).
"""

import json
import re
import time

import pytest

from meterlink.cli import main
from meterlink.device.commander import Commander, DeviceFault
from meterlink.commands.device import parse_setting
from meterlink.errors import MeterlinkError
from meterlink.device.protocol import FaultCode, SettingKey
from meterlink.storage.store import Store
from meterlink.device.transport import open_link
from meterlink.simulators.pty_meter import SimulatedMeter


@pytest.fixture
def meter():
    with SimulatedMeter("demo", speed=1, seed=2) as m:
        yield m


def cli(capsys, *argv):
    rc = main(["device", *argv])
    cap = capsys.readouterr()
    return rc, cap.out, cap.err


def test_show_json_reads_ident_status_and_every_key(meter, capsys):
    rc, out, _ = cli(capsys, "show", "--port", meter.port, "--json")
    assert rc == 0
    d = json.loads(out)
    assert set(d["settings"]) == {k.name.lower() for k in SettingKey}
    assert d["settings"]["interval_ms"] == d["status"]["interval_ms"]
    assert d["settings"]["probe_serial"] == d["ident"]["probe_serial"]
    assert d["settings"]["clock_utc"] == 0  # not set after boot


@pytest.mark.parametrize("key,value,expect", [("interval_ms", "500", 500), ("device_averaging", "16", 16),
                                              ("probe_serial", "EP-0001", "EP-0001"),
                                              ("cert_ref", "LAB-2026-17", "LAB-2026-17"), ("asset_tag", "", "")])
def test_set_writes_device_and_logs_old_and_new(meter, capsys, tmp_path, key, value, expect):
    db = tmp_path / "m.db"
    with open_link(meter.port) as link:
        old = Commander(link).get_setting(SettingKey[key.upper()])
    rc, out, _ = cli(capsys, "set", key, value, "--port", meter.port, "--db", str(db), "--json")
    assert rc == 0 and json.loads(out) == {"key": key, "old": old, "new": expect, "asked": expect}
    with open_link(meter.port) as link:
        assert Commander(link).get_setting(SettingKey[key.upper()]) == expect  # really in force
    with Store(db) as st:
        (ev,) = st.events(kind="setting_changed")
        assert ev["detail"]["old"] == old and ev["detail"]["new"] == expect and ev["detail"]["key"] == key
        sess = st.session(ev["session_id"])
        assert sess["kind"] == "device" and sess["device_serial"] == "SIM-100001" and sess["ended_utc"]


def test_device_refusal_and_bad_input_are_one_line_errors(meter, capsys, tmp_path):
    db = tmp_path / "m.db"
    rc, _, err = cli(capsys, "set", "device_averaging", "100", "--port", meter.port, "--db", str(db))
    assert rc == 2 and "BAD_VALUE" in err and len(err.strip().splitlines()) == 1  # averaging is 1..64
    rc, _, err = cli(capsys, "set", "clock_utc", "5", "--port", meter.port, "--db", str(db))
    assert rc == 2 and "not writable" in err and "clock --set" in err
    rc, _, err = cli(capsys, "set", "asset_tag", "x" * 33, "--port", meter.port, "--db", str(db))
    assert rc == 2 and "at most 32" in err
    rc, _, err = cli(capsys, "set", "interval_ms", "fast", "--port", meter.port, "--db", str(db))
    assert rc == 2 and "not a whole number" in err
    with Store(db) as st:
        assert st.events(kind="setting_changed") == []  # nothing changed, nothing logged


def test_parse_setting_rejects_control_characters():
    with pytest.raises(MeterlinkError, match="printable ASCII"):
        parse_setting("asset_tag", "tag\x1b[2J")
    assert parse_setting("Device-Averaging", "8") == (SettingKey.DEVICE_AVERAGING, 8)


def test_read_only_clock_key_faults_with_its_code(meter):
    with open_link(meter.port) as link:
        with pytest.raises(DeviceFault) as exc:
            Commander(link).put_setting(SettingKey.CLOCK_UTC, 1)
    assert exc.value.fault.code == FaultCode.READ_ONLY


def test_clock_set_then_check_reports_small_offset_and_logs(meter, capsys, tmp_path):
    db = tmp_path / "m.db"
    rc, out, _ = cli(capsys, "clock", "--port", meter.port, "--db", str(db), "--json")
    assert rc == 0 and json.loads(out)["before"]["offset_s"] is None  # clock_utc 0 = not set
    rc, out, _ = cli(capsys, "clock", "--set", "--port", meter.port, "--db", str(db), "--json")
    after = json.loads(out)["after"]
    assert abs(after["device_utc_s"] - time.time()) < 5
    assert abs(after["offset_s"]) <= after["resolution_s"] + 0.1  # whole-second readout: +-0.5 s
    with Store(db) as st:
        (ev,) = st.events(kind="clock_set")
        assert ev["detail"]["old"] == 0 and ev["detail"]["new"] == after["device_utc_s"]
    rc, out, _ = cli(capsys, "clock", "--port", meter.port, "--db", str(db))
    assert rc == 0 and "offset" in out and "not set" not in out
    # what a person reads is ISO 8601 UTC, never epoch seconds (the same instant as the JSON's number)
    import datetime as _dt
    iso = _dt.datetime.fromtimestamp(after["device_utc_s"], _dt.timezone.utc).strftime("%Y-%m-%dT%H:%M")
    assert after["device_utc"].startswith(iso) and after["device_utc"].endswith("Z")
    assert re.search(r"device \d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ, host \d{4}-", out)
    assert str(after["device_utc_s"]) not in out


def test_show_escapes_untrusted_device_text(meter, capsys, tmp_path):
    rc, _, _ = cli(capsys, "set", "asset_tag", "[red]BENCH-3[/red]", "--port", meter.port, "--db", str(tmp_path / "m.db"))
    assert rc == 0
    rc, out, _ = cli(capsys, "show", "--port", meter.port)
    assert rc == 0 and "[red]BENCH-3[/red]" in out  # shown literally, not taken as markup


def test_unopenable_port_is_exit_2(capsys, tmp_path):
    rc, _, err = cli(capsys, "show", "--port", str(tmp_path / "no-such-port"))
    assert rc == 2 and "cannot open port" in err
