"""Hold, min-jerk line, circle, sinusoid along an axis, rotation about an axis."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from .base import axis_angle_matrices, no_rotation, smooth_phase, unit

__all__ = [
    "Circle",
    "Hold",
    "Line",
    "Offsets",
    "Rotate",
    "Sine",
]

Offsets = tuple[np.ndarray, np.ndarray, np.ndarray, "np.ndarray | None", np.ndarray, np.ndarray]


def _zeros3(n: int) -> np.ndarray:
    return np.zeros((n, 3))


def _check_positive(value: float, name: str) -> None:
    if not (np.isfinite(value) and value > 0.0):
        raise ValueError(f"{name} must be a positive finite number, got {value!r}")


def _check_nonneg(value: float, name: str) -> None:
    if not (np.isfinite(value) and value >= 0.0):
        raise ValueError(f"{name} must be finite and >= 0, got {value!r}")


@dataclass(frozen=True)
class Hold:
    """Hold the start pose (regulation against gravity, payload and noise)."""

    kind: ClassVar[str] = "hold"

    def offsets(self, t: np.ndarray, R0: np.ndarray) -> Offsets:
        n = len(t)
        return (_zeros3(n), _zeros3(n), _zeros3(n), *no_rotation(n))


@dataclass(frozen=True)
class Line:
    """Min-jerk point-to-point move by ``delta_m`` over ``move_s``, then hold."""

    delta_m: tuple[float, float, float]
    """Displacement of the tip, world axes [m]."""
    move_s: float
    """Time of the move [s]."""
    start_s: float = 0.0
    """Time the move starts [s]."""
    kind: ClassVar[str] = "line"

    def __post_init__(self) -> None:
        if len(self.delta_m) != 3 or not np.all(np.isfinite(self.delta_m)):
            raise ValueError(f"delta_m must be 3 finite numbers, got {list(self.delta_m)}")
        _check_positive(self.move_s, "move_s")
        _check_nonneg(self.start_s, "start_s")

    def offsets(self, t: np.ndarray, R0: np.ndarray) -> Offsets:
        tau = np.clip((t - self.start_s) / self.move_s, 0.0, 1.0)
        inside = ((t >= self.start_s) & (t <= self.start_s + self.move_s)).astype(float)
        s = 10 * tau**3 - 15 * tau**4 + 6 * tau**5
        ds = inside * (30 * tau**2 - 60 * tau**3 + 30 * tau**4) / self.move_s
        dds = inside * (60 * tau - 180 * tau**2 + 120 * tau**3) / self.move_s**2
        d = np.asarray(self.delta_m, dtype=float)
        return (s[:, None] * d, ds[:, None] * d, dds[:, None] * d, *no_rotation(len(t)))


@dataclass(frozen=True)
class Circle:
    """Circle of ``radius_m`` through the start point, in the plane normal to ``normal``."""

    radius_m: float
    """Circle radius [m]."""
    frequency_hz: float
    """Laps per second once up to speed [Hz]."""
    normal: tuple[float, float, float] = (1.0, 0.0, 0.0)
    """Plane normal, world axes [-]."""
    ramp_s: float = 0.5
    """Time to come up to speed from rest [s]."""
    kind: ClassVar[str] = "circle"

    def __post_init__(self) -> None:
        _check_positive(self.radius_m, "radius_m")
        _check_positive(self.frequency_hz, "frequency_hz")
        _check_nonneg(self.ramp_s, "ramp_s")
        unit(self.normal, "normal")

    def offsets(self, t: np.ndarray, R0: np.ndarray) -> Offsets:
        n_ = unit(self.normal, "normal")
        helper = np.array([0.0, 0.0, 1.0]) if abs(n_[2]) < 0.9 else np.array([1.0, 0.0, 0.0])
        u = np.cross(n_, helper)
        u /= np.linalg.norm(u)
        w = np.cross(n_, u)
        th, dth, ddth = smooth_phase(t, 2 * np.pi * self.frequency_hz, self.ramp_s)
        r = self.radius_m
        c, s = np.cos(th)[:, None], np.sin(th)[:, None]
        p = r * (c * u + s * w) - r * u
        tang = -s * u + c * w
        rad = c * u + s * w
        v = r * dth[:, None] * tang
        a = r * ddth[:, None] * tang - r * (dth**2)[:, None] * rad
        return (p, v, a, *no_rotation(len(t)))


@dataclass(frozen=True)
class Sine:
    """Sinusoid of ``amplitude_m`` along ``axis`` about the start point."""

    axis: tuple[float, float, float]
    """Direction, world axes [-]."""
    amplitude_m: float
    """Amplitude [m]."""
    frequency_hz: float
    """Frequency once up to speed [Hz]."""
    ramp_s: float = 0.5
    """Time to come up to speed from rest [s]."""
    kind: ClassVar[str] = "sine"

    def __post_init__(self) -> None:
        unit(self.axis, "axis")
        _check_positive(self.amplitude_m, "amplitude_m")
        _check_positive(self.frequency_hz, "frequency_hz")
        _check_nonneg(self.ramp_s, "ramp_s")

    def offsets(self, t: np.ndarray, R0: np.ndarray) -> Offsets:
        a = unit(self.axis, "axis")
        th, dth, ddth = smooth_phase(t, 2 * np.pi * self.frequency_hz, self.ramp_s)
        A = self.amplitude_m
        x = A * np.sin(th)
        dx = A * np.cos(th) * dth
        ddx = A * (np.cos(th) * ddth - np.sin(th) * dth**2)
        return (x[:, None] * a, dx[:, None] * a, ddx[:, None] * a, *no_rotation(len(t)))


@dataclass(frozen=True)
class Rotate:
    """Sinusoidal rotation of ``amplitude_deg`` about a fixed world ``axis`` through the tip."""

    axis: tuple[float, float, float]
    """Rotation axis, world axes [-]."""
    amplitude_deg: float
    """Amplitude [deg]."""
    frequency_hz: float
    """Frequency once up to speed [Hz]."""
    ramp_s: float = 0.5
    """Time to come up to speed from rest [s]."""
    kind: ClassVar[str] = "rotate"

    def __post_init__(self) -> None:
        unit(self.axis, "axis")
        _check_positive(self.amplitude_deg, "amplitude_deg")
        if self.amplitude_deg >= 180.0:
            raise ValueError(f"amplitude_deg must be below 180, got {self.amplitude_deg}")
        _check_positive(self.frequency_hz, "frequency_hz")
        _check_nonneg(self.ramp_s, "ramp_s")

    def offsets(self, t: np.ndarray, R0: np.ndarray) -> Offsets:
        a = unit(self.axis, "axis")
        th, dth, ddth = smooth_phase(t, 2 * np.pi * self.frequency_hz, self.ramp_s)
        A = np.deg2rad(self.amplitude_deg)
        phi = A * np.sin(th)
        dphi = A * np.cos(th) * dth
        ddphi = A * (np.cos(th) * ddth - np.sin(th) * dth**2)
        n = len(t)
        return (
            _zeros3(n),
            _zeros3(n),
            _zeros3(n),
            axis_angle_matrices(a, phi),
            dphi[:, None] * a,
            ddphi[:, None] * a,
        )
