r"""Physically informed starting points: the gain ladder, and informed baseline gains.

The ladder climbs the joint subsets in order of falling bandwidth — every joint, then
the joints whose drives are at least as fast as the next bandwidth level, and so on. On
each rung it finds, on the linearised loop at the home pose, the highest task stiffness a
tier through that subset can carry on top of the rungs below (each at ``FRACTION`` of its
own limit) while the problem's minimum margins still hold; the margins scale every tier
at once, so each limit already includes the required stiffness margin. A rung whose
subset has no more joints than the task has rotation axes acts on orientation only (that
is all such a subset can reach independently of the others).

The suggested plan takes one tier per rung whose limit is at least ``MIN_GAIN_STEP`` times
the stiffness of the tier below (a tier that adds less stiffness adds little but risk),
each at ``FRACTION`` of its limit: the home pose is one instant of many, and the fraction
leaves room for the others (common practice, no source).

Informed baselines follow the same idea: single-tier OSC at ``FRACTION`` of its limit,
with the ratio of rotational to translational stiffness that tracks best on the nominal
plant among a few;
joint-space PD with per-joint stiffness in proportion to (2ζ / (τ_j + d_j))², the
Routh–Hurwitz bound ωn < 2ζ/τ of a unit inertia under PD through a first-order lag τ
(tests/REFERENCES.md §5), with the joint's delay d_j added to its lag (common practice, no
source), scaled by one factor to the margins' limit.

Pure library code: no printing, no optuna.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from .control import Controller, ControlSettings
from .evaluate import evaluate, joint_controller, make_loop, plan_controller
from .plan import Plan, Tier
from .problem import Problem
from .stability import home_check, home_linear

__all__ = [
    "DEVIATION_RANGE",
    "FRACTION",
    "FRACTION_RANGE",
    "K_RANGE",
    "K_TOL",
    "MIN_GAIN_STEP",
    "OSC_RATIOS",
    "RATIO_RANGE",
    "ZETA",
    "Rung",
    "bandwidth_cuts",
    "bandwidth_order",
    "gain_ladder",
    "highest_scaled",
    "highest_stiffness",
    "informed_joint_gains",
    "informed_osc",
    "joint_boundary",
    "joint_from_coords",
    "joint_gain_shape",
    "joint_to_coords",
    "ladder_variants",
    "osc_boundary",
    "osc_from_coords",
    "osc_to_coords",
    "suggested_plan",
]

#: Share of each rung's (or baseline's) stiffness limit used in suggested gains [-].
FRACTION = 0.7
#: A rung becomes a tier when its limit is at least this factor over the tier below [-].
MIN_GAIN_STEP = 2.0
#: Damping ratio of suggested tiers and baselines [-] (near critical; common practice).
ZETA = 0.8
#: Range of stiffness searched for a limit [1/s²], and its relative resolution.
K_RANGE = (1.0, 1e6)
K_TOL = 0.03


def bandwidth_order(problem: Problem, joints: Sequence[int]) -> list[int]:
    """``joints`` from the slowest to the fastest actuator (stable for ties)."""
    bw = [problem.actuators[j].model.bandwidth_hz() for j in joints]
    return [j for _, j in sorted(zip(bw, joints, strict=True), key=lambda x: x[0])]


def bandwidth_cuts(problem: Problem, joints: Sequence[int]) -> list[list[int]]:
    """The strict subsets of ``joints`` a ranked tier may keep: those whose drives are at
    least as fast as a cut, for every cut above the slowest drive among ``joints`` (drives
    of equal bandwidth stay together). Largest first."""
    bw = {j: problem.actuators[j].model.bandwidth_hz() for j in joints}
    levels = sorted(set(bw.values()))
    return [sorted(j for j in joints if bw[j] >= cut) for cut in levels[1:]]


@dataclass(frozen=True)
class Rung:
    """One rung of the gain ladder."""

    joints: tuple[int, ...]
    """Joint indices of the subset."""
    slowest: str
    """Name of the slowest joint in the subset."""
    slowest_hz: float
    """Bandwidth of that joint's drive [Hz]."""
    part: str
    """``both`` or ``orientation``: what a tier through the subset acts on."""
    limit: float
    """Highest stiffness with the minimum margins held, on top of the rungs below [1/s²];
    0 when none in ``K_RANGE`` holds them."""
    gain_step: float
    """``limit`` over the stiffness of the tier below (inf on the first rung) [-]."""


def highest_stiffness(
    problem: Problem, make: Callable[[float], Controller], lo: float = K_RANGE[0],
    hi: float = K_RANGE[1],
) -> float:
    """Largest k in [lo, hi] for which ``make(k)`` meets the problem's minimum margins at
    the home pose: the largest on a grid of factors of 2 over the range (a soft loop may
    not hold an unmodelled payload, so the stable range need not start at ``lo``), then
    bisected in log k against the next grid point; 0 when none holds."""
    ref = problem.references[0]
    limits = problem.scoring.margins
    return _highest(lambda k: home_check(make_loop(problem, make(k)), ref, limits), lo, hi)


def highest_scaled(
    problem: Problem, make: Callable[[float], Controller], lo: float = K_RANGE[0],
    hi: float = K_RANGE[1],
) -> float:
    """``highest_stiffness`` for a family whose every stiffness grows as k and every damping
    gain as √k (damping ratios held), all else fixed: the single-tier baselines. Such a
    controller is ``make(k₀)`` with ``set_gain_scale(k/k₀, √(k/k₀))``, and the loop's one-tick
    matrix is affine in those factors, so one linearisation at the home pose (at k₀, the
    range's geometric middle) serves every k; the same grid and bisection."""
    k0 = math.sqrt(lo * hi)
    lin = home_linear(make_loop(problem, make(k0)), problem.references[0])
    limits = problem.scoring.margins
    return _highest(lambda k: lin.meets(limits, stiffness=k / k0), lo, hi)


def _highest(ok: Callable[[float], bool], lo: float, hi: float) -> float:
    grid = [lo * 2.0**i for i in range(int(math.log2(hi / lo)) + 1)]
    good = [k for k in grid if ok(k)]
    if not good:
        return 0.0
    a = good[-1]
    if a >= grid[-1]:
        return a
    b = 2.0 * a
    while b / a > 1.0 + K_TOL:
        m = math.sqrt(a * b)
        if ok(m):
            a = m
        else:
            b = m
    return a


def _rotation_axes(control: ControlSettings) -> int:
    return sum(1 for ax in control.task_axes if ax >= 3)


def gain_ladder(problem: Problem) -> list[Rung]:
    """The rungs from every joint to the fastest group (see the module docstring)."""

    n = problem.arm.n
    names = problem.arm.joint_names
    bw = [a.model.bandwidth_hz() for a in problem.actuators]
    subsets = [list(range(n))]
    while cuts := bandwidth_cuts(problem, subsets[-1]):
        subsets.append(cuts[0])
    rungs: list[Rung] = []
    below: list[Tier] = []
    prev_gain = math.inf
    for joints in subsets:
        part = "both" if len(joints) > _rotation_axes(problem.control) else "orientation"
        if not rungs:
            part = "both"

        def make(k: float, joints: list[int] = joints, part: str = part) -> Controller:
            tier = Tier(tuple(joints), 0.0 if part == "orientation" else k, k, ZETA)
            return plan_controller(problem, Plan((*below, tier), joint_names=names))

        limit = highest_stiffness(problem, make)
        slow = min(joints, key=lambda j: bw[j])
        step = limit / prev_gain if rungs and prev_gain > 0 else math.inf
        rungs.append(Rung(tuple(joints), names[slow], bw[slow], part, limit, step))
        if limit <= 0:
            break
        g = FRACTION * limit
        below.append(Tier(tuple(joints), 0.0 if part == "orientation" else g, g, ZETA))
        prev_gain = g
    return rungs


def suggested_plan(problem: Problem, rungs: list[Rung] | None = None) -> Plan | None:
    """One tier per rung that adds at least ``MIN_GAIN_STEP`` of stiffness, at ``FRACTION``
    of its limit; None when not even every joint together holds any stiffness."""
    rungs = gain_ladder(problem) if rungs is None else rungs
    if not rungs or rungs[0].limit <= 0:
        return None
    tiers: list[Tier] = []
    for r in rungs:
        if r.limit <= 0:
            break
        if tiers and r.gain_step < MIN_GAIN_STEP:
            continue
        g = FRACTION * r.limit
        tiers.append(Tier(r.joints, 0.0 if r.part == "orientation" else g, g, ZETA))
    return Plan(
        tuple(tiers), label="ladder: suggested plan", nested=True,
        joint_names=problem.arm.joint_names,
    )


#: kp_r / kp_t ratios tried for the informed single-tier OSC.
OSC_RATIOS = (1.0, 2.0, 4.0, 8.0, 16.0)


def ladder_variants(problem: Problem, rungs: list[Rung] | None = None) -> list[Plan]:
    """The suggested plan and a few neighbours the plan search also evaluates first: every
    tier at 85 % and at 55 % of its rung's limit, and the middle tiers on position only
    (leaving orientation to the fastest tier). They start the search in the region the
    ladder found stable, at no more than a handful of trials."""
    rungs = gain_ladder(problem) if rungs is None else rungs
    base = suggested_plan(problem, rungs)
    if base is None:
        return []
    out = [base]
    for share in (0.85, 0.55):
        tiers = tuple(
            dataclasses.replace(t, kp_t=t.kp_t * share / FRACTION, kp_r=t.kp_r * share / FRACTION)
            for t in base.tiers
        )
        out.append(dataclasses.replace(base, tiers=tiers, label=f"ladder: at {share:.0%}"))
    if len(base.tiers) >= 3:
        tiers = tuple(
            dataclasses.replace(t, kp_r=0.0) if 0 < i < len(base.tiers) - 1 and t.kp_t > 0 else t
            for i, t in enumerate(base.tiers)
        )
        if tiers != base.tiers:
            out.append(dataclasses.replace(base, tiers=tiers, label="ladder: middle on position"))
    return out


def informed_osc(problem: Problem) -> tuple[float, float, float] | None:
    """(kp_t, kp_r, ζ) of single-tier OSC at ``FRACTION`` of its stiffness limit, with the
    kp_r / kp_t of ``OSC_RATIOS`` that tracks best on the nominal plant (orientation runs
    mostly through the fast wrist, so it often carries a stiffer loop than position)."""
    best: tuple[float, tuple[float, float, float]] | None = None
    for ratio in OSC_RATIOS:
        k = FRACTION * osc_boundary(problem, ZETA, ratio)
        if k <= 0:
            continue
        plan = Plan((Tier(tuple(range(problem.arm.n)), k, ratio * k, ZETA),),
                    joint_names=problem.arm.joint_names)
        s = evaluate(problem, plan_controller(problem, plan, kind="osc"), "informed",
                     compute_margin=False)
        err = s.error_index if s.feasible else math.inf
        if best is None or err < best[0]:
            best = (err, (k, ratio * k, ZETA))
    return best[1] if best is not None else None


def joint_gain_shape(problem: Problem, zeta: float = ZETA) -> np.ndarray:
    """Per-joint stiffness in proportion to (2ζ / (τ_j + d_j))² [1/s²] (module docstring)."""
    out = []
    for a in problem.actuators:
        tau = 1.0 / (2.0 * math.pi * a.model.bandwidth_hz())
        out.append((2.0 * zeta / (tau + a.delay_ticks * problem.dt)) ** 2)
    return np.array(out)


def informed_joint_gains(problem: Problem) -> tuple[np.ndarray, float] | None:
    """(per-joint kp, ζ) of the joint-space baseline at ``FRACTION`` of its limit."""
    shape = joint_gain_shape(problem)
    shape = shape / shape.max()
    c = joint_boundary(problem, ZETA, shape)
    return (FRACTION * c * shape, ZETA) if c > 0 else None


# -- baselines as fractions of their stability boundary --------------------------------
#: Range of the share of the stability boundary a baseline's gains are searched in [-].
FRACTION_RANGE = (0.2, 1.0)
#: Range of kp_r / kp_t of a single-tier OSC baseline [-].
RATIO_RANGE = (0.1, 30.0)
#: Range of each joint's deviation from the rule's shape, as a natural log [-].
DEVIATION_RANGE = (-2.0, 2.0)


def osc_boundary(problem: Problem, zeta: float, ratio: float) -> float:
    """Highest kp_t of single-tier OSC with kp_r = ratio·kp_t and damping ratio ζ that
    meets the minimum margins at the home pose [1/s²] (0 when none does)."""
    names = problem.arm.joint_names
    n = problem.arm.n

    def make(k: float) -> Controller:
        tier = Tier(tuple(range(n)), k, ratio * k, zeta)
        return plan_controller(problem, Plan((tier,), joint_names=names), kind="osc")

    return highest_scaled(problem, make)


def osc_from_coords(
    problem: Problem, zeta: float, ratio: float, fraction: float
) -> tuple[float, float]:
    """(kp_t, kp_r) at ``fraction`` of the boundary along kp_r = ratio·kp_t."""
    k = fraction * osc_boundary(problem, zeta, ratio)
    return k, ratio * k


def osc_to_coords(problem: Problem, kp_t: float, kp_r: float, zeta: float) -> tuple[float, float]:
    """(ratio, fraction) that give (kp_t, kp_r); the fraction may pass 1 (infeasible)."""
    ratio = kp_r / kp_t
    b = osc_boundary(problem, zeta, ratio)
    return ratio, (kp_t / b if b > 0 else math.inf)


def joint_boundary(problem: Problem, zeta: float, shape: np.ndarray) -> float:
    """Highest factor c for which per-joint stiffness c·shape meets the minimum margins at
    the home pose (0 when none does)."""

    def make(c: float) -> Controller:
        return joint_controller(problem, c * shape, zeta)

    return highest_scaled(problem, make, lo=1e-3, hi=1e6)


def joint_from_coords(
    problem: Problem, zeta: float, deviations: np.ndarray, fraction: float
) -> np.ndarray:
    """Per-joint stiffness at ``fraction`` of the boundary along the rule's shape times
    e^deviation per joint [1/s²]."""
    shape = joint_gain_shape(problem) * np.exp(np.asarray(deviations, dtype=float))
    shape = shape / shape.max()
    return fraction * joint_boundary(problem, zeta, shape) * shape


def joint_to_coords(problem: Problem, kp: np.ndarray, zeta: float) -> tuple[np.ndarray, float]:
    """(deviations, fraction) that give per-joint stiffness ``kp``."""
    kp = np.asarray(kp, dtype=float)
    rule = joint_gain_shape(problem)
    dev = np.log(kp / rule)
    dev -= dev.mean()  # the level is the fraction's; only the shape matters here
    shape = rule * np.exp(dev)
    shape = shape / shape.max()
    b = joint_boundary(problem, zeta, shape)
    return dev, (float(kp.max() / b) if b > 0 else math.inf)
