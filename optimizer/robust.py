"""Robust scoring: one candidate on the nominal plant and a fixed set of perturbed plants.

A perturbed plant scales every actuator's frequencies (and a second-order drive's
damping ratio), moves its delay by whole ticks, scales and moves the payload, scales
the friction, and uses its own noise seed, within the spreads of the problem's
``[perturb]`` table. The controller's model stays the nominal one: the plan must cope
with a plant it does not know. Every candidate of a study meets the same plants
(common random numbers), so their figures compare like with like.

The statistics run over the nominal plant and the perturbed ones together; a plant on
which the candidate diverges or whose linearised loop is unstable counts as a failure
(error index inf) and is never dropped: ``worst`` is then inf, ``p90`` is inf once more
than a tenth of the plants fail, ``mean`` is inf at the first failure.

Pure library code: no printing, no optuna.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from .control import Controller
from .evaluate import Score, evaluate
from .problem import Problem

__all__ = [
    "STATISTICS",
    "RobustScore",
    "corner_plant",
    "evaluate_robust",
    "perturbed",
    "plant_set",
    "statistic",
]

#: Statistics a robust objective may use.
STATISTICS = ("p90", "worst", "mean")


def perturbed(problem: Problem, rng: np.random.Generator, index: int) -> Problem:
    """One perturbed copy of ``problem`` (a new plant, the same controller model)."""
    sp = problem.perturb
    nyq = problem.control.rate_hz / 2.0

    def u(s: float) -> float:
        return float(rng.uniform(1.0 - s, 1.0 + s))

    acts = []
    for a in problem.actuators:
        d = int(rng.integers(-sp.delay_ticks, sp.delay_ticks + 1)) if sp.delay_ticks else 0
        model = a.model.scaled(u(sp.bandwidth_rel))
        if model.fastest_hz() >= 0.95 * nyq:  # keep the drive below Nyquist
            model = model.scaled(0.95 * nyq / model.fastest_hz())
        if (zeta := model.damping()) is not None and sp.damping_rel > 0:
            model = model.with_damping(zeta * u(sp.damping_rel))
        acts.append(
            dataclasses.replace(
                a,
                model=model,
                delay_ticks=max(0, a.delay_ticks + d),
                coulomb_nm=a.coulomb_nm * u(sp.friction_rel),
                viscous_nms=a.viscous_nms * u(sp.friction_rel),
            )
        )
    dev = problem.arm.deviation
    ox, oy, oz = (
        float(x + rng.uniform(-sp.payload_offset_m, sp.payload_offset_m))
        for x in dev.payload_offset_m
    )
    offset = (ox, oy, oz)
    arm = problem.arm.with_deviation(
        dataclasses.replace(
            dev, payload_kg=dev.payload_kg * u(sp.payload_rel), payload_offset_m=offset
        )
    )
    sim = dataclasses.replace(problem.sim, seed=problem.sim.seed + 7919 * (index + 1))
    return dataclasses.replace(problem, arm=arm, actuators=tuple(acts), sim=sim)


def corner_plant(problem: Problem) -> Problem:
    """The worst corner of the spreads for stability: every drive at its slowest (and a
    second-order drive at its least damped), one ``delay_ticks`` more delay on every joint,
    the heaviest payload, the least friction (the least damping), its own noise seed."""
    sp = problem.perturb
    acts = []
    for a in problem.actuators:
        model = a.model.scaled(1.0 - sp.bandwidth_rel)
        if (zeta := model.damping()) is not None and sp.damping_rel > 0:
            model = model.with_damping(zeta * (1.0 - sp.damping_rel))
        acts.append(
            dataclasses.replace(
                a,
                model=model,
                delay_ticks=a.delay_ticks + sp.delay_ticks,
                coulomb_nm=a.coulomb_nm * (1.0 - sp.friction_rel),
                viscous_nms=a.viscous_nms * (1.0 - sp.friction_rel),
            )
        )
    dev = problem.arm.deviation
    arm = problem.arm.with_deviation(
        dataclasses.replace(dev, payload_kg=dev.payload_kg * (1.0 + sp.payload_rel))
    )
    sim = dataclasses.replace(problem.sim, seed=problem.sim.seed + 7907)
    return dataclasses.replace(problem, arm=arm, actuators=tuple(acts), sim=sim)


def plant_set(
    problem: Problem, count: int, seed: int | None = None, corner: bool | None = None
) -> tuple[Problem, ...]:
    """``count`` perturbed plants drawn with ``seed`` (default: ``[perturb] seed``).

    With ``corner`` (default: ``[perturb] corner`` for the problem's own seed, off for any
    other seed, whose plants are a check the search never saw) the first plant is
    ``corner_plant`` and the other ``count − 1`` are drawn.
    """
    own = seed is None or seed == problem.perturb.seed
    corner = (problem.perturb.corner and own) if corner is None else corner
    rng = np.random.default_rng(problem.perturb.seed if seed is None else seed)
    if corner and count > 0:
        return (corner_plant(problem), *(perturbed(problem, rng, i) for i in range(count - 1)))
    return tuple(perturbed(problem, rng, i) for i in range(count))


def statistic(values: Sequence[float], how: str) -> float:
    """``p90`` (linear interpolation), ``worst`` or ``mean`` of ``values`` (inf = failure)."""
    v = np.asarray(values, dtype=float)
    if v.size == 0:
        return math.nan
    if how == "worst":
        return float(v.max())
    if how == "mean":
        return float(v.mean())
    if how == "p90":
        s = np.sort(v)
        pos = 0.9 * (s.size - 1)
        i = int(math.floor(pos))
        j = min(i + 1, s.size - 1)
        if not math.isfinite(s[j]):
            return math.inf if pos > i or not math.isfinite(s[i]) else float(s[i])
        return float(s[i] + (pos - i) * (s[j] - s[i]))
    raise ValueError(f"unknown statistic '{how}'; use one of {', '.join(STATISTICS)}")


@dataclass(frozen=True)
class RobustScore:
    """One candidate on the nominal plant and on perturbed plants."""

    nominal: Score
    """Score on the nominal plant (with the stability margins)."""
    draws: tuple[Score, ...]
    """Scores on the perturbed plants that were run (fewer when stopped early)."""
    plants: int
    """Perturbed plants in the set [-]."""
    how: str = "p90"
    """Statistic of the robust error: ``p90``, ``worst`` or ``mean``."""
    min_share: float = 1.0
    """Feasible share of the perturbed plants a feasible candidate needs [-]."""

    @property
    def errors(self) -> list[float]:
        """Error index on the nominal plant and each perturbed plant; failures (and plants
        not run after a failure) count as inf."""
        vals = [self.nominal.error_index if self.nominal.feasible else math.inf]
        vals += [d.error_index if d.feasible else math.inf for d in self.draws]
        vals += [math.inf] * (self.plants - len(self.draws))
        return vals

    @property
    def plants_feasible(self) -> int:
        """Perturbed plants on which the candidate stayed feasible [-]."""
        return sum(1 for d in self.draws if d.feasible)

    @property
    def feasible_share(self) -> float:
        """Share of the perturbed plants on which the candidate stayed feasible [-]."""
        return self.plants_feasible / self.plants if self.plants else 1.0

    @property
    def robust_error(self) -> float:
        """The chosen statistic of the error index over all plants [-]."""
        return statistic(self.errors, self.how)

    @property
    def feasible(self) -> bool:
        """Feasible on the nominal plant and on at least ``min_share`` of the others."""
        return self.nominal.feasible and self.feasible_share >= self.min_share - 1e-12

    @property
    def reason(self) -> str | None:
        """Why not feasible, or None."""
        if not self.nominal.feasible:
            return self.nominal.reason
        if self.feasible:
            return None
        bad = next((d for d in self.draws if not d.feasible), None)
        first = f"; first: {bad.reason}" if bad is not None else ""
        return (
            f"feasible on {self.plants_feasible} of {self.plants} perturbed plants, "
            f"needs {self.min_share:.0%}{first}"
        )

    def summary(self) -> dict[str, object]:
        """The robust figures under the field names of rankings and JSON."""
        e = self.errors
        return {
            "plants": self.plants,
            "plants_feasible": self.plants_feasible,
            "feasible_share": self.feasible_share,
            "p90_error": statistic(e, "p90"),
            "worst_error": statistic(e, "worst"),
            "mean_error": statistic(e, "mean"),
            "statistic": self.how,
            "robust_error": self.robust_error,
        }

    def to_dict(self) -> dict[str, object]:
        """The nominal score dict with the robust figures, feasibility and reason on top."""
        from .evaluate import finite

        d = self.nominal.to_dict()
        d.update(finite(self.summary()))  # type: ignore[call-overload]
        d["feasible"] = self.feasible
        d["reason"] = self.reason
        d["draws"] = [
            finite(
                {
                    "error_index": s.error_index,
                    "feasible": s.feasible,
                    "reason": s.reason,
                    "pos_rms_mm": s.pos_rms_mm,
                    "rot_rms_deg": s.rot_rms_deg,
                }
            )
            for s in self.draws
        ]
        return d


def evaluate_robust(
    problem: Problem,
    plants: Sequence[Problem],
    make: Callable[[Problem], Controller],
    label: str,
    text: str = "",
    stop_on_failure: bool = False,
    compute_margin: bool = True,
    on_step: Callable[[int, float], None] | None = None,
    keep_rollouts: list | None = None,
    how: str | None = None,
    min_share: float | None = None,
    on_plant: Callable[[int], None] | None = None,
) -> RobustScore:
    """Score a candidate on ``problem`` (margins included) and on each of ``plants``.

    Args:
        make: builds the candidate's controller for a given (perturbed) problem.
        stop_on_failure: stop once the candidate can no longer be feasible.
        on_step: called with (step, running mean error) after each trajectory of each
            plant; steps count trajectories over the plants in order, nominal first
            (the search reports them for pruning).
        keep_rollouts: nominal rollouts are appended to it (for figures).
        how, min_share: statistic and feasible share (default: the problem's).
        on_plant: called with the index of each perturbed plant when it is done.
    """
    how = how or problem.perturb.statistic
    min_share = problem.perturb.min_feasible_share if min_share is None else min_share
    ntraj = len(problem.references)
    done: list[float] = []
    nominal = evaluate(
        problem, make(problem), label, text,
        stop_on_failure=stop_on_failure, compute_margin=compute_margin,
        on_trajectory=_tracker(done, on_step, 0), keep_rollouts=keep_rollouts,
    )
    draws: list[Score] = []
    allowed_fail = math.floor((1.0 - min_share) * len(plants) + 1e-9)
    if not (stop_on_failure and not nominal.feasible):
        for i, p in enumerate(plants):
            s = evaluate(
                p, make(p), label, text, stop_on_failure=True,
                compute_margin=False, check_stable=True,
                on_trajectory=_tracker(done, on_step, (i + 1) * ntraj),
            )
            draws.append(s)
            if on_plant is not None:
                on_plant(i)
            if stop_on_failure and sum(1 for d in draws if not d.feasible) > allowed_fail:
                break
    return RobustScore(nominal, tuple(draws), len(plants), how, min_share)


def _tracker(
    done: list[float], on_step: Callable[[int, float], None] | None, base: int
) -> Callable[[int, float, float], None]:
    """An ``evaluate`` callback that records each trajectory's error and reports the
    running mean over every (plant, trajectory) so far at step ``base + i``."""

    def cb(i: int, _running: float, last: float) -> None:
        done.append(last)
        if on_step is not None:
            on_step(base + i, float(np.mean(done)))

    return cb
