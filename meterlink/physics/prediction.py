"""Predicted fields from declared sources: far-field power density, the cylindrical model near
collinear arrays, antenna patterns and the ground-reflection factor (pure, vectorised).

Geometry is local metres: x east, y north, z up from the ground; an azimuth is a bearing from
north, clockwise; tilt is positive downwards. Every value here is an estimate under the model
named beside it: the far-field formula overestimates close to a large antenna and the pattern
underestimates wherever the real pattern is wider than the declared one (see docs/prediction.md).
Compliance distances, maximum EIRP, exposure sums and K.52 classes are in prediction_compliance.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from meterlink.errors import MeterlinkError
from meterlink.physics.units import C_M_PER_S, Z0_OHM

#: Ground-reflection factor for power density: a reflected field adding in phase up to 1.6 times
#: the direct field, (1.6)^2 = 2.56 in power ("the EPA-recommended reflection factor", FCC OET
#: Bulletin 65, Edition 97-01, section 2, equation (7)).
OET65_GROUND_FACTOR = 1.6 ** 2
#: Power-density factor for 100 % reflection, the direct field doubled: 2^2 = 4 (OET 65,
#: equation (6)); an upper bound that OET 65 keeps for worst cases.
FULL_REFLECTION_FACTOR = 2.0 ** 2
#: Gain of a half-wave dipole over an isotropic radiator as OET 65 rounds it: EIRP = 1.64 x ERP
#: (equation (5)); 10*log10(1.64) = 2.15 dB, the usual dBi = dBd + 2.15.
DIPOLE_GAIN_LIN = 1.64
DIPOLE_GAIN_DB = 10.0 * math.log10(DIPOLE_GAIN_LIN)
#: Models reported beside every predicted value.
FAR_FIELD = "far field S = P*G/(4*pi*r^2)"
CYLINDRICAL = "cylindrical S = P*(360/bw)/(2*pi*R*L)"


class PredictionError(MeterlinkError):
    """A declared source or prediction request that cannot be evaluated (names the value)."""


@dataclass(frozen=True)
class Pattern:
    """A sector pattern: parabolic in dB about the beam axis, 3 dB down at half the beamwidth
    (12*(angle/beamwidth)^2 dB), floored at the front-to-back / side-lobe attenuation.

    h_beamwidth_deg = 360 means omnidirectional in azimuth; v_beamwidth_deg None means no
    vertical pattern (peak gain at every elevation, conservative)."""

    h_beamwidth_deg: float = 360.0
    v_beamwidth_deg: float | None = None
    electrical_tilt_deg: float = 0.0
    mechanical_tilt_deg: float = 0.0
    front_to_back_db: float = 25.0
    side_lobe_db: float = 20.0


@dataclass(frozen=True)
class Source:
    """One declared transmitter: power into the antenna, peak gain, position and pattern.

    array_length_m (the vertical aperture of a collinear array) enables the cylindrical model
    close to the antenna; without it only the far-field formula is used (conservative there)."""

    name: str
    power_w: float
    gain_dbi: float
    freq_hz: float
    x_m: float = 0.0
    y_m: float = 0.0
    height_m: float = 0.0
    azimuth_deg: float = 0.0
    pattern: Pattern | None = None
    array_length_m: float | None = None

    @property
    def gain_lin(self) -> float:
        """Peak gain as a power ratio."""
        return 10.0 ** (self.gain_dbi / 10.0)

    @property
    def eirp_w(self) -> float:
        """Equivalent isotropically radiated power P*G in the main beam, W."""
        return self.power_w * self.gain_lin

    @property
    def wavelength_m(self) -> float:
        return C_M_PER_S / self.freq_hz


def check_source(src: Source) -> Source:
    """The source itself, or a PredictionError naming the first bad value."""
    def bad(what: str, val) -> PredictionError:
        return PredictionError(f"source {src.name!r}: {what} {val!r}")

    for name, val in (("power_w", src.power_w), ("freq_hz", src.freq_hz)):
        if not (isinstance(val, (int, float)) and math.isfinite(val) and val > 0):
            raise bad(f"{name} must be a positive number, got", val)
    for name in ("gain_dbi", "x_m", "y_m", "height_m", "azimuth_deg"):
        val = getattr(src, name)
        if not (isinstance(val, (int, float)) and math.isfinite(val)):
            raise bad(f"{name} must be a finite number, got", val)
    if not -30.0 <= src.gain_dbi <= 70.0:
        raise bad("gain_dbi is outside -30..70 dBi:", src.gain_dbi)
    if src.array_length_m is not None and not (math.isfinite(src.array_length_m) and src.array_length_m > 0):
        raise bad("array_length_m must be positive, got", src.array_length_m)
    p = src.pattern
    if p is not None:
        if not (0 < p.h_beamwidth_deg <= 360):
            raise bad("h_beamwidth_deg must be in (0, 360], got", p.h_beamwidth_deg)
        if p.v_beamwidth_deg is not None and not (0 < p.v_beamwidth_deg <= 180):
            raise bad("v_beamwidth_deg must be in (0, 180], got", p.v_beamwidth_deg)
        for name in ("electrical_tilt_deg", "mechanical_tilt_deg"):
            if not -90 <= getattr(p, name) <= 90:
                raise bad(f"{name} must be within -90..90, got", getattr(p, name))
        for name in ("front_to_back_db", "side_lobe_db"):
            if not 0 <= getattr(p, name) <= 80:
                raise bad(f"{name} must be within 0..80 dB, got", getattr(p, name))
    return src


# ----------------------------------------------------------------------------- closed forms


def far_field_s(power_w, gain_lin, r_m, ground_factor: float = 1.0):
    """Far-field power density S = F*P*G/(4*pi*r^2), W/m^2 (F = 2.56 with ground reflection)."""
    r = np.asarray(r_m, dtype=float)
    return ground_factor * np.multiply(power_w, gain_lin) / (4.0 * np.pi * r * r)


def eirp_from_erp_w(erp_w):
    """EIRP from an ERP (power relative to a half-wave dipole): EIRP = 1.64 x ERP (OET 65 eq. (5))."""
    return np.multiply(erp_w, DIPOLE_GAIN_LIN)


def erp_from_eirp_w(eirp_w):
    """ERP (relative to a half-wave dipole) from an EIRP: ERP = EIRP / 1.64."""
    return np.divide(eirp_w, DIPOLE_GAIN_LIN)


def gain_dbi_from_dbd(gain_dbd):
    """Gain over isotropic from a gain over a half-wave dipole: dBi = dBd + 10*log10(1.64)."""
    return np.add(gain_dbd, DIPOLE_GAIN_DB)


def far_field_distance_for_s_m(eirp_w, s_w_per_m2, ground_factor: float = 1.0):
    """Main-beam distance where the far-field density F*EIRP/(4*pi*r^2) falls to s_w_per_m2, m:
    r = sqrt(F*EIRP/(4*pi*S)), the inverse of far_field_s."""
    return np.sqrt(np.multiply(ground_factor, eirp_w) / (4.0 * np.pi * np.asarray(s_w_per_m2, dtype=float)))


def field_from_s(s_w_per_m2):
    """Plane-wave-equivalent E = sqrt(Z0*S), V/m."""
    return np.sqrt(np.multiply(s_w_per_m2, Z0_OHM))


def cylindrical_s(power_w, r_m, array_length_m: float, h_beamwidth_deg: float = 360.0):
    """Spatially averaged S near a collinear array: the power spread over the side of a cylinder
    of radius r and height L, within the horizontal beamwidth: S = P*(360/bw)/(2*pi*r*L)."""
    r = np.asarray(r_m, dtype=float)
    return np.multiply(power_w, 360.0 / h_beamwidth_deg) / (2.0 * np.pi * r * array_length_m)


def transition_distance_m(gain_lin: float, array_length_m: float, h_beamwidth_deg: float = 360.0) -> float:
    """Distance where the cylindrical and the far-field estimates meet in the main beam:
    P*(360/bw)/(2*pi*R*L) = P*G/(4*pi*R^2) gives R = G*L*bw/720 (bw in degrees)."""
    return gain_lin * array_length_m * h_beamwidth_deg / 720.0


def rayleigh_distance_m(aperture_m: float, freq_hz: float) -> float:
    """The usual far-field criterion 2*D^2/lambda for an aperture of largest size D."""
    return 2.0 * aperture_m ** 2 * freq_hz / C_M_PER_S


def far_field_distance_m(src: Source) -> float:
    """Where the far-field formula starts to hold for a source, by common practice: beyond one
    wavelength, and beyond 2*D^2/lambda when its size D (array_length_m) is declared."""
    d = src.wavelength_m
    if src.array_length_m is not None:
        d = max(d, rayleigh_distance_m(src.array_length_m, src.freq_hz))
    return d


# ----------------------------------------------------------------------------- pattern


def _wrap_deg(a):
    """Angles folded into [-180, 180)."""
    return (np.asarray(a) + 180.0) % 360.0 - 180.0


def relative_gain_db(pattern: Pattern | None, az_off_deg, elev_deg):
    """Pattern attenuation (<= 0 dB) at an azimuth off the boresight and an elevation (up +).

    Mechanical tilt tips the whole pattern: its effect on the beam's elevation is taken as
    tilt*cos(azimuth offset) (down in front, up behind), electrical tilt is the same all round."""
    if pattern is None:
        return np.zeros(np.broadcast(np.asarray(az_off_deg), np.asarray(elev_deg)).shape)
    az = _wrap_deg(az_off_deg)
    if pattern.h_beamwidth_deg >= 360.0:
        a_h = np.zeros_like(np.asarray(az, dtype=float))
    else:
        a_h = np.minimum(12.0 * (az / pattern.h_beamwidth_deg) ** 2, pattern.front_to_back_db)
    if pattern.v_beamwidth_deg is None:
        a_v = 0.0
    else:
        tilt = pattern.electrical_tilt_deg + pattern.mechanical_tilt_deg * np.cos(np.radians(az))
        off = np.asarray(elev_deg) + tilt   # angle above the (tilted-down) beam axis
        a_v = np.minimum(12.0 * (off / pattern.v_beamwidth_deg) ** 2, pattern.side_lobe_db)
    return -np.minimum(a_h + a_v, pattern.front_to_back_db)


# ----------------------------------------------------------------------------- fields at points


@dataclass(frozen=True)
class PointPrediction:
    """Predicted S and E of one source at some points, and which model gave each value."""

    s_w_per_m2: np.ndarray
    e_v_per_m: np.ndarray
    distance_m: np.ndarray
    cylindrical: np.ndarray        # True where the cylindrical model was used
    gain_db: np.ndarray            # pattern attenuation applied (0 in the main beam)
    near: np.ndarray               # True closer than far_field_distance_m: the far-field value overestimates


def _geometry(src: Source, x_m, y_m, z_m):
    dx = np.asarray(x_m, dtype=float) - src.x_m
    dy = np.asarray(y_m, dtype=float) - src.y_m
    dz = np.asarray(z_m, dtype=float) - src.height_m
    rh2 = dx * dx + dy * dy
    return dx, dy, dz, rh2


def source_s(src: Source, x_m, y_m, z_m, ground_factor: float = 1.0, min_distance_m: float = 0.1):
    """Power density of one source at points (x, y, z), W/m^2, arrays broadcast.

    Far field with the pattern; where the source declares array_length_m, points within the
    array's vertical extent and closer than the transition distance use the cylindrical model.
    Distances below min_distance_m are raised to it (the formulas diverge at the antenna)."""
    return _source_s(src, x_m, y_m, z_m, ground_factor, min_distance_m)[0]


_LN10_10 = math.log(10.0) / 10.0


def _pattern_factor(pat: Pattern, azimuth_deg: float, dx, dy, dz, rh2):
    """(linear pattern factor, attenuation in dB >= 0) at points: relative_gain_db's model evaluated without
    wrapping or cosines (the offset comes from coordinates turned to the boresight, and the
    cosine of the azimuth offset is the along-boresight share of the horizontal distance)."""
    a0 = math.radians(azimuth_deg)
    att = 0.0
    if pat.h_beamwidth_deg < 360.0 or (pat.v_beamwidth_deg is not None and pat.mechanical_tilt_deg):
        u = dx * math.sin(a0) + dy * math.cos(a0)      # along the boresight
        v = dx * math.cos(a0) - dy * math.sin(a0)      # to its right (clockwise)
        if pat.h_beamwidth_deg < 360.0:
            az = np.arctan2(v, u)
            att = np.minimum((12.0 / math.radians(pat.h_beamwidth_deg) ** 2) * (az * az), pat.front_to_back_db)
    if pat.v_beamwidth_deg is not None:
        rh = np.sqrt(rh2)
        off = np.arctan2(dz, rh) + math.radians(pat.electrical_tilt_deg)
        if pat.mechanical_tilt_deg:
            off = off + math.radians(pat.mechanical_tilt_deg) * np.where(rh > 0, u / np.where(rh > 0, rh, 1.0), 1.0)
        att = att + np.minimum((12.0 / math.radians(pat.v_beamwidth_deg) ** 2) * (off * off), pat.side_lobe_db)
    att = np.minimum(att, pat.front_to_back_db)
    return np.exp(-_LN10_10 * att), att


def _source_s(src, x_m, y_m, z_m, ground_factor, min_distance_m):
    dx, dy, dz, rh2 = _geometry(src, x_m, y_m, z_m)
    r2 = np.maximum(rh2 + dz * dz, min_distance_m * min_distance_m)
    pat = src.pattern
    k = ground_factor * src.eirp_w / (4.0 * np.pi)
    if pat is None:
        att = 0.0
        s = k / r2
    else:
        g, att = _pattern_factor(pat, src.azimuth_deg, dx, dy, dz, rh2)
        s = k * g / r2
    cyl = np.zeros(r2.shape, dtype=bool)
    if src.array_length_m is not None:
        bw = pat.h_beamwidth_deg if pat is not None else 360.0
        r_t = transition_distance_m(src.gain_lin, src.array_length_m, bw)
        rh = np.maximum(np.sqrt(rh2), min_distance_m)
        cyl = (rh < r_t) & (np.abs(dz) <= src.array_length_m / 2.0)
        if np.any(cyl):
            if bw < 360.0:   # within the sector only; outside it the far-field pattern applies
                cyl &= np.abs(_wrap_deg(np.degrees(np.arctan2(dx, dy)) - src.azimuth_deg)) <= bw / 2.0
            s_cyl = ground_factor * cylindrical_s(src.power_w, rh, src.array_length_m, bw)
            s = np.where(cyl, s_cyl, s)
    return s, r2, cyl, att   # squared distance and attenuation: the grid path needs neither


def predict_points(src: Source, x_m, y_m, z_m, ground_factor: float = 1.0,
                   min_distance_m: float = 0.1) -> PointPrediction:
    """S, E = sqrt(Z0*S), distance, model and pattern attenuation of one source at points."""
    check_source(src)
    s, r2, cyl, att = _source_s(src, x_m, y_m, z_m, ground_factor, min_distance_m)
    r, g = np.sqrt(r2), -np.broadcast_to(np.asarray(att, dtype=float), s.shape)
    return PointPrediction(s, field_from_s(s), r, cyl, np.broadcast_to(g, s.shape).copy(),
                           r < far_field_distance_m(src))
