"""Calibration certificates (format meterlink-cert/1, see docs/calibration-format.md): load, validate, dump.

Every problem in a file raises CertificateError with one line naming the file and the problem.
"""

from __future__ import annotations

import datetime as _dt
import importlib.resources
import json
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from meterlink.errors import CertificateError, read_input_text
from meterlink.physics.uncertainty import DISTRIBUTIONS, UNITS, Component

FORMAT = "meterlink-cert/1"
KIND_PROBE = "isotropic-probe"
KIND_DIPOLE = "dipole-receiver"
AXES = ("x", "y", "z")
REQUIRED_U = {KIND_PROBE: ("reference_field", "linearity", "frequency_response"),
              KIND_DIPOLE: ("antenna_factor", "cable_loss", "receiver_level")}
#: A certificate due within this many days gets a "due soon" warning.
DUE_SOON_DAYS = 30
_FIELD_KEY = {"E": "v_per_m", "H": "a_per_m"}


@dataclass(frozen=True)
class AxisCalibration:
    """One probe axis: zero offset, linearisation table at the reference frequency, frequency response."""

    name: str
    zero_counts: float
    counts_above_zero: tuple[float, ...]
    field: tuple[float, ...]            # V/m (quantity E) or A/m (quantity H) at the reference frequency
    freq_hz: tuple[float, ...]
    correction_db: tuple[float, ...]    # field dB to ADD to the reading: 20*log10(true / indicated)


@dataclass(frozen=True)
class ProbeCertificate:
    """An isotropic three-axis diode probe."""

    model: str
    serial: str
    lab: str
    certificate_number: str
    cal_date: _dt.date
    due_date: _dt.date | None           # None: the certificate states no due date (ISO/IEC 17025:2017 7.8.4.3)
    quantity: str
    ref_freq_hz: float
    freq_range_hz: tuple[float, float]
    level_range: tuple[float, float]    # same unit as the axis tables
    temp_ref_c: float
    temp_coeff_db_per_c: float          # indicated field change per degC (field dB), corrected on apply
    temp_coeff_halfwidth_db_per_c: float
    isotropy_db: float                  # +/- deviation about the mean over orientations (half-width)
    axes: tuple[AxisCalibration, AxisCalibration, AxisCalibration]
    uncertainties: tuple[Component, ...]
    format: str = FORMAT
    kind: str = KIND_PROBE
    source: str = field(default="", compare=False)
    #: degC over which the temperature coefficient and the uncertainty hold; None: not stated
    temp_range_c: tuple[float, float] | None = None


@dataclass(frozen=True)
class DipoleCertificate:
    """A dipole antenna with its cable and receiver."""

    model: str
    serial: str
    receiver_model: str
    receiver_serial: str
    lab: str
    certificate_number: str
    cal_date: _dt.date
    due_date: _dt.date | None           # None: the certificate states no due date (ISO/IEC 17025:2017 7.8.4.3)
    freq_range_hz: tuple[float, float]
    level_range_dbuv: tuple[float, float]
    af_freq_hz: tuple[float, ...]
    af_db_per_m: tuple[float, ...]
    cable_freq_hz: tuple[float, ...]
    cable_loss_db: tuple[float, ...]
    receiver_level_correction_db: float  # dB added to the receiver's reading
    uncertainties: tuple[Component, ...]
    quantity: str = "E"
    format: str = FORMAT
    kind: str = KIND_DIPOLE
    source: str = field(default="", compare=False)
    #: degC over which the antenna factor, cable loss and uncertainty hold; None: not stated
    temp_range_c: tuple[float, float] | None = None


# Plausible bounds of a certificate's numbers, by the key's last name. Engineering judgement (no
# single published source): each is far wider than any real probe, antenna or cable shows, and
# narrow enough that arithmetic on the value cannot overflow (a correction of 1e308 dB would
# load, then give inf or nan field values in the middle of a recording).
_BOUNDS = {
    "freq_hz": (1.0, 3e12),                     # 1 Hz .. 3 THz
    "v_per_m": (1e-9, 1e6), "a_per_m": (1e-12, 1e4), "level_v_per_m": (1e-9, 1e6),
    "level_a_per_m": (1e-12, 1e4), "level_dbuv": (-200.0, 300.0),
    "zero_counts": (-2.0 ** 31, 2.0 ** 31),     # the device reports 32-bit counts
    "counts_above_zero": (1e-9, 2.0 ** 32),
    "correction_db": (-60.0, 60.0), "level_correction_db": (-60.0, 60.0),
    "db_per_m": (-60.0, 100.0), "db": (-20.0, 100.0),      # antenna factor; cable loss
    "reference_c": (-60.0, 100.0), "coefficient_db_per_c": (-50.0, 50.0),
    "coefficient_halfwidth_db_per_c": (0.0, 50.0), "deviation_db": (0.0, 30.0),
    "range_c": (-80.0, 150.0),                  # wider than any climatic chamber or field use
    "value": (0.0, 1000.0), "k": (0.1, 10.0), "sensitivity": (-1e3, 1e3),
}


class _Reader:
    """Typed access to a parsed TOML document; every failure names the file and the key."""

    def __init__(self, doc: dict, where: str):
        self.doc, self.where = doc, where

    def fail(self, problem: str):
        raise CertificateError(f"{self.where}: {problem}".replace("\n", " "))

    def get(self, dotted: str, kind: str):
        node = self.doc
        for part in dotted.split("."):
            if not isinstance(node, dict) or part not in node:
                self.fail(f"missing key '{dotted}'")
            node = node[part]
        return self.check(dotted, node, kind)

    def check(self, key, v, kind):
        if kind == "str":
            if not isinstance(v, str) or not v.strip():
                self.fail(f"'{key}' must be a non-empty string")
            return v
        if kind == "num":
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                self.fail(f"'{key}' must be a finite number, got {v!r}")
            lo, hi = _BOUNDS.get(key.rsplit(".", 1)[-1].split("[")[0], (-math.inf, math.inf))
            if not lo <= v <= hi:
                self.fail(f"'{key}' = {v!r} is outside the plausible range {lo:g} .. {hi:g}")
            return float(v)
        if kind == "date":
            if isinstance(v, str):
                try:
                    v = _dt.date.fromisoformat(v)
                except ValueError:
                    self.fail(f"'{key}' is not a date (YYYY-MM-DD): {v!r}")
            if isinstance(v, _dt.datetime) or not isinstance(v, _dt.date):
                self.fail(f"'{key}' must be a date (YYYY-MM-DD), got {v!r}")
            return v
        if kind in ("list", "increasing", "positive-increasing"):
            if not isinstance(v, list) or len(v) < 2:
                self.fail(f"'{key}' must be a list of at least 2 numbers")
            vals = tuple(self.check(f"{key}[{i}]", x, "num") for i, x in enumerate(v))
            if kind != "list" and any(b <= a for a, b in zip(vals, vals[1:])):
                self.fail(f"'{key}' is not strictly increasing")
            if kind == "positive-increasing" and vals[0] <= 0:
                self.fail(f"'{key}' must be > 0")
            return vals
        if kind == "table":
            if not isinstance(v, dict):
                self.fail(f"'{key}' must be a table")
            return v
        raise AssertionError(kind)

    def range(self, key: str, positive: bool = True) -> tuple[float, float]:
        vals = self.get(key, "positive-increasing" if positive else "increasing")
        if len(vals) != 2:
            self.fail(f"'{key}' must be [low, high]")
        return vals

    def pair(self, key_x, key_y, kind_y="list"):
        xs, ys = self.get(key_x, "positive-increasing"), self.get(key_y, kind_y)
        if len(xs) != len(ys):
            self.fail(f"'{key_x}' and '{key_y}' differ in length ({len(xs)} vs {len(ys)})")
        return xs, ys

    def uncertainties(self, kind: str) -> tuple[Component, ...]:
        table = self.get("uncertainty", "table")
        for name in REQUIRED_U[kind]:
            if name not in table:
                self.fail(f"missing key 'uncertainty.{name}'")
        out = []
        for name, row in table.items():
            key = f"uncertainty.{name}"
            self.check(key, row, "table")
            unit, dist = self.get(f"{key}.unit", "str"), self.get(f"{key}.distribution", "str")
            if unit not in UNITS:
                self.fail(f"'{key}.unit' must be one of {', '.join(UNITS)}, got {unit!r}")
            if dist not in DISTRIBUTIONS:
                self.fail(f"'{key}.distribution' must be one of {', '.join(DISTRIBUTIONS)}, got {dist!r}")
            k = self.get(f"{key}.k", "num") if dist == "normal" else 1.0
            if "k" in row and dist != "normal":
                self.fail(f"'{key}.k' applies to a normal distribution only (divisor is fixed for {dist})")
            sens = self.get(f"{key}.sensitivity", "num") if "sensitivity" in row else 1.0
            value = self.get(f"{key}.value", "num")
            if value < 0 or k <= 0:
                self.fail(f"'{key}' needs value >= 0 and k > 0")
            out.append(Component(name, value, unit, dist, k, sens))
        return tuple(out)


def _common(r: _Reader) -> dict:
    fmt = r.get("format", "str")
    if fmt != FORMAT:
        r.fail(f"unsupported format {fmt!r} (this meterlink reads {FORMAT!r})")
    cal = r.get("calibration.date", "date")
    # optional: a calibration certificate states a due date only when agreed with the customer
    # (ISO/IEC 17025:2017 clause 7.8.4.3); without one the user's own calibration programme sets it
    cal_tbl = r.doc.get("calibration")
    due = r.get("calibration.due", "date") if isinstance(cal_tbl, dict) and "due" in cal_tbl else None
    if due is not None and due <= cal:
        r.fail(f"due date {due} is not after calibration date {cal}")
    return dict(model=r.get("device.model", "str"), serial=r.get("device.serial", "str"),
                lab=r.get("calibration.lab", "str"),
                certificate_number=r.get("calibration.certificate_number", "str"),
                cal_date=cal, due_date=due, freq_range_hz=r.range("range.freq_hz"),
                temp_range_c=_temp_range(r))


def _temp_range(r: _Reader) -> tuple[float, float] | None:
    """Optional 'temperature.range_c' = [low, high] degC; None when the certificate does not state it."""
    t = r.doc.get("temperature")
    if not isinstance(t, dict) or "range_c" not in t:
        return None
    lo, hi = r.range("temperature.range_c", positive=False)
    if "reference_c" in t:
        ref = r.get("temperature.reference_c", "num")
        if not lo <= ref <= hi:
            r.fail(f"'temperature.reference_c' = {ref:g} lies outside 'temperature.range_c' {lo:g}..{hi:g}")
    return lo, hi


def _covers(r: _Reader, key: str, table, lo: float, hi: float):
    if table[0] > lo * (1 + 1e-9) or table[-1] < hi * (1 - 1e-9):
        r.fail(f"'{key}' ({table[0]:g}..{table[-1]:g}) does not cover the valid range {lo:g}..{hi:g}")


def _probe(r: _Reader, src: str) -> ProbeCertificate:
    c = _common(r)
    quantity = r.get("quantity", "str")
    if quantity not in _FIELD_KEY:
        r.fail(f"'quantity' must be 'E' or 'H', got {quantity!r}")
    fkey = _FIELD_KEY[quantity]
    ref = r.get("reference.freq_hz", "num")
    lo, hi = c["freq_range_hz"]
    if not lo <= ref <= hi:
        r.fail(f"reference frequency {ref:g} Hz is outside the valid range {lo:g}..{hi:g} Hz")
    level = r.range(f"range.level_{fkey}")
    axes_t = r.get("axis", "table")
    extra = sorted(set(axes_t) - set(AXES))
    if extra:
        r.fail(f"unknown axis {extra[0]!r} (expected x, y, z)")
    axes = []
    for a in AXES:
        p = f"axis.{a}"
        zero = r.get(f"{p}.zero_counts", "num")
        counts, fld = r.pair(f"{p}.counts_above_zero", f"{p}.{fkey}", "positive-increasing")
        fq, corr = r.pair(f"{p}.freq_hz", f"{p}.correction_db")
        _covers(r, f"{p}.{fkey}", fld, *level)
        _covers(r, f"{p}.freq_hz", fq, lo, hi)
        axes.append(AxisCalibration(a, zero, counts, fld, fq, corr))
    iso = r.get("isotropy.deviation_db", "num")
    hw = r.get("temperature.coefficient_halfwidth_db_per_c", "num")
    if iso < 0 or hw < 0:
        r.fail("'isotropy.deviation_db' and 'temperature.coefficient_halfwidth_db_per_c' must be >= 0")
    return ProbeCertificate(
        **c, quantity=quantity, ref_freq_hz=ref, level_range=level,
        temp_ref_c=r.get("temperature.reference_c", "num"),
        temp_coeff_db_per_c=r.get("temperature.coefficient_db_per_c", "num"),
        temp_coeff_halfwidth_db_per_c=hw, isotropy_db=iso, axes=tuple(axes),
        uncertainties=r.uncertainties(KIND_PROBE), source=src)


def _dipole(r: _Reader, src: str) -> DipoleCertificate:
    c = _common(r)
    if r.get("quantity", "str") != "E":
        r.fail("a dipole certificate measures quantity 'E'")
    lo, hi = c["freq_range_hz"]
    af_f, af = r.pair("antenna_factor.freq_hz", "antenna_factor.db_per_m")
    cl_f, cl = r.pair("cable_loss.freq_hz", "cable_loss.db")
    _covers(r, "antenna_factor.freq_hz", af_f, lo, hi)
    _covers(r, "cable_loss.freq_hz", cl_f, lo, hi)
    return DipoleCertificate(
        **c, receiver_model=r.get("receiver.model", "str"), receiver_serial=r.get("receiver.serial", "str"),
        level_range_dbuv=r.range("range.level_dbuv", positive=False), af_freq_hz=af_f, af_db_per_m=af,
        cable_freq_hz=cl_f, cable_loss_db=cl,
        receiver_level_correction_db=r.get("receiver.level_correction_db", "num"),
        uncertainties=r.uncertainties(KIND_DIPOLE), source=src)


def parse_certificate(text: str, where: str = "<text>") -> ProbeCertificate | DipoleCertificate:
    """Parse and validate certificate TOML text; `where` names it in errors."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise CertificateError(f"{where}: not valid TOML ({exc})".replace("\n", " ")) from None
    r = _Reader(doc, where)
    kind = r.get("kind", "str")
    if kind == KIND_PROBE:
        return _probe(r, where)
    if kind == KIND_DIPOLE:
        return _dipole(r, where)
    r.fail(f"unknown kind {kind!r} (expected {KIND_PROBE!r} or {KIND_DIPOLE!r})")


def _checkout_dir() -> Path:
    return Path(__file__).resolve().parents[2] / "calibration"


def _packaged():
    """Yield (name, traversable) of packaged certificates; the checkout folder if not installed."""
    try:
        root = importlib.resources.files("meterlink.calibration_data")
        items = [p for p in root.iterdir() if p.name.endswith(".toml")]
    except (ModuleNotFoundError, FileNotFoundError, NotADirectoryError):
        items = []
    if not items and _checkout_dir().is_dir():
        items = list(_checkout_dir().glob("*.toml"))
    return {p.name[: -len(".toml")]: p for p in items}


def packaged_certificates() -> list[str]:
    """Names of the certificates shipped with meterlink (e.g. 'demo-probe')."""
    return sorted(_packaged())


def load_certificate(path_or_name) -> ProbeCertificate | DipoleCertificate:
    """Load a certificate from a file path, or a packaged one by bare name."""
    text_name = str(path_or_name)
    if (isinstance(path_or_name, Path) or "/" in text_name or text_name.endswith(".toml")
            or Path(text_name).exists()):
        path = Path(path_or_name)
        return parse_certificate(read_input_text(path, "certificate", CertificateError), str(path))
    found = _packaged()
    if text_name not in found:
        known = ", ".join(sorted(found)) or "none"
        raise CertificateError(f"{text_name}: no such certificate file or packaged certificate (packaged: {known})")
    return parse_certificate(found[text_name].read_text(encoding="utf-8"), f"{text_name} (packaged)")


def certificate_status(cert, on: _dt.date) -> list[str]:
    """Warnings for using `cert` on date `on`: expired, due soon, calibrated in the future."""
    who = f"certificate {cert.certificate_number} ({cert.model} s/n {cert.serial})"
    out = []
    if cert.due_date is None:
        pass                         # no due date stated: the user's calibration programme decides
    elif on > cert.due_date:
        out.append(f"{who} expired on {cert.due_date.isoformat()}; recalibrate before relying on results")
    elif (cert.due_date - on).days <= DUE_SOON_DAYS:
        out.append(f"{who} is due on {cert.due_date.isoformat()} ({(cert.due_date - on).days} days)")
    if on < cert.cal_date:
        out.append(f"{who} has a calibration date {cert.cal_date.isoformat()} after {on.isoformat()}")
    return out


# --- writer -------------------------------------------------------------------------------------

_BARE = re.compile(r"^[A-Za-z0-9_-]+$")


def _key(k: str) -> str:
    return k if _BARE.match(k) else json.dumps(k)


def _value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf") if math.isinf(v) else repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False).replace("\x7f", "\\u007f")   # TOML forbids raw DEL
    if isinstance(v, _dt.date):
        return v.isoformat()
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def dumps_toml(doc: dict, prefix: str = "") -> str:
    """A small TOML writer for nested dicts of scalars, dates and lists (no arrays of tables)."""
    lines = [f"{_key(k)} = {_value(v)}" for k, v in doc.items() if not isinstance(v, dict)]
    out = "\n".join(lines) + ("\n" if lines else "")
    for k, v in doc.items():
        if isinstance(v, dict):
            name = f"{prefix}{_key(k)}"
            body = dumps_toml(v, name + ".")
            has_scalars = any(not isinstance(x, dict) for x in v.values())
            out += ("\n" if out else "") + (f"[{name}]\n" if has_scalars or not v else "") + body
    return out


def _u_doc(cs) -> dict:
    out = {}
    for c in cs:
        row = {"value": c.value, "unit": c.unit, "distribution": c.distribution}
        if c.distribution == "normal":
            row["k"] = c.k
        if c.sensitivity != 1.0:
            row["sensitivity"] = c.sensitivity
        out[c.name] = row
    return out


def dump_certificate(cert) -> str:
    """TOML text of a certificate; parse_certificate(dump_certificate(c)) == c."""
    doc = {"format": cert.format, "kind": cert.kind, "quantity": cert.quantity,
           "device": {"model": cert.model, "serial": cert.serial}}
    if cert.kind == KIND_DIPOLE:
        doc["receiver"] = {"model": cert.receiver_model, "serial": cert.receiver_serial,
                           "level_correction_db": cert.receiver_level_correction_db}
    doc["calibration"] = {"lab": cert.lab, "certificate_number": cert.certificate_number,
                          "date": cert.cal_date, **({"due": cert.due_date} if cert.due_date else {})}
    if cert.kind == KIND_PROBE:
        fkey = _FIELD_KEY[cert.quantity]
        doc["range"] = {"freq_hz": list(cert.freq_range_hz), f"level_{fkey}": list(cert.level_range)}
        doc["reference"] = {"freq_hz": cert.ref_freq_hz}
        doc["temperature"] = {"reference_c": cert.temp_ref_c, "coefficient_db_per_c": cert.temp_coeff_db_per_c,
                              "coefficient_halfwidth_db_per_c": cert.temp_coeff_halfwidth_db_per_c}
        if cert.temp_range_c is not None:
            doc["temperature"]["range_c"] = list(cert.temp_range_c)
        doc["isotropy"] = {"deviation_db": cert.isotropy_db}
        doc["axis"] = {ax.name: {"zero_counts": ax.zero_counts, "counts_above_zero": list(ax.counts_above_zero),
                                 fkey: list(ax.field), "freq_hz": list(ax.freq_hz),
                                 "correction_db": list(ax.correction_db)} for ax in cert.axes}
    else:
        doc["range"] = {"freq_hz": list(cert.freq_range_hz), "level_dbuv": list(cert.level_range_dbuv)}
        doc["antenna_factor"] = {"freq_hz": list(cert.af_freq_hz), "db_per_m": list(cert.af_db_per_m)}
        doc["cable_loss"] = {"freq_hz": list(cert.cable_freq_hz), "db": list(cert.cable_loss_db)}
        if cert.temp_range_c is not None:
            doc["temperature"] = {"range_c": list(cert.temp_range_c)}
    doc["uncertainty"] = _u_doc(cert.uncertainties)
    head = f"# meterlink calibration certificate ({cert.format}); see docs/calibration-format.md\n"
    return head + dumps_toml(doc)
