"""A tiny plan space that can be enumerated, to check how fast a sampler gets near its best.

The space: two tiers on a problem, the second keeping the fastest ``keep`` joints; a few
log-spaced levels of tier-1 kp_t and of tier-2 kp_t and kp_r; tier-1 kp_r and ζ fixed.
Every point is scored once (``table``); samplers then draw from the same table, so
comparing them costs no more simulation. Pure code: no printing.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import optuna

from .evaluate import score_plan
from .plan import Plan, Tier
from .problem import Problem
from .search import PENALTY, quiet_optuna

__all__ = [
    "Point",
    "TinySpace",
    "evals_to_within",
    "sampler_trace",
    "table",
    "tiny_space",
]

Point = tuple[int, ...]


@dataclass(frozen=True)
class TinySpace:
    """Names and number of levels of each parameter, and how a point becomes a plan."""

    names: tuple[str, ...]
    """Parameter names."""
    sizes: tuple[int, ...]
    """Levels per parameter."""
    build: Callable[[Point], Plan]
    """Plan of a point (one level index per parameter)."""

    def points(self) -> list[Point]:
        """Every point, in enumeration order."""
        return list(itertools.product(*(range(k) for k in self.sizes)))


def tiny_space(problem: Problem, levels: int = 4) -> TinySpace:
    """Two-tier plans on ``problem`` over ``levels`` gain levels (see the module text)."""
    sp = problem.search
    n = problem.arm.n
    bw = [a.model.bandwidth_hz() for a in problem.actuators]
    order = sorted(range(n), key=lambda j: bw[j])  # slowest first
    t1 = np.geomspace(*(sp.tier1_kp_t_range or sp.kp_t_range), levels)
    t2 = np.geomspace(*sp.kp_t_range, levels)
    r2 = np.geomspace(*sp.kp_r_range, levels)
    kp_r1 = math.sqrt(math.prod(sp.tier1_kp_r_range or sp.kp_r_range))
    zeta = 0.8
    keeps = list(range(1, n))

    def build(p: Point) -> Plan:
        i1, keep_i, i2, j2 = p
        tier2 = tuple(sorted(order[-keeps[keep_i] :]))
        return Plan(
            (
                Tier(tuple(range(n)), float(t1[i1]), kp_r1, zeta),
                Tier(tier2, float(t2[i2]), float(r2[j2]), zeta),
            ),
            label="tiny " + "-".join(map(str, p)),
            nested=True,
            joint_names=problem.arm.joint_names,
        )

    return TinySpace(
        ("t1_kp_t", "t2_keep", "t2_kp_t", "t2_kp_r"), (levels, len(keeps), levels, levels), build
    )


def table(problem: Problem, space: TinySpace) -> dict[Point, float]:
    """Objective of every point: the error index, or PENALTY when infeasible."""
    out = {}
    for p in space.points():
        s = score_plan(problem, space.build(p))
        out[p] = s.error_index if s.feasible and math.isfinite(s.error_index) else PENALTY
    return out


def sampler_trace(
    space: TinySpace, values: dict[Point, float], sampler: optuna.samplers.BaseSampler, budget: int
) -> list[float]:
    """Objective values in the order ``sampler`` proposes points (``budget`` trials).

    A repeated point still costs a trial (a real search would simulate it again).
    """
    quiet_optuna()
    study = optuna.create_study(sampler=sampler)

    def f(trial: optuna.trial.Trial) -> float:
        p = tuple(
            trial.suggest_int(nm, 0, k - 1) for nm, k in zip(space.names, space.sizes, strict=True)
        )
        return values[p]

    study.optimize(f, n_trials=budget)
    return [float(t.value) for t in study.trials if t.value is not None]


def evals_to_within(trace: Sequence[float], best: float, rel: float = 0.05) -> int | None:
    """Trials until the best-so-far is within ``rel`` of ``best`` (None: never)."""
    for i, v in enumerate(trace, start=1):
        if v <= best * (1.0 + rel):
            return i
    return None
