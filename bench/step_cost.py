"""Cost of one closed-loop control step on the demo arm with the three-tier hand plan.

Prints µs per step of the full loop, µs per step of only the pinocchio calls a step needs
(controller kinematics, M⁻¹, h, Jacobian, drift; plant ABA), and their ratio, all measured
in this one run. Last line: ``us_per_step=<x> pinocchio_us=<y> ratio=<x/y>``.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pinocchio as pin

from optimizer.arm import LWA
from optimizer.evaluate import make_loop, plan_controller
from optimizer.plan import load_plan
from optimizer.problem import load_problem

ROOT = Path(__file__).resolve().parent.parent


def main() -> None:
    prob = load_problem(ROOT / "problems/polish7/problem.toml", check_reach=False)
    plan = load_plan(ROOT / "problems/polish7/plans/three-tier.toml", prob.arm.joint_names)
    loop = make_loop(prob, plan_controller(prob, plan))
    ref = prob.references[0]
    loop.rollout(ref)  # compile and warm up
    best_loop = np.inf
    for _ in range(3):
        t0 = time.perf_counter()
        ro = loop.rollout(ref)
        best_loop = min(best_loop, (time.perf_counter() - t0) / ro.steps)

    model, plant = prob.arm.model, prob.arm.plant_model
    dc, dp = model.createData(), plant.createData()
    fid = prob.arm.tip_id
    q = np.array(prob.arm.home)
    v = np.full(prob.arm.n, 0.1)
    z = np.zeros(prob.arm.n)
    tau = np.ones(prob.arm.n)
    n_calls = 20000
    best_pin = np.inf
    for _ in range(3):
        t0 = time.perf_counter()
        for _ in range(n_calls):
            pin.forwardKinematics(model, dc, q, v, z)
            pin.computeJointJacobians(model, dc)
            pin.updateFramePlacement(model, dc, fid)
            pin.getFrameJacobian(model, dc, fid, LWA)
            pin.getFrameClassicalAcceleration(model, dc, fid, LWA).vector  # noqa: B018
            pin.nonLinearEffects(model, dc, q, v)
            pin.computeMinverse(model, dc, q)
            pin.aba(plant, dp, q, v, tau)
        best_pin = min(best_pin, (time.perf_counter() - t0) / n_calls)

    us, pus = best_loop * 1e6, best_pin * 1e6
    print(f"closed-loop step (rollout of {ro.steps} ticks, best of 3): {us:.1f} us")
    print(f"pinocchio calls of one step (best of 3 x {n_calls}):      {pus:.1f} us")
    print(f"us_per_step={us:.1f} pinocchio_us={pus:.1f} ratio={us / pus:.2f}")


if __name__ == "__main__":
    main()
