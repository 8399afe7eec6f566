"""Reference levels of RF exposure standards, read from the packaged TOML tables.

Every standard is one file in ``meterlink/physics/data/limits``; the loader discovers them, so a new
standard or a national variant is a data change only. A cell is a constant or a power law
a*(f/unit)^b; S-only cells get plane-wave E = sqrt(S*Z0) and H = sqrt(S/Z0), marked derived.

Breakpoint convention: each row says whether its lower bound is inclusive. Most standards
write ranges ">30-400 MHz", so a frequency exactly on a breakpoint belongs to the LOWER band
(lo_inclusive = false); the first row of a table includes its lower edge. A row whose lower
bound is inclusive wins at its breakpoint (Directive 2013/35/EU writes "10 MHz <= f < 400 MHz",
and ICNIRP 2020 Table 6 has a row for 300 GHz exactly).

Check status: a table, row, cell or averaging time may say ``checked = "..."``: the document,
table and note its value was compared with. Cells inherit it from their row, rows from their
table. A value without it is shown to users as NOT_CHECKED; ``ReferenceLevel.status`` is the
one-line summary every caller prints beside a level.
"""

from __future__ import annotations

import math
import os
import tomllib
from dataclasses import dataclass
from functools import lru_cache

from meterlink.errors import MeterlinkError
from meterlink.physics.units import C_M_PER_S, Z0_OHM, format_frequency

TIERS = ("public", "occupational")
KINDS = ("whole_body", "local", "peak", "brief_energy")
#: What users see beside a value no one has yet compared with the published document.
NOT_CHECKED = "not yet checked against the primary text"
CHECKED_PREFIX = "checked against "
_FREQ_UNIT_HZ = {"Hz": 1.0, "kHz": 1e3, "MHz": 1e6, "GHz": 1e9}
_TIME_UNIT_S = {"s": 1.0, "min": 60.0}
_MU0 = Z0_OHM / C_M_PER_S  # mu_0 = Z0/c, consistent with the Z0 used for derived cells


class LimitsError(MeterlinkError):
    """An unknown standard, tier or kind, a frequency a table does not cover, or bad table data."""


@dataclass(frozen=True)
class ReferenceLevel:
    """The reference levels of one standard, tier and kind at one frequency (SI units)."""

    standard: str
    tier: str
    kind: str
    freq_hz: float
    e_v_per_m: float | None
    h_a_per_m: float | None
    s_w_per_m2: float | None
    e_derived: bool
    h_derived: bool
    s_derived: bool
    averaging_time_s: float | None
    band_lo_hz: float
    band_hi_hz: float
    source: str
    #: One line for users: "checked against <document, table>", NOT_CHECKED, or which parts are which.
    status: str
    tier_label: str
    notes: str = ""
    #: S for comparison with H-derived power density where the standard splits S_E / S_H
    #: (IEEE C95.1-2019 below 100 MHz); otherwise equal to s_w_per_m2.
    s_h_w_per_m2: float | None = None
    #: Per value: the document and table it was checked against, "" when not yet checked
    #: (a derived value carries the status of the value it is derived from).
    e_checked: str = ""
    h_checked: str = ""
    s_checked: str = ""
    averaging_checked: str = ""
    lo_inclusive: bool = True

    @property
    def fully_checked(self) -> bool:
        """True when every value given here and the averaging time were checked against a text."""
        return self.status.startswith(CHECKED_PREFIX)


@dataclass(frozen=True)
class SummationTerm:
    """One term of a multi-frequency sum: sum over f in the band of (X_i / divisor(f))^exponent."""

    effect: str
    f_lo_hz: float
    f_hi_hz: float
    quantity: str
    exponent: int
    divisor: str
    formula: tuple[float, float, str] | None
    kind: str = "whole_body"
    #: Terms with the same (effect, group) add into one sum; each such sum must not exceed 1.
    group: str = ""


@dataclass(frozen=True)
class SummationRule:
    """The multi-frequency summation rule of one standard and tier."""

    standard: str
    tier: str
    terms: tuple[SummationTerm, ...]
    source: str
    #: "checked against <document, clause>" or NOT_CHECKED, as for ReferenceLevel.status.
    status: str
    notes: str = ""


# ----------------------------------------------------------------------------- parsing


@dataclass(frozen=True)
class _Law:
    """value = a * (f / unit_hz)^b / per, or a constant when b = 0."""

    a: float
    b: float
    unit_hz: float
    per: float = 1.0

    def __call__(self, freq_hz: float) -> float:
        if self.b == 0:
            return self.a / self.per
        return self.a * (freq_hz / self.unit_hz) ** self.b / self.per


@dataclass(frozen=True)
class _Cell:
    law: _Law | None  # None when derived
    derived_from: str  # "" or "s" / "s_h" / "b"
    checked: str  # document and table it was checked against; "" = not yet checked


@dataclass(frozen=True)
class _Row:
    f_lo_hz: float
    f_hi_hz: float
    lo_inclusive: bool
    cells: tuple[tuple[str, _Cell], ...]
    averaging: tuple[_Law, float] | None  # (law, seconds per unit); None = instantaneous
    averaging_checked: str
    checked: str
    notes: str

    def cell(self, name: str) -> _Cell | None:
        return dict(self.cells).get(name)


@dataclass(frozen=True)
class _Table:
    standard: str
    tier: str
    tier_label: str
    kind: str
    table: str
    source: str
    rows: tuple[_Row, ...]
    checked: str
    notes: str
    time_factor: tuple[float, float, float, float, float] | None  # k, c0, c1, t_ref_s, exponent


def _bad(where: str, problem: str) -> LimitsError:
    return LimitsError(f"limits data {where}: {problem}")


def _checked(spec, where: str, default: str) -> str:
    """The `checked` text of a table, row or cell dict (inherited when absent)."""
    if not isinstance(spec, dict):
        return default
    if "status" in spec:
        raise _bad(where, "'status' is not a key here; say what the value was checked against "
                          "with checked = \"document, table\", or leave it out")
    value = spec.get("checked", default)
    if not isinstance(value, str) or (value == "" and "checked" in spec):
        raise _bad(where, f"checked = {value!r} must name the document and table")
    return value


def check_status(parts: list[tuple[str, str]]) -> str:
    """One line for users from (label, checked text) pairs: all checked against the same text,
    none checked (NOT_CHECKED), or which labels are which."""
    docs = [c for _, c in parts]
    if not docs or not any(docs):
        return NOT_CHECKED
    if all(d == docs[0] for d in docs):
        return CHECKED_PREFIX + docs[0]
    groups: dict[str, list[str]] = {}
    for label, c in parts:
        groups.setdefault(c, []).append(label)
    text = [f"{', '.join(labels)} {CHECKED_PREFIX}{c}" for c, labels in groups.items() if c]
    if "" in groups:
        text.append(f"{', '.join(groups[''])} {NOT_CHECKED}")
    return "; ".join(text)


def _law(spec, where: str) -> _Law:
    """Parse a number, {value}, or {a, b, unit[, per]} into a power law."""
    if isinstance(spec, (int, float)) and not isinstance(spec, bool):
        return _Law(float(spec), 0.0, 1.0)
    if isinstance(spec, dict) and "value" in spec:
        return _Law(float(spec["value"]), 0.0, 1.0)
    if isinstance(spec, dict) and {"a", "b", "unit"} <= spec.keys():
        if spec["unit"] not in _FREQ_UNIT_HZ:
            raise _bad(where, f"unit {spec['unit']!r} is not one of {', '.join(_FREQ_UNIT_HZ)}")
        return _Law(float(spec["a"]), float(spec["b"]), _FREQ_UNIT_HZ[spec["unit"]],
                    float(spec.get("per", 1.0)))
    raise _bad(where, f"cannot read {spec!r} (a number, {{value}} or {{a, b, unit}})")


def _averaging(spec, where: str):
    if spec == "instantaneous":
        return None
    unit = spec.get("time_unit", "s") if isinstance(spec, dict) else "s"
    if unit not in _TIME_UNIT_S:
        raise _bad(where, f"time_unit {unit!r} is not one of {', '.join(_TIME_UNIT_S)}")
    return (_law(spec, where), _TIME_UNIT_S[unit])


_CELL_NAMES = ("e", "h", "s", "s_h", "b", "u")
_ROW_KEYS = {"f_lo_hz", "f_hi_hz", "lo_inclusive", "checked", "notes", "averaging_time", *_CELL_NAMES}


def _row(spec: dict, where: str, table_checked: str, table_avg, table_avg_checked: str) -> _Row:
    unknown = set(spec) - _ROW_KEYS
    if unknown:
        raise _bad(where, f"unknown row keys {sorted(unknown)}")
    checked = _checked(spec, where, table_checked)
    cells = []
    for name in _CELL_NAMES:
        if name not in spec:
            continue
        c = spec[name]
        c_checked = _checked(c, f"{where} {name}", checked)
        if isinstance(c, dict) and "derived_from" in c:
            if c["derived_from"] not in ("s", "b"):
                raise _bad(where, f"{name} derived_from {c['derived_from']!r} (must be 's' or 'b')")
            cells.append((name, _Cell(None, c["derived_from"], c_checked)))
        else:
            cells.append((name, _Cell(_law(c, where), "", c_checked)))
    avg, avg_checked = table_avg, table_avg_checked
    if "averaging_time" in spec:
        a = spec["averaging_time"]
        avg = _averaging(a, where)
        avg_checked = _checked(a, f"{where} averaging_time", checked)
    row = _Row(float(spec["f_lo_hz"]), float(spec["f_hi_hz"]), bool(spec["lo_inclusive"]),
               tuple(cells), avg, avg_checked, checked, spec.get("notes", ""))
    if not 0 < row.f_lo_hz <= row.f_hi_hz:
        raise _bad(where, f"band {row.f_lo_hz}-{row.f_hi_hz} Hz is not increasing")
    return row


#: The packaged tables (package data of meterlink.physics.data.limits), read as plain files beside this
#: module: importlib.resources would cost the start-up of every command that shows a level (zipfile & co.)
_DATA_DIR = os.path.join(os.path.dirname(os.path.abspath(__file__)), "data", "limits")


@lru_cache(maxsize=None)
def _raw(standard: str) -> dict:
    path = os.path.join(_DATA_DIR, f"{standard}.toml")
    if os.sep in standard or not os.path.isfile(path):
        raise LimitsError(f"unknown standard {standard!r} (known: {', '.join(standards())})")
    try:
        with open(path, encoding="utf-8") as fh:
            data = tomllib.loads(fh.read())
    except tomllib.TOMLDecodeError as exc:
        raise _bad(f"{standard}.toml", str(exc)) from None
    if data.get("id") != standard:
        raise _bad(f"{standard}.toml", f"id {data.get('id')!r} differs from the file name")
    return data


@lru_cache(maxsize=None)
def _tables(standard: str) -> tuple[_Table, ...]:
    data = _raw(standard)
    out = []
    for i, t in enumerate(data.get("tables", [])):
        where = f"{standard}.toml table {i + 1}"
        tier, kind = t.get("tier"), t.get("kind")
        if tier not in TIERS or kind not in KINDS:
            raise _bad(where, f"tier {tier!r} / kind {kind!r} not recognised")
        checked = _checked(t, where, "")
        if "rows_from" in t:
            # Another standard's rows, with their values; checked against that standard's text
            # only when this table says so too (the status is about this document).
            ref = t["rows_from"]
            rows = tuple(_recheck(r, checked) for r in _table(ref["standard"], ref["tier"], ref["kind"]).rows)
        else:
            avg_spec = t.get("averaging_time", "instantaneous")
            avg = _averaging(avg_spec, where)
            avg_checked = _checked(avg_spec, f"{where} averaging_time", checked)
            rows = tuple(_row(r, f"{where} row {j + 1}", checked, avg, avg_checked)
                         for j, r in enumerate(t["rows"]))
        for prev, nxt in zip(rows, rows[1:]):
            if prev.f_hi_hz != nxt.f_lo_hz:
                raise _bad(where, f"gap or overlap between {prev.f_hi_hz} and {nxt.f_lo_hz} Hz")
        tf = t.get("time_factor")
        if tf is not None and t.get("energy_unit") != "kJ/m2":
            raise _bad(where, "a time_factor table needs energy_unit = \"kJ/m2\"")
        out.append(_Table(
            standard, tier, data.get("tiers", {}).get(tier, tier), kind, str(t["table"]),
            _source(data["citation"], str(t["table"])), rows, checked, t.get("notes", ""),
            None if tf is None else (float(tf["k"]), float(tf["c0"]), float(tf["c1"]),
                                     float(tf["t_ref_s"]), float(tf["exponent"]))))
    return tuple(out)


def _recheck(row: _Row, checked: str) -> _Row:
    """A borrowed row carrying this document's check status instead of the lender's."""
    cells = tuple((n, _Cell(c.law, c.derived_from, checked)) for n, c in row.cells)
    return _Row(row.f_lo_hz, row.f_hi_hz, row.lo_inclusive, cells, row.averaging, checked, checked, row.notes)


def _source(citation: str, table: str) -> str:
    """'ICNIRP 2020, Health Phys 118(5), Table 5'; labels such as 'Annex III, Table B1' verbatim."""
    return f"{citation}, Table {table}" if table[:1].isdigit() else f"{citation}, {table}"


def _check(standard: str, tier: str | None = None, kind: str | None = None) -> None:
    if standard not in standards():
        raise LimitsError(f"unknown standard {standard!r} (known: {', '.join(standards())})")
    if tier is not None and tier not in TIERS:
        raise LimitsError(f"unknown tier {tier!r} (use {' or '.join(TIERS)})")
    if kind is not None and kind not in KINDS:
        raise LimitsError(f"unknown kind {kind!r} (use one of {', '.join(KINDS)})")


def _table(standard: str, tier: str, kind: str) -> _Table:
    _check(standard, tier, kind)
    for t in _tables(standard):
        if t.tier == tier and t.kind == kind:
            return t
    have = sorted({f"{t.tier} {t.kind}" for t in _tables(standard)})
    raise LimitsError(f"{standard} has no {kind} table for the {tier} tier (has: {', '.join(have)})")


def _find_row(table: _Table, freq_hz: float) -> _Row | None:
    """The row covering freq_hz under the breakpoint convention in the module docstring."""
    if not (isinstance(freq_hz, (int, float)) and math.isfinite(freq_hz) and freq_hz > 0):
        raise LimitsError(f"frequency {freq_hz!r} Hz is not a positive finite number")
    hits = [r for r in table.rows
            if (r.f_lo_hz < freq_hz or (r.lo_inclusive and r.f_lo_hz == freq_hz)) and freq_hz <= r.f_hi_hz]
    if not hits:
        return None
    exact = [r for r in hits if r.lo_inclusive and r.f_lo_hz == freq_hz]
    return exact[0] if exact else hits[0]


def _covering_row(table: _Table, freq_hz: float) -> _Row:
    row = _find_row(table, freq_hz)
    if row is None:
        lo, hi = table.rows[0].f_lo_hz, table.rows[-1].f_hi_hz
        raise LimitsError(
            f"{table.standard} {table.tier} {table.kind} levels cover {format_frequency(lo)} to "
            f"{format_frequency(hi)}; {format_frequency(freq_hz)} is outside")
    return row


def _level(table: _Table, row: _Row, freq_hz: float) -> ReferenceLevel:
    values: dict[str, float | None] = {}
    derived: dict[str, bool] = {}
    status: dict[str, str] = {}  # name -> checked text ("" = not yet checked)
    for name in ("s", "s_h", "b", "e", "h"):  # sources before the cells derived from them
        cell = row.cell(name)
        if cell is None:
            values[name], derived[name], status[name] = None, False, ""
        elif cell.law is not None:
            values[name], derived[name], status[name] = cell.law(freq_hz), False, cell.checked
        elif cell.derived_from == "b":
            b_ut = values["b"]
            if b_ut is None:
                raise _bad(table.source, f"{name} is derived from b, which the row lacks")
            values[name], derived[name], status[name] = b_ut * 1e-6 / _MU0, True, status["b"]
        else:
            src = "s_h" if name == "h" and values["s_h"] is not None else "s"
            s = values[src]
            if s is None:
                raise _bad(table.source, f"{name} is derived from S, which the row lacks")
            v = math.sqrt(s * Z0_OHM) if name == "e" else math.sqrt(s / Z0_OHM)
            values[name], derived[name], status[name] = v, True, status[src]
    if row.averaging is None:
        avg_s = None
    else:
        law, scale = row.averaging
        avg_s = law(freq_hz) * scale
    notes = "; ".join(n for n in (row.notes, table.notes) if n)
    labels = {"e": "E", "h": "H", "s": "S", "s_h": "S (H)"}
    parts = [(labels[n], status[n]) for n in ("e", "h", "s", "s_h") if values[n] is not None]
    parts.append(("averaging time", row.averaging_checked))
    return ReferenceLevel(
        standard=table.standard, tier=table.tier, kind=table.kind, freq_hz=float(freq_hz),
        e_v_per_m=values["e"], h_a_per_m=values["h"], s_w_per_m2=values["s"],
        e_derived=derived["e"], h_derived=derived["h"], s_derived=derived["s"],
        averaging_time_s=avg_s, band_lo_hz=row.f_lo_hz, band_hi_hz=row.f_hi_hz,
        source=table.source, status=check_status(parts), tier_label=table.tier_label,
        notes=notes, s_h_w_per_m2=values["s_h"] if values["s_h"] is not None else values["s"],
        e_checked=status["e"], h_checked=status["h"], s_checked=status["s"],
        averaging_checked=row.averaging_checked, lo_inclusive=row.lo_inclusive)


# ----------------------------------------------------------------------------- public API


@lru_cache(maxsize=None)
def _standard_ids() -> tuple[str, ...]:
    names = os.listdir(_DATA_DIR)
    return tuple(sorted(n[: -len(".toml")] for n in names if n.endswith(".toml")))


def standards() -> list[str]:
    """Ids of all packaged standards, sorted (one TOML file each)."""
    return list(_standard_ids())


def describe_standard(standard: str) -> dict:
    """Title, document, tiers (with the standard's own names), kinds and frequency coverage."""
    _check(standard)
    data = _raw(standard)
    tables = _tables(standard)
    return {
        "id": standard,
        "title": data.get("title", standard),
        "document": f"{data['citation']}; {data.get('document', '')}".rstrip("; "),
        "year": data.get("year"),
        "tiers": {t: data.get("tiers", {}).get(t, t) for t in TIERS if any(x.tier == t for x in tables)},
        "kinds": [k for k in KINDS if any(x.kind == k for x in tables)],
        "coverage": [
            {"tier": t.tier, "kind": t.kind, "table": t.table, "f_lo_hz": t.rows[0].f_lo_hz,
             "f_hi_hz": t.rows[-1].f_hi_hz, "status": _table_status(t)}
            for t in tables
        ],
    }


def _table_status(table: _Table) -> str:
    """Check status of a whole table: every value and averaging time in every row."""
    docs = {c.checked for r in table.rows for _, c in r.cells} | {r.averaging_checked for r in table.rows}
    if docs == {""}:
        return NOT_CHECKED
    checked = "; ".join(sorted(CHECKED_PREFIX + d for d in docs if d))
    return checked if "" not in docs else f"partly: {checked}; the rest {NOT_CHECKED}"


def reference_level(standard: str, tier: str, freq_hz: float, kind: str = "whole_body") -> ReferenceLevel:
    """The levels of `standard`/`tier`/`kind` at freq_hz; LimitsError if not covered."""
    if kind == "brief_energy":
        _check(standard, tier)
        raise LimitsError("brief_energy levels depend on exposure time; "
                          "use brief_exposure_energy_j_per_m2(standard, tier, freq_hz, duration_s)")
    table = _table(standard, tier, kind)
    return _level(table, _covering_row(table, freq_hz), freq_hz)


_QUANTITY_FIELD = {"e": "e_v_per_m", "h": "h_a_per_m", "s": "s_w_per_m2"}


def most_restrictive_level(standard: str, tier: str, lo_hz: float, hi_hz: float, kind: str = "whole_body",
                           quantity: str = "e") -> ReferenceLevel:
    """The level with the lowest E (or H, or S) anywhere in [lo_hz, hi_hz]: what a broadband probe,
    which cannot tell frequencies apart, must be judged against (common practice).

    Tables step at their breakpoints (ICNIRP 2020 public: 27.7 V/m up to 400 MHz, then
    1.375*sqrt(f_M) = 27.5 V/m just above), so both sides of every edge inside the band are
    examined as well as a dense log grid.
    """
    attr = _QUANTITY_FIELD[quantity]
    lo, hi = float(min(lo_hz, hi_hz)), float(max(lo_hz, hi_hz))
    n = 1 if lo == hi else 401
    grid = [lo * (hi / lo) ** (i / max(1, n - 1)) for i in range(n)] + [hi]
    found: list[ReferenceLevel] = []

    def scan(freqs):
        for f in freqs:
            if lo <= f <= hi:
                try:
                    found.append(reference_level(standard, tier, f, kind))
                except MeterlinkError:
                    pass

    scan(grid)
    edges = {x for r in found for x in (r.band_lo_hz, r.band_hi_hz) if lo < x < hi}
    scan([x * (1 + d) for x in sorted(edges) for d in (-1e-9, 0.0, 1e-9)])
    usable = [r for r in found if getattr(r, attr) is not None]
    if not usable:
        raise LimitsError(f"{standard} {tier}: no {quantity.upper()} reference level between "
                          f"{format_frequency(lo)} and {format_frequency(hi)}")
    return min(usable, key=lambda r: getattr(r, attr))

def reference_levels_at(freq_hz: float, standard: str | None = None,
                        tier: str | None = None) -> list[ReferenceLevel]:
    """All levels (every kind except brief_energy) covering freq_hz, optionally filtered."""
    if standard is not None:
        _check(standard)
    if tier is not None and tier not in TIERS:
        raise LimitsError(f"unknown tier {tier!r} (use {' or '.join(TIERS)})")
    out = []
    for std in [standard] if standard else standards():
        for table in sorted(_tables(std), key=lambda t: (TIERS.index(t.tier), KINDS.index(t.kind))):
            if table.kind == "brief_energy" or (tier and table.tier != tier):
                continue
            row = _find_row(table, freq_hz)
            if row is not None:
                out.append(_level(table, row, freq_hz))
    return out


def _term(spec: dict, where: str) -> SummationTerm:
    formula = spec.get("formula")
    if spec.get("divisor") not in ("reference_level", "formula") or (
            (spec["divisor"] == "formula") != (formula is not None)):
        raise _bad(where, "divisor must be 'reference_level', or 'formula' with a formula [a, b, unit]")
    if formula is not None:
        formula = (float(formula[0]), float(formula[1]), str(formula[2]))
        _law({"a": formula[0], "b": formula[1], "unit": formula[2]}, where)
    if spec.get("quantity") not in ("e", "h", "s") or spec.get("kind", "whole_body") not in KINDS:
        raise _bad(where, f"bad quantity or kind in {spec!r}")
    return SummationTerm(spec["effect"], float(spec["f_lo_hz"]), float(spec["f_hi_hz"]),
                         spec["quantity"], int(spec["exponent"]), spec["divisor"], formula,
                         spec.get("kind", "whole_body"), spec.get("group", ""))


@lru_cache(maxsize=None)
def summation_rule(standard: str, tier: str) -> SummationRule:
    """The multi-frequency summation rule of a standard and tier."""
    _check(standard, tier)
    data = _raw(standard)
    for i, s in enumerate(data.get("summation", [])):
        if s.get("tier") != tier:
            continue
        if "summation_from" in s:
            base = summation_rule(s["summation_from"]["standard"], s["summation_from"]["tier"])
            where = f"{standard}.toml summation {i + 1}"
            return SummationRule(standard, tier, base.terms, data["citation"],
                                 check_status([("rule", _checked(s, where, ""))]),
                                 f"as {base.source}; {base.notes}".rstrip("; "))
        where = f"{standard}.toml summation {i + 1}"
        terms = tuple(_term(t, where) for t in s["terms"])
        return SummationRule(standard, tier, terms, data["citation"],
                             check_status([("rule", _checked(s, where, ""))]), s.get("notes", ""))
    raise LimitsError(f"{standard} has no summation rule for the {tier} tier")


def brief_exposure_status(standard: str, tier: str, freq_hz: float) -> str:
    """Check status of the brief-exposure energy density (the row's value and the time factor)."""
    table = _table(standard, tier, "brief_energy")
    row = _covering_row(table, freq_hz)
    return check_status([("U", row.cell("u").checked), ("time factor", table.checked)])


def brief_exposure_energy_j_per_m2(standard: str, tier: str, freq_hz: float, duration_s: float) -> float:
    """Incident energy density limit (J/m^2) for a brief exposure of duration_s (0 < t <= 360 s)."""
    table = _table(standard, tier, "brief_energy")
    k, c0, c1, t_ref, p = table.time_factor
    if not (math.isfinite(duration_s) and 0 < duration_s <= t_ref):
        raise LimitsError(f"brief-exposure duration {duration_s!r} s is outside 0 < t <= {t_ref:g} s")
    row = _covering_row(table, freq_hz)
    u = row.cell("u").law(freq_hz)
    return u * k * (c0 + c1 * (duration_s / t_ref) ** p) * 1e3  # table values in kJ/m^2
