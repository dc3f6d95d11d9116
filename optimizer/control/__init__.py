"""Controllers: the tiered task-space law (OSC is its one-tier case), the joint-space baseline."""

from .base import AXES, Controller, ControlSettings
from .joint_space import ClikSolution, JointSpaceController, clik, clik_cached, dls
from .tiered import TieredController, null_projector_t, osc_torque, tier_torque

#: Controller families by the ``kind`` used in results files.
CONTROLLER_KINDS = {
    "plan": TieredController,
    "osc": TieredController,
    "joint_space": JointSpaceController,
}

__all__ = [
    "AXES",
    "CONTROLLER_KINDS",
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
