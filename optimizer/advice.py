"""Why this plan, and which drive to upgrade: sensitivities and upgrade advice.

Sensitivities: the change of a plan's error index and margins for a one-sided step of
each plant parameter, in the direction that hurts — the payload heavier by its
``[perturb]`` spread, and per joint one more period of delay, friction higher by its
spread, the drive slower by its spread. Upgrade advice: for each joint, the same problem
with that joint's drive made faster (every frequency × ``factor``, delay unchanged),
scored with the best of a set of candidate plans (the run's ranked plans and the gain
ladder's plans for the upgraded problem) on the robust objective.

Pure library code: no printing, no optuna.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from .control import Controller
from .evaluate import Score, evaluate
from .ladder import ladder_variants
from .plan import Plan
from .problem import Problem
from .robust import RobustScore, evaluate_robust, plant_set

__all__ = [
    "Sensitivity",
    "Upgrade",
    "best_of",
    "sensitivities",
    "stepped_plants",
    "upgrade_advice",
    "upgraded",
]


def _json_ready(record: object) -> dict[str, object]:
    """A dataclass record as a JSON-ready dict (non-finite numbers become None)."""
    from .evaluate import finite

    out: dict[str, object] = finite(dataclasses.asdict(record))  # type: ignore[call-overload, assignment]
    return out


@dataclass(frozen=True)
class Sensitivity:
    """One step of one plant parameter and what it did to a plan."""

    parameter: str
    """What changed: ``payload``, ``delay:<joint>``, ``friction:<joint>``, ``bandwidth:<joint>``."""
    step: str
    """The step in words."""
    error_index: float
    """Error index on the stepped plant [-] (inf when the plan failed there)."""
    error_change: float
    """Relative change of the error index against the nominal plant [-]."""
    stiffness_margin: float
    """Stiffness margin on the stepped plant [×]."""
    delay_margin_ms: float
    """Delay margin on the stepped plant [ms]."""
    bandwidth_margin: float
    """Bandwidth margin on the stepped plant [×]."""
    feasible: bool
    """Whether the plan stays feasible there."""

    def to_dict(self) -> dict[str, object]:
        """JSON-ready dict (non-finite numbers become None)."""
        return _json_ready(self)


def stepped_plants(problem: Problem) -> list[tuple[str, str, Problem]]:
    """(parameter, step in words, problem) for each one-sided step (module docstring)."""
    sp = problem.perturb
    out: list[tuple[str, str, Problem]] = []
    dev = problem.arm.deviation
    heavier = problem.arm.with_deviation(
        dataclasses.replace(dev, payload_kg=dev.payload_kg * (1.0 + sp.payload_rel))
    )
    if dev.payload_kg > 0:
        out.append(("payload", f"+{sp.payload_rel:.0%} mass", dataclasses.replace(
            problem, arm=heavier)))
    ms = problem.dt * 1e3
    for j, a in enumerate(problem.actuators):
        steps = [
            (f"delay:{a.joint}", f"+{max(1, sp.delay_ticks) * ms:g} ms",
             dataclasses.replace(a, delay_ticks=a.delay_ticks + max(1, sp.delay_ticks))),
            (f"friction:{a.joint}", f"+{sp.friction_rel:.0%}",
             dataclasses.replace(a, coulomb_nm=a.coulomb_nm * (1 + sp.friction_rel),
                                 viscous_nms=a.viscous_nms * (1 + sp.friction_rel))),
            (f"bandwidth:{a.joint}", f"−{sp.bandwidth_rel:.0%}",
             dataclasses.replace(a, model=a.model.scaled(1.0 - sp.bandwidth_rel))),
        ]
        for name, words, act in steps:
            acts = list(problem.actuators)
            acts[j] = act
            out.append((name, words, dataclasses.replace(problem, actuators=tuple(acts))))
    return out


def sensitivities(
    problem: Problem,
    make: Callable[[Problem], Controller],
    label: str = "",
    on_step: Callable[[int, int], None] | None = None,
) -> tuple[Score, list[Sensitivity]]:
    """The plan's nominal score and its sensitivities, largest error change first."""
    base = evaluate(problem, make(problem), label)
    steps = stepped_plants(problem)
    out = []
    for i, (name, words, p) in enumerate(steps):
        s = evaluate(p, make(p), label)
        err = s.error_index if math.isfinite(s.error_index) else math.inf
        change = err / base.error_index - 1.0 if base.error_index > 0 else math.nan
        out.append(Sensitivity(name, words, err, change, s.stiffness_margin,
                               s.delay_margin_ms, s.bandwidth_margin, s.feasible))
        if on_step is not None:
            on_step(i + 1, len(steps))
    out.sort(key=lambda x: -x.error_change if math.isfinite(x.error_change) else -math.inf)
    return base, out


@dataclass(frozen=True)
class Upgrade:
    """One joint's drive made faster, and the best robust error then."""

    joint: str
    """The joint."""
    bandwidth_hz: float
    """Its drive's bandwidth now [Hz]."""
    upgraded_bandwidth_hz: float
    """After the upgrade [Hz]."""
    error_now: float
    """Best robust error of the candidates on the problem as it is [-]."""
    error_upgraded: float
    """Best robust error of the candidates with this drive upgraded [-]."""
    improvement: float
    """1 − error_upgraded / error_now [-] (0.2: 20 % lower)."""
    best_plan: str
    """The plan that gave ``error_upgraded``, in one line."""
    tiers_now: int
    """Tier count of the best plan now."""
    tiers_upgraded: int
    """Tier count of the best plan after the upgrade."""

    def to_dict(self) -> dict[str, object]:
        """JSON-ready dict (non-finite numbers become None)."""
        return _json_ready(self)


def upgraded(problem: Problem, joint: str, factor: float) -> Problem:
    """``problem`` with ``joint``'s drive ``factor`` times faster (held below Nyquist)."""
    nyq = problem.control.rate_hz / 2.0
    acts = []
    for a in problem.actuators:
        if a.joint == joint:
            m = a.model.scaled(factor)
            if m.fastest_hz() >= 0.95 * nyq:
                m = m.scaled(0.95 * nyq / m.fastest_hz())
            a = dataclasses.replace(a, model=m)
        acts.append(a)
    return dataclasses.replace(problem, actuators=tuple(acts))


def best_of(
    problem: Problem, plans: Sequence[Plan]
) -> tuple[float, Plan | None, RobustScore | None]:
    """The lowest robust error among ``plans`` on ``problem`` (feasible ones only)."""
    from .evaluate import plan_controller

    plants = plant_set(problem, problem.perturb.plants)
    best: tuple[float, Plan | None, RobustScore | None] = (math.inf, None, None)
    n = problem.arm.n
    for plan in plans:
        kind = "osc" if plan.is_single_tier(n) else "plan"

        def make(p: Problem, plan: Plan = plan, kind: str = kind) -> Controller:
            return plan_controller(p, plan, kind=kind)

        r = evaluate_robust(problem, plants, make, plan.label, plan.compact(n),
                            stop_on_failure=True)
        if r.feasible and r.robust_error < best[0]:
            best = (r.robust_error, plan, r)
    return best


def upgrade_advice(
    problem: Problem,
    plans: Sequence[Plan],
    factor: float = 2.0,
    on_joint: Callable[[str], None] | None = None,
) -> list[Upgrade]:
    """For each joint: the best robust error of ``plans`` plus the gain ladder's plans,
    now and with that joint's drive ``factor`` times faster. Best improvement first."""
    now_err, now_plan, _ = best_of(problem, [*plans, *ladder_variants(problem)])
    n = problem.arm.n
    out = []
    for a in problem.actuators:
        if on_joint is not None:
            on_joint(a.joint)
        up = upgraded(problem, a.joint, factor)
        err, plan, _ = best_of(up, [*plans, *ladder_variants(up)])
        imp = 1.0 - err / now_err if math.isfinite(err) and math.isfinite(now_err) else math.nan
        out.append(Upgrade(
            joint=a.joint,
            bandwidth_hz=a.model.bandwidth_hz(),
            upgraded_bandwidth_hz=next(x for x in up.actuators if x.joint == a.joint)
            .model.bandwidth_hz(),
            error_now=now_err,
            error_upgraded=err,
            improvement=imp,
            best_plan=plan.compact(n) if plan is not None else "",
            tiers_now=len(now_plan.tiers) if now_plan is not None else 0,
            tiers_upgraded=len(plan.tiers) if plan is not None else 0,
        ))
    out.sort(key=lambda u: -u.improvement if math.isfinite(u.improvement) else math.inf)
    return out
