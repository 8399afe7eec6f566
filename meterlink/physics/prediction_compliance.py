"""Predicted exposure against the reference levels: the sum over sources by each standard's
summation rule, compliance distances, the largest EIRP a source may have for a distance, the
ITU-T K.52 installation class and grids of percent of the reference level (pure, vectorised).

Reference levels and summation rules come from meterlink.physics.limits (the level at each
source's own frequency); every result carries their check status. Predictions are far-field
estimates except where the cylindrical model was used; see meterlink.physics.prediction.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from meterlink.errors import MeterlinkError
from meterlink.physics.limits import reference_level, summation_rule
from meterlink.physics.prediction import (
    CYLINDRICAL,
    FAR_FIELD,
    PredictionError,
    Source,
    _LN10_10,
    _source_s,
    check_source,
    cylindrical_s,
    far_field_distance_for_s_m,
    transition_distance_m,
)
from meterlink.physics.units import Z0_OHM

_UNIT_HZ = {"Hz": 1.0, "kHz": 1e3, "MHz": 1e6, "GHz": 1e9}
K52_SOURCE = "ITU-T K.52, Annex B (installation categories); thresholds as declared by the user"
#: Below this frequency a prediction point is likely in the reactive near field of most antennas.
PLANE_WAVE_FROM_HZ = 30e6


@dataclass(frozen=True)
class RuleTerm:
    """How one source enters one sum of the summation rule: ratio = (S / s_equiv)^power."""

    source: str
    group: tuple[str, str]       # (effect, group)
    quantity: str                # the rule's quantity: e, h or s
    exponent: int
    divisor: float               # the reference level (or formula value) in the rule's quantity, SI
    s_equiv_w_per_m2: float      # the same divisor as a plane-wave power density
    power: float                 # exponent in power terms: 1 for S or (E/E_L)^2, 0.5 for E/E_L
    level_status: str


def rule_terms(src: Source, standard: str, tier: str, kind: str = "whole_body") -> list[RuleTerm]:
    """The terms of the rule that apply at the source's frequency, one per (effect, group)."""
    rule = summation_rule(standard, tier)
    f = src.freq_hz
    groups: dict = {}
    for t in rule.terms:
        if t.kind == kind:
            groups.setdefault((t.effect, t.group or t.quantity), []).append(t)
    out = []
    for key, terms in groups.items():
        term = next((t for t in sorted(terms, key=lambda t: t.f_lo_hz) if t.f_lo_hz <= f <= t.f_hi_hz), None)
        if term is None:
            continue
        level = reference_level(standard, tier, f, kind)
        q, n = term.quantity, term.exponent
        if term.divisor == "formula":
            a, b, unit = term.formula
            div = a * (f / _UNIT_HZ[unit]) ** b
        else:
            div = {"e": level.e_v_per_m, "h": level.h_a_per_m, "s": level.s_w_per_m2}[q]
            if div is None and q == "s" and level.e_v_per_m is not None:
                q, n, div = "e", 2, level.e_v_per_m      # no S level: (E/E_L)^2, as exposure.py does
        if div is None:
            continue
        s_eq = {"s": div, "e": div * div / Z0_OHM, "h": Z0_OHM * div * div}[q]
        power = n if q == "s" else n / 2.0
        out.append(RuleTerm(src.name, key, q, n, float(div), float(s_eq), float(power), level.status))
    if not out:
        raise PredictionError(f"source {src.name!r}: {standard} {tier} has no {kind} summation term "
                              f"at {f / 1e6:g} MHz")
    return out


@dataclass(frozen=True)
class ExposurePrediction:
    """Total exposure ratio at points (1.0 = 100 % of the reference level in the rule's terms)."""

    standard: str
    tier: str
    total: np.ndarray            # the largest of the rule's sums at each point
    sums: dict                   # (effect, group) -> array
    per_source: np.ndarray | None  # (n_sources, ...) each source's ratio in the governing sum's terms
    terms: tuple[RuleTerm, ...]
    cylindrical: np.ndarray      # True where any source used the cylindrical model
    messages: tuple[str, ...]
    rule_source: str
    status: str


def _prepare(sources, standard: str, tier: str, ground_factor: float):
    """Checked sources, each one's rule terms and the notes that go with them (once per request)."""
    sources = [check_source(s) for s in sources]
    if not sources:
        raise PredictionError("no sources declared")
    if not (math.isfinite(ground_factor) and ground_factor >= 1.0):
        raise PredictionError(f"ground factor must be >= 1, got {ground_factor!r}")
    src_terms, msgs = [], []
    for src in sources:
        try:
            src_terms.append(rule_terms(src, standard, tier))
        except MeterlinkError as exc:
            raise PredictionError(f"source {src.name!r}: {exc}") from None
        if src.freq_hz < PLANE_WAVE_FROM_HZ:
            msgs.append(f"{src.name}: below 30 MHz the prediction is a plane-wave equivalent; "
                        "close to the antenna E and H must be assessed separately")
    return sources, src_terms, msgs


def predict_exposure(sources, x_m, y_m, z_m, *, standard: str, tier: str, ground_factor: float = 1.0,
                     keep_sources: bool = False, min_distance_m: float = 0.1, _prepared=None) -> ExposurePrediction:
    """Sum every source's predicted exposure ratio at points by the standard's summation rule.

    Each source is compared with the reference level at its own frequency; the total is the
    largest of the rule's sums (each must stay at or below 1)."""
    sources, src_terms, msgs = _prepared or _prepare(sources, standard, tier, ground_factor)
    shape = np.broadcast(np.asarray(x_m), np.asarray(y_m), np.asarray(z_m)).shape
    sums: dict = {}
    per_src = np.zeros((len(sources),) + shape) if keep_sources else None
    cyl_any = np.zeros(shape, dtype=bool)
    all_terms, statuses = [], set()
    for i, (src, terms) in enumerate(zip(sources, src_terms)):
        s, _, cyl, _ = _source_s(src, x_m, y_m, z_m, ground_factor, min_distance_m)
        cyl_any |= cyl
        done: dict = {}
        for t in terms:
            ratio = done.get((t.s_equiv_w_per_m2, t.power))   # groups often share a divisor
            if ratio is None:
                ratio = s * (1.0 / t.s_equiv_w_per_m2)
                if t.power != 1.0:
                    ratio = ratio ** t.power
                done[(t.s_equiv_w_per_m2, t.power)] = ratio
            acc = sums.get(t.group)
            if acc is None:
                sums[t.group] = np.array(ratio, dtype=float, copy=True)
            else:
                acc += ratio
            all_terms.append(t)
            statuses.add(t.level_status)
    arrays = [np.broadcast_to(v, shape) for v in sums.values()]
    total = arrays[0].copy()
    for a in arrays[1:]:
        np.maximum(total, a, out=total)
    if keep_sources:
        gov = np.argmax(np.stack(arrays), axis=0)
        keys = list(sums)
        for i, (src, terms) in enumerate(zip(sources, src_terms)):
            s, _, _, _ = _source_s(src, x_m, y_m, z_m, ground_factor, min_distance_m)
            for t in terms:
                r = (s / t.s_equiv_w_per_m2) ** t.power
                per_src[i] = np.where(gov == keys.index(t.group), r, per_src[i])
    rule = summation_rule(standard, tier)
    status = f"levels: {'; '.join(sorted(statuses))}; summation rule: {rule.status}"
    return ExposurePrediction(standard, tier, total, sums, per_src, tuple(all_terms), cyl_any,
                              tuple(msgs), rule.source, status)


# ----------------------------------------------------------------------------- distances, EIRP


@dataclass(frozen=True)
class ComplianceDistance:
    """Main-beam distance beyond which one source alone stays at or below the target ratio."""

    source: str
    standard: str
    tier: str
    distance_m: float
    model: str                   # FAR_FIELD or CYLINDRICAL
    s_target_w_per_m2: float     # power density that gives the target ratio
    target_ratio: float
    ground_factor: float
    level_status: str


def _governing(src: Source, standard: str, tier: str, target_ratio: float) -> tuple[float, RuleTerm]:
    """The lowest power density that reaches target_ratio in any sum of the rule."""
    best = None
    for t in rule_terms(src, standard, tier):
        s = t.s_equiv_w_per_m2 * target_ratio ** (1.0 / t.power)
        if best is None or s < best[0]:
            best = (s, t)
    return best


def compliance_distance(src: Source, *, standard: str, tier: str, ground_factor: float = 1.0,
                        target_ratio: float = 1.0) -> ComplianceDistance:
    """Distance in the main beam at which the source reaches target_ratio of the limit:
    far field r = sqrt(F*EIRP/(4*pi*S_t)); the cylindrical model inside its transition distance."""
    check_source(src)
    if not (math.isfinite(target_ratio) and target_ratio > 0):
        raise PredictionError(f"target ratio must be positive, got {target_ratio!r}")
    s_t, term = _governing(src, standard, tier, target_ratio)
    d = float(far_field_distance_for_s_m(src.eirp_w, s_t, ground_factor))
    model = FAR_FIELD
    if src.array_length_m is not None:
        bw = src.pattern.h_beamwidth_deg if src.pattern is not None else 360.0
        r_t = transition_distance_m(src.gain_lin, src.array_length_m, bw)
        if d < r_t:
            d = float(ground_factor * cylindrical_s(src.power_w, 1.0, src.array_length_m, bw) / s_t)
            model = CYLINDRICAL
    return ComplianceDistance(src.name, standard, tier, d, model, s_t, target_ratio, ground_factor,
                              term.level_status)


def max_eirp_w(distance_m: float, freq_hz: float, *, standard: str, tier: str, ground_factor: float = 1.0,
               target_ratio: float = 1.0) -> float:
    """The largest main-beam EIRP (W) that keeps a point at distance_m at target_ratio of the
    limit, far-field model: EIRP = 4*pi*d^2*S_t/F (the inverse of the compliance distance)."""
    if not (math.isfinite(distance_m) and distance_m > 0):
        raise PredictionError(f"distance must be positive, got {distance_m!r}")
    probe = Source("probe", 1.0, 0.0, float(freq_hz))
    check_source(probe)
    s_t, _ = _governing(probe, standard, tier, target_ratio)
    return 4.0 * math.pi * distance_m ** 2 * s_t / ground_factor


# ----------------------------------------------------------------------------- K.52


K52_INHERENT = "inherently compliant"
K52_NORMAL = "normally compliant"
K52_PROVISIONAL = "provisionally compliant"


@dataclass(frozen=True)
class K52Class:
    """ITU-T K.52 installation category of one source, the numbers it rests on and why."""

    source: str
    category: str
    reason: str
    eirp_w: float
    public_distance_m: float
    occupational_distance_m: float
    public_access_m: float
    source_doc: str = K52_SOURCE


def k52_class(src: Source, *, standard: str, public_access_m: float | None = None,
              inherent_eirp_w: float | None = None, ground_factor: float = 1.0) -> K52Class:
    """Installation category after ITU-T K.52 Annex B, decided on declared numbers:

    inherently compliant where the EIRP is at most the declared threshold for inherently
    compliant sources (inherent_eirp_w, from the K.52 table the user applies); normally
    compliant where the public compliance distance in the main beam does not reach the nearest
    point the public can access (public_access_m; default the antenna height less 2 m, i.e.
    head height directly below, which is conservative); else provisionally compliant:
    compliance needs measures (barriers, signs, restricted access) or a detailed assessment."""
    check_source(src)
    pub = compliance_distance(src, standard=standard, tier="public", ground_factor=ground_factor)
    occ = compliance_distance(src, standard=standard, tier="occupational", ground_factor=ground_factor)
    access = max(0.0, src.height_m - 2.0) if public_access_m is None else float(public_access_m)
    if not (math.isfinite(access) and access >= 0):
        raise PredictionError(f"public access distance must be >= 0, got {public_access_m!r}")
    if inherent_eirp_w is not None and src.eirp_w <= inherent_eirp_w:
        cat = K52_INHERENT
        why = f"EIRP {src.eirp_w:.3g} W <= declared threshold {inherent_eirp_w:.3g} W"
    elif pub.distance_m <= access:
        cat = K52_NORMAL
        why = (f"public compliance distance {pub.distance_m:.3g} m <= nearest public access "
               f"{access:.3g} m: the exceedance zone is not normally accessible")
    else:
        cat = K52_PROVISIONAL
        why = (f"public compliance distance {pub.distance_m:.3g} m > nearest public access {access:.3g} m: "
               "compliance needs access restriction, signs or a detailed assessment")
    return K52Class(src.name, cat, why, src.eirp_w, pub.distance_m, occ.distance_m, access)


# ----------------------------------------------------------------------------- grids


#: Grid points per block in exposure_grid: a few arrays of this many doubles fit a core's L2 cache.
_BLOCK_POINTS = 16384


@dataclass(frozen=True)
class ExposureGrid:
    """Percent of the reference level (power terms, summed by the rule) on a horizontal grid."""

    x_m: np.ndarray              # (nx,) east of the origin
    y_m: np.ndarray              # (ny,) north of the origin
    z_m: float                   # height of the grid above ground
    percent: np.ndarray          # (ny, nx)
    standard: str
    tier: str
    ground_factor: float
    status: str
    messages: tuple[str, ...]
    cylindrical_fraction: float  # share of grid points where the cylindrical model was used


def exposure_grid(sources, *, standard: str, tier: str, half_width_m: float, step_m: float,
                  z_m: float = 1.5, center=(0.0, 0.0), ground_factor: float = 1.0) -> ExposureGrid:
    """Predicted percent of the reference level on a square grid around center, at height z_m.

    The same model and sum as predict_exposure at every grid point, computed by _GridKernel: in
    blocks of rows that stay in the CPU cache, into reused buffers, with the constants of each
    source folded together and the work a block cannot need skipped (see _GridKernel)."""
    if not (math.isfinite(half_width_m) and half_width_m > 0 and math.isfinite(step_m) and step_m > 0):
        raise PredictionError("grid half width and step must be positive")
    n = int(round(2 * half_width_m / step_m)) + 1
    if n > 4001:
        raise PredictionError(f"grid of {n} x {n} points is too large (at most 4001 per side)")
    x = center[0] + np.linspace(-half_width_m, half_width_m, n)
    y = center[1] + np.linspace(-half_width_m, half_width_m, n)
    percent = np.empty((n, n))
    prepared = _prepare(sources, standard, tier, ground_factor)
    srcs, src_terms, msgs = prepared
    rows = max(1, _BLOCK_POINTS // n)   # blocks of rows whose temporaries stay in the CPU cache
    kern = _GridKernel(srcs, src_terms, x, y, float(z_m), ground_factor, rows)
    n_cyl = 0
    for i in range(0, n, rows):
        n_cyl += kern.block(i, percent[i:i + rows])
    return ExposureGrid(x, y, float(z_m), percent, standard, tier, ground_factor,
                        _status(src_terms, standard, tier), tuple(msgs), n_cyl / percent.size)


class _GridKernel:
    """predict_exposure's model and sum on blocks of a horizontal grid, with fewer passes over memory.

    What depends on x only or on y only (offsets from each source, their squares, their parts
    along and across its boresight) is computed once per source for the whole grid; per block, the
    horizontal distance squared is one pass (a row plus a column); the floor on the distance is
    applied only when the block comes near it (its smallest distance is the sum of its smallest dx^2
    and dy^2); the pattern attenuation is kept in natural-log units, so that the gain, the EIRP, the
    ground factor and the divisor of the rule fold into one exp(ln K - att) / r^2; the cylindrical
    model is computed only for blocks that reach into its zone. Every block works in the same few
    buffers. The results equal predict_exposure's to rounding."""

    def __init__(self, sources, src_terms, x, y, z_m: float, ground_factor: float, rows: int,
                 min_distance_m: float = 0.1):
        self.z, self.gf, self.md = z_m, ground_factor, min_distance_m
        shape = (rows, x.size)
        self.b_rh2, self.b_r2, self.b_u, self.b_att, self.b_off = (np.empty(shape) for _ in range(5))
        self.src = []
        self.groups: list = []
        for src, terms in zip(sources, src_terms):
            s_eq0 = terms[0].s_equiv_w_per_m2
            adds = []
            for t in terms:
                if t.group not in self.groups:
                    self.groups.append(t.group)
                adds.append((self.groups.index(t.group), s_eq0 / t.s_equiv_w_per_m2, t.power))
            a0 = math.radians(src.azimuth_deg)
            sa, ca = math.sin(a0), math.cos(a0)
            dx, dy = (x - src.x_m)[None, :], (y - src.y_m)[:, None]
            dx2, dy2 = dx * dx, dy * dy
            axes = {"dx": dx, "dy": dy, "dx2": dx2, "dy2": dy2, "dx2_min": float(dx2.min()),
                    "dxs": dx * sa, "dxc": dx * ca, "dyc": dy * ca, "dys": dy * -sa,
                    "zx": np.flatnonzero(dx.ravel() == 0.0), "zy": dy.ravel() == 0.0}
            self.src.append((src, s_eq0, adds, axes))

    def block(self, i0: int, out) -> int:
        """Percent of the rule's largest sum into out (rows i0.. of the grid); returns the
        cylindrical points."""
        rows = out.shape[0]
        sums: list = [None] * len(self.groups)
        n_cyl = 0
        for src, s_eq0, adds, axes in self.src:
            e, nc = self._ratio(src, s_eq0, axes, slice(i0, i0 + rows), rows)
            n_cyl += nc
            for gi, scale, power in adds:
                r = e if scale == 1.0 and power == 1.0 else (e * scale if power == 1.0 else (e * scale) ** power)
                if sums[gi] is None:
                    sums[gi] = r.copy() if r is e else r
                else:
                    sums[gi] += r
        tot = sums[0]
        for a in sums[1:]:
            np.maximum(tot, a, out=tot)
        np.multiply(tot, 100.0, out=out)
        return n_cyl

    def _ratio(self, src, s_eq0, axes, sl, rows):
        """One source's S / s_eq0 on the block (a view of a reused buffer) and its cylindrical points."""
        dx, dx2, dy, dy2 = axes["dx"], axes["dx2"], axes["dy"][sl], axes["dy2"][sl]
        dz = self.z - src.height_m
        dz2 = dz * dz
        dy2_min = float(dy2.min())
        rh2 = np.add(dx2, dy2, out=self.b_rh2[:rows])
        r2 = np.add(rh2, dz2, out=self.b_r2[:rows])
        md2 = self.md * self.md
        if dz2 + axes["dx2_min"] + dy2_min < md2:
            np.maximum(r2, md2, out=r2)
        k = self.gf * src.eirp_w / (4.0 * math.pi) / s_eq0
        pat = src.pattern
        if pat is None:
            e = np.divide(k, r2, out=self.b_att[:rows])
        else:
            e = self._pattern(pat, axes, sl, dz, rh2, rows)       # attenuation, log units
            np.subtract(math.log(k), e, out=e)
            np.exp(e, out=e)
            np.divide(e, r2, out=e)
        n_cyl = 0
        if src.array_length_m is not None and abs(dz) <= src.array_length_m / 2.0:
            bw = pat.h_beamwidth_deg if pat is not None else 360.0
            r_t = transition_distance_m(src.gain_lin, src.array_length_m, bw)
            if max(math.sqrt(axes["dx2_min"] + dy2_min), self.md) < r_t:   # the block reaches the zone
                rh = np.maximum(np.sqrt(dx2 + dy2), self.md)
                cyl = rh < r_t
                if bw < 360.0:
                    cyl &= np.abs(((np.degrees(np.arctan2(dx, dy)) - src.azimuth_deg) + 180.0) % 360.0 - 180.0) \
                        <= bw / 2.0
                if cyl.any():
                    s_cyl = self.gf * cylindrical_s(src.power_w, rh, src.array_length_m, bw) / s_eq0
                    np.copyto(e, s_cyl, where=cyl)
                    n_cyl = int(np.count_nonzero(cyl))
        return e, n_cyl

    def _pattern(self, pat, axes, sl, dz, rh2, rows):
        """_pattern_factor's attenuation times ln(10)/10 (so that exp(-att) is the gain factor), into a buffer."""
        c = _LN10_10
        ftb = c * pat.front_to_back_db
        att = self.b_att[:rows]
        have = False
        mech = pat.v_beamwidth_deg is not None and bool(pat.mechanical_tilt_deg)
        u = None
        if pat.h_beamwidth_deg < 360.0 or mech:
            u = np.add(axes["dxs"], axes["dyc"][sl], out=self.b_u[:rows])        # along the boresight
        if pat.h_beamwidth_deg < 360.0:
            np.add(axes["dxc"], axes["dys"][sl], out=att)                        # to its right
            np.arctan2(att, u, out=att)
            np.square(att, out=att)
            np.multiply(att, c * 12.0 / math.radians(pat.h_beamwidth_deg) ** 2, out=att)
            np.minimum(att, ftb, out=att)
            have = True
        if pat.v_beamwidth_deg is not None:
            rh = np.sqrt(rh2, out=self.b_off[:rows] if mech else rh2)    # rh2 is not needed after this
            # arctan2(dz, rh) with rh >= 0 is arctan(dz / rh) (+-pi/2 at rh = 0): half the time of
            # numpy's arctan2 with a scalar first argument
            with np.errstate(invalid="ignore", divide="ignore"):
                off = np.divide(dz, rh, out=rh2)
                np.arctan(off, out=off)
                cos_az = np.divide(u, rh, out=u) if mech else None
            zx, zy = axes["zx"], np.flatnonzero(axes["zy"][sl])
            if zx.size and zy.size:                  # straight below or above the antenna
                at = np.ix_(zy, zx)
                if dz == 0.0:
                    off[at] = 0.0                    # arctan2(0, 0)
                if mech:
                    cos_az[at] = 1.0                 # as if in front (predict_exposure's rule)
            if pat.electrical_tilt_deg:
                off += math.radians(pat.electrical_tilt_deg)
            if mech:
                np.multiply(cos_az, math.radians(pat.mechanical_tilt_deg), out=cos_az)
                off += cos_az
            np.square(off, out=off)
            np.multiply(off, c * 12.0 / math.radians(pat.v_beamwidth_deg) ** 2, out=off)
            np.minimum(off, c * pat.side_lobe_db, out=off)
            if have:
                att += off
            else:
                np.copyto(att, off)
                have = True
        if not have:
            att.fill(0.0)
        np.minimum(att, ftb, out=att)
        return att


def _status(src_terms, standard: str, tier: str) -> str:
    statuses = {t.level_status for terms in src_terms for t in terms}
    rule = summation_rule(standard, tier)
    return f"levels: {'; '.join(sorted(statuses))}; summation rule: {rule.status}"
