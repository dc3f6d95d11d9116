r"""The tiered task-space law; single-tier OSC is its one-tier, all-joint case.

Per tick, with measured q, v and the controller's model M(q), h(q, v), tip
Jacobian J (task rows, world-aligned), drift J̇v, pose error
e = [p_d − p; log3(R_d Rᵀ)] and velocity error ė = ẋ_d − J v:

    a_k = Kp_k e + Kd_k ė            (tier 1 adds ẍ_d − J̇v)
    B_k = J M⁻¹ S_kᵀ,  W_k = S_k M⁻¹ S_kᵀ
    τ_k = S_kᵀ W_k⁻¹ B_kᵀ (B_k W_k⁻¹ B_kᵀ + λ_k I)⁻¹ a_k
    τ   = Σ_k τ_k + Nᵀ (K_null (q_home − q) − D_null v) + h,   Nᵀ = I − Jᵀ Λ J M⁻¹

then clipped to the effort limits. τ_k is the least M⁻¹-weighted torque on the joints
of S_k that gives tip acceleration a_k; with S_k = all joints and λ = 0 it equals
Jᵀ Λ a_k, Λ = (J M⁻¹ Jᵀ)⁻¹. When a tier has fewer joints than task rows, the
push-through identity W⁻¹Bᵀ(BW⁻¹Bᵀ + λI)⁻¹ = (BᵀB + λW)⁻¹Bᵀ gives the same τ_k for
λ > 0 and its least-squares limit at λ = 0. A tier with kp_t = 0 (kp_r = 0) drops
the position (orientation) rows: it leaves that part of the task alone. Tier 1
always keeps every task row, since it carries the feed-forward.
"""

from __future__ import annotations

import numpy as np
import pinocchio as pin

from ..arm import LWA, Arm
from ..plan import Plan
from ..trajectories import Reference
from . import kernels
from .base import ControlSettings


def tier_torque(
    Minv: np.ndarray, J: np.ndarray, joints: np.ndarray, a: np.ndarray, lam: float = 0.0
) -> np.ndarray:
    """τ_k = Sᵀ W⁻¹ Bᵀ (B W⁻¹ Bᵀ + λI)⁻¹ a, plain numpy (the reference form)."""
    n = Minv.shape[0]
    S = np.eye(n)[joints]
    B = J @ Minv @ S.T
    W = S @ Minv @ S.T
    WiBt = np.linalg.solve(W, B.T)
    return S.T @ WiBt @ np.linalg.solve(B @ WiBt + lam * np.eye(J.shape[0]), a)


def osc_torque(M: np.ndarray, J: np.ndarray, a: np.ndarray) -> np.ndarray:
    """Jᵀ Λ a with Λ = (J M⁻¹ Jᵀ)⁻¹."""
    Lam = np.linalg.inv(J @ np.linalg.solve(M, J.T))
    return J.T @ Lam @ a


def null_projector_t(M: np.ndarray, J: np.ndarray) -> np.ndarray:
    """Nᵀ = I − Jᵀ Λ J M⁻¹ (dynamically consistent torque projector)."""
    Minv = np.linalg.inv(M)
    Lam = np.linalg.inv(J @ Minv @ J.T)
    return np.eye(M.shape[0]) - J.T @ Lam @ J @ Minv


class TieredController:
    """The tiered law for one plan on one arm (the numba kernel does the maths)."""

    def __init__(self, arm: Arm, plan: Plan, settings: ControlSettings, kind: str = "plan") -> None:
        self.arm = arm
        self.plan = plan
        self.settings = settings
        self.kind = kind
        self.n_tiers = len(plan.tiers)
        n = arm.n
        axes = np.array(settings.task_axes, dtype=np.int64)
        m = len(axes)
        K = self.n_tiers
        self.axes = axes
        self.tier_joints = np.zeros((K, n), dtype=np.int64)
        self.tier_nj = np.zeros(K, dtype=np.int64)
        self.tier_rows = np.zeros((K, m), dtype=np.int64)
        self.tier_nr = np.zeros(K, dtype=np.int64)
        self.tier_kp = np.zeros((K, m))
        self.tier_kd = np.zeros((K, m))
        self.tier_lam = np.zeros(K)
        for k, tier in enumerate(plan.tiers):
            if max(tier.joints) >= n:
                raise ValueError(f"tier {k + 1} names joint index {max(tier.joints)} of {n}")
            self.tier_joints[k, : len(tier.joints)] = tier.joints
            self.tier_nj[k] = len(tier.joints)
            rows = []
            for i, ax in enumerate(axes):
                is_pos = ax < 3
                kp = tier.kp_t if is_pos else tier.kp_r
                kd = tier.kd_t if is_pos else tier.kd_r
                self.tier_kp[k, i] = kp
                self.tier_kd[k, i] = kd
                if k == 0 or kp > 0.0:
                    rows.append(i)
            self.tier_rows[k, : len(rows)] = rows
            self.tier_nr[k] = len(rows)
            self.tier_lam[k] = settings.tier_damping if tier.damping is None else tier.damping
        self.kn = _per_joint(settings.null_stiffness, n)
        self.dn = _per_joint(settings.null_damping, n)
        self.qhome = np.array(arm.home)
        self.effort = np.array(arm.effort)
        self.data = arm.model.createData()
        self._zero = np.zeros(n)
        self.ref: Reference | None = None
        self._one_joint = n == 1

    def bind(self, ref: Reference) -> None:
        self.ref = ref
        self._p = ref.p
        self._R = ref.R
        self._tw = ref.twist
        self._acc = ref.acc

    def command(
        self,
        k: int,
        q: np.ndarray,
        vm: np.ndarray,
        tau: np.ndarray,
        tier_tau: np.ndarray,
        e6: np.ndarray,
    ) -> int:
        model, data, fid = self.arm.model, self.data, self.arm.tip_id
        pin.forwardKinematics(model, data, q, vm, self._zero)
        pin.computeJointJacobians(model, data)
        oMf = pin.updateFramePlacement(model, data, fid)
        J6 = pin.getFrameJacobian(model, data, fid, LWA)
        dJv = pin.getFrameClassicalAcceleration(model, data, fid, LWA).vector
        h = pin.nonLinearEffects(model, data, q, vm)
        Minv = pin.computeMinverse(model, data, q)
        if self._one_joint:  # pinocchio hands a 6×1 Jacobian back as a vector
            J6 = J6.reshape(6, 1)
            Minv = np.atleast_2d(Minv)
        return int(
            kernels.tiered_command(
                oMf.translation,
                oMf.rotation,
                J6,
                dJv,
                h,
                Minv,
                q,
                vm,
                self._p[k],
                self._R[k],
                self._tw[k],
                self._acc[k],
                self.axes,
                self.tier_joints,
                self.tier_nj,
                self.tier_rows,
                self.tier_nr,
                self.tier_kp,
                self.tier_kd,
                self.tier_lam,
                self.kn,
                self.dn,
                self.qhome,
                self.settings.null_eps,
                self.effort,
                tau,
                tier_tau,
                e6,
            )
        )


def _per_joint(values: tuple[float, ...], n: int) -> np.ndarray:
    if len(values) == 0:
        return np.zeros(n)
    if len(values) == 1:
        return np.full(n, float(values[0]))
    if len(values) != n:
        raise ValueError(f"expected 1 or {n} per-joint values, got {len(values)}")
    return np.array(values, dtype=float)
