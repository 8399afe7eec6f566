"""A lab session: probe under test, field method, orientation convention, ambient, steps (pure).

Orientation convention (documented in docs/lab.md): the probe's handle axis is the direction
(1, 1, 1)/sqrt(3) of its sensor frame, the three sensors being equally inclined (54.7 deg) to the
handle, a common design. On the rotator the handle points along the bench's +z axis; at
rotator angle 0 and tilt 0 the sensor X axis lies in the bench x-z plane, towards +x. The rotator
turns the probe about the handle (bench z) by `rotator_deg`, right-handed; `tilt_deg` first tips
the handle about the bench y axis. The applied field direction is given in bench coordinates.
"""

from __future__ import annotations

import datetime as _dt
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from meterlink.errors import MeterlinkError
from meterlink.lab.fieldgen import FieldMethod

PROCEDURES = ("zero", "linearity", "frequency", "isotropy", "temperature", "check")
AXES = ("x", "y", "z")


class LabError(MeterlinkError):
    """A lab session file, import or step that cannot be used."""


def _rot(axis: np.ndarray, angle_rad: float) -> np.ndarray:
    """Rodrigues rotation matrix about a unit axis."""
    k = axis / np.linalg.norm(axis)
    kx = np.array([[0, -k[2], k[1]], [k[2], 0, -k[0]], [-k[1], k[0], 0]])
    return np.eye(3) + math.sin(angle_rad) * kx + (1 - math.cos(angle_rad)) * kx @ kx


def _mount() -> np.ndarray:
    """Columns: the sensor axes in bench coordinates at rotator 0, tilt 0 (handle (1,1,1) -> bench z)."""
    a = np.ones(3) / math.sqrt(3.0)
    z = np.array([0.0, 0.0, 1.0])
    m = _rot(np.cross(a, z), math.acos(float(a @ z)))
    # then turn about bench z so that sensor X lies in the x-z plane towards +x
    x = m[:, 0]
    return _rot(z, -math.atan2(x[1], x[0])) @ m


MOUNT = _mount()


def orientation_matrix(rotator_deg: float = 0.0, tilt_deg: float = 0.0) -> np.ndarray:
    """Columns are the probe's sensor axes in bench coordinates for a rotator angle and tilt."""
    rz = _rot(np.array([0.0, 0.0, 1.0]), math.radians(rotator_deg))
    ry = _rot(np.array([0.0, 1.0, 0.0]), math.radians(tilt_deg))
    return rz @ ry @ MOUNT


def axis_direction_world(axis: str) -> tuple[float, float, float]:
    """Bench direction of the field that lies along one sensor axis at rotator 0, tilt 0."""
    v = MOUNT[:, AXES.index(axis)]
    return tuple(float(x) for x in v)


def diagonal_direction_world() -> tuple[float, float, float]:
    """A field direction equally shared by the three sensors: along the handle (bench +z)."""
    return (0.0, 0.0, 1.0)


@dataclass(frozen=True)
class Step:
    """One set-up of the bench: what the lab applies and what it takes as the reference field."""

    procedure: str
    freq_hz: float
    e_ref_v_per_m: float
    direction_world: tuple[float, float, float] = (1.0, 0.0, 0.0)
    rotator_deg: float = 0.0
    tilt_deg: float = 0.0
    axis: str = ""            # "x", "y", "z" for a per-axis step, "" for the total field
    role: str = ""            # linearity: "table" (builds the certificate) or "check" (tests it)
    net_power_w: float = float("nan")
    temp_c: float = float("nan")  # climatic chamber setting (degC); NaN: the lab's ambient


@dataclass(frozen=True)
class StepResult:
    """The repeated raw readings (counts, shape (n, 3)) taken at one step."""

    step: Step
    counts: np.ndarray


@dataclass(frozen=True)
class Ambient:
    temp_c: float = 23.0
    humidity_pct: float = 45.0


@dataclass(frozen=True)
class ProbeSpec:
    """The probe's specification tolerances (half-widths, dB) for the conformity statement."""

    frequency_response_db: float = 1.0
    isotropy_db: float = 1.0
    linearity_db: float = 0.5


@dataclass(frozen=True)
class ReferenceStandard:
    """A reference standard the applied field is traceable through, with its own calibration."""

    name: str
    certificate_number: str
    due_date: _dt.date
    calibrated_by: str = ""


@dataclass(frozen=True)
class Party:
    """A name with a postal address (the customer)."""

    name: str
    address: str


@dataclass(frozen=True)
class Signatory:
    """The person who authorises the certificate and their function in the laboratory."""

    name: str
    function: str


@dataclass(frozen=True)
class LabSession:
    """Everything recorded about a calibration besides the readings."""

    probe_model: str
    probe_serial: str
    lab: str
    certificate_number: str        # "" until issued from the lab's register (meterlink.lab.register)
    cal_date: _dt.date
    # stated on the certificate only when the interval was agreed with the customer (ISO/IEC 17025:2017
    # 7.8.4.3, session key calibration.interval_agreed_with_customer); None: no due date on the certificate
    due_date: _dt.date | None
    method: FieldMethod = field(default_factory=FieldMethod)
    ambient: Ambient = field(default_factory=Ambient)
    spec: ProbeSpec = field(default_factory=ProbeSpec)
    ref_freq_hz: float = 1e9
    operator: str = ""
    decision_rule: str = "guarded"
    budget: dict = field(default_factory=dict)   # overrides of meterlink.lab.budget.DEFAULTS
    orientation: str = "handle = sensor (1,1,1); rotator about the handle; see docs/lab.md"
    # what a certificate states besides the results (ISO/IEC 17025:2017 7.8.2.1, 7.8.4.1); a session
    # file must give them (session_from_dict), a session built in code is checked when the page is made
    lab_address: str = ""
    customer: Party | None = None
    references: tuple[ReferenceStandard, ...] = ()
    signatory: Signatory | None = None
    issue_date: _dt.date | None = None       # None: the calibration date
    received_date: _dt.date | None = None    # optional: when the item reached the laboratory
    item_condition: str = ""                 # optional: the item's condition on receipt
    procedure: str = ""                      # optional: the lab's own procedure document and revision
    location: str = ""                       # optional: where calibrated, if not at the lab's address

    def missing_certificate_items(self) -> list[str]:
        """Names of the session items a certificate needs that are not given (empty: complete)."""
        miss = []
        if not self.lab_address.strip():
            miss.append("calibration.address")
        if self.customer is None:
            miss.append("customer")
        if not self.references:
            miss.append("[[reference]]")
        if self.signatory is None:
            miss.append("signatory")
        return miss

    def reference_field(self, e_ref_v_per_m: float, net_power_w: float) -> float:
        """The step's reference field: entered if given, else computed from the net power."""
        if math.isfinite(e_ref_v_per_m):
            return float(e_ref_v_per_m)
        if math.isfinite(net_power_w):
            return self.method.e_from_power(net_power_w)
        raise LabError("a step needs its reference field or a net power")


def _num(where, d, key, default=None, lo=None, hi=None):
    v = d.get(key, default)
    if v is None:
        raise LabError(f"{where}: missing key '{key}'")
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise LabError(f"{where}: '{key}' must be a finite number, got {v!r}")
    if lo is not None and v < lo or hi is not None and v > hi:
        raise LabError(f"{where}: '{key}' = {v!r} must be within [{lo:g}, {hi:g}]")
    return float(v)


def _str(where, d, key, default=None):
    v = d.get(key, default)
    if v is None or not isinstance(v, str) or not v.strip():
        raise LabError(f"{where}: '{key}' must be a non-empty string")
    return v


def _date(where, d, key, default):
    v = d.get(key, default)
    if isinstance(v, str):
        try:
            v = _dt.date.fromisoformat(v)
        except ValueError:
            raise LabError(f"{where}: '{key}' is not a date (YYYY-MM-DD): {v!r}") from None
    if not isinstance(v, _dt.date) or isinstance(v, _dt.datetime):
        raise LabError(f"{where}: '{key}' must be a date (YYYY-MM-DD)")
    return v


def _cert_number(where, cal) -> str:
    """calibration.certificate_number if given (checked against the register when issued), else ""."""
    if "certificate_number" not in cal:
        return ""   # to be issued from the lab's register (meterlink.lab.register)
    v = _str(where, cal, "certificate_number")
    if any(not ch.isprintable() for ch in v) or v != v.strip():
        raise LabError(f"{where}: 'certificate_number' must be printable text without surrounding spaces")
    return v


def _text(where, d, key, optional=False) -> str:
    """A printable one-paragraph text item (names, addresses); "" when optional and absent."""
    if optional and key not in d:
        return ""
    v = d.get(key)
    if v is None:
        raise LabError(f"{where}: missing key '{key}'")
    if not isinstance(v, str) or not v.strip():
        raise LabError(f"{where}: '{key}' must be a non-empty string")
    return v.strip()


def _table(where, d, key) -> dict:
    v = d.get(key)
    if v is None:
        raise LabError(f"{where}: missing table [{key}] (a certificate needs it, see docs/lab.md)")
    if not isinstance(v, dict):
        raise LabError(f"{where}: '{key}' must be a table")
    return v


def _references(where, d, cal_date) -> tuple[ReferenceStandard, ...]:
    """[[reference]]: each standard with its own certificate number and due date, in force on the day."""
    refs = d.get("reference")
    if refs is None:
        raise LabError(f"{where}: missing [[reference]]: name the reference standards (name, certificate_number, "
                       "due) the field is traceable through")
    if not isinstance(refs, list) or not refs or not all(isinstance(r, dict) for r in refs):
        raise LabError(f"{where}: 'reference' must be one or more [[reference]] tables")
    out = []
    for i, r in enumerate(refs):
        w = f"{where}: reference {i + 1}"
        if "due" not in r:
            raise LabError(f"{w}: missing key 'due'")
        ref = ReferenceStandard(_text(w, r, "name"), _text(w, r, "certificate_number"),
                                _date(w, r, "due", None), _text(w, r, "calibrated_by", optional=True))
        if ref.due_date < cal_date:
            raise LabError(f"{w}: {ref.name!r} was due for calibration on {ref.due_date} before the calibration "
                           f"date {cal_date}: a standard out of its calibration gives no traceability")
        out.append(ref)
    return tuple(out)


def session_from_dict(d: dict, where: str = "<session>") -> LabSession:
    """Build a session from a parsed TOML document; LabError names the key on any problem."""
    probe, cal = d.get("probe", {}), d.get("calibration", {})
    m, amb, spec = d.get("method", {}), d.get("ambient", {}), d.get("spec", {})
    for name, t in (("probe", probe), ("calibration", cal), ("method", m), ("ambient", amb), ("spec", spec)):
        if not isinstance(t, dict):
            raise LabError(f"{where}: '{name}' must be a table")
    cal_date = _date(where, cal, "date", _dt.date.today())
    agreed = cal.get("interval_agreed_with_customer", False)
    if not isinstance(agreed, bool):
        raise LabError(f"{where}: 'calibration.interval_agreed_with_customer' must be true or false, got {agreed!r}")
    # ISO/IEC 17025:2017 7.8.4.3: no recommended calibration interval on a certificate unless agreed
    if "due" in cal and not agreed:
        raise LabError(f"{where}: 'calibration.due' is stated on the certificate only when the interval was agreed "
                       "with the customer (ISO/IEC 17025:2017 7.8.4.3): set calibration.interval_agreed_with_customer "
                       "= true, or remove due")
    if agreed and "due" not in cal:
        raise LabError(f"{where}: missing key 'calibration.due' (the due date agreed with the customer)")
    due = _date(where, cal, "due", None) if agreed else None
    if due is not None and due <= cal_date:
        raise LabError(f"{where}: due date {due} is not after calibration date {cal_date}")
    try:
        method = FieldMethod(kind=_str(where, m, "kind", "tem-cell"),
                             impedance_ohm=_num(where, m, "impedance_ohm", 50.0, 0.0, 1e4),
                             spacing_m=_num(where, m, "spacing_m", 0.15, -1.0, 100.0),
                             gain_dbi=_num(where, m, "gain_dbi", 0.0, -50.0, 100.0),
                             distance_m=_num(where, m, "distance_m", 1.0, -1.0, 1e4),
                             description=str(m.get("description", "")))
    except LabError:
        raise
    except MeterlinkError as exc:
        raise LabError(f"{where}: {exc}") from None
    budget = d.get("budget", {})
    if not isinstance(budget, dict) or any(not isinstance(v, (int, float)) or isinstance(v, bool)
                                           or not math.isfinite(v) for v in budget.values()):
        raise LabError(f"{where}: 'budget' must be a table of finite numbers")
    operator = d.get("operator", "")
    if not isinstance(operator, str):
        raise LabError(f"{where}: 'operator' must be text, got {operator!r}")
    rule = _str(where, d, "decision_rule", "guarded")
    try:
        from meterlink.physics.verdict import get_rule
        get_rule(rule)
    except MeterlinkError as exc:
        raise LabError(f"{where}: 'decision_rule': {exc}") from None
    model, serial, lab = _str(where, probe, "model"), _str(where, probe, "serial"), _str(where, cal, "lab")
    for key in ("temp_c", "humidity_pct"):     # the conditions are stated on the certificate, never assumed
        if key not in amb:
            raise LabError(f"{where}: missing key 'ambient.{key}' (the conditions of the calibration)")
    address = _text(where, cal, "address") if "address" in cal else ""
    if not address:
        raise LabError(f"{where}: missing key 'calibration.address' (the laboratory's address)")
    cust, sig = _table(where, d, "customer"), _table(where, d, "signatory")
    customer = Party(_text(f"{where}: customer", cust, "name"), _text(f"{where}: customer", cust, "address"))
    signatory = Signatory(_text(f"{where}: signatory", sig, "name"), _text(f"{where}: signatory", sig, "function"))
    issued = _date(where, cal, "issued", cal_date)
    if issued < cal_date:
        raise LabError(f"{where}: issue date {issued} is before the calibration date {cal_date}")
    received = _date(where, cal, "received", None) if "received" in cal else None
    if received is not None and received > cal_date:
        raise LabError(f"{where}: received date {received} is after the calibration date {cal_date}")
    return LabSession(
        lab_address=address, customer=customer, signatory=signatory, references=_references(where, d, cal_date),
        issue_date=issued, received_date=received, item_condition=_text(where, probe, "condition", optional=True),
        procedure=_text(where, m, "procedure", optional=True), location=_text(where, cal, "location", optional=True),
        probe_model=model, probe_serial=serial, lab=lab, certificate_number=_cert_number(where, cal),
        cal_date=cal_date, due_date=due, method=method,
        # bounds no calibration lab comes near (engineering judgement): they catch typing slips
        ambient=Ambient(_num(where, amb, "temp_c", 23.0, -60.0, 100.0),
                        _num(where, amb, "humidity_pct", 45.0, 0.0, 100.0)),
        spec=ProbeSpec(_num(where, spec, "frequency_response_db", 1.0, 0.0, 30.0),
                       _num(where, spec, "isotropy_db", 1.0, 0.0, 30.0), _num(where, spec, "linearity_db", 0.5, 0.0, 30.0)),
        ref_freq_hz=_num(where, d, "ref_freq_hz", 1e9, 1.0, 3e12), operator=operator,
        decision_rule=rule, budget={k: float(v) for k, v in budget.items()})


def load_session(path) -> LabSession:
    """Read a session TOML file (see docs/lab.md)."""
    from meterlink.errors import read_input_text

    p = Path(path)
    text = read_input_text(p, "lab session", LabError)
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise LabError(f"{p}: not a valid TOML session file ({exc})".replace("\n", " ")) from None
    return session_from_dict(doc, str(p))
