"""The search's objectives and their Pareto front: plain numbers, no optuna.

The plan study minimises the error index, alone or with a second objective; plotting
and the CLI read the names and directions from here without importing the search.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = ["SECOND_OBJECTIVES", "directions", "pareto_front"]

#: Second objectives of the two-objective mode: optuna direction and what is measured.
SECOND_OBJECTIVES = {
    "margin": ("maximize", "stiffness margin: factor on every stiffness, ζ held [-]"),
    "effort": ("minimize", "RMS commanded torque over the set [N·m]"),
}


def directions(objectives: Sequence[str]) -> list[str]:
    """Optuna directions of ``("error",)`` or ``("error", <second>)``."""
    return ["minimize"] + [SECOND_OBJECTIVES[o][0] for o in objectives[1:]]


def pareto_front(points: Sequence[Sequence[float]], dirs: Sequence[str]) -> list[bool]:
    """Whether each point is non-dominated under ``dirs`` (``minimize``/``maximize``)."""
    sign = np.array([1.0 if d == "minimize" else -1.0 for d in dirs])
    p = np.asarray(points, dtype=float).reshape(len(points), len(dirs)) * sign
    out = []
    for i in range(len(p)):
        dominated = np.all(p <= p[i], axis=1) & np.any(p < p[i], axis=1)
        out.append(not bool(dominated.any()))
    return out
