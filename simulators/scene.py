"""Scenes the simulated meter sits in: an invented broadcast site, or (later) a lab with a known field.

Pure numpy. A scene answers field(t_s) -> (freq_hz (n,), e_axes_v_per_m (n, 3)): the RMS field of
each source resolved on the probe's three axes at scene time t_s.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Protocol

import numpy as np

from meterlink.physics.units import Z0_OHM

ERP_TO_EIRP = 1.64  # half-wave dipole gain over isotropic (2.15 dBi), the usual ERP -> EIRP factor
MIN_DISTANCE_M = 1.0  # the far-field formula is meaningless closer than this; clamp


class Scene(Protocol):
    """Anything that gives per-source fields on the probe axes at a scene time."""

    def field(self, t_s: float) -> tuple[np.ndarray, np.ndarray]: ...


def free_space_field_v_per_m(eirp_w, distance_m):
    """Far-field RMS E = sqrt(Z0 * EIRP / (4 pi)) / d (about sqrt(30 EIRP)/d)."""
    return np.sqrt(Z0_OHM * np.asarray(eirp_w, dtype=float) / (4 * math.pi)) / np.maximum(distance_m, MIN_DISTANCE_M)


def traffic_factor(time_of_day_h: float) -> float:
    """Power fraction of a cellular carrier over the day: 0.25 at 04:00 rising to 1 at 16:00."""
    return 0.25 + 0.75 * (0.5 - 0.5 * math.cos(2 * math.pi * (time_of_day_h - 4.0) / 24.0))


def rotation_matrix(yaw_deg: float, pitch_deg: float, roll_deg: float) -> np.ndarray:
    """Columns are the probe's X, Y, Z axes in site coordinates (R = Rz(yaw) Ry(pitch) Rx(roll))."""
    a, b, c = (math.radians(v) for v in (yaw_deg, pitch_deg, roll_deg))
    rz = np.array([[math.cos(a), -math.sin(a), 0], [math.sin(a), math.cos(a), 0], [0, 0, 1]])
    ry = np.array([[math.cos(b), 0, math.sin(b)], [0, 1, 0], [-math.sin(b), 0, math.cos(b)]])
    rx = np.array([[1, 0, 0], [0, math.cos(c), -math.sin(c)], [0, math.sin(c), math.cos(c)]])
    return rz @ ry @ rx


def polarisation_unit(k_unit: np.ndarray, polarisation: str) -> np.ndarray:
    """Unit E direction transverse to the propagation direction k for a named polarisation."""
    z = np.array([0.0, 0.0, 1.0])
    v = z - np.dot(z, k_unit) * k_unit
    if np.linalg.norm(v) < 1e-9:  # straight above/below: any transverse direction
        v = np.array([1.0, 0.0, 0.0]) - k_unit[0] * k_unit
    v /= np.linalg.norm(v)
    h = np.cross(k_unit, v)
    if polarisation == "vertical":
        return v
    if polarisation == "horizontal":
        return h
    if polarisation == "slant":
        return (v + h) / math.sqrt(2)
    raise ValueError(f"unknown polarisation {polarisation!r}")


@dataclass(frozen=True)
class Transmitter:
    """One emitter of the site; erp_w is the busy-hour value for 'traffic' carriers."""

    name: str
    freq_hz: float
    erp_w: float
    position_m: tuple[float, float, float]
    polarisation: str
    technology: str
    profile: str = "constant"


@dataclass(frozen=True)
class Excursion:
    """A scheduled window where one transmitter's power is multiplied by factor."""

    transmitter: str
    start_s: float
    end_s: float
    factor: float


@dataclass(frozen=True)
class Path:
    """Probe position over time: waypoints (t_s, x, y, z), linear in between, held at the ends."""

    t_s: np.ndarray
    xyz_m: np.ndarray

    @classmethod
    def fixed(cls, xyz) -> "Path":
        return cls(np.array([0.0]), np.asarray([xyz], dtype=float))

    @classmethod
    def from_waypoints(cls, rows) -> "Path":
        a = np.asarray(rows, dtype=float)
        if a.ndim != 2 or a.shape[1] != 4 or np.any(np.diff(a[:, 0]) <= 0):
            raise ValueError("path rows are [t_s, x, y, z] with increasing t_s")
        return cls(a[:, 0], a[:, 1:])

    def position(self, t_s: float) -> np.ndarray:
        return np.array([np.interp(t_s, self.t_s, self.xyz_m[:, i]) for i in range(3)])


@dataclass(frozen=True)
class SiteScene:
    """Free-space far field of a set of transmitters seen by a probe moving along a path."""

    transmitters: tuple[Transmitter, ...]
    path: Path
    orientation_deg: tuple[float, float, float] = (0.0, 0.0, 0.0)
    excursions: tuple[Excursion, ...] = ()
    start_time_of_day_h: float = 0.0

    def power_factor(self, tx: Transmitter, t_s: float) -> float:
        """Fraction of the nominal ERP radiated at t_s (daily profile times any excursion)."""
        f = traffic_factor(self.start_time_of_day_h + t_s / 3600.0) if tx.profile == "traffic" else 1.0
        for ex in self.excursions:
            if ex.transmitter == tx.name and ex.start_s <= t_s < ex.end_s:
                f *= ex.factor
        return f

    def source_fields(self, t_s: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(freq_hz (n,), e_world (n, 3) RMS field vectors, position (3,)) at t_s."""
        p = self.path.position(t_s)
        freq = np.array([tx.freq_hz for tx in self.transmitters])
        e = np.zeros((len(self.transmitters), 3))
        for i, tx in enumerate(self.transmitters):
            r = p - np.asarray(tx.position_m)
            d = float(np.linalg.norm(r))
            k = r / d if d > 0 else np.array([1.0, 0.0, 0.0])
            mag = free_space_field_v_per_m(ERP_TO_EIRP * tx.erp_w * self.power_factor(tx, t_s), d)
            e[i] = mag * polarisation_unit(k, tx.polarisation)
        return freq, e, p

    def field(self, t_s: float) -> tuple[np.ndarray, np.ndarray]:
        freq, e, _ = self.source_fields(t_s)
        return freq, e @ rotation_matrix(*self.orientation_deg)


@dataclass(frozen=True)
class LabScene:
    """Placeholder for a lab: one known applied field, the probe turned by a rotator about its Z axis."""

    freq_hz: float
    e_v_per_m: float
    direction_world: tuple[float, float, float] = (1.0, 0.0, 0.0)
    rotator_deg_per_s: float = 0.0
    tilt_deg: tuple[float, float] = (0.0, 0.0)  # pitch, roll of the probe on the rotator

    def field(self, t_s: float) -> tuple[np.ndarray, np.ndarray]:
        u = np.asarray(self.direction_world, dtype=float)
        u = u / np.linalg.norm(u)
        r = rotation_matrix(self.rotator_deg_per_s * t_s, *self.tilt_deg)
        return np.array([self.freq_hz]), (self.e_v_per_m * u)[None, :] @ r
