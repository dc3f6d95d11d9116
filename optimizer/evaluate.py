"""Score a controller on a problem: one rollout per trajectory, metrics, stability margins.

Pure library code: no printing, no optuna. ``on_trajectory`` lets a caller (the search)
see the running error after each trajectory and stop early by raising.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import asdict, dataclass

import numpy as np

from .control import Controller, JointSpaceController, TieredController
from .metrics import TrackMetrics, track_metrics
from .plan import Plan, single_tier
from .problem import Problem
from .simulate import ClosedLoop, Rollout
from .stability import Margins, delay_cap_ticks, loop_margins, unstable_instant

__all__ = [
    "NO_MARGINS",
    "Score",
    "TrajectoryScore",
    "evaluate",
    "finite",
    "joint_controller",
    "joint_gains_text",
    "make_loop",
    "margin_fields",
    "osc_plan",
    "plan_controller",
    "score_joint_baseline",
    "score_osc_baseline",
    "score_plan",
    "trajectory_error",
]


@dataclass(frozen=True)
class TrajectoryScore:
    """Figures of one plan on one trajectory."""

    name: str
    """Trajectory name."""
    metrics: TrackMetrics
    """Tracking and effort figures."""
    margins: Margins
    """Worst margins over the sampled instants (nan when diverged or not computed)."""
    diverged: bool
    """True when the rollout stopped early."""
    reason: str | None
    """Why it stopped, or None."""
    steps: int
    """Ticks simulated."""
    error_index: float
    """Weighted normalised RMS error of this trajectory [-]."""
    bounded_ticks: int = 0
    """Ticks where the bounded law's QP was solved (a limit would have bound) [-]."""
    qp_failures: int = 0
    """Ticks where that QP failed and the clipped sum was used instead [-]."""


@dataclass(frozen=True)
class Score:
    """Figures of one plan (or baseline) over the whole trajectory set."""

    label: str
    """Name shown in tables."""
    kind: str
    """``plan``, ``osc`` or ``joint_space``."""
    tiers: int
    """Tier count."""
    plan_text: str
    """Plan in one line (or the baseline's gains)."""
    feasible: bool
    """Stable with margin and no divergence on any trajectory."""
    reason: str | None
    """Why not feasible, or None."""
    pos_rms_mm: float
    """Mean over trajectories of the RMS position error [mm]."""
    rot_rms_deg: float
    """Mean over trajectories of the RMS orientation error [deg]."""
    pos_max_mm: float
    """Largest position error over the set [mm]."""
    rot_max_deg: float
    """Largest orientation error over the set [deg]."""
    tau_rms_nm: float
    """Mean over trajectories of the RMS commanded torque [N·m]."""
    peak_torque_ratio: float
    """Largest |command| / limit over the set [-]."""
    path_at_mm: float | None
    """Largest path accuracy AT_p over the set [mm] (None when no trajectory moves)."""
    stiffness_margin: float
    """Smallest stiffness margin over the set: factor on every stiffness, ζ held [-]."""
    delay_margin_ms: float
    """Smallest delay margin over the set: extra delay on every joint [ms]."""
    bandwidth_margin: float
    """Smallest bandwidth margin over the set: factor every actuator may slow down [-]."""
    slowest_mode_s: float
    """Time constant of the slowest mode (the posture loop, usually) [s]."""
    delay_cap_ms: float
    """Largest extra delay the delay-margin search looks at [ms] (a margin there means
    at least this much)."""
    error_index: float
    """Aggregate error the search minimises (inf when infeasible by divergence) [-]."""
    steps: int
    """Ticks simulated over the set."""
    trajectories: tuple[TrajectoryScore, ...]
    """Per-trajectory figures."""
    law: str = "summed"
    """The plan's control law (``summed`` or ``bounded``; ``summed`` for joint space)."""
    bounded_ticks: int = 0
    """Ticks over the set where the bounded law's QP was solved [-]."""
    qp_failures: int = 0
    """Ticks over the set where it failed and the clipped sum was used [-]."""

    def to_dict(self) -> dict[str, object]:
        """JSON-ready dict; non-finite numbers become None."""
        d = {k: v for k, v in asdict(self).items() if k != "trajectories"}
        d["trajectories"] = [
            {
                "name": t.name,
                **asdict(t.metrics),
                **margin_fields(t.margins),
                "diverged": t.diverged,
                "reason": t.reason,
                "steps": t.steps,
                "error_index": t.error_index,
                "bounded_ticks": t.bounded_ticks,
                "qp_failures": t.qp_failures,
            }
            for t in self.trajectories
        ]
        out: dict[str, object] = finite(d)  # type: ignore[assignment]
        return out


def margin_fields(m: Margins) -> dict[str, float]:
    """The margins under the field names of scores, rankings and JSON."""
    return {
        "stiffness_margin": m.stiffness,
        "delay_margin_ms": m.delay_ms,
        "bandwidth_margin": m.bandwidth,
        "slowest_mode_s": m.slowest_mode_s,
    }


NO_MARGINS = Margins(math.nan, math.nan, math.nan, math.nan, math.nan)


def finite(x: object) -> object:
    """``x`` with non-finite floats (also inside dicts and lists) replaced by None."""
    if isinstance(x, float):
        return x if math.isfinite(x) else None
    if isinstance(x, dict):
        return {k: finite(v) for k, v in x.items()}
    if isinstance(x, list):
        return [finite(v) for v in x]
    return x


def plan_controller(problem: Problem, plan: Plan, kind: str = "plan") -> TieredController:
    """The tiered controller of ``plan`` on ``problem`` (with the drives' rate limits, which
    the bounded law keeps to)."""
    rates = np.array([a.rate_limit_nm_s for a in problem.actuators])
    return TieredController(problem.arm, plan, problem.control, kind=kind, rate_limits=rates)


def osc_plan(
    problem: Problem, kp_t: float, kp_r: float, zeta: float, label: str = "single-tier OSC"
) -> Plan:
    """Single-tier OSC over every joint."""
    return single_tier(problem.arm.n, kp_t, kp_r, zeta, problem.arm.joint_names, label=label)


def joint_controller(
    problem: Problem, kp: object, zeta: float, label: str = "joint-space CLIK + PD"
) -> JointSpaceController:
    """The joint-space baseline with the problem's CLIK settings."""
    b = problem.baseline
    return JointSpaceController(
        problem.arm,
        problem.control,
        np.asarray(kp, dtype=float),
        zeta,
        b.clik_gain,
        b.clik_damping,
        b.posture_gain,
        label=label,
    )


def make_loop(problem: Problem, controller: Controller) -> ClosedLoop:
    """The closed loop of ``controller`` on the problem's plant."""
    return ClosedLoop(problem.arm, problem.actuators, controller, problem.dt, problem.sim)


def trajectory_error(problem: Problem, m: TrackMetrics) -> float:
    """Weighted normalised RMS error of one trajectory [-]."""
    s = problem.scoring
    return (
        s.pos_weight * m.pos_rms_mm / s.pos_scale_mm
        + s.rot_weight * m.rot_rms_deg / s.rot_scale_deg
    )


def evaluate(
    problem: Problem,
    controller: Controller,
    label: str,
    plan_text: str = "",
    stop_on_failure: bool = False,
    compute_margin: bool = True,
    on_trajectory: Callable[[int, float, float], None] | None = None,
    keep_rollouts: list[Rollout] | None = None,
    seed: int | None = None,
    check_stable: bool = False,
) -> Score:
    """Simulate ``controller`` on every trajectory of ``problem`` and score it.

    Args:
        stop_on_failure: skip the remaining trajectories once one diverges or is unstable.
        compute_margin: linearise the loop at the sampled instants and find the stiffness,
            delay and bandwidth margins there (a plan below the problem's minimums is
            infeasible).
        check_stable: without ``compute_margin``, still linearise at the sampled instants
            and count a loop with spectral radius ≥ 1 as a failure; path accuracy is
            skipped (perturbed plants).
        on_trajectory: called with (index, running aggregate error, this trajectory's
            error) after each trajectory.
        keep_rollouts: when given, every rollout is appended to it (for figures).
        seed: noise seed (default: the problem's).
    """
    loop = make_loop(problem, controller)
    per: list[TrajectoryScore] = []
    s = problem.scoring
    for i, ref in enumerate(problem.references):
        ro = loop.rollout(ref, seed=seed)
        if keep_rollouts is not None:
            keep_rollouts.append(ro)
        m = track_metrics(ro, loop.effort, s.settle_s, problem.dt, path_accuracy=not check_stable)
        margins = NO_MARGINS
        diverged, why = ro.diverged, ro.reason
        if compute_margin and not diverged:
            margins = loop_margins(loop, ro.snapshots, s.margins)
        elif check_stable and not diverged:
            k = unstable_instant(loop, ro.snapshots)
            if k is not None:
                diverged = True
                why = f"linearised loop unstable at t={ref.t[k]:.3f} s (spectral radius ≥ 1)"
        err = math.inf if diverged else trajectory_error(problem, m)
        qp_ticks = int(getattr(controller, "bounded_ticks", 0))
        qp_fail = int(getattr(controller, "qp_failures", 0))
        per.append(
            TrajectoryScore(ref.name, m, margins, diverged, why, ro.steps, err, qp_ticks, qp_fail)
        )
        if on_trajectory is not None:
            on_trajectory(i, _aggregate([t.error_index for t in per], s.aggregate), err)
        unstable = compute_margin and not diverged and s.margins.shortfall(margins) is not None
        if stop_on_failure and (diverged or unstable):
            break
    return _score(problem, controller, label, plan_text, per, delay_cap_ticks(loop) * problem.dt)


def _aggregate(values: list[float], how: str) -> float:
    if not values:
        return math.inf
    return float(max(values)) if how == "worst" else float(np.mean(values))


def _score(
    problem: Problem,
    controller: Controller,
    label: str,
    plan_text: str,
    per: list[TrajectoryScore],
    delay_cap_s: float,
) -> Score:
    s = problem.scoring
    reason = next((f"on {t.name!r}: {t.reason}" for t in per if t.diverged), None)
    computed = [t for t in per if not math.isnan(t.margins.radius)]
    worst_m = Margins.worst(t.margins for t in computed) if computed else NO_MARGINS
    if reason is None:
        short = next(
            ((t.name, w) for t in computed if (w := s.margins.shortfall(t.margins))), None
        )
        if short is not None:
            reason = f"on {short[0]!r}: {short[1]}"
    if reason is None and len(per) < len(problem.references):
        reason = "not all trajectories were run"
    ats = [t.metrics.path_at_mm for t in per if t.metrics.path_at_mm is not None]
    return Score(
        label=label,
        kind=controller.kind,
        tiers=controller.n_tiers,
        plan_text=plan_text,
        feasible=reason is None,
        reason=reason,
        pos_rms_mm=float(np.mean([t.metrics.pos_rms_mm for t in per])),
        rot_rms_deg=float(np.mean([t.metrics.rot_rms_deg for t in per])),
        pos_max_mm=float(max(t.metrics.pos_max_mm for t in per)),
        rot_max_deg=float(max(t.metrics.rot_max_deg for t in per)),
        tau_rms_nm=float(np.mean([t.metrics.tau_rms_nm for t in per])),
        peak_torque_ratio=float(max(t.metrics.peak_torque_ratio for t in per)),
        path_at_mm=float(max(ats)) if ats else None,
        stiffness_margin=worst_m.stiffness,
        delay_margin_ms=worst_m.delay_ms,
        bandwidth_margin=worst_m.bandwidth,
        slowest_mode_s=worst_m.slowest_mode_s,
        delay_cap_ms=delay_cap_s * 1e3,
        law=str(getattr(getattr(controller, "plan", None), "law", "summed")),
        bounded_ticks=sum(t.bounded_ticks for t in per),
        qp_failures=sum(t.qp_failures for t in per),
        error_index=_aggregate([t.error_index for t in per], s.aggregate),
        steps=sum(t.steps for t in per),
        trajectories=tuple(per),
    )


def score_plan(
    problem: Problem,
    plan: Plan,
    *,
    compute_margin: bool = True,
    seed: int | None = None,
    keep_rollouts: list[Rollout] | None = None,
    stop_on_failure: bool = False,
) -> Score:
    """Evaluate a tier plan (kind ``osc`` when it is one all-joint tier); the options are
    ``evaluate``'s."""
    n = problem.arm.n
    ctrl = plan_controller(problem, plan, kind="osc" if plan.is_single_tier(n) else "plan")
    return evaluate(problem, ctrl, plan.label, plan.compact(n), compute_margin=compute_margin,
                    seed=seed, keep_rollouts=keep_rollouts,
                    stop_on_failure=stop_on_failure)


def score_osc_baseline(
    problem: Problem,
    *,
    compute_margin: bool = True,
    seed: int | None = None,
    keep_rollouts: list[Rollout] | None = None,
    stop_on_failure: bool = False,
) -> Score:
    """Single-tier OSC at the problem's baseline gains; the options are ``evaluate``'s."""
    b = problem.baseline
    plan = osc_plan(problem, b.osc_kp_t, b.osc_kp_r, b.osc_zeta, label="baseline: single-tier OSC")
    ctrl = plan_controller(problem, plan, kind="osc")
    return evaluate(problem, ctrl, plan.label, plan.compact(problem.arm.n),
                    compute_margin=compute_margin, seed=seed, keep_rollouts=keep_rollouts,
                    stop_on_failure=stop_on_failure)


def joint_gains_text(kp: tuple[float, ...] | np.ndarray, zeta: float) -> str:
    """Joint-space gains in one line."""
    vals = np.atleast_1d(np.asarray(kp, dtype=float))
    body = (
        f"kp {vals[0]:.4g}"
        if np.all(vals == vals[0])
        else "kp " + "/".join(f"{v:.3g}" for v in vals)
    )
    return f"joint PD {body} z{zeta:.3g}"


def score_joint_baseline(
    problem: Problem,
    *,
    compute_margin: bool = True,
    seed: int | None = None,
    keep_rollouts: list[Rollout] | None = None,
    stop_on_failure: bool = False,
) -> Score:
    """Joint-space CLIK + PD at the problem's baseline gains; the options are
    ``evaluate``'s."""
    b = problem.baseline
    ctrl = joint_controller(
        problem, b.joint_kp, b.joint_zeta, label="baseline: joint-space CLIK + PD"
    )
    return evaluate(problem, ctrl, ctrl.label, joint_gains_text(b.joint_kp, b.joint_zeta),
                    compute_margin=compute_margin, seed=seed, keep_rollouts=keep_rollouts,
                    stop_on_failure=stop_on_failure)
