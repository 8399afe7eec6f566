"""Scenario files (TOML data in simulators/scenarios/): loading and validation into typed parts."""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path as FsPath

from meterlink.errors import MeterlinkError
from simulators.instruments import ProbeModel, ReceiverModel
from simulators.scene import Excursion, Path, SiteScene, Transmitter


class ScenarioError(MeterlinkError):
    """A scenario name or file that cannot be used."""


@dataclass(frozen=True)
class MeterSpec:
    """One simulated meter of a scenario: identity, where it is, how it is held."""

    name: str
    serial: str
    asset_tag: str
    scene: SiteScene
    mains_powered: bool = False


@dataclass(frozen=True)
class Scenario:
    name: str
    site: dict
    device: dict
    probe: ProbeModel
    probe_info: dict
    receiver: ReceiverModel
    receiver_info: dict
    meters: tuple[MeterSpec, ...]
    faults: dict = field(default_factory=dict)


def _read(name_or_path: str) -> tuple[str, dict]:
    p = FsPath(name_or_path)
    try:
        if p.suffix == ".toml" or p.exists():
            return p.stem, tomllib.loads(p.read_text())
        res = resources.files("simulators.scenarios").joinpath(f"{name_or_path}.toml")
        if not res.is_file():
            raise ScenarioError(f"scenario {name_or_path!r}: no such packaged scenario or file")
        return name_or_path, tomllib.loads(res.read_text())
    except OSError as exc:
        raise ScenarioError(f"scenario {name_or_path}: {exc.strerror}") from None
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(f"scenario {name_or_path}: not valid TOML ({exc})") from None


def load_scenario(name_or_path: str = "demo") -> Scenario:
    """Load a packaged scenario by name, or a TOML file by path; ScenarioError if unusable."""
    name, d = _read(name_or_path)
    try:
        site = d.get("site", {})
        txs = tuple(Transmitter(t["name"], float(t["freq_hz"]), float(t["erp_w"]),
                                tuple(float(v) for v in t["position_m"]), t.get("polarisation", "vertical"),
                                t.get("technology", ""), t.get("profile", "constant"))
                    for t in d["transmitter"])
        names = {t.name for t in txs}
        exs = tuple(Excursion(e["transmitter"], float(e["start_s"]), float(e["end_s"]), float(e["factor"]))
                    for e in d.get("excursion", []))
        for e in exs:
            if e.transmitter not in names:
                raise ScenarioError(f"scenario {name}: excursion names unknown transmitter {e.transmitter!r}")
        meters = []
        for m in d["meter"]:
            path = Path.from_waypoints(m["path"]) if "path" in m else Path.fixed(m["position_m"])
            scene = SiteScene(txs, path, tuple(float(v) for v in m.get("orientation_deg", (0, 0, 0))), exs,
                              float(site.get("start_time_of_day_h", 0.0)))
            meters.append(MeterSpec(m.get("name", f"meter{len(meters)}"), m["serial"], m.get("asset_tag", ""),
                                    scene, bool(m.get("mains_powered", False))))
        return Scenario(name, site, d["device"], ProbeModel.from_dict(d["probe"]), d["probe"],
                        ReceiverModel.from_dict(d["receiver"]), d["receiver"], tuple(meters), d.get("faults", {}))
    except KeyError as exc:
        raise ScenarioError(f"scenario {name}: missing entry {exc.args[0]!r}") from None
    except (TypeError, ValueError) as exc:
        raise ScenarioError(f"scenario {name}: {exc}") from None
