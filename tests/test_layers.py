"""The package layering (pyproject.toml [tool.importlinter]) holds, and lint-imports would catch a breach.

The contracts: layers commands > station, survey, lab > reports > storage > device > physics; the
physics core imports no other layer and none of serial, sqlite3, sqlite_utils, rich; the device side
does not import storage; nothing but the CLI imports the commands.
"""

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
LINT = Path(sys.executable).with_name("lint-imports")


def lint(cwd: Path, pythonpath: Path | None = None) -> subprocess.CompletedProcess:
    assert LINT.exists(), f"{LINT} missing: install the test extra (pip install '.[test]')"
    env = dict(os.environ)
    if pythonpath is not None:  # put the copied package ahead of the installed one
        env["PYTHONPATH"] = str(pythonpath) + os.pathsep + env.get("PYTHONPATH", "")
    return subprocess.run([str(LINT), "--no-cache"], cwd=cwd, env=env, capture_output=True, text=True,
                          timeout=120)


def test_the_import_contracts_are_kept():
    p = lint(ROOT)
    assert p.returncode == 0, p.stdout + p.stderr
    assert "Contracts: 4 kept, 0 broken." in p.stdout, p.stdout


@pytest.mark.parametrize("module, line, contract, edge", [
    ("physics/averaging.py", "import sqlite3",
     "the physics core imports no other layer and no serial, sqlite or rich",
     "meterlink.physics.averaging -> sqlite3"),
    ("physics/exposure.py", "from meterlink.storage import store",
     "the physics core imports no other layer and no serial, sqlite or rich",
     "meterlink.physics.exposure -> meterlink.storage.store"),
    ("device/protocol.py", "from meterlink.storage import spans",
     "the device side does not import storage",
     "meterlink.device.protocol -> meterlink.storage.spans"),
    ("reports/htmlpage.py", "from meterlink.commands import report",
     "nothing imports the commands (only the CLI does)",
     "meterlink.reports.htmlpage -> meterlink.commands.report"),
])
def test_a_forbidden_import_breaks_its_contract(tmp_path, module, line, contract, edge):
    shutil.copytree(ROOT / "meterlink", tmp_path / "meterlink", ignore=shutil.ignore_patterns("__pycache__"))
    shutil.copy(ROOT / "pyproject.toml", tmp_path / "pyproject.toml")
    assert lint(tmp_path, tmp_path).returncode == 0  # the untouched copy passes: the breach below is the cause
    target = tmp_path / "meterlink" / module
    target.write_text(target.read_text() + f"\n{line}  # noqa: E402,F401\n")
    p = lint(tmp_path, tmp_path)
    assert p.returncode != 0
    assert f"{contract} BROKEN" in p.stdout, p.stdout
    assert edge in p.stdout, p.stdout


def _relayout():
    import importlib.util
    spec = importlib.util.spec_from_file_location("relayout", ROOT / "tools" / "relayout.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_no_file_uses_the_old_flat_layout():
    p = subprocess.run([sys.executable, str(ROOT / "tools" / "relayout.py")], capture_output=True, text=True,
                       timeout=60)
    assert p.returncode == 0, p.stdout  # after a merge: python tools/relayout.py --write


@pytest.mark.parametrize("old, new", [
    ("from meterlink.storage import Store, StorageError", "from meterlink.storage.store import Store, StorageError"),
    ("from meterlink import calibrate, derived, spans  # noqa",
     "from meterlink.physics import calibrate  # noqa\nfrom meterlink.station import derived\n"
     "from meterlink.storage import spans"),
    ("    from meterlink import storage", "    from meterlink.storage import store as storage"),
    ("from meterlink.station import Station", "from meterlink.station.stationfile import Station"),
    ('monkeypatch.setattr("meterlink.monitor.time.time", f)', 'monkeypatch.setattr("meterlink.station.monitor.time.time", f)'),
    ('resources.files("meterlink.data.limits")', 'resources.files("meterlink.physics.data.limits")'),
    ("see meterlink/storage.py and meterlink/data/limits/", "see meterlink/storage/store.py and meterlink/physics/data/limits/"),
    ("from simulators.pty_meter import SimulatedMeter", "from meterlink.simulators.pty_meter import SimulatedMeter"),
    ('files("simulators.scenarios")', 'files("meterlink.simulators.scenarios")'),
    ("import simulators.scene as sc", "import meterlink.simulators.scene as sc"),
])
def test_relayout_rewrites_old_names_once(old, new):
    rewrite = _relayout().rewrite
    assert rewrite(old) == new
    assert rewrite(new) == new  # idempotent: new-layout text is left alone
