"""The sources file (TOML, documented in docs/sources.md): a site with a declared origin and its
transmitters, read into physics.prediction Sources. Errors name the file, the source and the key."""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass
from pathlib import Path

from meterlink.errors import MeterlinkError
from meterlink.physics.prediction import Pattern, PredictionError, Source, check_source, gain_dbi_from_dbd
from meterlink.physics.units import parse_frequency_hz

_SOURCE_KEYS = {"name", "power_w", "gain_dbi", "gain_dbd", "frequency", "freq_hz", "x_m", "y_m", "height_m", "azimuth_deg",
                "h_beamwidth_deg", "v_beamwidth_deg", "electrical_tilt_deg", "mechanical_tilt_deg",
                "front_to_back_db", "side_lobe_db", "array_length_m", "notes"}
_SITE_KEYS = {"name", "origin", "notes", "standard", "ground_factor", "grid_height_m"}


class SourceFileError(MeterlinkError):
    """A sources file that cannot be read or holds a bad value."""


@dataclass(frozen=True)
class Site:
    """A planning site: its name, what its local origin (0, 0) is, defaults and the sources."""

    name: str
    origin: str
    sources: tuple[Source, ...]
    standard: str | None = None
    ground_factor: float | None = None
    grid_height_m: float | None = None
    path: str = ""


def _num(where: str, key: str, val, *, required: bool = False, default=None):
    if val is None:
        if required:
            raise SourceFileError(f"{where}: {key} is required")
        return default
    if isinstance(val, bool) or not isinstance(val, (int, float)) or not math.isfinite(val):
        raise SourceFileError(f"{where}: {key} must be a finite number, got {val!r}")
    return float(val)


def _source(spec, where: str) -> Source:
    if not isinstance(spec, dict):
        raise SourceFileError(f"{where}: a [[source]] must be a table")
    unknown = sorted(set(spec) - _SOURCE_KEYS)
    if unknown:
        raise SourceFileError(f"{where}: unknown key {unknown[0]!r}")
    name = spec.get("name")
    if not isinstance(name, str) or not name.strip():
        raise SourceFileError(f"{where}: name must be a non-empty string")
    where = f"{where} ({name!r})"
    if ("frequency" in spec) == ("freq_hz" in spec):
        raise SourceFileError(f"{where}: give exactly one of frequency (e.g. \"900MHz\") or freq_hz")
    if "frequency" in spec:
        if not isinstance(spec["frequency"], str):
            raise SourceFileError(f"{where}: frequency must be a string such as \"900MHz\"")
        try:
            f = parse_frequency_hz(spec["frequency"])
        except ValueError as exc:
            raise SourceFileError(f"{where}: {exc}") from None
    else:
        f = _num(where, "freq_hz", spec["freq_hz"], required=True)
    g = lambda k, **kw: _num(where, k, spec.get(k), **kw)  # noqa: E731
    if ("gain_dbi" in spec) == ("gain_dbd" in spec):
        raise SourceFileError(f"{where}: give exactly one of gain_dbi or gain_dbd (over a half-wave dipole)")
    gain_dbi = (g("gain_dbi", required=True) if "gain_dbi" in spec
                else float(gain_dbi_from_dbd(g("gain_dbd", required=True))))
    has_pattern = any(k in spec for k in ("h_beamwidth_deg", "v_beamwidth_deg", "electrical_tilt_deg",
                                          "mechanical_tilt_deg", "front_to_back_db", "side_lobe_db"))
    pattern = Pattern(g("h_beamwidth_deg", default=360.0), g("v_beamwidth_deg"),
                      g("electrical_tilt_deg", default=0.0), g("mechanical_tilt_deg", default=0.0),
                      g("front_to_back_db", default=25.0), g("side_lobe_db", default=20.0)) if has_pattern else None
    src = Source(name.strip(), g("power_w", required=True), gain_dbi, f,
                 g("x_m", default=0.0), g("y_m", default=0.0), g("height_m", required=True),
                 g("azimuth_deg", default=0.0), pattern, g("array_length_m"))
    try:
        return check_source(src)
    except PredictionError as exc:
        raise SourceFileError(f"{where}: {exc}") from None


def parse_site(data: dict, where: str = "sources") -> Site:
    """A Site from parsed TOML (a dict); SourceFileError naming the first problem."""
    site = data.get("site", {})
    if not isinstance(site, dict):
        raise SourceFileError(f"{where}: [site] must be a table")
    unknown = sorted(set(site) - _SITE_KEYS) or sorted(set(data) - {"site", "source"})
    if unknown:
        raise SourceFileError(f"{where}: unknown key {unknown[0]!r}")
    origin = site.get("origin")
    if not isinstance(origin, str) or not origin.strip():
        raise SourceFileError(f"{where}: [site] origin is required: say what the local point (0, 0) is "
                              "(e.g. \"foot of the mast, x east, y north\")")
    specs = data.get("source", [])
    if not isinstance(specs, list) or not specs:
        raise SourceFileError(f"{where}: no [[source]] declared")
    sources = tuple(_source(s, f"{where} source {i + 1}") for i, s in enumerate(specs))
    names = [s.name for s in sources]
    dup = next((n for n in names if names.count(n) > 1), None)
    if dup:
        raise SourceFileError(f"{where}: two sources are named {dup!r}")
    std = site.get("standard")
    if std is not None and not isinstance(std, str):
        raise SourceFileError(f"{where}: [site] standard must be a string")
    gf = _num(where, "ground_factor", site.get("ground_factor"))
    if gf is not None and gf < 1.0:
        raise SourceFileError(f"{where}: ground_factor must be >= 1 (1 = none, 2.56 = OET 65), got {gf:g}")
    return Site(str(site.get("name", "unnamed site")), origin.strip(), sources, std, gf,
                _num(where, "grid_height_m", site.get("grid_height_m")), where)


def load_site(path) -> Site:
    """Read a sources file; SourceFileError (one line) if it is missing or malformed."""
    p = Path(path)
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SourceFileError(f"{p}: no such file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SourceFileError(f"{p}: cannot read: {exc}") from None
    except tomllib.TOMLDecodeError as exc:
        raise SourceFileError(f"{p}: not valid TOML: {exc}") from None
    return parse_site(data, str(p))
