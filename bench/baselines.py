"""Repeatability of the tuned baselines: each demo baseline tuned with several seeds.

For each sampler (CMA-ES from the informed start, which the search uses for baselines;
and TPE as the plan study uses it) and each baseline study (single-tier OSC, joint-space
CLIK + PD), tunes the demo problem's baseline with ``SEEDS`` seeds at the default budget
(``[search] trials``), one worker, and prints the best robust error of each run, the
best, the worst and their ratio. Last line, per sampler and baseline:
``<sampler>.<kind> best=<b> worst=<w> max_over_min=<r>``.

Usage: python bench/baselines.py [TRIALS] [SEEDS] [SAMPLERS] [KINDS]
(default 60 3 cmaes,tpe osc,joint_space); a sampler name ending in ``-noprune`` runs its
studies without pruning.
"""

from __future__ import annotations

import sys
import tempfile
import time
import warnings
from pathlib import Path

from optimizer import search as srch
from optimizer.problem import load_problem
from optimizer.runs import baseline_seeds

ROOT = Path(__file__).resolve().parent.parent


def main() -> None:
    warnings.filterwarnings("ignore", message="Fixed parameter")
    trials = int(sys.argv[1]) if len(sys.argv) > 1 else None
    seeds = int(sys.argv[2]) if len(sys.argv) > 2 else 3
    samplers = sys.argv[3].split(",") if len(sys.argv) > 3 else ["cmaes", "tpe"]
    kinds = sys.argv[4].split(",") if len(sys.argv) > 4 else ["osc", "joint_space"]
    prob = load_problem(ROOT / "problems/polish7/problem.toml")
    trials = trials or prob.search.trials
    lines = []
    for sampler in samplers:
        name, _, flag = sampler.partition("-")
        for kind in kinds:
            srch.STUDY_SAMPLER[kind] = name
            best = []
            for seed in range(seeds):
                with tempfile.TemporaryDirectory() as tmp:
                    t0 = time.perf_counter()
                    study = srch.run_search(
                        prob, str(Path(tmp) / "b.journal"), "b", kind, trials, seed=seed,
                        enqueue=baseline_seeds(prob, kind), prune=flag != "noprune",
                    )
                    v = srch.best_value(study)
                    best.append(v if v is not None else float("inf"))
                    print(f"{sampler:6s} {kind:12s} seed {seed}: best robust error {best[-1]:.4g}"
                          f" ({time.perf_counter() - t0:.0f} s)", flush=True)
            lo, hi = min(best), max(best)
            lines.append(
                f"{sampler}.{kind} best={lo:.4g} worst={hi:.4g} max_over_min={hi / lo:.3f}"
            )
    print("\n".join(lines))


if __name__ == "__main__":
    main()
