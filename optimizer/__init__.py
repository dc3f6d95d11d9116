"""tierplan: choose tiered task-space controller plans for arms with mixed-bandwidth actuators.

A tiered controller sums task-space torques from several tiers: tier 1 uses every joint,
each further tier only a subset (the fast joints). This package simulates a plan in closed
loop (rigid-body dynamics, actuator lag and delay, friction, noise, model error), scores it,
and compares it with single-tier OSC and a joint-space CLIK baseline. Simulation only.
"""

from .arm import Arm, PlantDeviation
from .evaluate import (
    Score,
    TrajectoryScore,
    evaluate,
    score_joint_baseline,
    score_osc_baseline,
    score_plan,
)
from .exceptions import InputError, PlanError, ProblemError, SimulationError, TierplanError
from .plan import Plan, Tier, load_plan
from .problem import Problem, load_problem
from .simulate import ClosedLoop, Rollout, SimSettings

__version__ = "0.1.0"

__all__ = [
    "Arm",
    "ClosedLoop",
    "InputError",
    "Plan",
    "PlanError",
    "PlantDeviation",
    "Problem",
    "ProblemError",
    "Rollout",
    "Score",
    "SimSettings",
    "SimulationError",
    "Tier",
    "TierplanError",
    "TrajectoryScore",
    "__version__",
    "evaluate",
    "load_plan",
    "load_problem",
    "score_joint_baseline",
    "score_osc_baseline",
    "score_plan",
]
