"""What the simulator needs from a controller, and the settings shared by controllers."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Protocol

import numpy as np

from ..trajectories import Reference

__all__ = [
    "AXES",
    "ControlSettings",
    "Controller",
    "at_each_scale",
]

#: Task axes by the names used in problem files, in J's row order.
AXES = ("x", "y", "z", "rx", "ry", "rz")


@dataclass(frozen=True)
class ControlSettings:
    """Controller settings from the problem's ``[control]`` table."""

    rate_hz: float
    """Control rate [Hz]."""
    task_axes: tuple[int, ...] = (0, 1, 2, 3, 4, 5)
    """Rows of the 6×n tip Jacobian the task controls (0–2 position, 3–5 orientation)."""
    null_stiffness: tuple[float, ...] = ()
    """Null-space posture stiffness per joint [N·m/rad]; empty for none."""
    null_damping: tuple[float, ...] = ()
    """Null-space damping per joint [N·m·s/rad]; empty for none."""
    tier_damping: float = 1e-4
    """Default λ of each tier's solve [(m/s²)/(N) scale, i.e. of J M⁻¹ Jᵀ]."""
    null_eps: float = 1e-8
    """Regularisation of Λ⁻¹ = J M⁻¹ Jᵀ in the null-space projector [-]."""

    @property
    def dt(self) -> float:
        """Control period [s]."""
        return 1.0 / self.rate_hz


class Controller(Protocol):
    """A controller the closed loop can run."""

    kind: str
    """``plan``, ``osc`` or ``joint_space``."""
    n_tiers: int
    """Tier count (1 for baselines)."""
    tau: np.ndarray
    """After ``command``: the clipped torque command (n,) [N·m]."""
    e6: np.ndarray
    """After ``command``: the tip pose error (6,) [m; rad], world axes."""
    tier_tau: np.ndarray
    """After ``command``: each tier's torque share before clipping (n_tiers, n) [N·m]."""

    def set_gain_scale(
        self, stiffness: float = 1.0, damping: float = 1.0, clip: bool = True
    ) -> None:
        """Scale every task (or joint) stiffness and damping gain; ``clip=False`` lifts the
        effort clip. The command must be affine in the two factors (for linearisation)."""
        ...

    def bind(self, ref: Reference) -> None:
        """Prepare for a rollout on ``ref`` (may precompute, e.g. inverse kinematics)."""
        ...

    def command(self, k: int, q: np.ndarray, vm: np.ndarray) -> int:
        """Compute the command for tick ``k`` into ``tau``, ``e6`` and ``tier_tau``.

        ``q``/``vm`` are the measured joint positions [rad] and velocities [rad/s].
        Returns 0, or a non-zero status for a singular solve.
        """
        ...

    def commands(
        self, k: int, q: np.ndarray, vm: np.ndarray, scales: Sequence[tuple[float, float]]
    ) -> np.ndarray:
        """The command for tick ``k`` with the effort clip lifted, one row per (stiffness,
        damping) pair of ``scales``, each equal bit for bit to ``set_gain_scale(s, d,
        clip=False)`` then ``command``; the kinematics are computed once (linearisation).
        The plan's gains are restored after."""
        ...


def at_each_scale(
    ctrl: Controller, scales: Sequence[tuple[float, float]], law: Callable[[], object]
) -> np.ndarray:
    """``ctrl.tau`` after ``law()`` (the law's kernel on kinematics already computed) at each
    (stiffness, damping) pair of ``scales``, the clip lifted, as rows; the plan's gains are
    restored after. The body of every controller's ``commands``."""
    out = np.empty((len(scales), ctrl.tau.shape[0]))
    try:
        for i, (s, d) in enumerate(scales):
            ctrl.set_gain_scale(s, d, clip=False)
            law()
            out[i] = ctrl.tau
    finally:
        ctrl.set_gain_scale()
    return out
