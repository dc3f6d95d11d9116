"""The closed loop: sensors → controller → saturation, rate limit, delay → actuator lag
→ joint friction → rigid-body plant (ABA) → semi-implicit Euler.

One control tick (period Ts):
  1. measure q (exact) and v + noise (seeded Gaussian, σ per the problem);
  2. the controller computes the command from its own model (no payload, no friction);
  3. the command is clipped to the effort limit, rate-limited, and delayed by whole ticks;
  4. it is held over the tick (ZOH); over each of ``substeps`` integration steps
     h = Ts/substeps the actuator bank advances exactly and delivers its mean torque;
  5. friction τ_c tanh(v/v_ε) + b v is subtracted and the *plant* model (payload,
     mass scales) gives the acceleration by ABA; v ← v + h a, q ← q + h v.

The whole state — q, v, actuator states, the delay line and (with rate limits) the
last command — is what ``stability.py`` linearises over.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pinocchio as pin

from . import plant
from .actuators import DiscreteBank, JointActuator, discretize
from .arm import Arm
from .control import Controller
from .trajectories import Reference

__all__ = [
    "V_EPS",
    "ClosedLoop",
    "LoopState",
    "Rollout",
    "SimSettings",
]

#: Default width of the Coulomb smoothing [rad/s]; widened per joint where needed.
V_EPS = 0.01


@dataclass(frozen=True)
class SimSettings:
    """Simulation settings from the problem's ``[simulation]`` and ``[sensing]`` tables."""

    substeps: int = 1
    """Integration steps per control tick [-]."""
    velocity_noise: float = 0.0
    """σ of the Gaussian velocity measurement noise [rad/s]."""
    seed: int = 0
    """Seed of the noise generator."""
    max_error_m: float = 0.2
    """Tip position error that counts as divergence [m]."""
    pinned_s: float = 0.2
    """Time a command may sit at its effort limit before the rollout counts as failed [s]."""
    margin_samples: int = 3
    """Instants per trajectory at which the loop is linearised [-]."""

    def __post_init__(self) -> None:
        if self.substeps < 1:
            raise ValueError(f"substeps must be >= 1, got {self.substeps}")


@dataclass
class LoopState:
    """Mutable state of the loop (only used inside the simulator)."""

    q: np.ndarray
    v: np.ndarray
    xa: np.ndarray
    hist: np.ndarray
    u_prev: np.ndarray
    pinned: np.ndarray

    def copy(self) -> LoopState:
        return LoopState(
            *(a.copy() for a in (self.q, self.v, self.xa, self.hist, self.u_prev, self.pinned))
        )


@dataclass(frozen=True)
class Rollout:
    """What one closed-loop run on one trajectory recorded."""

    name: str
    """Trajectory name."""
    t: np.ndarray
    """Tick times (K,) [s], K ≤ N when stopped early."""
    e: np.ndarray
    """Tip pose error (K, 6) [m; rad], world axes."""
    tau_cmd: np.ndarray
    """Command after saturation and rate limit (K, n) [N·m]."""
    tau_del: np.ndarray
    """Mean delivered torque per tick (K, n) [N·m]."""
    tier_tau: np.ndarray
    """Each tier's torque share before clipping (K, n_tiers, n) [N·m]."""
    q: np.ndarray
    """Joint positions at the start of each tick (K, n) [rad]."""
    v: np.ndarray
    """Joint velocities at the start of each tick, as the plant had them (K, n) [rad/s]."""
    p: np.ndarray
    """Tip position (K, 3) [m]."""
    p_ref: np.ndarray
    """Reference tip position (K, 3) [m]."""
    v_ref: np.ndarray
    """Reference tip velocity (K, 3) [m/s]."""
    diverged: bool
    """True when the run stopped early."""
    reason: str | None
    """Why it stopped early, or None."""
    steps: int
    """Ticks simulated."""
    snapshots: list[tuple[int, LoopState]] = field(repr=False, default_factory=list)
    """States kept at the linearisation instants (tick, state)."""


class ClosedLoop:
    """Controller, actuators and plant of one problem; runs rollouts and one-tick maps."""

    def __init__(
        self,
        arm: Arm,
        actuators: Sequence[JointActuator],
        controller: Controller,
        dt: float,
        settings: SimSettings | None = None,
    ) -> None:
        if len(actuators) != arm.n:
            raise ValueError(f"{len(actuators)} actuators for {arm.n} joints")
        self.arm = arm
        self.actuators = tuple(actuators)
        self.controller = controller
        self.dt = float(dt)
        self.settings = settings or SimSettings()
        self.h = self.dt / self.settings.substeps
        self.bank: DiscreteBank = discretize(self.actuators, self.h)
        n = arm.n
        self.n = n
        self.delay = np.array([a.delay_ticks for a in self.actuators], dtype=np.int64)
        self.D = int(self.delay.max()) if n else 0
        self.effort = np.array(
            [
                min(a.effort_nm, arm.effort[j]) if math.isfinite(a.effort_nm) else arm.effort[j]
                for j, a in enumerate(self.actuators)
            ]
        )
        self.rate_step = np.array([a.rate_limit_nm_s * self.dt for a in self.actuators])
        self.has_rate = bool(np.any(np.isfinite(self.rate_step)))
        self.coulomb = np.array([a.coulomb_nm for a in self.actuators])
        self.viscous = np.array([a.viscous_nms for a in self.actuators])
        self.plant = arm.plant_model
        self.pdata = self.plant.createData()
        Minv_home = pin.computeMinverse(self.plant, self.pdata, np.array(arm.home))
        # explicit smoothed Coulomb friction is stable when h·(τ_c/v_ε)·(M⁻¹)_jj ≤ 0.5; the
        # width is set with the control period, not the integration step, so that
        # ``substeps`` refines the integration without changing the friction law itself
        self.v_eps = np.maximum(V_EPS, 2.0 * self.dt * self.coulomb * np.diag(Minv_home) * 1.5)
        self.lower = np.array(arm.lower)
        self.upper = np.array(arm.upper)
        self.pinned_ticks = max(1, int(round(self.settings.pinned_s / self.dt)))
        # scratch
        self._ud = np.zeros(n)
        self._ABd = np.ascontiguousarray(np.hstack([self.bank.Ad, self.bank.Bd]))
        self._CDm = np.ascontiguousarray(np.hstack([self.bank.Cm, self.bank.Dm]))
        self._fr = np.ascontiguousarray(np.vstack([self.coulomb, self.v_eps, self.viscous]))
        self._net = np.zeros(n)
        self._del = np.zeros(n)
        self._del_sum = np.zeros(n)

    # -- state -----------------------------------------------------------------
    def initial_state(self) -> LoopState:
        """At home, at rest, the actuators delivering the model's gravity torque."""
        q = np.array(self.arm.home, dtype=float)
        u0 = np.clip(self.arm.gravity(q), -self.effort, self.effort)
        return LoopState(
            q=q,
            v=np.zeros(self.n),
            xa=self.bank.steady_state(u0),
            hist=np.tile(u0, (self.D, 1)),
            u_prev=u0.copy(),
            pinned=np.zeros(self.n, dtype=np.int64),
        )

    def pack(self, st: LoopState) -> np.ndarray:
        """The state as one vector: q, v, actuator states, delay line, (last command)."""
        parts = [st.q, st.v, st.xa, st.hist.ravel()]
        if self.has_rate:
            parts.append(st.u_prev)
        return np.concatenate(parts)

    def unpack(self, x: np.ndarray, like: LoopState) -> LoopState:
        n, nx, D = self.n, len(like.xa), self.D
        i = 0
        q = x[i : i + n].copy()
        i += n
        v = x[i : i + n].copy()
        i += n
        xa = x[i : i + nx].copy()
        i += nx
        hist = x[i : i + D * n].reshape(D, n).copy()
        i += D * n
        u_prev = x[i : i + n].copy() if self.has_rate else like.u_prev.copy()
        return LoopState(q, v, xa, hist, u_prev, like.pinned.copy())

    # -- one tick --------------------------------------------------------------
    def step(self, k: int, st: LoopState, vm: np.ndarray) -> tuple[int, int]:
        """Advance ``st`` by one tick with measured velocity ``vm``.

        Returns (controller status, index of the joint pinned longest).
        """
        ctrl = self.controller
        status = ctrl.command(k, st.q, vm)
        return status, self.advance(st, ctrl.tau)

    def advance(self, st: LoopState, tau: np.ndarray) -> int:
        """Advance ``st`` by one tick under the command ``tau`` [N·m]: saturation, rate
        limit, delay, actuator lag, friction and the plant. Returns the joint pinned longest.
        """
        nsub = self.settings.substeps
        if nsub > 1:
            self._del_sum[:] = 0.0
        for i in range(nsub):
            if i == 0:  # the command's limits and delay, then the first drive substep
                worst = plant.actuate_drive(
                    tau, st.u_prev, self.rate_step, st.hist, self.delay, self.effort,
                    st.pinned, self._ud, st.xa, self._ABd, self._CDm, self._fr, st.v,
                    self._net, self._del,
                )
            else:
                plant.drive_packed(
                    st.xa, self._ud, self._ABd, self._CDm, self._fr, st.v, self._net,
                    self._del,
                )
            a = pin.aba(self.plant, self.pdata, st.q, st.v, self._net)
            plant.integrate(st.q, st.v, a, self.h)
            if nsub > 1:
                self._del_sum += self._del
        if nsub > 1:  # the logged delivered torque is the mean over the tick
            self._del[:] = self._del_sum / nsub
        return int(worst)

    def step_map(self, k: int, x: np.ndarray, like: LoopState) -> np.ndarray:
        """x(k+1) as a function of x(k), noise off (for linearisation)."""
        st = self.unpack(x, like)
        self.step(k, st, st.v.copy())
        return self.pack(st)

    # -- rollout ---------------------------------------------------------------
    def _explain(self, code: int, worst: int, t: float, st: LoopState) -> str:
        s, names = self.settings, self.arm.joint_names
        if code == plant.STOP_SINGULAR:
            return f"singular solve in the controller at t={t:.3f} s"
        if code == plant.STOP_NONFINITE:
            return f"state became non-finite at t={t:.3f} s"
        if code == plant.STOP_ERROR_BOUND:
            e = self.controller.e6
            err = math.sqrt(float(e[:3] @ e[:3]))
            return (
                f"tip error {err * 1000:.0f} mm over the {s.max_error_m * 1000:.0f} mm "
                f"bound at t={t:.3f} s"
            )
        if code == plant.STOP_PINNED:
            j = int(np.argmax(st.pinned))
            return f"torque of {names[j]} pinned at its limit for {s.pinned_s:g} s (t={t:.3f} s)"
        j = code - plant.STOP_JOINT_LIMIT
        return f"{names[j]} left its position limits ({np.rad2deg(st.q[j]):.1f} deg) at t={t:.3f} s"

    def rollout(self, ref: Reference, seed: int | None = None) -> Rollout:
        """Run the loop over ``ref``; stop early on divergence and say why."""
        s = self.settings
        self.controller.bind(ref)
        N = len(ref.t)
        n, K = self.n, self.controller.n_tiers
        rng = np.random.default_rng(s.seed if seed is None else seed)
        noise = rng.standard_normal((N, n)) * s.velocity_noise
        E = np.zeros((N, 6))
        TC = np.zeros((N, n))
        TD = np.zeros((N, n))
        TT = np.zeros((N, K, n))
        Q = np.zeros((N, n))
        V = np.zeros((N, n))
        snap_at = {int(N * (i + 1) / (s.margin_samples + 1)) for i in range(s.margin_samples)}
        snaps: list[tuple[int, LoopState]] = []
        st = self.initial_state()
        reason: str | None = None
        k = 0
        vm = np.empty(n)
        max_err2 = s.max_error_m**2
        code = 0
        ctrl, dl, advance, settle = self.controller, self._del, self.advance, plant.settle
        lower, upper, pinned_ticks = self.lower, self.upper, self.pinned_ticks
        Q[0] = st.q
        V[0] = st.v
        np.add(st.v, noise[0], out=vm)
        for k in range(N):
            if k in snap_at:
                snaps.append((k, st.copy()))
            status = ctrl.command(k, st.q, vm)
            worst = advance(st, ctrl.tau)
            code = settle(
                k, st.q, st.v, ctrl.e6, st.u_prev, dl, ctrl.tier_tau, Q, V, E, TC, TD, TT,
                lower, upper, max_err2, st.pinned, pinned_ticks, status, noise, vm,
            )
            if code:
                reason = self._explain(code, worst, ref.t[k], st)
                break
        steps = k + 1
        P = ref.p[:steps] - E[:steps, :3]
        return Rollout(
            name=ref.name,
            t=ref.t[:steps].copy(),
            e=E[:steps],
            tau_cmd=TC[:steps],
            tau_del=TD[:steps],
            tier_tau=TT[:steps],
            q=Q[:steps],
            v=V[:steps],
            p=P,
            p_ref=ref.p[:steps].copy(),
            v_ref=ref.twist[:steps, :3].copy(),
            diverged=reason is not None,
            reason=reason,
            steps=steps,
            snapshots=snaps,
        )
