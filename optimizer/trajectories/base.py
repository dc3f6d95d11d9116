"""Sampled task-space references and the helpers trajectory kinds share."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Protocol

import numpy as np

__all__ = [
    "Reference",
    "TrajectoryKind",
    "axis_angle_matrices",
    "no_rotation",
    "smooth_phase",
    "unit",
]


@dataclass(frozen=True)
class Reference:
    """A task-space reference sampled at every control tick (world frame)."""

    name: str
    """Trajectory name from the problem file."""
    t: np.ndarray
    """Tick times (N,) [s]."""
    p: np.ndarray
    """Desired tip position (N, 3) [m]."""
    R: np.ndarray
    """Desired tip rotation (N, 3, 3)."""
    twist: np.ndarray
    """Desired tip twist (N, 6): [linear m/s; angular rad/s], world axes."""
    acc: np.ndarray
    """Desired tip acceleration (N, 6): [m/s²; rad/s²], world axes."""

    def __post_init__(self) -> None:
        for name in ("t", "p", "R", "twist", "acc"):
            arr = np.ascontiguousarray(getattr(self, name), dtype=float).copy()
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)

    @property
    def peak_speed(self) -> float:
        """Largest tip speed [m/s]."""
        return float(np.max(np.linalg.norm(self.twist[:, :3], axis=1)))

    @property
    def peak_rate(self) -> float:
        """Largest tip angular rate [rad/s]."""
        return float(np.max(np.linalg.norm(self.twist[:, 3:], axis=1)))


class TrajectoryKind(Protocol):
    """A trajectory kind: parameters are dataclass fields, ``sample`` evaluates them."""

    kind: ClassVar[str]

    def offsets(
        self, t: np.ndarray, R0: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None, np.ndarray, np.ndarray]:
        """Position offset, velocity, acceleration (N, 3) and rotation offset.

        Returns ``(dp, dv, da, dR, w, dw)``: ``dR`` (N, 3, 3) multiplies the start
        rotation from the left (world axes), or is ``None`` for no rotation;
        ``w``/``dw`` are the angular velocity and acceleration (N, 3) in world axes.
        """
        ...


def smooth_phase(
    t: np.ndarray, omega: float, ramp_s: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Phase θ(t), θ̇, θ̈ whose rate ramps from 0 to ``omega`` [rad/s] over ``ramp_s``.

    The rate follows the quintic smoothstep s(τ) = 10τ³ − 15τ⁴ + 6τ⁵, so the
    reference starts at rest with zero acceleration.
    """
    if ramp_s <= 0.0:
        return omega * t, np.full_like(t, omega), np.zeros_like(t)
    tau = np.clip(t / ramp_s, 0.0, 1.0)
    s = 10 * tau**3 - 15 * tau**4 + 6 * tau**5
    ds = (30 * tau**2 - 60 * tau**3 + 30 * tau**4) / ramp_s
    integral = np.where(
        t < ramp_s, ramp_s * (2.5 * tau**4 - 3 * tau**5 + tau**6), 0.5 * ramp_s + (t - ramp_s)
    )
    return omega * integral, omega * s, omega * np.where(t < ramp_s, ds, 0.0)


def unit(v: tuple[float, ...] | np.ndarray, name: str) -> np.ndarray:
    """Return ``v`` normalised; raise ValueError for a zero or non-3 vector."""
    a = np.asarray(v, dtype=float)
    if a.shape != (3,) or not np.all(np.isfinite(a)) or np.linalg.norm(a) < 1e-12:
        raise ValueError(f"{name} must be a non-zero 3-vector, got {list(np.atleast_1d(a))}")
    return a / np.linalg.norm(a)


def no_rotation(n: int) -> tuple[None, np.ndarray, np.ndarray]:
    return None, np.zeros((n, 3)), np.zeros((n, 3))


def axis_angle_matrices(axis: np.ndarray, angle: np.ndarray) -> np.ndarray:
    """Rodrigues' formula for many angles about one unit axis: (N, 3, 3)."""
    K = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
    s = np.sin(angle)[:, None, None]
    c = np.cos(angle)[:, None, None]
    return np.eye(3)[None] + s * K[None] + (1.0 - c) * (K @ K)[None]
