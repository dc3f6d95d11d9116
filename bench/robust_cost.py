"""Cost of scoring one candidate robustly against scoring it on the nominal plant alone.

On the demo with the three-tier hand plan, in this one run (CPU time, best of 3):
the nominal score without margins, the nominal score with the three stability margins,
and the robust score the search makes of every trial (nominal with margins plus the
problem's ``[perturb] plants`` perturbed plants, each checked for stability). Prints the
seconds of each and their ratios; last line
``nominal_s=<a> margins_s=<b> robust_s=<c> plants=<K> robust_over_nominal=<c/b>
margin_share=<(b-a)/c>``.
"""

from __future__ import annotations

import sys
from pathlib import Path

from timing import best_cpu  # bench/timing.py, beside this script

from optimizer.evaluate import evaluate, plan_controller
from optimizer.plan import load_plan
from optimizer.problem import load_problem
from optimizer.robust import evaluate_robust, plant_set

ROOT = Path(__file__).resolve().parent.parent


def main() -> None:
    prob = load_problem(ROOT / "problems/polish7/problem.toml", check_reach=False)
    plan = load_plan(ROOT / "problems/polish7/plans/three-tier.toml", prob.arm.joint_names)
    k = int(sys.argv[1]) if len(sys.argv) > 1 else prob.perturb.plants
    plants = plant_set(prob, k)

    def make(p):  # type: ignore[no-untyped-def]
        return plan_controller(p, plan)

    evaluate(prob, make(prob), "warm-up", compute_margin=True)  # compile
    a = best_cpu(lambda: evaluate(prob, make(prob), "n", compute_margin=False))
    b = best_cpu(lambda: evaluate(prob, make(prob), "m", compute_margin=True))
    c = best_cpu(lambda: evaluate_robust(prob, plants, make, "r"))
    print(f"nominal plant, no margins:          {a:6.2f} s CPU")
    print(f"nominal plant with the 3 margins:   {b:6.2f} s CPU ({b / a:.2f}x)")
    print(f"robust ({k} perturbed plants + nominal): {c:6.2f} s CPU ({c / b:.2f}x the nominal "
          "score with margins)")
    print(f"margins are {(b - a) / c:.0%} of a robust score")
    print(
        f"nominal_s={a:.3f} margins_s={b:.3f} robust_s={c:.3f} plants={k} "
        f"robust_over_nominal={c / b:.2f} margin_share={(b - a) / c:.2f}"
    )


if __name__ == "__main__":
    main()
