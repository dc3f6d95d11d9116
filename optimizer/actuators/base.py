"""What every actuator model provides, and the per-joint settings around it."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import ClassVar, Protocol

import numpy as np

__all__ = [
    "MAX_DAMPING_RATIO",
    "MAX_MODEL_HZ",
    "ActuatorModel",
    "JointActuator",
    "ModelParameterError",
    "check_positive_finite",
]


class ActuatorModel(Protocol):
    """A linear SISO model from commanded to delivered torque, unit DC gain.

    A model gives its continuous state-space ``(A, B, C)`` (no feed-through);
    the bank discretises every joint's model at once.
    """

    kind: ClassVar[str]

    def continuous(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Continuous ``(A (k, k), B (k, 1), C (1, k))`` with C(−A)⁻¹B = 1."""
        ...

    def bandwidth_hz(self) -> float:
        """Frequency where the magnitude falls 3.01 dB below DC [Hz]."""
        ...

    def fastest_hz(self) -> float:
        """Largest characteristic frequency, checked against Nyquist [Hz]."""
        ...

    def describe(self) -> str:
        """Short text: kind and parameters with units."""
        ...

    units: ClassVar[dict[str, str]]
    """Unit of each parameter, by its key in problem files (``Hz``, ``-``...)."""

    def scaled(self, factor: float) -> ActuatorModel:
        """The same model ``factor`` times faster: every frequency parameter times
        ``factor`` (its bandwidth then scales by ``factor`` exactly)."""
        ...

    def damping(self) -> float | None:
        """Its damping ratio ζ, or None for a model that has none."""
        ...

    def with_damping(self, zeta: float) -> ActuatorModel:
        """The same model with damping ratio ``zeta`` (only where ``damping()`` is not
        None)."""
        ...


#: Largest frequency [Hz] and damping ratio [-] a model takes: far beyond any torque loop,
#: and below where the model's arithmetic overflows (ζ = 1e308 did).
MAX_MODEL_HZ = 1e5
MAX_DAMPING_RATIO = 100.0


class ModelParameterError(ValueError):
    """A model parameter that is not usable: ``name`` and ``reason`` kept apart, so that a
    file reader can name the key it came from."""

    def __init__(self, name: str, reason: str) -> None:
        super().__init__(f"{name} {reason}")
        self.name = name
        self.reason = reason


def check_positive_finite(value: float, name: str, most: float = math.inf) -> float:
    """Return ``value`` as float, or raise ModelParameterError saying why it is not
    usable: it must be positive, finite and at most ``most``."""
    v = float(value)
    if not math.isfinite(v) or v <= 0.0:
        raise ModelParameterError(name, f"must be a positive finite number, got {value!r}")
    if v > most:
        raise ModelParameterError(name, f"must be at most {most:g}, got {value!r}")
    return v


@dataclass(frozen=True)
class JointActuator:
    """One joint's drive: the lag model plus delay, limits and joint friction."""

    joint: str
    """URDF joint name."""
    model: ActuatorModel
    """Torque lag from command to delivered torque."""
    delay_ticks: int = 0
    """Transport delay in whole control periods [-]."""
    effort_nm: float = math.inf
    """Saturation of the command [N·m] (or [N] for a prismatic joint)."""
    rate_limit_nm_s: float = math.inf
    """Largest change of the command per second [N·m/s]; inf for none."""
    coulomb_nm: float = 0.0
    """Coulomb friction at the joint [N·m], smoothed near zero speed."""
    viscous_nms: float = 0.0
    """Viscous friction at the joint [N·m·s/rad]."""

    def __post_init__(self) -> None:
        if self.delay_ticks < 0:
            raise ValueError(
                f"delay of joint {self.joint} must be >= 0 ticks, got {self.delay_ticks}"
            )
        if not self.effort_nm > 0.0:
            raise ValueError(
                f"effort limit of joint {self.joint} must be > 0, got {self.effort_nm}"
            )
        if not self.rate_limit_nm_s > 0.0:
            raise ValueError(
                f"rate limit of joint {self.joint} must be > 0, got {self.rate_limit_nm_s}"
            )
        for name in ("coulomb_nm", "viscous_nms"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v >= 0.0):
                raise ValueError(f"{name} of joint {self.joint} must be finite and >= 0, got {v}")
