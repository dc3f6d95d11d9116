r"""Joint-space baseline: offline CLIK turns the task reference into q_d, v_d, a_d;
a computed-torque joint PD tracks them.

CLIK (damped least squares, with the same null-space posture as the tiered law):

    q̇ = J†(ẋ_d + K_clik e) + (I − J†J) k₀ (q_home − q),   J† = Jᵀ (J Jᵀ + λ² I)⁻¹

so that, away from singularities, ė + K_clik e = 0. Tracking:

    τ = M (a_d + Kp (q_d − q) + Kd (v_d − v)) + h,   Kp = diag(kp_i), Kd = 2 ζ √Kp
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pinocchio as pin

from ..arm import LWA, Arm
from ..trajectories import Reference
from . import kernels
from .base import ControlSettings, at_each_scale

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
        self.data = arm.model.createData()
        self.sol: ClikSolution | None = None
        self.ref: Reference | None = None
        n = arm.n
        #: the kernel's inputs: gains and limits; task and joint references, per tick
        self._gp = np.concatenate([self.kp, self.kd, self.effort])
        self._refs = np.zeros((1, 12))
        self._jref = np.zeros((1, 3 * n))
        #: the kernel writes here; tau, e6 and tier_tau are views
        self._out = np.zeros(2 * n + 6)
        self.tau = self._out[:n]
        self.e6 = self._out[n : n + 6]
        self.tier_tau = self._out[n + 6 :].reshape(1, n)

    def set_gain_scale(
        self, stiffness: float = 1.0, damping: float = 1.0, clip: bool = True
    ) -> None:
        """Scale the joint stiffness by ``stiffness`` and damping by ``damping`` [-];
        ``clip=False`` lifts the effort clip (for linearisation). (1, 1, True) restores."""
        self.kp = self._kp_base * stiffness
        self.kd = self._kd_base * damping
        self.effort = self._effort_base.copy() if clip else np.full_like(self.effort, np.inf)
        self._gp[:] = np.concatenate([self.kp, self.kd, self.effort])

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
        N = len(ref.t)
        self._refs = np.ascontiguousarray(np.hstack([ref.p, ref.R.reshape(N, 9)]), dtype=float)
        sol = self.sol
        self._jref = np.ascontiguousarray(np.hstack([sol.q, sol.v, sol.a]), dtype=float)

    def _kinematics(
        self, q: np.ndarray, vm: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Tip placement (4×4), M and h at (q, v): the law's pinocchio calls."""
        model, data = self.arm.model, self.data
        if self.sol is None:
            raise RuntimeError("bind() a reference before command()")
        pin.framesForwardKinematics(model, data, q)
        H = data.oMf[self.arm.tip_id].homogeneous
        M = pin.crba(model, data, q)
        h = pin.nonLinearEffects(model, data, q, vm)
        return H, M, h

    def command(self, k: int, q: np.ndarray, vm: np.ndarray) -> int:
        H, M, h = self._kinematics(q, vm)
        kernels.joint_command(H, M, h, q, vm, self._refs, self._jref, k, self._gp, self._out)
        return 0

    def commands(
        self, k: int, q: np.ndarray, vm: np.ndarray, scales: Sequence[tuple[float, float]]
    ) -> np.ndarray:
        """As ``TieredController.commands``: the unclipped command per gain-factor pair."""
        kin = self._kinematics(q, vm)
        return at_each_scale(
            self, scales,
            lambda: kernels.joint_command(
                *kin, q, vm, self._refs, self._jref, k, self._gp, self._out
            ),
        )

    def command_numpy(
        self, k: int, q: np.ndarray, vm: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The same law written with numpy (the readable form ``command`` compiles): the
        clipped command, the tip pose error and the PD part, as ``tau``, ``e6`` and
        ``tier_tau[0]`` after ``command``. For tests."""
        model, data, fid = self.arm.model, self.data, self.arm.tip_id
        sol, ref = self.sol, self.ref
        if sol is None or ref is None:
            raise RuntimeError("bind() a reference before command()")
        pin.framesForwardKinematics(model, data, q)
        f = data.oMf[fid]
        rv = np.empty(3)
        kernels.log3(ref.R[k] @ f.rotation.T, rv)
        e6 = np.concatenate([ref.p[k] - f.translation, rv])
        M = pin.crba(model, data, q)
        h = pin.nonLinearEffects(model, data, q, vm)
        t = M @ (sol.a[k] + self.kp * (sol.q[k] - q) + self.kd * (sol.v[k] - vm)) + h
        return np.minimum(np.maximum(t, -self.effort), self.effort), e6, t - h
