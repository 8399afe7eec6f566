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


# -- a house a newcomer can read ---------------------------------------------------------------------

MAX_CLASS_LINES = 300    # issue 15: modules a newcomer reads in one sitting, no class over about 300 lines


def test_no_class_is_longer_than_a_sitting():
    import ast

    long = []
    for path in sorted((ROOT / "meterlink").rglob("*.py")) + sorted((ROOT / "simulators").rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ClassDef) and node.end_lineno - node.lineno + 1 > MAX_CLASS_LINES:
                long.append(f"{path.relative_to(ROOT)}:{node.lineno} {node.name}: "
                            f"{node.end_lineno - node.lineno + 1} lines")
    assert long == [], long


def _module_map() -> dict[str, set[str]]:
    """DEVELOPERS.md's layout tree: the words of each package's line, by the package's name."""
    import re

    text = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    tree = text.split("## Layout", 1)[1].split("```\nmeterlink/\n", 1)[1].split("```", 1)[0]
    lines = {}
    for line in tree.splitlines():
        m = re.match(r"[├└]── (\S+?)/?\s", line)
        assert m, f"not a line of the tree: {line!r}"
        lines["" if m.group(1).endswith(".py,") else m.group(1)] = set(re.findall(r"\w+(?:\.py)?", line))
    return lines


def _unlisted(lines: dict[str, set[str]]) -> list[str]:
    """Packages without a line in the map, and modules not named on their package's line."""
    folders = {p.parent for p in (ROOT / "meterlink").glob("*/__init__.py")} | {ROOT / "simulators"}
    missing = []
    for folder in sorted(folders):
        words = lines.get(folder.name)
        if words is None:
            missing.append(f"package {folder.name}/ has no line")
            continue
        missing += [f"{folder.name}/{m.name}" for m in sorted(folder.glob("*.py"))
                    if m.name != "__init__.py" and m.stem not in words]
    missing += [f"meterlink/{m.name}" for m in sorted((ROOT / "meterlink").glob("*.py")) if m.name not in lines[""]]
    return missing


def test_the_module_map_in_developers_md_names_every_package_and_module():
    assert _unlisted(_module_map()) == []


def test_the_module_map_check_finds_what_is_left_out():
    lines = _module_map()
    lines["device"] = lines["device"] - {"handshake"}
    lines[""] = lines[""] - {"cautions.py"}
    del lines["planning"]
    assert _unlisted(lines) == ["device/handshake.py", "package planning/ has no line", "meterlink/cautions.py"]
