"""Rewrite imports and references from the old flat layout (meterlink/<module>.py, top-level simulators)
to the layer packages. Idempotent: run it after merging a branch written against the old layout.

    python tools/relayout.py            # list the files that still use old names (exit 1 if any)
    python tools/relayout.py --write    # rewrite them in place
"""

from __future__ import annotations

import re
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
LAYOUT = {
    "physics": ["units", "interp", "uncertainty", "calibrate", "certificate", "limits", "averaging",
                "exposure", "verdict", "assessment"],
    "device": ["protocol", "transport", "link", "handshake", "mux", "commander", "clock", "conformance"],
    "storage": ["schema", ("storage", "store"), "spans", "salvage", "recorder", "processing", "files", "rows", "batch",
                "writing", "queries", "recording", "streamed", "listing"],
    "station": [("station", "stationfile"), "monitor", "derived", "spectral", "alarms", "stats", "publish",
                "hooks", "lock", "notify", "retention", "ingest", "persist", "health", "meterwriter",
                "period_report"],
    "reports": ["render", "htmlpage", "session_report", "digits", "termtable"],
}
MAP = {}  # old flat module -> new dotted path below meterlink
for _pkg, _mods in LAYOUT.items():
    for _m in _mods:
        _old, _new = (_m, _m) if isinstance(_m, str) else _m
        MAP[_old] = f"{_pkg}.{_new}"
MAP["data"] = "physics.data"
# names that are both an old module and a new package: new-style uses are left alone
MEMBERS = {pkg: {m if isinstance(m, str) else m[1] for m in mods} | {"__init__"} for pkg, mods in LAYOUT.items()}
MEMBERS["data"] = set()

_names = "|".join(sorted(MAP, key=len, reverse=True))
DOTTED = re.compile(rf"(?<![\w.])meterlink\.({_names})\b(?![-])(\.\w+| import [\w ,]+)?")
PATHS = re.compile(rf"(?<![\w./])meterlink/(?:({_names})\.py\b|(data)/)")
FROM_PKG = re.compile(r"^(\s*)from meterlink import ([^()\n]+?)(\s*(#.*)?)$", re.M)
SIM = re.compile(r"(?<![\w./-])simulators(?=\.[a-z_])")
SIM_IMPORT = re.compile(r"^(\s*)(from|import) simulators\b", re.M)


def _dotted(m: re.Match) -> str:
    name, rest = m.group(1), m.group(2) or ""
    if name in MEMBERS:  # storage, station: already the new package when what follows is one of its modules
        if rest.startswith(".") and rest[1:] in MEMBERS[name]:
            return m.group(0)
        if rest.startswith(" import "):
            imported = [p.split()[0] for p in rest[len(" import "):].split(",") if p.strip()]
            if imported and all(i in MEMBERS[name] for i in imported):
                return m.group(0)
    return "meterlink." + MAP[name] + rest


def _from_pkg(m: re.Match) -> str:
    indent, body, tail = m.group(1), m.group(2), m.group(3) or ""
    groups: dict[str, list[str]] = {}
    for part in (p.strip() for p in body.split(",")):
        name = part.split()[0]
        if name in MAP and name != "data":
            pkg, mod = MAP[name].rsplit(".", 1)
            if mod != name:
                part = part.replace(name, mod, 1) if " as " in part else f"{mod} as {name}"
            groups.setdefault(f"meterlink.{pkg}", []).append(part)
        else:
            groups.setdefault("meterlink", []).append(part)
    lines = [f"{indent}from {k} import {', '.join(v)}" for k, v in groups.items()]
    lines[0] += tail
    return "\n".join(lines)


def rewrite(text: str) -> str:
    """The text with every old-layout name replaced by its new one; new-layout text is unchanged."""
    text = DOTTED.sub(_dotted, text)
    text = FROM_PKG.sub(_from_pkg, text)
    text = PATHS.sub(lambda m: "meterlink/" + (MAP[m.group(1)].replace(".", "/") + ".py" if m.group(1)
                                               else "physics/data/"), text)
    text = SIM_IMPORT.sub(lambda m: f"{m.group(1)}{m.group(2)} meterlink.simulators", text)
    return SIM.sub("meterlink.simulators", text)


def files(root: Path):
    skip = {".venv", ".git", "build", "dist", "firmware", "__pycache__", "tools"}
    for p in sorted(root.rglob("*")):
        if (p.is_file() and p.suffix in (".py", ".md", ".toml", ".service") and p.name != "pyproject.toml"
                and not skip.intersection(p.relative_to(root).parts)
                and p.relative_to(root).as_posix() != "tests/test_layers.py"  # its examples are old names
                and not p.relative_to(root).parts[0].endswith(".egg-info")):
            yield p


def main(argv: list[str]) -> int:
    write = "--write" in argv
    stale = []
    for p in files(ROOT):
        text = p.read_text(encoding="utf-8")
        new = rewrite(text)
        if new != text:
            stale.append(p.relative_to(ROOT))
            if write:
                p.write_text(new, encoding="utf-8")
    for p in stale:
        print(("rewrote " if write else "old layout: ") + str(p))
    return 0 if write or not stale else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
