r"""Stability margins of the sampled closed loop, in units an engineer reads.

At a sampled instant k with loop state x — joint positions and velocities m = (q, v),
actuator states x_a, the delay line and (with rate limits) the last command — the
one-tick map is linearised in pieces (noise off, reference frozen at tick k):

    δτ   = G δm,            G(s) = G₀ + s G_p + √s G_d         (controller, clip lifted)
    δu   = S_u δτ + S_p δu_prev                                 (saturation, rate limit)
    δu_d = δu delayed T_j ticks on joint j                      (transport delay)
    per integration substep:
    δτ_del = C_m δx_a + D_m δu_d,  δx_a ← A_d δx_a + B_d δu_d  (ZOH actuator bank)
    δm     ← M_m δm + M_τ δτ_del                                (friction, ABA, Euler)

G is affine in the factors that scale every stiffness (s) and every damping gain (√s,
ζ held), so three finite-difference Jacobians of the controller give G for any s;
S_u, S_p are 0/1 per joint from the command at the instant; M_m, M_τ come from central
differences of the plant over one substep. The closed loop is locally stable when the
spectral radius ρ of the assembled one-tick matrix is below 1. From it:

* stiffness margin — the factor s by which every tier's stiffness may grow, damping
  ratios held, before ρ reaches 1 (the first loss scanning up from 1);
* delay margin [ms] — the extra transport delay on every joint at once that the loop
  tolerates; whole ticks exactly (a longer delay line), fractions of a tick by linear
  interpolation between neighbouring taps;
* bandwidth margin — the factor by which every actuator's frequencies may fall.

The slow null-space posture mode does not move when these factors change, so it does
not decide them; it is reported on its own as the time constant of the slowest mode
(−T_s / ln ρ at the plan's own gains).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass

import numpy as np
import pinocchio as pin

from .actuators import JointActuator, discretize
from .exceptions import SimulationError
from .simulate import ClosedLoop, LoopState
from .trajectories import Reference

__all__ = [
    "BANDWIDTH_CAP",
    "DELAY_CAP_STATES",
    "DELAY_CAP_TICKS",
    "DELAY_TOL_TICKS",
    "FACTOR_TOL",
    "STIFFNESS_CAP",
    "LinearLoop",
    "MarginLimits",
    "Margins",
    "delay_cap_ticks",
    "home_check",
    "home_linear",
    "jacobian_fd",
    "loop_margins",
    "spectral_radius",
    "unstable_instant",
]

#: Largest factors and extra delay the margin searches look at; a margin at its cap
#: means "at least this much".
STIFFNESS_CAP = 100.0
BANDWIDTH_CAP = 20.0
DELAY_CAP_TICKS = 64
#: The delay search also stops where the one-tick matrix would exceed this many states
#: (each extra tick adds n): it bounds the cost on arms with many joints.
DELAY_CAP_STATES = 200
#: Relative resolution of the stiffness and bandwidth margins, and of the delay [ticks].
FACTOR_TOL = 0.01
DELAY_TOL_TICKS = 1.0 / 16.0


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


@dataclass(frozen=True)
class Margins:
    """Margins of the loop at one instant (or the worst over several)."""

    stiffness: float
    """Factor on every stiffness, damping ratios held, before instability [-]."""
    delay_ms: float
    """Extra transport delay on every joint before instability [ms]."""
    bandwidth: float
    """Factor by which every actuator's frequencies may fall before instability [-]."""
    slowest_mode_s: float
    """Time constant of the slowest mode at the plan's own gains [s] (inf when ρ ≥ 1)."""
    radius: float
    """Spectral radius ρ of the one-tick map at the plan's own gains [-]."""

    @staticmethod
    def worst(items: Iterable[Margins]) -> Margins:
        """Element-wise worst: smallest margins, slowest mode, largest radius."""
        ms = list(items)
        if not ms:
            nan = math.nan
            return Margins(nan, nan, nan, nan, nan)
        return Margins(
            stiffness=min(m.stiffness for m in ms),
            delay_ms=min(m.delay_ms for m in ms),
            bandwidth=min(m.bandwidth for m in ms),
            slowest_mode_s=max(m.slowest_mode_s for m in ms),
            radius=max(m.radius for m in ms),
        )


@dataclass(frozen=True)
class MarginLimits:
    """Smallest margins a feasible plan may have (``[simulation]`` of the problem)."""

    stiffness: float = 2.0
    """Stiffness margin [-] (2 = 6 dB)."""
    delay_ms: float = 1.0
    """Delay margin [ms]."""
    bandwidth: float = 1.25
    """Bandwidth margin [-]."""

    def shortfall(self, m: Margins) -> str | None:
        """Which margin is below its minimum, in words, or None."""
        if not m.stiffness >= self.stiffness:
            return f"stiffness margin {m.stiffness:.4g}× below the minimum {self.stiffness:g}×"
        if not m.delay_ms >= self.delay_ms:
            return f"delay margin {m.delay_ms:.4g} ms below the minimum {self.delay_ms:g} ms"
        if not m.bandwidth >= self.bandwidth:
            return f"bandwidth margin {m.bandwidth:.4g}× below the minimum {self.bandwidth:g}×"
        return None

    def violation(self, m: Margins) -> float:
        """How far the worst margin is below its minimum, as a relative amount (≤ 0: met)."""
        parts = [
            1.0 - m.stiffness / self.stiffness if self.stiffness > 0 else -1.0,
            1.0 - m.delay_ms / self.delay_ms if self.delay_ms > 0 else -1.0,
            1.0 - m.bandwidth / self.bandwidth if self.bandwidth > 0 else -1.0,
        ]
        worst = max(parts)
        return worst if math.isfinite(worst) else 1.0


class LinearLoop:
    """The loop linearised at one instant, in the pieces listed in the module docstring."""

    def __init__(
        self,
        loop: ClosedLoop,
        k: int,
        state: LoopState,
        split_gains: bool = True,
        coulomb_slope: bool = False,
        limits_active: bool = False,
    ) -> None:
        """Linearise ``loop`` at tick ``k`` and ``state``.

        ``split_gains=False`` skips the two extra controller Jacobians that stiffness
        scaling needs (stability only). ``coulomb_slope=False`` (the default for margins)
        holds the Coulomb friction torque at its value at the instant: near rest its
        smoothed slope τ_c/v_ε is a stiff damper that holds small motions, but an
        oscillation that outgrows v_ε no longer sees it (the describing function of
        Coulomb friction falls with amplitude), so a margin must not count on it. With
        True the matrix is the exact derivative of the simulator's step.

        ``limits_active=False`` (the default for margins) linearises as if no effort or
        rate limit bound at the instant: a saturated joint is an open loop, which a
        small-signal margin cannot describe; saturation is judged by the simulation
        (pinned commands, peak torque). With True (and ``coulomb_slope``) the matrix is
        the exact derivative of the step.
        """
        self.coulomb_slope = coulomb_slope
        self._v_hold = state.v.copy()
        self.loop = loop
        n = loop.n
        self.n = n
        self.nx = loop.bank.Ad.shape[0]
        self.dt = loop.dt
        self.h = loop.h
        self.delay = loop.delay.copy()
        self.has_rate = loop.has_rate
        q, v = state.q.copy(), state.v.copy()
        ctrl = loop.controller
        ref = getattr(ctrl, "ref", None)
        if ref is None or not 0 <= k < len(ref.t):
            raise SimulationError(
                f"linearising at tick {k} needs the controller bound to a reference that long"
            )
        m0 = np.concatenate([q, v])

        # the clip lifted; gains as planned, and (split_gains) stiffness or damping alone
        scales = ((1.0, 1.0), (1.0, 0.0), (0.0, 1.0)) if split_gains else ((1.0, 1.0),)

        def ctrl_map(m: np.ndarray) -> np.ndarray:
            return ctrl.commands(k, m[:n].copy(), m[n:].copy(), scales).ravel()

        tau0 = ctrl_map(m0)[:n]
        G = jacobian_fd(ctrl_map, m0)  # each factor pair's rows: its own Jacobian
        G11 = G[:n]
        if split_gains:
            G10, G01 = G[n : 2 * n], G[2 * n :]
            self.Gp = G11 - G01
            self.Gd = G11 - G10
        else:  # stiffness scaling unavailable: every factor gives the plan's own gains
            self.Gp = np.zeros_like(G11)
            self.Gd = np.zeros_like(G11)
        self.G0 = G11 - self.Gp - self.Gd
        # saturation and rate limit at the instant, as in plant.actuate
        eff = loop.effort
        u = np.clip(tau0, -eff, eff)
        du = u - state.u_prev
        rate = np.abs(du) > loop.rate_step
        sat = np.abs(tau0) > eff
        if not limits_active:
            rate = np.zeros(n, dtype=bool)
            sat = np.zeros(n, dtype=bool)
        self.Su = np.where(rate | sat, 0.0, 1.0)
        self.Sp = np.where(rate, 1.0, 0.0)
        step = np.where(rate, loop.rate_step, 0.0)
        u = np.where(rate, state.u_prev + np.sign(du) * step, u)
        # the command reaching the actuators this tick
        ud = np.array(
            [u[j] if self.delay[j] == 0 else state.hist[self.delay[j] - 1, j] for j in range(n)]
        )
        # plant Jacobians per substep, along the nominal substeps of this tick
        bank = loop.bank
        xa = state.xa.copy()
        self.mech: list[tuple[np.ndarray, np.ndarray]] = []
        for _ in range(loop.settings.substeps):
            tdel = bank.Cm @ xa + bank.Dm @ ud
            z0 = np.concatenate([q, v, tdel])
            self._v_hold = v.copy()
            J = jacobian_fd(self._mech_map, z0)
            self.mech.append((J[:, : 2 * n], J[:, 2 * n :]))
            qv = self._mech_map(z0)
            q, v = qv[:n], qv[n:]
            xa = bank.Ad @ xa + bank.Bd @ ud
        self._banks: dict[float, tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]] = {
            1.0: (bank.Ad, bank.Bd, bank.Cm, bank.Dm)
        }
        self._own_radius: float | None = None

    def _mech_map(self, z: np.ndarray) -> np.ndarray:
        """(q, v, delivered torque) ↦ (q, v) after one substep: friction, ABA, Euler."""
        loop, n, h = self.loop, self.n, self.h
        q, v, tdel = z[:n], z[n : 2 * n], z[2 * n :]
        c, ve, b = loop._fr[0], loop._fr[1], loop._fr[2]
        vc = v if self.coulomb_slope else self._v_hold
        net = tdel - c * np.tanh(vc / ve) - b * v
        a = pin.aba(loop.plant, loop.pdata, q, v, net)
        v1 = v + h * a
        return np.concatenate([q + h * v1, v1])

    def _bank(self, bandwidth: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        if bandwidth not in self._banks:
            acts: Sequence[JointActuator] = [
                dataclasses.replace(a, model=a.model.scaled(1.0 / bandwidth))
                for a in self.loop.actuators
            ]
            b = discretize(acts, self.h)
            self._banks[bandwidth] = (b.Ad, b.Bd, b.Cm, b.Dm)
        return self._banks[bandwidth]

    def matrix(
        self, stiffness: float = 1.0, extra_delay: float = 0.0, bandwidth: float = 1.0
    ) -> np.ndarray:
        """The one-tick matrix with every stiffness × ``stiffness`` (ζ held), ``extra_delay``
        ticks more on every joint, and every actuator's frequencies ÷ ``bandwidth``.

        State order: q, v, actuator states, delay line (row r holds the command of r + 1
        ticks ago), last command (with rate limits): at (1, 0, 1) this is the layout of
        ``ClosedLoop.pack`` and the same matrix as differentiating ``ClosedLoop.step``.
        """
        n, nx = self.n, self.nx
        d = int(math.floor(extra_delay))
        f = extra_delay - d
        T = self.delay + d
        H = int(T.max()) + (1 if f > 0 else 0) if n else 0
        N = 2 * n + nx + H * n + (n if self.has_rate else 0)
        i_xa, i_h = 2 * n, 2 * n + nx
        i_up = i_h + H * n
        G = self.G0 + stiffness * self.Gp + math.sqrt(stiffness) * self.Gd
        U = np.zeros((n, N))
        U[:, : 2 * n] = self.Su[:, None] * G
        if self.has_rate:
            U[np.arange(n), i_up + np.arange(n)] = self.Sp
        Ud = np.zeros((n, N))
        for j in range(n):
            for r, w in ((T[j] - 1, 1.0 - f), (T[j], f)):
                if w == 0.0:
                    continue
                if r < 0:
                    Ud[j] += w * U[j]
                else:
                    Ud[j, i_h + r * n + j] += w
        Ad, Bd, Cm, Dm = self._bank(bandwidth)
        Xa = np.zeros((nx, N))
        Xa[:, i_xa : i_xa + nx] = np.eye(nx)
        Mq = np.zeros((2 * n, N))
        Mq[:, : 2 * n] = np.eye(2 * n)
        for Mm, Mt in self.mech:
            Tdel = Cm @ Xa + Dm @ Ud
            Xa = Ad @ Xa + Bd @ Ud
            Mq = Mm @ Mq + Mt @ Tdel
        A = np.zeros((N, N))
        A[: 2 * n] = Mq
        A[i_xa : i_xa + nx] = Xa
        if H:
            A[i_h : i_h + n] = U
            for r in range(1, H):
                A[i_h + r * n + np.arange(n), i_h + (r - 1) * n + np.arange(n)] = 1.0
        if self.has_rate:
            A[i_up : i_up + n] = U
        return A

    def radius(
        self, stiffness: float = 1.0, extra_delay: float = 0.0, bandwidth: float = 1.0
    ) -> float:
        """Spectral radius of ``matrix`` with those factors (at the plan's own gains it is
        computed once: every margin search starts there)."""
        own = stiffness == 1.0 and extra_delay == 0.0 and bandwidth == 1.0
        if own and self._own_radius is not None:
            return self._own_radius
        r = spectral_radius(self.matrix(stiffness, extra_delay, bandwidth))
        if own:
            self._own_radius = r
        return r

    def stable(self, **kw: float) -> bool:
        """Whether the one-tick matrix with those factors has ρ < 1."""
        return self.radius(**kw) < 1.0

    # -- margins -----------------------------------------------------------------------
    def stiffness_margin(
        self, cap: float = STIFFNESS_CAP, probe: float = math.nan, floor: float = math.inf
    ) -> float:
        """Largest stiffness factor (ζ held) with the loop stable [-]; 0 when none ≥ 1e-3.

        ``probe`` (a minimum to be met) is decided exactly when it falls in the last bracket.
        ``floor``: once the margin is known to be at least this, the search stops and
        returns a value ≥ ``floor`` (the worst over several instants needs no more).
        """
        return _factor_margin(lambda s: self.radius(stiffness=s), cap, 1.5, probe, floor)

    def bandwidth_margin(
        self, cap: float = BANDWIDTH_CAP, probe: float = math.nan, floor: float = math.inf
    ) -> float:
        """Largest factor by which every actuator may slow down with the loop stable [-];
        ``probe`` and ``floor`` as in stiffness_margin."""
        return _factor_margin(lambda b: self.radius(bandwidth=b), cap, 1.3, probe, floor)

    def delay_cap_ticks(self) -> int:
        """Largest extra delay the margin search looks at [ticks]."""
        return delay_cap_ticks(self.loop)

    def delay_margin_ticks(
        self, cap: int | None = None, probe: float = math.nan, floor: float = math.inf
    ) -> float:
        """Largest extra delay on every joint with the loop stable [ticks]; ``cap`` when
        stable up to it (default ``delay_cap_ticks``); ``probe`` and ``floor`` as in
        stiffness_margin."""
        cap = self.delay_cap_ticks() if cap is None else cap
        r0 = self.radius()
        if not r0 < 1.0:
            return 0.0
        lo, hi, r_lo = 0, 1, r0
        while (r := self.radius(extra_delay=hi)) < 1.0:
            lo, r_lo = hi, r
            if hi >= cap:
                return float(cap)
            if lo >= floor:
                return float(lo)
            hi = min(2 * hi, cap)
        r_hi = r
        while hi - lo > 1 and not lo >= floor:
            mid = (lo + hi) // 2
            r = self.radius(extra_delay=mid)
            if r < 1.0:
                lo, r_lo = mid, r
            else:
                hi, r_hi = mid, r
        return _crossing(
            lambda e: self.radius(extra_delay=e), float(lo), float(hi), r_lo, r_hi,
            lambda a, b: b - a <= DELAY_TOL_TICKS, log=False, probe=probe, floor=floor,
        )

    def margins(
        self,
        which: Sequence[str] = ("stiffness", "delay", "bandwidth"),
        limits: MarginLimits | None = None,
        floor: Margins | None = None,
    ) -> Margins:
        """The margins named in ``which`` (the others are nan) and the slowest mode; with
        ``limits``, a margin close to its minimum is decided exactly at the minimum. With
        ``floor`` (the worst of other instants so far), a margin known to be at least the
        floor's is not located further: it is returned as that lower bound, so the worst
        over the instants comes out exactly as with every margin located."""
        fl = floor or Margins(math.inf, math.inf, math.inf, math.nan, math.nan)
        fs, fd, fb = (math.inf if math.isnan(x) else x
                      for x in (fl.stiffness, fl.delay_ms, fl.bandwidth))
        rho = self.radius()
        slow = -self.dt / math.log(rho) if 0.0 < rho < 1.0 else (0.0 if rho == 0 else math.inf)
        lim = limits or MarginLimits(math.nan, math.nan, math.nan)
        ms = self.dt * 1e3
        return Margins(
            stiffness=self.stiffness_margin(probe=lim.stiffness, floor=fs)
            if "stiffness" in which
            else math.nan,
            delay_ms=self.delay_margin_ticks(probe=lim.delay_ms / ms, floor=fd / ms) * ms
            if "delay" in which
            else math.nan,
            bandwidth=self.bandwidth_margin(probe=lim.bandwidth, floor=fb)
            if "bandwidth" in which
            else math.nan,
            slowest_mode_s=slow,
            radius=rho,
        )

    def meets(self, limits: MarginLimits, stiffness: float = 1.0) -> bool:
        """Whether the loop is stable at its own gains and at each minimum margin; with
        ``stiffness``, for every stiffness × that factor (ζ held) as its own gains."""
        s0 = stiffness
        if not self.stable(stiffness=s0):
            return False
        if not all(self.stable(stiffness=s0 * s) for s in _ladder(limits.stiffness)):
            return False
        ticks = limits.delay_ms / (self.dt * 1e3)
        if ticks > 0 and not self.stable(stiffness=s0, extra_delay=ticks):
            return False
        return limits.bandwidth <= 1.0 or self.stable(stiffness=s0, bandwidth=limits.bandwidth)


def delay_cap_ticks(loop: ClosedLoop) -> int:
    """Largest extra delay the margin search looks at on ``loop`` [ticks]: DELAY_CAP_TICKS,
    or less where the one-tick matrix would pass DELAY_CAP_STATES states."""
    n = loop.n
    base = 2 * n + loop.bank.Ad.shape[0] + loop.D * n + (n if loop.has_rate else 0)
    room = (DELAY_CAP_STATES - base) // max(n, 1)
    return max(2, min(DELAY_CAP_TICKS, room))


def _ladder(top: float) -> list[float]:
    """Stiffness factors checked up to ``top``: the scan of the margin search, then top."""
    out, s = [], 1.3
    while s < top:
        out.append(s)
        s *= 1.3
    return [*out, top] if top > 1.0 else []


def _factor_margin(
    radius: Callable[[float], float],
    cap: float,
    step: float,
    probe: float = math.nan,
    floor: float = math.inf,
) -> float:
    """Largest factor x with ``radius(x) < 1``, the first loss scanning from 1 (up, or
    down when 1 is unstable) in steps of ``step``, then located to FACTOR_TOL; a stable
    point at or above ``floor`` ends the search there (a lower bound)."""
    r1 = radius(1.0)
    if r1 < 1.0:
        if floor <= 1.0:
            return 1.0
        lo, r_lo, hi = 1.0, r1, min(step, cap)
        while (r := radius(hi)) < 1.0:
            if hi >= cap:
                return cap
            lo, r_lo, hi = hi, r, min(hi * step, cap)
            if lo >= floor:
                return lo
        r_hi = r
    else:
        hi, r_hi, lo = 1.0, r1, 1.0 / step
        while not (r := radius(lo)) < 1.0:
            hi, r_hi, lo = lo, r, lo / step
            if lo < 1e-3:
                return 0.0
        r_lo = r
    return _crossing(
        radius, lo, hi, r_lo, r_hi, lambda a, b: b / a <= 1.0 + FACTOR_TOL, probe=probe,
        floor=floor,
    )


def _crossing(
    radius: Callable[[float], float],
    lo: float,
    hi: float,
    r_lo: float,
    r_hi: float,
    done: Callable[[float, float], bool],
    log: bool = True,
    probe: float = math.nan,
    floor: float = math.inf,
) -> float:
    """The stable end of a bracket [lo stable, hi unstable] shrunk until ``done``: regula
    falsi on ρ − 1 (Illinois variant), in log x when ``log``, with a bisection whenever
    the guess would not cut the bracket by a quarter. A ``probe`` inside the last bracket
    is evaluated, so that a comparison with it is exact. Once ``lo`` ≥ ``floor`` it is
    returned as it is (a lower bound is all the caller needs)."""
    side = 0
    while not done(lo, hi):
        if lo >= floor:
            return lo
        a, b = (math.log(lo), math.log(hi)) if log else (lo, hi)
        fa, fb = r_lo - 1.0, r_hi - 1.0
        if side == -1:
            fb *= 0.5
        elif side == 1:
            fa *= 0.5
        t = fa / (fa - fb) if math.isfinite(fb) and fa != fb else 0.5
        t = min(max(t, 0.25), 0.75)
        x = a + t * (b - a)
        x = math.exp(x) if log else x
        r = radius(x)
        if r < 1.0:
            lo, r_lo, side = x, r, -1
        else:
            hi, r_hi, side = x, r, 1
    if lo < probe < hi and radius(probe) < 1.0:
        return probe
    return lo


def loop_margins(
    loop: ClosedLoop,
    samples: Iterable[tuple[int, LoopState]],
    limits: MarginLimits | None = None,
) -> Margins:
    """Worst margins over the sampled (tick, state) pairs of a rollout (decided exactly at
    the minimums of ``limits`` when close to them)."""
    worst: Margins | None = None
    for k, st in samples:
        m = LinearLoop(loop, k, st).margins(limits=limits, floor=worst)
        worst = m if worst is None else Margins.worst((worst, m))
    return worst if worst is not None else Margins.worst(())


def unstable_instant(
    loop: ClosedLoop, samples: Iterable[tuple[int, LoopState]]
) -> int | None:
    """The first sampled tick at which the linearised loop is unstable (ρ ≥ 1), or None."""
    for k, st in samples:
        if not LinearLoop(loop, k, st, split_gains=False).stable():
            return k
    return None


def home_linear(loop: ClosedLoop, ref: Reference) -> LinearLoop:
    """``loop`` linearised at the home pose (t = 0 of ``ref``), at rest."""
    loop.controller.bind(ref)
    return LinearLoop(loop, 0, loop.initial_state())


def home_check(loop: ClosedLoop, ref: Reference, limits: MarginLimits) -> bool:
    """Whether the loop at the home pose (t = 0 of ``ref``) meets ``limits``: a cheap
    pre-check before any rollout."""
    return home_linear(loop, ref).meets(limits)
