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
Jᵀ Λ a_k, Λ = (J M⁻¹ Jᵀ)⁻¹. A tier with fewer joints than task rows cannot give every
a_k; it gives the task acceleration closest to a_k in the metric of the arm's task-space
inertia Λ_k = (J_k M⁻¹ J_kᵀ)⁻¹ (J_k: the tier's rows),

    τ_k = S_kᵀ (B_kᵀ Λ_k B_k + λ_k W_k)⁻¹ B_kᵀ Λ_k a_k,

so it acts only where its joints reach, and which directions count as reached does not
depend on the units of the task (metres against radians): a plain least squares would
mix them. A tier with kp_t = 0 (kp_r = 0) drops the position (orientation) rows: it
leaves that part of the task alone. Tier 1 always keeps every task row, since it carries
the feed-forward.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pinocchio as pin

from ..arm import LWA, Arm
from ..plan import Plan
from ..trajectories import Reference
from . import kernels
from .base import ControlSettings, at_each_scale

__all__ = [
    "TieredController",
    "null_projector_t",
    "osc_torque",
    "tier_torque",
]


def tier_torque(
    Minv: np.ndarray, J: np.ndarray, joints: np.ndarray, a: np.ndarray, lam: float = 0.0
) -> np.ndarray:
    """The tier law in plain numpy (the reference form; ``J`` holds the tier's rows):
    Sᵀ W⁻¹ Bᵀ (B W⁻¹ Bᵀ + λI)⁻¹ a, or Sᵀ (Bᵀ Λ B + λW)⁻¹ Bᵀ Λ a with fewer joints than rows."""
    n = Minv.shape[0]
    S = np.eye(n)[joints]
    B = J @ Minv @ S.T
    W = S @ Minv @ S.T
    if len(joints) < J.shape[0]:
        Lam = np.linalg.inv(J @ Minv @ J.T)
        return S.T @ np.linalg.solve(B.T @ Lam @ B + lam * W, B.T @ Lam @ a)
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
    """The tiered law for one plan on one arm (the numba kernel does the maths).

    After ``command`` the attributes ``tau`` (clipped command, n), ``e6`` (tip pose
    error [m; rad], 6) and ``tier_tau`` (each tier's share, K×n) hold the results.
    """

    def __init__(
        self,
        arm: Arm,
        plan: Plan,
        settings: ControlSettings,
        kind: str = "plan",
        rate_limits: np.ndarray | None = None,
        qp_solver: str = "daqp",
    ) -> None:
        """``rate_limits``: each joint's torque-rate limit [N·m/s] (the bounded law keeps the
        command within it); ``qp_solver``: a name of ``bounded.QP_SOLVERS``."""
        self.arm = arm
        self.plan = plan
        self.settings = settings
        self.kind = kind
        self.n_tiers = len(plan.tiers)
        n = arm.n
        for k, tier in enumerate(plan.tiers):
            if max(tier.joints) >= n:
                raise ValueError(f"tier {k + 1} names joint index {max(tier.joints)} of {n}")
        self.kn = _per_joint(settings.null_stiffness, n)
        self.dn = _per_joint(settings.null_damping, n)
        self.qhome = np.array(arm.home)
        self.effort = np.array(arm.effort)
        self.data = arm.model.createData()
        self._zero = np.zeros(n)
        self._one_joint = n == 1
        self.ref: Reference | None = None
        self._refs = np.zeros((1, 24))
        m = len(settings.task_axes)
        K = self.n_tiers
        self._out = np.zeros(n + 6 + K * n + n)
        self.tau = self._out[:n]
        self.e6 = self._out[n : n + 6]
        self.tier_tau = self._out[n + 6 : n + 6 + K * n].reshape(K, n)
        self.raw = self._out[n + 6 + K * n :]
        """After ``command``: the summed command before any clipping (n,) [N·m]."""
        self.law = plan.law
        self._bounded = plan.law == "bounded"
        self.qp_solver = qp_solver
        step = np.full(n, np.inf) if rate_limits is None else np.asarray(rate_limits) * settings.dt
        self._rate_step = step
        self._has_rate = bool(np.isfinite(step).any())
        self._prev: np.ndarray | None = None
        self._x_prev: np.ndarray | None = None
        self._clip = True
        self.bounded_ticks = 0
        """Ticks of the last rollout where the bounded law's QP was solved."""
        self.qp_failures = 0
        """Ticks of the last rollout where it failed and the clipped sum was used."""
        self._ws = np.zeros(9 + 3 + 2 * m * n + 5 * m + n + m * m + 3 * n * n + 3 * n + 64)
        self.pack()

    def pack(self) -> None:
        """Pack the plan into the kernel's int and float arrays (call after changing gains).

        ints: [n, m, K, axes(m), per tier: nj, joints(nj), nr, rows(nr)]
        floats: [null_eps, kn(n), dn(n), q_home(n), effort(n), per tier: λ, kp(m), kd(m)]
        """
        n = self.arm.n
        axes = list(self.settings.task_axes)
        m = len(axes)
        ints: list[int] = [n, m, self.n_tiers, *axes]
        floats: list[float] = [
            self.settings.null_eps,
            *self.kn,
            *self.dn,
            *self.qhome,
            *self.effort,
        ]
        kp_at: list[int] = []
        kd_at: list[int] = []
        self._blocks: list[tuple[np.ndarray, np.ndarray, float]] = []
        for k, tier in enumerate(self.plan.tiers):
            kp = [tier.kp_t if ax < 3 else tier.kp_r for ax in axes]
            kd = [tier.kd_t if ax < 3 else tier.kd_r for ax in axes]
            rows = [i for i in range(m) if k == 0 or kp[i] > 0.0]
            ints += [len(tier.joints), *tier.joints, len(rows), *rows]
            lam = self.settings.tier_damping if tier.damping is None else tier.damping
            self._blocks.append(
                (np.array(tier.joints), np.array([axes[i] for i in rows]), float(lam))
            )
            kp_at += range(len(floats) + 1, len(floats) + 1 + m)
            kd_at += range(len(floats) + 1 + m, len(floats) + 1 + 2 * m)
            floats += [lam, *kp, *kd]
        self._ip = np.array(ints, dtype=np.int64)
        self._fp = np.array(floats, dtype=float)
        qp_ints: list[int] = [len(self._blocks)]
        for joints_k, rows6, _ in self._blocks:
            qp_ints += [len(joints_k), *joints_k, len(rows6), *rows6]
        self._qp_ip = np.array(qp_ints, dtype=np.int64)
        self._qp_lam = np.array([lam for _, _, lam in self._blocks], dtype=float)
        N = sum(len(j) for j, _, _ in self._blocks)
        self._qp_P = np.zeros((N, N))
        self._qp_A = np.zeros((n, N))
        self._qp_x = np.zeros(N)
        self._qp_ws = np.zeros(3 * 36 + 12 * n + 2 * 6 * n + 64)
        self._fp_base = self._fp.copy()
        self._kp_at = np.array(kp_at, dtype=np.int64)
        self._kd_at = np.array(kd_at, dtype=np.int64)
        self._effort_at = slice(1 + 3 * n, 1 + 4 * n)

    def set_gain_scale(
        self, stiffness: float = 1.0, damping: float = 1.0, clip: bool = True
    ) -> None:
        """Scale every tier's stiffness by ``stiffness`` and its damping gain by ``damping``
        [-] (ζ held when damping = √stiffness); ``clip=False`` lifts the effort clip.

        For linearisation: the command is affine in the two factors. (1, 1, True) restores
        the plan as written.
        """
        fp = self._fp
        fp[:] = self._fp_base
        fp[self._kp_at] *= stiffness
        fp[self._kd_at] *= damping
        if not clip:
            fp[self._effort_at] = np.inf
        self._clip = clip  # the bounded law's QP too is a bound: off while linearising

    def bind(self, ref: Reference) -> None:
        self.ref = ref
        self._prev = None
        self._x_prev = None
        self.bounded_ticks = 0
        self.qp_failures = 0
        N = len(ref.t)
        self._refs = np.ascontiguousarray(
            np.hstack([ref.p, ref.R.reshape(N, 9), ref.twist, ref.acc]), dtype=float
        )

    def _kinematics(
        self, q: np.ndarray, vm: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Tip placement (4×4), tip Jacobian, J̇v, h and M⁻¹ at (q, v): the law's pinocchio
        calls."""
        model, data, fid = self.arm.model, self.data, self.arm.tip_id
        pin.forwardKinematics(model, data, q, vm, self._zero)
        pin.computeJointJacobians(model, data)
        H = pin.updateFramePlacement(model, data, fid).homogeneous
        J6 = pin.getFrameJacobian(model, data, fid, LWA)
        dJv = pin.getFrameClassicalAcceleration(model, data, fid, LWA).vector
        h = pin.nonLinearEffects(model, data, q, vm)
        Minv = pin.computeMinverse(model, data, q)
        if self._one_joint:  # pinocchio hands a 6×1 Jacobian back as a vector
            J6 = J6.reshape(6, 1)
            Minv = np.atleast_2d(Minv)
        return H, J6, dJv, h, Minv

    def command(self, k: int, q: np.ndarray, vm: np.ndarray) -> int:
        H, J6, dJv, h, Minv = self._kinematics(q, vm)
        status = int(
            kernels.tiered_command(
                H, J6, dJv, h, Minv, q, vm, self._refs, k, self._ip, self._fp, self._ws, self._out
            )
        )
        if self._bounded and self._clip:
            if status == 0:
                self._bound(J6, Minv)
            self._prev = self.tau.copy()
        return status

    def commands(
        self, k: int, q: np.ndarray, vm: np.ndarray, scales: Sequence[tuple[float, float]]
    ) -> np.ndarray:
        """The command at tick ``k`` with the effort clip lifted, once per (stiffness,
        damping) factor pair of ``scales`` (rows), the kinematics computed once: each row
        is what ``set_gain_scale(s, d, clip=False)`` then ``command`` gives, bit for bit.
        The plan's own gains are restored after."""
        kin = self._kinematics(q, vm)
        return at_each_scale(
            self, scales,
            lambda: kernels.tiered_command(
                *kin, q, vm, self._refs, k, self._ip, self._fp, self._ws, self._out
            ),
        )

    def _bound(self, J6: np.ndarray, Minv: np.ndarray) -> None:
        """Replace the clipped sum by the bounded law's command where a bound binds."""
        from .bounded import PRIORITY, BoundedQP, solve_qp

        eff = self.effort
        raw = self.raw
        if self._prev is None or not self._has_rate:
            if (np.abs(raw) <= eff).all():
                return  # no bound binds: the summed law exactly (tau already equals raw)
            lo, hi = -eff, eff
        else:
            lo = np.maximum(-eff, self._prev - self._rate_step)
            hi = np.minimum(eff, self._prev + self._rate_step)
            if (raw >= lo).all() and (raw <= hi).all():
                return
        self.bounded_ticks += 1
        p = raw - self.tier_tau.sum(axis=0)  # posture and h
        P, A, xs = self._qp_P, self._qp_A, self._qp_x
        ok_build = kernels.bounded_qp(
            Minv, J6, self._qp_ip, self._qp_lam, self.tier_tau, PRIORITY, P, A, xs, self._qp_ws
        )
        if ok_build < 0:
            self.qp_failures += 1
            self.tau[:] = np.clip(raw, lo, hi)
            return
        qp = BoundedQP(P, -(P @ xs), A, lo - p, hi - p, xs)
        x, ok = solve_qp(qp, self.qp_solver, self._x_prev)
        if ok:
            self._x_prev = x
            self.tau[:] = np.clip(p + qp.A @ x, lo, hi)
        else:
            self.qp_failures += 1
            self.tau[:] = np.clip(raw, lo, hi)


def _per_joint(values: tuple[float, ...], n: int) -> np.ndarray:
    if len(values) == 0:
        return np.zeros(n)
    if len(values) == 1:
        return np.full(n, float(values[0]))
    if len(values) != n:
        raise ValueError(f"expected 1 or {n} per-joint values, got {len(values)}")
    return np.array(values, dtype=float)
