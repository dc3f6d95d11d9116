"""Nested against ranked tier subsets: the plan study alone, several seeds, per problem.

For each problem (default: the demo and problems/inspect6) and each subset mode, runs the
plan study with the problem's budget ([search] trials), one worker, seeds 0..SEEDS-1, and
prints the best robust error of each run, the number of feasible trials, and per mode the
median best. Last lines: ``<problem>.<mode> median_best=<m> feasible_share=<f>``.

Usage: python bench/subsets.py [SEEDS] [PROBLEM ...]
"""

from __future__ import annotations

import dataclasses
import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path

from optimizer import search as srch
from optimizer.problem import load_problem

ROOT = Path(__file__).resolve().parent.parent


def main() -> None:
    warnings.filterwarnings("ignore")
    seeds = int(sys.argv[1]) if len(sys.argv) > 1 else 3
    paths = sys.argv[2:] or [
        str(ROOT / "problems/polish7/problem.toml"),
        str(ROOT / "problems/inspect6/problem.toml"),
    ]
    lines = []
    for path in paths:
        base = load_problem(path)
        for mode in ("ranked", "nested"):
            prob = dataclasses.replace(
                base, search=dataclasses.replace(base.search, subset_mode=mode)
            )
            best, share = [], []
            for seed in range(seeds):
                with tempfile.TemporaryDirectory() as tmp:
                    t0 = time.perf_counter()
                    study = srch.run_search(
                        prob, str(Path(tmp) / "p.journal"), "p", "plan", prob.search.trials,
                        seed=seed,
                    )
                    v = srch.best_value(study)
                    ts = study.get_trials(deepcopy=False)
                    feas = sum(1 for t in ts if srch.feasible(t))
                    best.append(v if v is not None else float("inf"))
                    share.append(feas / max(1, len(ts)))
                    print(f"{prob.name} {mode:6s} seed {seed}: best {best[-1]:.4g}, feasible "
                          f"{feas}/{len(ts)} ({time.perf_counter() - t0:.0f} s)", flush=True)
            lines.append(f"{prob.name}.{mode} median_best={statistics.median(best):.4g} "
                         f"feasible_share={statistics.mean(share):.2f}")
    print("\n".join(lines))


if __name__ == "__main__":
    main()
