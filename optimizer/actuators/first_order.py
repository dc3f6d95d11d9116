"""First-order torque lag: delivered/commanded = 1 / (s/ωc + 1)."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from .base import MAX_MODEL_HZ, check_positive_finite

__all__ = [
    "FirstOrder",
]


@dataclass(frozen=True)
class FirstOrder:
    """First-order lag with corner frequency ``corner_hz`` [Hz]."""

    corner_hz: float
    """Corner (−3 dB) frequency [Hz]."""
    kind: ClassVar[str] = "first_order"
    units: ClassVar[dict[str, str]] = {"corner_hz": "Hz"}

    def __post_init__(self) -> None:
        check_positive_finite(self.corner_hz, "corner_hz", MAX_MODEL_HZ)

    def continuous(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        w = 2.0 * math.pi * self.corner_hz
        return np.array([[-w]]), np.array([[w]]), np.array([[1.0]])

    def bandwidth_hz(self) -> float:
        return float(self.corner_hz)

    def fastest_hz(self) -> float:
        return float(self.corner_hz)

    def describe(self) -> str:
        return f"1st order {self.corner_hz:g} Hz"

    def scaled(self, factor: float) -> FirstOrder:
        return FirstOrder(self.corner_hz * factor)

    def damping(self) -> float | None:
        return None

    def with_damping(self, zeta: float) -> FirstOrder:
        raise ValueError("a first-order lag has no damping ratio")
