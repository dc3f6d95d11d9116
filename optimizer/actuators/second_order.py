"""Second-order torque loop: ωn² / (s² + 2ζωn s + ωn²)."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from .base import MAX_DAMPING_RATIO, MAX_MODEL_HZ, check_positive_finite

__all__ = [
    "SecondOrder",
]


@dataclass(frozen=True)
class SecondOrder:
    """Second-order model with natural frequency ``natural_hz`` [Hz] and damping ratio ζ."""

    natural_hz: float
    """Undamped natural frequency [Hz]."""
    damping_ratio: float
    """Damping ratio ζ [-], > 0."""
    kind: ClassVar[str] = "second_order"
    units: ClassVar[dict[str, str]] = {"natural_hz": "Hz", "damping_ratio": "-"}

    def __post_init__(self) -> None:
        check_positive_finite(self.natural_hz, "natural_hz", MAX_MODEL_HZ)
        check_positive_finite(self.damping_ratio, "damping_ratio", MAX_DAMPING_RATIO)

    def continuous(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        w = 2.0 * math.pi * self.natural_hz
        z = self.damping_ratio
        A = np.array([[0.0, 1.0], [-w * w, -2.0 * z * w]])
        return A, np.array([[0.0], [w * w]]), np.array([[1.0, 0.0]])

    def bandwidth_hz(self) -> float:
        """−3 dB frequency, ωBW = ωn √(1 − 2ζ² + √(4ζ⁴ − 4ζ² + 2))."""
        z2 = self.damping_ratio**2
        return self.natural_hz * math.sqrt(
            1.0 - 2.0 * z2 + math.sqrt(4.0 * z2 * z2 - 4.0 * z2 + 2.0)
        )

    def fastest_hz(self) -> float:
        return max(self.natural_hz, self.bandwidth_hz())

    def describe(self) -> str:
        return f"2nd order {self.natural_hz:g} Hz ζ {self.damping_ratio:g}"

    def scaled(self, factor: float) -> SecondOrder:
        return SecondOrder(self.natural_hz * factor, self.damping_ratio)

    def damping(self) -> float | None:
        return float(self.damping_ratio)

    def with_damping(self, zeta: float) -> SecondOrder:
        return SecondOrder(self.natural_hz, zeta)
