"""The tiered law for a user's own control loop: measured state and task reference in, torque
command out. The simulator runs the same code (``TieredController`` and its compiled
kernel), so what was scored is what this class computes.

    law = TierLaw(load_problem("problem.toml"), load_plan("best-plan.toml", names))
    tau = law.command(q, v, p_d, R_d, twist_d, acc_d)     # every control period

Units: q [rad or m], v [rad/s or m/s], p_d [m], R_d a 3×3 rotation, twist_d = (linear
[m/s], angular [rad/s]) and acc_d the same in [m/s², rad/s²], all in world axes at the
tip frame; tau [N·m or N], clipped to the effort limits. The law computes the arm's
model itself (pinocchio, the problem's URDF as the controller knows it). Simulation
results only: see the README's safety section before any hardware.
"""

from __future__ import annotations

import numpy as np
import pinocchio as pin

from .arm import LWA
from .evaluate import plan_controller
from .plan import Plan
from .problem import Problem
from .trajectories import Reference

__all__ = [
    "TierLaw",
]


class TierLaw:
    """A plan's tiered law on a problem's arm, one command per call."""

    def __init__(self, problem: Problem, plan: Plan) -> None:
        self.problem = problem
        self.plan = plan
        self.controller = plan_controller(problem, plan)
        self.n = problem.arm.n

    def command(
        self,
        q: np.ndarray,
        v: np.ndarray,
        p_d: np.ndarray,
        R_d: np.ndarray,
        twist_d: np.ndarray | None = None,
        acc_d: np.ndarray | None = None,
    ) -> np.ndarray:
        """The torque command [N·m] for measured ``q``, ``v`` and the reference pose,
        twist and acceleration at this instant (a copy: it is not reused)."""
        z6 = np.zeros(6)
        ref = Reference(
            name="runtime",
            t=np.zeros(1),
            p=np.asarray(p_d, dtype=float).reshape(1, 3),
            R=np.asarray(R_d, dtype=float).reshape(1, 3, 3),
            twist=np.asarray(z6 if twist_d is None else twist_d, dtype=float).reshape(1, 6),
            acc=np.asarray(z6 if acc_d is None else acc_d, dtype=float).reshape(1, 6),
        )
        ctrl = self.controller
        ctrl.bind(ref)
        status = ctrl.command(0, np.asarray(q, dtype=float), np.asarray(v, dtype=float))
        if status != 0:
            raise FloatingPointError("singular tier solve at this state")
        return ctrl.tau.copy()

    def model_terms(
        self, q: np.ndarray, v: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """What an external implementation must supply at (q, v): M, h = C v + g, the
        tip Jacobian J (6×n, world-aligned), J̇v (classical, 6), tip position, rotation."""
        arm = self.problem.arm
        model, data, fid = arm.model, arm.model.createData(), arm.tip_id
        z = np.zeros(self.n)
        pin.forwardKinematics(model, data, q, v, z)
        pin.computeJointJacobians(model, data)
        oMf = pin.updateFramePlacement(model, data, fid)
        J = pin.getFrameJacobian(model, data, fid, LWA)
        dJv = pin.getFrameClassicalAcceleration(model, data, fid, LWA).vector
        h = pin.nonLinearEffects(model, data, q, v)
        M = pin.crba(model, data, q)
        return (np.array(M), np.array(h), np.array(J).reshape(6, self.n), np.array(dJv),
                np.array(oMf.translation), np.array(oMf.rotation))
