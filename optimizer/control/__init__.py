"""Controllers: the tiered task-space law (OSC is its one-tier case), the joint-space baseline."""

from .base import AXES, Controller, ControlSettings
from .joint_space import ClikSolution, JointSpaceController, clik, clik_cached, dls
from .tiered import TieredController, null_projector_t, osc_torque, tier_torque

__all__ = [
    "AXES",
    "ClikSolution",
    "ControlSettings",
    "Controller",
    "JointSpaceController",
    "TieredController",
    "clik",
    "clik_cached",
    "dls",
    "null_projector_t",
    "osc_torque",
    "tier_torque",
]
