"""Robustness: the same plans on perturbed plants (actuators, delay, payload, friction, noise).

Each draw scales every actuator's frequencies, moves its delay by whole ticks, scales the
payload and the friction, and uses its own noise seed, within the spreads of the
problem's ``[perturb]`` table. The controller's model stays the nominal one: the plan
must cope with a plant it does not know.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from .actuators import ActuatorModel
from .control import Controller
from .evaluate import Score, evaluate
from .problem import Problem


def _scaled_model(model: ActuatorModel, s: float, nyquist: float) -> ActuatorModel:
    changes = {}
    for f in dataclasses.fields(model):  # type: ignore[arg-type]
        if f.name.endswith("_hz"):
            changes[f.name] = min(getattr(model, f.name) * s, 0.95 * nyquist)
    return dataclasses.replace(model, **changes)  # type: ignore[type-var]


def perturbed(problem: Problem, rng: np.random.Generator, index: int) -> Problem:
    """One perturbed copy of ``problem`` (a new plant, the same controller model)."""
    sp = problem.perturb
    nyq = problem.control.rate_hz / 2.0

    def u(s: float) -> float:
        return float(rng.uniform(1.0 - s, 1.0 + s))

    acts = []
    for a in problem.actuators:
        d = int(rng.integers(-sp.delay_ticks, sp.delay_ticks + 1)) if sp.delay_ticks else 0
        acts.append(
            dataclasses.replace(
                a,
                model=_scaled_model(a.model, u(sp.bandwidth_rel), nyq),
                delay_ticks=max(0, a.delay_ticks + d),
                coulomb_nm=a.coulomb_nm * u(sp.friction_rel),
                viscous_nms=a.viscous_nms * u(sp.friction_rel),
            )
        )
    dev = problem.arm.deviation
    arm = problem.arm.with_deviation(
        dataclasses.replace(dev, payload_kg=dev.payload_kg * u(sp.payload_rel))
    )
    sim = dataclasses.replace(problem.sim, seed=problem.sim.seed + 7919 * (index + 1))
    return dataclasses.replace(problem, arm=arm, actuators=tuple(acts), sim=sim)


@dataclass(frozen=True)
class Robustness:
    """One plan over the nominal plant and N perturbed plants."""

    nominal: Score
    """Score on the nominal problem."""
    draws: tuple[Score, ...]
    """Scores on the perturbed plants."""

    @property
    def feasible_fraction(self) -> float:
        """Share of perturbed plants on which the plan stays feasible [-]."""
        return float(np.mean([d.feasible for d in self.draws])) if self.draws else math.nan

    def _errors(self) -> np.ndarray:
        return np.array([d.error_index if d.feasible else math.inf for d in self.draws])

    @property
    def mean_error(self) -> float:
        """Mean error index over the feasible draws [-]."""
        e = self._errors()
        e = e[np.isfinite(e)]
        return float(e.mean()) if e.size else math.inf

    @property
    def p90_error(self) -> float:
        """90th percentile of the error index, infeasible draws counted as inf [-]."""
        e = self._errors()
        return float(np.percentile(e, 90, method="higher")) if e.size else math.nan

    @property
    def worst_error(self) -> float:
        """Largest error index, inf when any draw is infeasible [-]."""
        e = self._errors()
        return float(e.max()) if e.size else math.nan

    def to_dict(self) -> dict[str, object]:
        d = self.nominal.to_dict()
        d.update(
            {
                "perturbed": len(self.draws),
                "feasible_fraction": self.feasible_fraction,
                "mean_error": _fin(self.mean_error),
                "p90_error": _fin(self.p90_error),
                "worst_error": _fin(self.worst_error),
                "draws": [
                    {
                        "error_index": _fin(s.error_index),
                        "feasible": s.feasible,
                        "reason": s.reason,
                        "pos_rms_mm": s.pos_rms_mm,
                    }
                    for s in self.draws
                ],
            }
        )
        return d


def _fin(x: float) -> float | None:
    return x if math.isfinite(x) else None


Candidate = tuple[str, str, Callable[[Problem], Controller]]
"""(label, plan text, controller factory taking the problem to run on)."""


def compare(
    problem: Problem,
    candidates: Sequence[Candidate],
    n_perturb: int,
    on_draw: Callable[[int], None] | None = None,
) -> list[Robustness]:
    """Score every candidate on the nominal plant and on the same ``n_perturb`` perturbed ones."""
    rng = np.random.default_rng(problem.perturb.seed)
    plants = [perturbed(problem, rng, i) for i in range(n_perturb)]
    out = []
    for label, text, make in candidates:
        nominal = evaluate(problem, make(problem), label, text)
        draws = []
        for i, p in enumerate(plants):
            draws.append(evaluate(p, make(p), label, text, stop_on_failure=True))
            if on_draw:
                on_draw(i)
        out.append(Robustness(nominal, tuple(draws)))
    return out
