"""tierplan: choose tiered task-space controller plans for arms with mixed-bandwidth actuators.

A tiered controller sums task-space torques from several tiers: tier 1 uses every joint,
each further tier only a subset (the fast joints). This package simulates a plan in closed
loop (rigid-body dynamics, actuator lag and delay, friction, noise, model error), scores it,
and compares it with single-tier OSC and a joint-space CLIK baseline. Simulation only.
"""

from typing import TYPE_CHECKING, Any

from .exceptions import InputError, PlanError, ProblemError, SimulationError, TierplanError

#: Public names and the module that defines each: imported on first use, so that the
#: command line (``tierplan --help``) starts without numba, pinocchio and scipy.
_LAZY = {
    "Arm": "arm",
    "PlantDeviation": "arm",
    "Score": "evaluate",
    "TrajectoryScore": "evaluate",
    "evaluate": "evaluate",
    "score_joint_baseline": "evaluate",
    "score_osc_baseline": "evaluate",
    "score_plan": "evaluate",
    "Plan": "plan",
    "Tier": "plan",
    "load_plan": "plan",
    "Problem": "problem",
    "load_problem": "problem",
    "ClosedLoop": "simulate",
    "Rollout": "simulate",
    "SimSettings": "simulate",
    "Margins": "stability",
    "MarginLimits": "stability",
    "RobustScore": "robust",
    "evaluate_robust": "robust",
}

if TYPE_CHECKING:
    from .arm import Arm, PlantDeviation
    from .evaluate import (
        Score,
        TrajectoryScore,
        evaluate,
        score_joint_baseline,
        score_osc_baseline,
        score_plan,
    )
    from .plan import Plan, Tier, load_plan
    from .problem import Problem, load_problem
    from .robust import RobustScore, evaluate_robust
    from .simulate import ClosedLoop, Rollout, SimSettings
    from .stability import MarginLimits, Margins


def __getattr__(name: str) -> Any:
    import importlib

    if name in _LAZY:
        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


__version__ = "0.1.0"

__all__ = [
    "Arm",
    "ClosedLoop",
    "InputError",
    "MarginLimits",
    "Margins",
    "Plan",
    "PlanError",
    "PlantDeviation",
    "Problem",
    "ProblemError",
    "RobustScore",
    "Rollout",
    "Score",
    "SimSettings",
    "SimulationError",
    "Tier",
    "TierplanError",
    "TrajectoryScore",
    "__version__",
    "evaluate",
    "evaluate_robust",
    "load_plan",
    "load_problem",
    "score_joint_baseline",
    "score_osc_baseline",
    "score_plan",
]
