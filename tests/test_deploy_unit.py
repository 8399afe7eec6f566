"""The systemd unit in deploy/: it parses (systemd-analyze verify), its sandbox scores under 2.5 in
systemd-analyze security (offline mode, systemd >= 252), and it carries the settings the monitor
relies on: notify + watchdog, no restart on exit 2, SIGTERM to the main process only, a stop
timeout longer than the monitor's own bound on alarm commands."""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from meterlink.station.hooks import STOP_WAIT_S, TERM_GRACE_S

ROOT = Path(__file__).resolve().parents[1]
UNIT = ROOT / "deploy" / "meterlink-monitor.service"


def _settings() -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for line in UNIT.read_text().splitlines():
        line = line.strip()
        if line and not line.startswith(("#", "[")):
            k, _, v = line.partition("=")
            out.setdefault(k, []).append(v)
    return out


def test_unit_settings():
    s = _settings()
    assert s["Type"] == ["notify"] and s["NotifyAccess"] == ["main"] and float(s["WatchdogSec"][0]) > 0
    assert s["RestartPreventExitStatus"] == ["2"] and s["Restart"] == ["on-failure"]
    assert s["KillMode"] == ["mixed"] and "Group" not in s and s["SupplementaryGroups"] == ["dialout"]
    assert float(s["TimeoutStopSec"][0]) > STOP_WAIT_S + TERM_GRACE_S + 10
    assert s["DevicePolicy"] == ["closed"] and set(s["DeviceAllow"]) == {"char-ttyUSB rw", "char-ttyACM rw"}
    assert s["CapabilityBoundingSet"] == [""] and s["UMask"] == ["0027"] and s["StateDirectory"] == ["meterlink"]
    assert s["RestrictAddressFamilies"] == ["AF_UNIX AF_INET AF_INET6"]
    assert "@system-service" in s["SystemCallFilter"] and s["ProtectSystem"] == ["strict"]


def _installed_copy(tmp_path: Path) -> Path:
    """The unit with ExecStart pointing at this checkout's meterlink (verify checks the binary exists)."""
    exe = Path(sys.executable).parent / "meterlink"
    if not exe.exists():
        pytest.skip("no meterlink console script beside the interpreter")
    p = tmp_path / UNIT.name
    p.write_text(UNIT.read_text().replace("/opt/meterlink/venv/bin/meterlink", str(exe)))
    return p


@pytest.mark.skipif(shutil.which("systemd-analyze") is None, reason="systemd-analyze not installed")
def test_systemd_analyze_verify_and_security(tmp_path):
    unit = _installed_copy(tmp_path)
    v = subprocess.run(["systemd-analyze", "verify", str(unit)], capture_output=True, text=True, timeout=60)
    assert v.returncode == 0 and v.stderr.strip() == "", v.stderr
    sec = subprocess.run(["systemd-analyze", "security", "--offline=yes", str(unit)], capture_output=True,
                         text=True, timeout=60)
    if sec.returncode != 0 and "offline" in sec.stderr:
        pytest.skip("this systemd-analyze has no offline security mode")
    m = re.search(r"Overall exposure level for \S+: ([0-9.]+)", sec.stdout)
    assert m, sec.stdout[-500:] + sec.stderr
    assert float(m.group(1)) < 2.5, sec.stdout
