"""Numbers as every CSV and JSON output writes them: rounded to a stated count of digits suited to the
quantity, so a cell reads 27.5 and never 27.50000001375 (float noise from unit conversions). The rule
is chosen by the column or key name (units are in the names, DEVELOPERS.md) and documented in
docs/formats.md:

    frequencies (freq..., ..._hz)                    9 significant digits
    latitude / longitude (lat..., lon...)            7 decimal places (about 1 cm)
    times and durations in seconds (..._utc, t, t0,
      t1, ..._s, ..._time)                           3 decimal places (1 ms)
    everything else (fields, percent, ratios, dB,
      powers, positions, coverage, ...)              5 significant digits

Five significant digits are well beyond a field meter's expanded uncertainty (about 1 to 3 dB, i.e.
12 to 41 % in field strength). Integers, booleans, text and None pass unchanged; NaN and infinities
too (each writer says how it writes them). Stored values in the databases keep full precision: this
is only how they are written out. One rounded value is the double nearest the rounded decimal, so
Python's repr (json, csv) writes the short decimal.
"""

from __future__ import annotations

import functools
import json
import math
import numbers
import re

#: significant digits of a quantity without a rule of its own
DEFAULT_SIG = 5
#: (name pattern, "sig" | "dec", digits), first match wins; docs/formats.md lists the same table
RULES: tuple[tuple[re.Pattern, str, int], ...] = (
    (re.compile(r"(^|_)(lat|lon|latitude|longitude)(_|$)"), "dec", 7),
    (re.compile(r"(^|_)freq|_hz$|^hz$"), "sig", 9),
    (re.compile(r"_utc$|^t$|^t[01]$|^t_|_s$|^time$|_time$"), "dec", 3),
)


_INF = float("inf")


@functools.lru_cache(maxsize=1024)
def rule(name: str | None) -> tuple[str, int]:
    """("sig", n) or ("dec", n) for a column or key name (cached: writers ask once per cell)."""
    if name:
        low = str(name).lower()
        for pat, kind, n in RULES:
            if pat.search(low):
                return kind, n
    return "sig", DEFAULT_SIG


def sig(x: float, n: int = DEFAULT_SIG) -> float:
    """x rounded to n significant digits (the nearest double to that decimal)."""
    if x == 0 or not math.isfinite(x):
        return x
    return float(f"{x:.{n}g}")


def dec(x: float, n: int) -> float:
    """x rounded to n decimal places (the nearest double to that decimal)."""
    if not math.isfinite(x):
        return x
    return float(f"{x:.{n}f}")


def rounded(v, name: str | None = None):
    """v as written under the rule of ``name``: floats (numpy floats too) rounded, the rest unchanged."""
    if type(v) is float:                              # the common case first
        kind, n = rule(name)
        if v != v or v in (_INF, -_INF) or v == 0.0:
            return v
        return float(f"{v:.{n}g}") if kind == "sig" else float(f"{v:.{n}f}")
    if isinstance(v, bool) or v is None or isinstance(v, str):
        return v
    if isinstance(v, numbers.Integral):               # numpy integers too
        return int(v)
    if isinstance(v, numbers.Real):                   # numpy floats too
        kind, n = rule(name)
        return sig(float(v), n) if kind == "sig" else dec(float(v), n)
    return v


def rounded_array(a, name: str | None = None):
    """A float array rounded under the rule of ``name``, vectorised (long series): integer-valued floats
    scaled by exact powers of ten, so each value is the double nearest its decimal as sig() gives it
    (they can differ only at an exact tie)."""
    import numpy as np

    a = np.asarray(a, dtype=float)
    kind, n = rule(name)
    out = a.copy()
    good = np.isfinite(a) & (a != 0)
    if not good.any():
        return out
    if kind == "dec":
        e = np.full(a.shape, -n, dtype=int)
    else:
        e = np.zeros(a.shape, dtype=int)
        e[good] = np.floor(np.log10(np.abs(a[good]))).astype(int) - (n - 1)
    neg, pos = good & (e < 0), good & (e >= 0)
    p = 10.0 ** (-e[neg])                        # exact powers of ten up to 1e22
    out[neg] = np.round(a[neg] * p) / p
    q = 10.0 ** e[pos]
    out[pos] = np.round(a[pos] / q) * q
    return out


def tidy(obj, name: str | None = None):
    """A JSON-able structure with every float rounded by its key's rule (a list takes its key's rule);
    tuples become lists, numpy scalars and arrays plain numbers and lists."""
    if isinstance(obj, dict):
        return {k: tidy(v, k if isinstance(k, str) else name) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [tidy(v, name) for v in obj]
    if type(obj).__name__ == "ndarray":              # numpy, without importing it here
        return [tidy(v, name) for v in obj.tolist()]
    return rounded(obj, name)


def dumps(obj, **kw) -> str:
    """json.dumps of tidy(obj); ``default`` (e.g. str for dates) as json.dumps takes it."""
    return json.dumps(tidy(obj), **kw)


def row(head, cells) -> list:
    """One CSV row with each cell rounded under its column's rule."""
    return [rounded(c, h) for h, c in zip(head, cells)]


def iso_utc(t) -> str | None:
    """An epoch time (s) as ISO 8601 UTC with milliseconds, e.g. 2026-11-03T10:15:02.250Z; None stays None."""
    import datetime as _dt

    if t is None or (isinstance(t, float) and not math.isfinite(t)):
        return None
    return _dt.datetime.fromtimestamp(float(t), _dt.timezone.utc).isoformat(timespec="milliseconds")[:-6] + "Z"
