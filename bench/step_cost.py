"""Cost of one closed-loop control step on the demo arm with the three-tier hand plan.

Prints µs per step of the full loop, µs per step of only the pinocchio calls a step needs
(controller kinematics, M⁻¹, h, Jacobian, drift; plant ABA), and their ratio, all measured
in this one run; then the bounded law against the summed law: on the demo (where no bound
binds: the cost of the check) and on ``problems/polish7-fast`` (where the QP is solved on
a third of the ticks), with the QP solver it uses. Last lines:
``us_per_step=<x> pinocchio_us=<y> ratio=<x/y>`` and
``bounded_over_summed_demo=<a> bounded_over_summed_fast=<b> qp_share_fast=<c> solver=<s>``.
"""

from __future__ import annotations

import dataclasses
import time
from pathlib import Path

import numpy as np
import pinocchio as pin

from optimizer.arm import LWA
from optimizer.control import bounded
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

    best_fused = np.inf  # the same quantities from fewer, larger pinocchio calls
    for _ in range(3):
        t0 = time.perf_counter()
        for _ in range(n_calls):
            pin.computeAllTerms(model, dc, q, v)  # kinematics, Jacobians, M, h at once
            pin.updateFramePlacement(model, dc, fid)
            pin.getFrameJacobian(model, dc, fid, LWA)
            pin.getFrameClassicalAcceleration(model, dc, fid, LWA).vector  # noqa: B018
            pin.computeMinverse(model, dc, q)
            pin.aba(plant, dp, q, v, tau)
        best_fused = min(best_fused, (time.perf_counter() - t0) / n_calls)

    us, pus, fus = best_loop * 1e6, best_pin * 1e6, best_fused * 1e6
    print(f"closed-loop step (rollout of {ro.steps} ticks, best of 3): {us:.1f} us")
    print(f"pinocchio calls of one step (best of 3 x {n_calls}):      {pus:.1f} us")
    print(f"the same with fused pinocchio calls (computeAllTerms):     {fus:.1f} us")
    print(f"us_per_step={us:.1f} pinocchio_us={pus:.1f} ratio={us / pus:.2f} "
          f"fused_pinocchio_us={fus:.1f} ratio_fused={us / fus:.2f}")

    ratios, share = [], 0.0
    for folder, plan_file in (("polish7", "three-tier.toml"),
                              ("polish7-fast", "three-tier-summed.toml")):
        pr = load_problem(ROOT / "problems" / folder / "problem.toml", check_reach=False)
        pl = load_plan(ROOT / "problems" / folder / "plans" / plan_file, pr.arm.joint_names)
        per = {}
        for law in ("summed", "bounded"):
            lp = make_loop(pr, plan_controller(pr, dataclasses.replace(pl, law=law)))
            lp.rollout(pr.references[0])
            best = np.inf
            for _ in range(3):
                t0 = time.perf_counter()
                r = lp.rollout(pr.references[0])
                best = min(best, (time.perf_counter() - t0) / r.steps)
            per[law] = best * 1e6
            if law == "bounded" and folder == "polish7-fast":
                share = lp.controller.bounded_ticks / r.steps
        ratios.append(per["bounded"] / per["summed"])
        print(f"{folder}: summed {per['summed']:.1f} us/step, bounded {per['bounded']:.1f} "
              f"us/step ({ratios[-1]:.2f}x)")
    print(f"bounded law: QP on {share:.0%} of the ticks of polish7-fast, solver "
          f"{bounded.DEFAULT_SOLVER} (bench/qp_solvers.py compares the registered ones)")
    print(f"bounded_over_summed_demo={ratios[0]:.2f} bounded_over_summed_fast={ratios[1]:.2f} "
          f"qp_share_fast={share:.2f} solver={bounded.DEFAULT_SOLVER}")


if __name__ == "__main__":
    main()
