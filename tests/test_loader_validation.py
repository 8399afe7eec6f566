"""Every input-file loader refuses bad types, ranges and non-finite numbers with its own error,
naming the file and the key; none lets a Python exception or an unusable value through.

Each case starts from a real, valid file of the project (the demo plan, the demo certificates,
the example station file, the demo scenario; a lab session written here), changes one entry and
writes it back as TOML, so the loader reads a real file from disk.
"""

from __future__ import annotations

import copy
import datetime as dt
import json
import math
import tomllib
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from meterlink.physics.certificate import CertificateError, load_certificate
from meterlink.errors import MeterlinkError
from meterlink.lab.session import LabError, load_session
from meterlink.station.stationfile import StationFileError, load_station
from meterlink.survey.plan import PlanError, load_plan
from meterlink.simulators.scenario import ScenarioError, load_scenario

ROOT = Path(__file__).resolve().parent.parent
NAN, INF = float("nan"), float("inf")


# -- a small TOML writer (tables, arrays of tables, inline values), enough for these files ---------
def _value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, (dt.date, dt.datetime)):
        return v.isoformat()
    if isinstance(v, list):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{json.dumps(k)} = {_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(v)


def _is_tables(v) -> bool:
    return isinstance(v, list) and bool(v) and all(isinstance(x, dict) for x in v)


def dump(doc: dict, prefix: str = "") -> str:
    out = [f"{json.dumps(k)} = {_value(v)}" for k, v in doc.items() if not isinstance(v, dict) and not _is_tables(v)]
    for k, v in doc.items():
        name = f"{prefix}{json.dumps(k)}"
        if isinstance(v, dict):
            out += [f"[{name}]", dump(v, name + ".")]
        elif _is_tables(v):
            for t in v:
                out += [f"[[{name}]]", dump(t, name + ".")]
    return "\n".join(out) + "\n"


_DELETE = object()


def changed(doc: dict, path: tuple, value) -> dict:
    """A deep copy of doc with the entry at path set to value (or deleted, for _DELETE)."""
    d = copy.deepcopy(doc)
    node = d
    for part in path[:-1]:
        node = node[part]
    if value is _DELETE:
        del node[path[-1]]
    else:
        node[path[-1]] = value
    return d


# -- the loaders and their valid starting documents ------------------------------------------------
LAB_SESSION = {
    "probe": {"model": "ML-EP3 (invented)", "serial": "EP-0001"},
    "calibration": {"lab": "Invented lab", "certificate_number": "CAL-T-1", "date": dt.date(2026, 1, 5),
                    "due": dt.date(2027, 1, 5), "address": "1 Invented Road", "interval_agreed_with_customer": True},
    "customer": {"name": "Invented customer", "address": "2 Invented Road"},
    "signatory": {"name": "Invented signatory", "function": "Technical manager"},
    "reference": [{"name": "Invented power sensor", "certificate_number": "REF-1", "due": dt.date(2026, 6, 1)}],
    "method": {"kind": "tem-cell", "impedance_ohm": 50.0, "spacing_m": 0.15},
    "ambient": {"temp_c": 23.0, "humidity_pct": 45.0},
    "spec": {"frequency_response_db": 1.0, "isotropy_db": 1.0, "linearity_db": 0.5},
    "ref_freq_hz": 1e9, "decision_rule": "guarded",
}

LOADERS = {
    "plan": (load_plan, PlanError, lambda: tomllib.loads((ROOT / "simulators/scenarios/demo-survey.toml").read_text())),
    "probe": (load_certificate, CertificateError, lambda: tomllib.loads((ROOT / "calibration/demo-probe.toml").read_text())),
    "dipole": (load_certificate, CertificateError, lambda: tomllib.loads((ROOT / "calibration/demo-dipole.toml").read_text())),
    "station": (load_station, StationFileError, lambda: tomllib.loads((ROOT / "deploy/example-station.toml").read_text())),
    "lab": (load_session, LabError, lambda: copy.deepcopy(LAB_SESSION)),
    "scenario": (load_scenario, ScenarioError, lambda: tomllib.loads((ROOT / "simulators/scenarios/demo.toml").read_text())),
}


def _write(tmp_path: Path, kind: str, doc: dict) -> Path:
    p = tmp_path / f"{kind}-case.toml"
    p.write_text(dump(doc), encoding="utf-8")
    return p


def test_the_starting_documents_load_after_a_round_trip_through_the_writer(tmp_path):
    for kind, (load, _, base) in LOADERS.items():
        load(_write(tmp_path, kind, base()))      # the writer itself changes nothing that matters


# (loader, path to the entry, bad value, word the message must hold besides the file name)
CASES = [
    # survey plans
    ("plan", ("source",), 5, "source"),
    ("plan", ("source",), "FM", "source"),
    ("plan", ("point",), 7, "point"),
    ("plan", ("survey",), "icnirp", "survey"),
    ("plan", ("survey", "standard"), 5, "standard"),
    ("plan", ("survey", "interval_ms"), NAN, "interval_ms"),
    ("plan", ("survey", "interval_ms"), 1e308, "interval_ms"),
    ("plan", ("survey", "freq_hz"), INF, "freq_hz"),
    ("plan", ("survey", "freq_hz"), 1e308, "freq_hz"),
    ("plan", ("survey", "band_hz"), [1e6, INF], "band_hz"),
    ("plan", ("survey", "band_hz"), [True, 5e6], "band_hz"),
    ("plan", ("survey", "spot_s"), 1e308, "spot_s"),
    ("plan", ("survey", "sweep_s"), -1.0, "sweep_s"),
    ("plan", ("survey", "followup_percent"), NAN, "followup_percent"),
    ("plan", ("site", "name"), 3, "name"),
    ("plan", ("site", "latitude_deg"), 91.0, "latitude_deg"),
    ("plan", ("source", 0, "freq_hz"), -94.3e6, "freq_hz"),
    ("plan", ("source", 0, "freq_hz"), 1e308, "freq_hz"),
    ("plan", ("source", 0, "power_w"), NAN, "power_w"),
    ("plan", ("source", 0, "name"), _DELETE, "name"),
    ("plan", ("point", 0, "height_m"), NAN, "height_m"),
    ("plan", ("point", 0, "height_m"), "1.5", "height_m"),
    ("plan", ("point", 0, "duration_s"), 1e308, "duration_s"),
    ("plan", ("point", 0, "label"), ["a"], "label"),
    ("plan", ("point", 0, "near_field"), "yes", "near_field"),
    ("plan", ("point", 0, "x_m"), INF, "x_m"),
    # probe certificate
    ("probe", ("axis", "x", "correction_db", 0), 1e308, "correction_db"),
    ("probe", ("axis", "x", "correction_db", 0), NAN, "correction_db"),
    ("probe", ("axis", "y", "zero_counts"), 1e300, "zero_counts"),
    ("probe", ("axis", "z", "v_per_m"), "lots", "v_per_m"),
    ("probe", ("axis", "x", "counts_above_zero", 3), -5.0, "counts_above_zero"),
    ("probe", ("range", "freq_hz"), [30e6, INF], "freq_hz"),
    ("probe", ("reference", "freq_hz"), 1e308, "freq_hz"),
    ("probe", ("temperature", "coefficient_db_per_c"), 1e200, "coefficient_db_per_c"),
    ("probe", ("isotropy", "deviation_db"), -0.1, "deviation_db"),
    ("probe", ("uncertainty", "linearity", "value"), 1e308, "value"),
    ("probe", ("uncertainty", "linearity", "k"), 0.0, "k"),
    ("probe", ("calibration", "date"), "yesterday", "date"),
    ("probe", ("device", "serial"), 4417, "serial"),
    ("probe", ("axis",), 3, "axis"),
    # dipole certificate
    ("dipole", ("antenna_factor", "db_per_m", 2), 1e308, "db_per_m"),
    ("dipole", ("cable_loss", "db", 0), NAN, "db"),
    ("dipole", ("receiver", "level_correction_db"), -1e308, "level_correction_db"),
    ("dipole", ("range", "level_dbuv"), [11.0, 1e308], "level_dbuv"),
    # station files
    ("station", ("assessment", "windows_s"), [NAN], "windows_s"),
    ("station", ("assessment", "windows_s"), [INF], "windows_s"),
    ("station", ("assessment", "windows_s"), [1e308], "windows_s"),
    ("station", ("assessment", "windows_s"), ["6 min"], "windows_s"),
    ("station", ("assessment", "block_s"), NAN, "block_s"),
    ("station", ("assessment", "block_s"), 1e308, "block_s"),
    ("station", ("assessment", "interval_s"), INF, "interval_s"),
    ("station", ("assessment", "band"), ["80 MHz", NAN], "band"),
    ("station", ("station", "heartbeat_s"), 1e308, "heartbeat_s"),
    ("station", ("station", "elevation_m"), NAN, "elevation_m"),
    ("station", ("station", "database"), 5, "database"),
    ("station", ("meter", 0, "interval_s"), NAN, "interval_s"),
    ("station", ("meter", 0, "baudrate"), 1e6, "baudrate"),
    ("station", ("meter", 0, "baudrate"), 2 ** 62, "baudrate"),
    ("station", ("meter", 0, "port"), 0, "port"),
    ("station", ("health", "temp_min_c"), -INF, "temp_min_c"),
    ("station", ("health", "cert_warn_days"), 2 ** 62, "cert_warn_days"),
    ("station", ("retention", "raw_days"), 1e308, "raw_days"),
    ("station", ("retention", "chunk_rows"), 2 ** 62, "chunk_rows"),
    ("station", ("meter",), 5, "meter"),
    # lab sessions
    ("lab", ("ref_freq_hz",), NAN, "ref_freq_hz"),
    ("lab", ("ref_freq_hz",), -1e9, "ref_freq_hz"),
    ("lab", ("ref_freq_hz",), 1e308, "ref_freq_hz"),
    ("lab", ("ambient", "temp_c"), 1e308, "temp_c"),
    ("lab", ("ambient", "humidity_pct"), 150.0, "humidity_pct"),
    ("lab", ("method", "impedance_ohm"), INF, "impedance_ohm"),
    ("lab", ("method", "spacing_m"), -0.1, "spacing_m"),
    ("lab", ("spec", "linearity_db"), -1.0, "linearity_db"),
    ("lab", ("probe", "serial"), 17, "serial"),
    ("lab", ("operator",), 5, "operator"),
    # what a certificate must state (ISO/IEC 17025:2017 7.8.2.1 b, e, o; 7.8.4.1 b, c): refused when missing
    ("lab", ("calibration", "address"), _DELETE, "calibration.address"),
    ("lab", ("customer",), _DELETE, "customer"),
    ("lab", ("customer", "address"), _DELETE, "address"),
    ("lab", ("signatory", "function"), _DELETE, "function"),
    ("lab", ("reference",), _DELETE, "reference"),
    ("lab", ("reference", 0, "certificate_number"), _DELETE, "certificate_number"),
    ("lab", ("reference", 0, "due"), _DELETE, "due"),
    ("lab", ("reference", 0, "due"), dt.date(2025, 12, 31), "was due for calibration"),
    ("lab", ("ambient", "humidity_pct"), _DELETE, "humidity_pct"),
    ("lab", ("decision_rule",), "lenient", "decision_rule"),
    ("lab", ("budget",), {"x": NAN}, "budget"),
    ("lab", ("probe",), "EP-1", "probe"),
    # simulator scenarios
    ("scenario", ("transmitter", 0, "freq_hz"), NAN, "freq_hz"),
    ("scenario", ("transmitter", 0, "freq_hz"), "FM", "freq_hz"),
    ("scenario", ("transmitter", 0, "erp_w"), -5.0, "erp_w"),
    ("scenario", ("transmitter", 0, "erp_w"), 1e308, "erp_w"),
    ("scenario", ("transmitter", 0, "position_m"), [0.0, 0.0], "position_m"),
    ("scenario", ("transmitter", 0, "position_m"), 5, "position_m"),
    ("scenario", ("transmitter", 0, "name"), _DELETE, "name"),
    ("scenario", ("transmitter",), 5, "transmitter"),
    ("scenario", ("probe", "counts_per_v2m2"), INF, "counts_per_v2m2"),
    ("scenario", ("probe", "knee_v_per_m"), [20.0, 21.5], "knee_v_per_m"),
    ("scenario", ("device", "interval_ms"), NAN, "interval_ms"),
    ("scenario", ("receiver", "noise_db_rms"), "loud", "noise_db_rms"),
    ("scenario", ("site", "start_time_of_day_h"), NAN, "start_time_of_day_h"),
]


@pytest.mark.parametrize("kind,path,value,word", CASES,
                         ids=[f"{c[0]}-{'.'.join(map(str, c[1]))}={'<deleted>' if c[2] is _DELETE else repr(c[2])}" for c in CASES])
def test_a_bad_entry_is_refused_naming_file_and_key(tmp_path, kind, path, value, word):
    load, error, base = LOADERS[kind]
    p = _write(tmp_path, kind, changed(base(), path, value))
    with pytest.raises(error) as info:
        load(p)
    msg = str(info.value)
    assert str(p) in msg, msg
    assert word in msg, msg
    assert "\n" not in msg


# Hostile values for any entry: whatever the entry (a number, a text, a list, a whole table), the
# loader either accepts the file or refuses it with its own error naming the file. Never another
# exception. (test_every_entry_with_every_hostile_value, marked slow, tries them all: 13,345 files.)
HOSTILE_VALUES = [NAN, INF, -INF, 1e308, -1e308, 0, -1, 2 ** 63 - 1, -(2 ** 63), True, "x", "", [], {}, [1],
                  ["a", "b"], {"a": 1}]
HOSTILE = st.sampled_from(HOSTILE_VALUES)


def _entry_paths(doc, prefix=()):
    if prefix:
        yield prefix
    if isinstance(doc, dict):
        for k, v in doc.items():
            yield from _entry_paths(v, prefix + (k,))
    elif isinstance(doc, list):
        for i, v in enumerate(doc):
            yield from _entry_paths(v, prefix + (i,))


@pytest.mark.parametrize("kind", sorted(LOADERS))
@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_any_entry_made_hostile_loads_or_is_refused_cleanly(tmp_path, kind, data):
    load, error, base = LOADERS[kind]
    doc = base()
    paths = list(_entry_paths(doc))
    path = data.draw(st.sampled_from(paths), label="entry")
    value = data.draw(HOSTILE, label="value")
    p = _write(tmp_path, kind, changed(doc, path, value))
    try:
        load(p)
    except error as exc:
        assert str(p) in str(exc) and "\n" not in str(exc)
    except MeterlinkError as exc:   # pragma: no cover - a wrong error type is a failure too
        pytest.fail(f"{type(exc).__name__} instead of {error.__name__}: {exc}")


@pytest.mark.parametrize("heights", [["a"], [True, 1.0], [NAN], [1e308], "1.0, 1.5", [-1.0, 1.0]])
def test_custom_spatial_heights_are_checked(tmp_path, heights):
    doc = LOADERS["plan"][2]()
    doc["point"][0] = {"label": "custom", "mode": "spatial", "scheme": "custom", "heights_m": heights}
    p = _write(tmp_path, "plan", doc)
    with pytest.raises(PlanError) as info:
        load_plan(p)
    assert str(p) in str(info.value) and "heights" in str(info.value)


@pytest.mark.slow
@pytest.mark.parametrize("kind", sorted(LOADERS))
def test_every_entry_with_every_hostile_value(tmp_path, kind):
    """The exhaustive form of the property above (about a minute for all loaders)."""
    load, error, base = LOADERS[kind]
    doc = base()
    p = tmp_path / f"{kind}-sweep.toml"
    tried = 0
    for path in _entry_paths(doc):
        for value in HOSTILE_VALUES:
            p.write_text(dump(changed(doc, path, value)), encoding="utf-8")
            tried += 1
            try:
                load(p)
            except error as exc:
                assert str(p) in str(exc) and "\n" not in str(exc), (path, value, str(exc))
    assert tried > 100


def test_a_folder_named_like_a_packaged_scenario_does_not_hide_it(tmp_path, monkeypatch):
    # 'meterlink demo --out demo' makes ./demo; the next run must still find the packaged scenario 'demo'
    monkeypatch.chdir(tmp_path)
    (tmp_path / "demo").mkdir()
    assert load_scenario("demo").name == "demo"
    (tmp_path / "not-a-scenario").mkdir()
    with pytest.raises(ScenarioError, match="not-a-scenario: is a directory"):
        load_scenario("not-a-scenario")
