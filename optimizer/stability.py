"""Stability of the sampled closed loop: spectral radius of the linearised one-tick map.

At an instant k with loop state x, the map x ↦ F_k(x) (one control period, noise off)
is linearised by central finite differences over every state — q, v, actuator states,
delay line and last command. The loop is locally stable when the spectral radius ρ of
∂F/∂x is below 1; the margin is 1 − ρ (per tick; −ln ρ / Ts is the slowest decay
rate [1/s]). A plan is infeasible when the margin falls below the problem's threshold.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable

import numpy as np

from .simulate import ClosedLoop, LoopState
from .trajectories import Reference


def jacobian_fd(
    F: Callable[[np.ndarray], np.ndarray], x0: np.ndarray, rel_step: float = 1e-6
) -> np.ndarray:
    """Central finite-difference Jacobian of ``F`` at ``x0``; step rel_step·max(1, |xᵢ|)."""
    n = x0.size
    cols = []
    for i in range(n):
        d = rel_step * max(1.0, abs(float(x0[i])))
        xp = x0.copy()
        xm = x0.copy()
        xp[i] += d
        xm[i] -= d
        cols.append((F(xp) - F(xm)) / (2.0 * d))
    return np.column_stack(cols) if cols else np.zeros((0, 0))


def spectral_radius(A: np.ndarray) -> float:
    """Largest eigenvalue modulus of a square matrix (inf when not finite)."""
    if A.size == 0:
        return 0.0
    if not np.all(np.isfinite(A)):
        return float("inf")
    return float(np.max(np.abs(np.linalg.eigvals(A))))


def loop_radius(loop: ClosedLoop, k: int, state: LoopState) -> float:
    """Spectral radius of the loop's linearised one-tick map at tick ``k`` and ``state``."""
    x0 = loop.pack(state)
    return spectral_radius(jacobian_fd(lambda x: loop.step_map(k, x, state), x0))


def loop_margin(loop: ClosedLoop, samples: Iterable[tuple[int, LoopState]]) -> float:
    """1 − the largest spectral radius over the sampled (tick, state) pairs."""
    radii = [loop_radius(loop, k, st) for k, st in samples]
    return 1.0 - max(radii) if radii else float("nan")


def home_margin(loop: ClosedLoop, ref: Reference) -> float:
    """Margin at the home pose at t = 0 of ``ref``: a cheap pre-check before any rollout."""
    loop.controller.bind(ref)
    return 1.0 - loop_radius(loop, 0, loop.initial_state())
