"""Scenario files (TOML data in simulators/scenarios/): loading and validation into typed parts."""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path as FsPath

from meterlink.errors import MeterlinkError, read_input_text
from meterlink.simulators.instruments import ProbeModel, ReceiverModel
from meterlink.simulators.scene import Excursion, Path, SiteScene, Transmitter


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


def _read(name_or_path: str) -> tuple[str, str, dict]:
    """(name, where, document): where names the file in messages (its path, or the packaged name)."""
    p = FsPath(name_or_path)
    try:
        res = resources.files("meterlink.simulators.scenarios").joinpath(f"{name_or_path}.toml")
        # a folder that happens to bear a packaged scenario's name (say ./demo, the demo's --out) does not hide it
        if p.suffix == ".toml" or p.is_file() or (p.exists() and not res.is_file()):
            return p.stem, str(p), tomllib.loads(read_input_text(p, "scenario", ScenarioError))
        if not res.is_file():
            raise ScenarioError(f"scenario {name_or_path!r}: no such packaged scenario or file")
        return name_or_path, f"{name_or_path} (packaged)", tomllib.loads(res.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ScenarioError(f"scenario {name_or_path}: {exc.strerror}") from None
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(f"scenario {name_or_path}: not valid TOML ({exc})".replace("\n", " ")) from None


# Bounds no invented site comes near; they keep a typing slip from reaching the physics as inf or nan.
_MAX_FREQ_HZ, _MAX_ERP_W, _MAX_SITE_M = 3e12, 1e9, 1e6


class _Check:
    """Type and range checks of a scenario document; every failure names the file and the key."""

    def __init__(self, where: str):
        self.where = where

    def fail(self, key: str, problem: str):
        raise ScenarioError(f"scenario {self.where}: {key}: {problem}"[:300])

    def finite_everywhere(self, node, key: str = "") -> None:
        if isinstance(node, dict):
            for k, v in node.items():
                self.finite_everywhere(v, f"{key}.{k}" if key else str(k))
        elif isinstance(node, list):
            for i, v in enumerate(node):
                self.finite_everywhere(v, f"{key}[{i}]")
        elif isinstance(node, float) and not math.isfinite(node):
            self.fail(key, f"must be a finite number, got {node!r}")

    def table(self, d: dict, key: str) -> dict:
        v = d.get(key, {})
        if not isinstance(v, dict):
            self.fail(key, f"expected a table, got {v!r}")
        return v

    def tables(self, d: dict, key: str, required: bool = False) -> list:
        if required and key not in d:
            self.fail(key, "missing")
        v = d.get(key, [])
        if not isinstance(v, list) or not all(isinstance(t, dict) for t in v):
            self.fail(key, f"use [[{key}]] tables, got {v!r}")
        return v

    def num(self, d: dict, key: str, where: str, lo: float, hi: float, required: bool = True):
        if key not in d:
            if required:
                self.fail(f"{where}.{key}", "missing")
            return
        v = d[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not lo <= v <= hi:
            self.fail(f"{where}.{key}", f"expected a number from {lo:g} to {hi:g}, got {v!r}")

    def nums(self, d: dict, key: str, where: str, n: int | None, lo: float, hi: float, required: bool = True):
        if key not in d:
            if required:
                self.fail(f"{where}.{key}", "missing")
            return
        v = d[key]
        if (not isinstance(v, list) or (n is not None and len(v) != n)
                or any(isinstance(x, bool) or not isinstance(x, (int, float)) or not lo <= x <= hi for x in v)):
            self.fail(f"{where}.{key}", f"expected {n or 'a list of'} numbers from {lo:g} to {hi:g}, got {v!r}")

    def text(self, d: dict, key: str, where: str, required: bool = True):
        if key not in d:
            if required:
                self.fail(f"{where}.{key}", "missing")
            return
        if not isinstance(d[key], str) or not d[key].strip():
            self.fail(f"{where}.{key}", f"expected non-empty text, got {d[key]!r}")


def _validate(d: dict, where: str) -> None:
    """Check the types and ranges of everything the loader turns into models (ScenarioError if not)."""
    c = _Check(where)
    c.finite_everywhere(d)
    site = c.table(d, "site")
    for k in ("name", "description"):
        c.text(site, k, "site", required=False)
    c.num(site, "start_time_of_day_h", "site", 0.0, 24.0, required=False)
    for k in ("temp_mean_c", "temp_daily_amp_c"):
        c.num(site, k, "site", -100.0, 150.0, required=False)
    device = c.table(d, "device")
    c.text(device, "model", "device", required=False)
    c.nums(device, "fw", "device", 3, 0, 255, required=False)
    for k, v in device.items():
        if k not in ("model", "fw") and not isinstance(v, str):
            c.num(device, k, "device", 0.0, 1e12)
    probe = c.table(d, "probe")
    for k in ("serial", "cert_ref"):
        c.text(probe, k, "probe", required=False)
    for k in ("ref_freq_hz", "counts_per_v2m2"):
        c.num(probe, k, "probe", 1e-12, _MAX_FREQ_HZ if k.endswith("hz") else 1e15)
    for k in ("noise_counts_rms", "full_scale_counts", "ripple_db", "ripple_period_decades"):
        c.num(probe, k, "probe", 0.0, 1e12)
    for k in ("slope_db_per_decade", "temp_coeff_db_per_c"):
        c.num(probe, k, "probe", -100.0, 100.0)
    for k, lo, hi in (("knee_v_per_m", 1e-9, 1e6), ("offset_counts", -2.0 ** 31, 2.0 ** 31),
                      ("sensitivity_db", -60.0, 60.0), ("ripple_phase_rad", -1e3, 1e3)):
        c.nums(probe, k, "probe", 3, lo, hi)
    c.nums(probe, "freq_range_hz", "probe", 2, 1.0, _MAX_FREQ_HZ)
    receiver = c.table(d, "receiver")
    for k in ("serial", "cert_ref"):
        c.text(receiver, k, "receiver", required=False)
    for k in ("level_error_db", "noise_floor_dbuv", "noise_db_rms"):
        c.num(receiver, k, "receiver", -300.0, 300.0)
    c.nums(receiver, "freq_range_hz", "receiver", 2, 1.0, _MAX_FREQ_HZ)
    for k in ("antenna_gain_dbi", "cable_loss_db"):
        rows = receiver.get(k)
        if not isinstance(rows, list) or not rows:
            c.fail(f"receiver.{k}", f"expected [[freq_hz, value], ...], got {rows!r}")
        for i, row in enumerate(rows):
            c.nums({"row": row}, "row", f"receiver.{k}[{i}]", 2, -_MAX_FREQ_HZ, _MAX_FREQ_HZ)
    for i, t in enumerate(c.tables(d, "transmitter", required=True)):
        w = f"transmitter[{i}]"
        c.text(t, "name", w)
        c.num(t, "freq_hz", w, 1.0, _MAX_FREQ_HZ)
        c.num(t, "erp_w", w, 0.0, _MAX_ERP_W)
        c.nums(t, "position_m", w, 3, -_MAX_SITE_M, _MAX_SITE_M)
        for k in ("polarisation", "technology", "profile"):
            c.text(t, k, w, required=False)
    for i, e in enumerate(c.tables(d, "excursion")):
        w = f"excursion[{i}]"
        c.text(e, "transmitter", w)
        c.num(e, "start_s", w, 0.0, 1e12)
        c.num(e, "end_s", w, 0.0, 1e12)
        c.num(e, "factor", w, 0.0, 1e6)
    for i, m in enumerate(c.tables(d, "meter", required=True)):
        w = f"meter[{i}]"
        c.text(m, "serial", w)
        c.text(m, "name", w, required=False)
        c.text(m, "asset_tag", w, required=False)
        c.nums(m, "orientation_deg", w, 3, -360.0, 360.0, required=False)
        if "path" in m:
            rows = m["path"]
            if not isinstance(rows, list) or not rows:
                c.fail(f"{w}.path", f"expected rows [t_s, x, y, z], got {rows!r}")
            for j, row in enumerate(rows):
                c.nums({"row": row}, "row", f"{w}.path[{j}]", 4, -_MAX_SITE_M * 1e6, _MAX_SITE_M * 1e6)
        else:
            c.nums(m, "position_m", w, 3, -_MAX_SITE_M, _MAX_SITE_M)


def load_scenario(name_or_path: str = "demo") -> Scenario:
    """Load a packaged scenario by name, or a TOML file by path; ScenarioError if unusable."""
    name, where, d = _read(name_or_path)
    _validate(d, where)
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
                raise ScenarioError(f"scenario {where}: excursion names unknown transmitter {e.transmitter!r}")
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
        raise ScenarioError(f"scenario {where}: missing entry {exc.args[0]!r}") from None
    except (TypeError, ValueError) as exc:
        raise ScenarioError(f"scenario {where}: {exc}") from None
