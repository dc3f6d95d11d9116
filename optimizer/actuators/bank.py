"""All joints' actuators as one discrete state-space system, exact zero-order hold.

Continuous per joint: ẋ = A x + B u, y = C x. Over a hold interval h with u held,

    x(h) = Φ x(0) + Γ₁ B u,          Φ = e^{Ah}, Γ₁ = ∫₀ʰ e^{As} ds
    ȳ    = (1/h)∫₀ʰ y dt = (C Γ₁/h) x(0) + (C Γ₂ B/h) u,   Γ₂ = ∫₀ʰ∫₀ˢ e^{Ar} dr ds

Φ, Γ₁ and Γ₂ are blocks of one matrix exponential of [[A, I, 0], [0, 0, I], [0, 0, 0]] h
(Van Loan's method). ȳ is the mean delivered torque over the interval, which is the
torque whose impulse the plant integrator receives.
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from .base import JointActuator

__all__ = [
    "DiscreteBank",
    "continuous_bank",
    "discretize",
]


@dataclass(frozen=True)
class DiscreteBank:
    """Discrete actuator bank at step ``h``: x⁺ = Ad x + Bd u, ȳ = Cm x + Dm u."""

    Ad: np.ndarray
    """State transition (nx, nx)."""
    Bd: np.ndarray
    """Input matrix (nx, n)."""
    Cm: np.ndarray
    """Mean-output state matrix (n, nx)."""
    Dm: np.ndarray
    """Mean-output feed-through (n, n)."""
    C: np.ndarray
    """Instantaneous output matrix (n, nx)."""
    h: float
    """Hold interval [s]."""

    def steady_state(self, u: np.ndarray) -> np.ndarray:
        """Actuator state (nx,) that delivers ``u`` at rest."""
        nx = self.Ad.shape[0]
        return np.linalg.solve(np.eye(nx) - self.Ad, self.Bd @ u)


def continuous_bank(
    actuators: Sequence[JointActuator],
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Block-diagonal continuous ``(A, B, C)`` of every joint's model."""
    blocks = [a.model.continuous() for a in actuators]
    nx = sum(b[0].shape[0] for b in blocks)
    n = len(blocks)
    A = np.zeros((nx, nx))
    B = np.zeros((nx, n))
    C = np.zeros((n, nx))
    i = 0
    for j, (Aj, Bj, Cj) in enumerate(blocks):
        k = Aj.shape[0]
        A[i : i + k, i : i + k] = Aj
        B[i : i + k, j] = Bj[:, 0]
        C[j, i : i + k] = Cj[0, :]
        i += k
    return A, B, C


def discretize(actuators: Sequence[JointActuator], h: float) -> DiscreteBank:
    """Exact ZOH discretisation of the bank at step ``h`` [s].

    Remembered per (actuators, h) in this process (the bank's arrays are read-only): a
    search builds a loop for every trial and plant, and the margins rescale the same
    actuators by the same factors at every sampled instant."""
    return _discretize(tuple(actuators), float(h))


@functools.lru_cache(maxsize=512)
def _discretize(actuators: tuple[JointActuator, ...], h: float) -> DiscreteBank:
    A, B, C = continuous_bank(actuators)
    nx = A.shape[0]
    big = np.zeros((3 * nx, 3 * nx))
    big[:nx, :nx] = A
    big[:nx, nx : 2 * nx] = np.eye(nx)
    big[nx : 2 * nx, 2 * nx :] = np.eye(nx)
    E = scipy.linalg.expm(big * h)
    Phi = E[:nx, :nx]
    G1 = E[:nx, nx : 2 * nx]
    G2 = E[:nx, 2 * nx :]
    return DiscreteBank(
        Ad=_ro(Phi), Bd=_ro(G1 @ B), Cm=_ro(C @ G1 / h), Dm=_ro(C @ G2 @ B / h), C=_ro(C), h=h
    )


def _ro(a: np.ndarray) -> np.ndarray:
    out = np.ascontiguousarray(a, dtype=float).copy()
    out.setflags(write=False)
    return out
