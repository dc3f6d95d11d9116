"""Search throughput, what pruning saves, and optuna against random search on a tiny space.

Measured in one run on this machine:
1. plan trials per second on the demo with 1 and 2 worker processes (same trial count,
   same seed, fresh journal each); speedup_2w is their ratio (target >= 1.7 on 2 cores);
2. the fraction of simulated steps that pruning and the home pre-check saved in the
   1-worker run: 1 - steps run / (trials x steps of the whole trajectory set);
3. the tiny enumerable space of ``optimizer.gridcheck`` on the planar arm: evaluations
   until the best so far is within 5 % of the enumerated best, median over 5 seeds, for
   TPE and for random search, beside the size of the enumeration.
Last line: ``speedup_2w=<x> pruned_fraction=<y> evals_to_5pct_optuna=<a>
evals_to_5pct_random=<b> evals_enumeration=<c>``.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

import optuna

from optimizer import gridcheck as g
from optimizer import search as srch
from optimizer.problem import load_problem

ROOT = Path(__file__).resolve().parent.parent


def throughput(prob, trials: int, workers: int, folder: Path) -> tuple[float, list]:
    t0 = time.perf_counter()
    study = srch.run_search(
        prob, str(folder / f"w{workers}.journal"), "bench", "plan", trials, seed=11, workers=workers
    )
    return trials / (time.perf_counter() - t0), study.get_trials()


def main(trials: int = 40) -> None:
    demo = load_problem(ROOT / "problems/polish7/problem.toml", check_reach=False)
    with tempfile.TemporaryDirectory() as tmp:
        srch.run_search(demo, str(Path(tmp) / "warm.journal"), "warm", "plan", 2, seed=1)  # JIT
        r1, done = throughput(demo, trials, 1, Path(tmp))
        r2, done2 = throughput(demo, trials, 2, Path(tmp))
    full = sum(len(r.t) for r in demo.references)
    steps = sum(int(t.user_attrs.get("steps") or 0) for t in done)
    states = [t.state.name for t in done]
    pre = sum(1 for t in done if str(t.user_attrs.get("reason", "")).startswith("pre-check"))
    saved = 1.0 - steps / (len(done) * full)
    print(
        f"demo plan search, {trials} trials: 1 worker {r1:.2f} trials/s, "
        f"2 workers {r2:.2f} trials/s"
    )
    print(
        f"  1-worker run: {states.count('PRUNED')} pruned, {pre} stopped by the pre-check, "
        f"{steps} of {len(done) * full} steps simulated"
    )
    steps2 = sum(int(t.user_attrs.get("steps") or 0) for t in done2)
    print(
        f"  2-worker run: {[t.state.name for t in done2].count('PRUNED')} pruned, "
        f"{steps2} steps simulated (the workers' own seeds draw other trials; "
        f"steps per second ratio {steps2 / steps * r2 / r1:.2f})"
    )

    planar = load_problem(ROOT / "problems/planar3/problem.toml", check_reach=False)
    space = g.tiny_space(planar, levels=5)
    t0 = time.perf_counter()
    values = g.table(planar, space)
    t_enum = time.perf_counter() - t0
    best = min(values.values())
    n = len(values)
    tpe, rnd = [], []
    for s in range(5):
        tpe.append(g.evals_to_within(g.sampler_trace(space, values, srch.make_sampler(s), n), best))
        rnd.append(
            g.evals_to_within(
                g.sampler_trace(space, values, optuna.samplers.RandomSampler(s), n), best
            )
        )
    print(f"tiny space on planar3: {n} points enumerated in {t_enum:.1f} s")
    print(f"  evals to within 5 % of the best, seeds 0-4: TPE {tpe}, random {rnd}")
    med = lambda xs: statistics.median(x if x is not None else n for x in xs)  # noqa: E731
    print(
        f"speedup_2w={r2 / r1:.2f} pruned_fraction={saved:.2f} "
        f"evals_to_5pct_optuna={med(tpe):g} evals_to_5pct_random={med(rnd):g} evals_enumeration={n}"
    )


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 40)
