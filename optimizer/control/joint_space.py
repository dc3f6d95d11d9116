r"""Joint-space baseline: offline CLIK turns the task reference into q_d, v_d, a_d;
a computed-torque joint PD tracks them.

CLIK (damped least squares, with the same null-space posture as the tiered law):

    q̇ = J†(ẋ_d + K_clik e) + (I − J†J) k₀ (q_home − q),   J† = Jᵀ (J Jᵀ + λ² I)⁻¹

so that, away from singularities, ė + K_clik e = 0. Tracking:

    τ = M (a_d + Kp (q_d − q) + Kd (v_d − v)) + h,   Kp = diag(kp_i), Kd = 2 ζ √Kp
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass

import numpy as np
import pinocchio as pin

from ..arm import LWA, Arm
from ..trajectories import Reference
from . import kernels
from .base import ControlSettings

__all__ = [
    "ClikSolution",
    "JointSpaceController",
    "clik",
    "clik_cached",
    "dls",
]


@dataclass(frozen=True)
class ClikSolution:
    """Joint reference from CLIK for one task reference."""

    q: np.ndarray
    """Joint positions (N, n) [rad]."""
    v: np.ndarray
    """Joint velocities (N, n) [rad/s]."""
    a: np.ndarray
    """Joint accelerations (N, n) [rad/s²]."""
    error: np.ndarray
    """Task error left by CLIK (N, 6) [m; rad]."""


def dls(J: np.ndarray, lam: float) -> np.ndarray:
    """Damped least-squares inverse Jᵀ (J Jᵀ + λ² I)⁻¹."""
    return J.T @ np.linalg.inv(J @ J.T + lam * lam * np.eye(J.shape[0]))


def clik(
    arm: Arm,
    ref: Reference,
    axes: tuple[int, ...],
    gain: float = 200.0,
    lam: float = 0.01,
    posture_gain: float = 2.0,
) -> ClikSolution:
    """Integrate CLIK along ``ref`` from the home pose, one step per tick.

    Args:
        gain: K_clik [1/s]; the discrete error map is stable for 0 < K dt < 2.
        lam: damping λ of the least-squares inverse [-].
        posture_gain: k₀ pulling the redundancy toward the home pose [1/s].
    """
    model, data, fid = arm.model, arm.model.createData(), arm.tip_id
    N = len(ref.t)
    dt = float(ref.t[1] - ref.t[0]) if N > 1 else 1e-3
    n = arm.n
    ax = np.array(axes)
    q = np.array(arm.home, dtype=float)
    Q = np.empty((N, n))
    V = np.empty((N, n))
    E = np.empty((N, 6))
    e6 = np.empty(6)
    rv = np.empty(3)
    for k in range(N):
        pin.framesForwardKinematics(model, data, q)
        f = data.oMf[fid]
        e6[:3] = ref.p[k] - f.translation
        kernels.log3(ref.R[k] @ f.rotation.T, rv)
        e6[3:] = rv
        J = pin.computeFrameJacobian(model, data, q, fid, LWA)[ax]
        Jp = dls(J, lam)
        qd = Jp @ (ref.twist[k, ax] + gain * e6[ax]) + (np.eye(n) - Jp @ J) @ (
            posture_gain * (arm.home - q)
        )
        Q[k] = q
        V[k] = qd
        E[k] = e6
        q = q + dt * qd
    A = np.gradient(V, dt, axis=0) if N > 2 else np.zeros_like(V)
    return ClikSolution(q=Q, v=V, a=A, error=E)


#: Joint references already computed: (URDF, tip, home, reference, axes, gains) → solution.
#: The reference object is kept in the value so that its id is not reused while cached.
_CLIK_CACHE: OrderedDict[tuple[object, ...], tuple[Reference, ClikSolution]] = OrderedDict()
_CLIK_CACHE_SIZE = 64


def clik_cached(
    arm: Arm,
    ref: Reference,
    axes: tuple[int, ...],
    gain: float = 200.0,
    lam: float = 0.01,
    posture_gain: float = 2.0,
) -> ClikSolution:
    """``clik`` computed once per arm model, reference and settings in this process.

    The joint reference depends on the problem only (not on the baseline's gains nor on
    the plant), so every trial and perturbed plant of a search shares it.
    """
    key = (
        arm.urdf_xml, arm.tip_frame, arm.home.tobytes(), id(ref), tuple(axes),
        float(gain), float(lam), float(posture_gain),
    )
    hit = _CLIK_CACHE.get(key)
    if hit is not None and hit[0] is ref:
        _CLIK_CACHE.move_to_end(key)
        return hit[1]
    sol = clik(arm, ref, axes, gain, lam, posture_gain)
    for a in (sol.q, sol.v, sol.a, sol.error):
        a.setflags(write=False)
    _CLIK_CACHE[key] = (ref, sol)
    while len(_CLIK_CACHE) > _CLIK_CACHE_SIZE:
        _CLIK_CACHE.popitem(last=False)
    return sol


class JointSpaceController:
    """Computed-torque joint PD on a CLIK joint reference."""

    kind = "joint_space"
    n_tiers = 1

    def __init__(
        self,
        arm: Arm,
        settings: ControlSettings,
        kp: np.ndarray,
        zeta: float,
        clik_gain: float = 200.0,
        clik_damping: float = 0.01,
        posture_gain: float = 2.0,
        label: str = "joint-space CLIK + PD",
    ) -> None:
        self.arm = arm
        self.settings = settings
        self.kp = np.broadcast_to(np.asarray(kp, dtype=float), (arm.n,)).copy()
        if np.any(self.kp < 0) or not np.all(np.isfinite(self.kp)) or not zeta > 0:
            raise ValueError("joint gains must be finite and >= 0, zeta > 0")
        self.kd = 2.0 * zeta * np.sqrt(self.kp)
        self._kp_base = self.kp.copy()
        self._kd_base = self.kd.copy()
        self.zeta = float(zeta)
        self.clik_gain = clik_gain
        self.clik_damping = clik_damping
        self.posture_gain = posture_gain
        self.label = label
        self.effort = np.array(arm.effort)
        self._effort_base = self.effort.copy()
        self._low = -self.effort
        self.data = arm.model.createData()
        self.sol: ClikSolution | None = None
        self.ref: Reference | None = None
        self._rv = np.empty(3)
        self.tau = np.zeros(arm.n)
        self.e6 = np.zeros(6)
        self.tier_tau = np.zeros((1, arm.n))

    def set_gain_scale(
        self, stiffness: float = 1.0, damping: float = 1.0, clip: bool = True
    ) -> None:
        """Scale the joint stiffness by ``stiffness`` and damping by ``damping`` [-];
        ``clip=False`` lifts the effort clip (for linearisation). (1, 1, True) restores."""
        self.kp = self._kp_base * stiffness
        self.kd = self._kd_base * damping
        self.effort = self._effort_base.copy() if clip else np.full_like(self.effort, np.inf)
        self._low = -self.effort

    def bind(self, ref: Reference) -> None:
        self.sol = clik_cached(
            self.arm,
            ref,
            self.settings.task_axes,
            self.clik_gain,
            self.clik_damping,
            self.posture_gain,
        )
        self.ref = ref

    def command(self, k: int, q: np.ndarray, vm: np.ndarray) -> int:
        model, data, fid = self.arm.model, self.data, self.arm.tip_id
        sol = self.sol
        if sol is None:
            raise RuntimeError("bind() a reference before command()")
        pin.framesForwardKinematics(model, data, q)
        f = data.oMf[fid]
        e6, tau, ref = self.e6, self.tau, self.ref
        if ref is None:
            raise RuntimeError("bind() a reference before command()")
        e6[:3] = ref.p[k] - f.translation
        kernels.log3(ref.R[k] @ f.rotation.T, self._rv)
        e6[3:] = self._rv
        M = pin.crba(model, data, q)
        h = pin.nonLinearEffects(model, data, q, vm)
        t = M @ (sol.a[k] + self.kp * (sol.q[k] - q) + self.kd * (sol.v[k] - vm)) + h
        np.minimum(np.maximum(t, self._low, out=tau), self.effort, out=tau)  # np.clip, faster
        self.tier_tau[0, :] = t - h
        return 0
