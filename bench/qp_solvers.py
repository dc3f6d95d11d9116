"""QP solvers for the bounded law, measured on the QPs the law really builds
(each also warm-started from the previous tick's solution, as the law does, where the
solver can).

Runs the three-tier bounded plan on ``problems/polish7-fast`` (where the torque limits
bind), keeps every QP the law built (15 variables, 7 two-sided constraints), then solves
each with every registered solver: µs per solve (best of 5 passes), failures, the largest
constraint violation, and the largest objective gap to the best solver. Last line per
solver: ``<name> us_per_qp=<t> failures=<f> max_violation=<v> max_objective_gap=<g>``.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from optimizer.control import bounded
from optimizer.evaluate import make_loop, plan_controller
from optimizer.plan import load_plan
from optimizer.problem import load_problem

ROOT = Path(__file__).resolve().parent.parent


def main() -> None:
    prob = load_problem(ROOT / "problems/polish7-fast/problem.toml")
    plan = load_plan(ROOT / "problems/polish7-fast/plans/three-tier-bounded.toml",
                     prob.arm.joint_names)
    seen: list[bounded.BoundedQP] = []
    real = bounded.solve_qp

    warms: list[np.ndarray | None] = []

    def keep(qp, solver=bounded.DEFAULT_SOLVER, warm=None):  # type: ignore[no-untyped-def]
        seen.append(qp)
        warms.append(warm)
        return real(qp, solver, warm)

    bounded.solve_qp = keep  # type: ignore[assignment]
    try:
        loop = make_loop(prob, plan_controller(prob, plan))
        loop.rollout(prob.references[0])
    finally:
        bounded.solve_qp = real  # type: ignore[assignment]
    print(f"{len(seen)} QPs of {len(seen[0].q)} variables, {len(seen[0].lo)} constraints")
    results = {}
    runs = [(n, False) for n in bounded.QP_SOLVERS] + [(bounded.DEFAULT_SOLVER, True)]
    for name, warm in runs:
        best_t = np.inf
        for _ in range(5):
            t0 = time.perf_counter()
            sols = [real(qp, name, w if warm else None) for qp, w in zip(seen, warms)]
            best_t = min(best_t, (time.perf_counter() - t0) / len(seen))
        results[name + ("+warm" if warm else "")] = (best_t, sols)
    objs = {n: [0.5 * x @ qp.P @ x + qp.q @ x if ok else np.inf
                for (x, ok), qp in zip(r[1], seen)] for n, r in results.items()}
    best_obj = np.min(np.array(list(objs.values())), axis=0)
    lines = []
    for name, (t, sols) in results.items():
        fails = sum(1 for _, ok in sols if not ok)
        viol = max(
            float(max(0.0, (qp.lo - qp.A @ x).max(), (qp.A @ x - qp.hi).max()))
            for (x, ok), qp in zip(sols, seen) if ok
        )
        gap = float(np.max((np.array(objs[name]) - best_obj) / (1.0 + np.abs(best_obj))))
        print(f"{name:10s}: {t * 1e6:8.1f} us per QP, {fails} failed, largest violation "
              f"{viol:.1e} N·m, largest relative objective gap {gap:.1e}")
        lines.append(f"{name} us_per_qp={t * 1e6:.1f} failures={fails} max_violation={viol:.1e} "
                     f"max_objective_gap={gap:.1e}")
    print("\n".join(lines))


if __name__ == "__main__":
    main()
