"""Robustness: the same candidates side by side on the nominal plant and perturbed plants.

The plants come from ``robust.plant_set`` (the problem's ``[perturb]`` spreads, any
seed); every candidate meets the same plants. Each candidate runs on every plant, so
the figures show the whole spread; a plant where it diverges or whose linearised loop
is unstable counts as a failure in every statistic.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

from .control import Controller
from .problem import Problem
from .robust import RobustScore, evaluate_robust, perturbed, plant_set

__all__ = ["Candidate", "compare", "perturbed"]

Candidate = tuple[str, str, Callable[[Problem], Controller]]
"""(label, plan text, controller factory taking the problem to run on)."""


def compare(
    problem: Problem,
    candidates: Sequence[Candidate],
    n_perturb: int,
    on_draw: Callable[[int], None] | None = None,
    seed: int | None = None,
) -> list[RobustScore]:
    """Score every candidate on the nominal plant and on the same ``n_perturb`` perturbed
    plants, drawn with ``seed`` (default: the problem's ``[perturb] seed``)."""
    plants = plant_set(problem, n_perturb, seed)
    return [
        evaluate_robust(problem, plants, make, label, text, on_plant=on_draw)
        for label, text, make in candidates
    ]
