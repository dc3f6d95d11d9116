"""Search throughput, what pruning saves, and optuna against random search on a tiny space.

Measured in one run on this machine:
1. plan trials per second on the demo with 1 and 2 worker processes (same trial count,
   same seed, fresh journal each); speedup_2w is their ratio (target >= 1.7 on 2 cores);
   speedup_2w_same_trials times exactly the 1-worker run's trials again, enqueued and
   unpruned, with 1 and with 2 workers (the workers' start-up counted);
2. the fraction of simulated steps that pruning and the home pre-check saved in the
   1-worker run: 1 - steps run / (trials x steps of the whole trajectory set on the
   nominal and every perturbed plant);
3. the tiny enumerable space of ``optimizer.gridcheck`` on the planar arm: evaluations
   until the best so far is within 5 % of the enumerated best, median over 5 seeds, for
   TPE and for random search, beside the size of the enumeration.
Last line: ``speedup_2w=<x> speedup_2w_same_trials=<s> pruned_fraction=<y> evals_to_5pct_optuna=<a>
evals_to_5pct_random=<b> evals_enumeration=<c>``.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

from optimizer.blas import one_thread

one_thread()  # as the command line does, before numpy loads its BLAS

import optuna  # noqa: E402

from optimizer import gridcheck as g  # noqa: E402
from optimizer import search as srch  # noqa: E402
from optimizer.problem import load_problem  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent


def throughput(prob, trials: int, workers: int, folder: Path) -> tuple[float, list]:
    t0 = time.perf_counter()
    study = srch.run_search(
        prob, str(folder / f"w{workers}.journal"), "bench", "plan", trials, seed=11, workers=workers
    )
    return trials / (time.perf_counter() - t0), study.get_trials()


def same_trials(prob, done: list, workers: int, folder: Path) -> float:
    """Seconds to evaluate exactly the parameter sets of ``done`` (enqueued, no pruning,
    so every worker count runs the same trials to the end). One worker runs in this
    process; with two, the workers' start-up (imports, problem load) is inside the time,
    so the speedup is a conservative one."""
    enqueue = [(t.params, {}) for t in done if t.params]
    t0 = time.perf_counter()
    with srch.worker_pool(workers, prob) as pool:
        srch.run_search(
            prob, str(folder / f"same{workers}.journal"), "same", "plan", len(enqueue),
            seed=11, workers=workers, prune=False, enqueue=enqueue, pool=pool,
        )  # fmt: skip
    return time.perf_counter() - t0


def main(trials: int = 40) -> None:
    demo = load_problem(ROOT / "problems/polish7/problem.toml", check_reach=False)
    with tempfile.TemporaryDirectory() as tmp:
        srch.run_search(demo, str(Path(tmp) / "warm.journal"), "warm", "plan", 2, seed=1)  # JIT
        r1, done = throughput(demo, trials, 1, Path(tmp))
        r2, done2 = throughput(demo, trials, 2, Path(tmp))
        same1 = same_trials(demo, done, 1, Path(tmp))
        same2 = same_trials(demo, done, 2, Path(tmp))
    # a robust trial simulates the trajectory set on the nominal and every perturbed plant
    full = sum(len(r.t) for r in demo.references) * (1 + demo.perturb.plants)
    steps = sum(int(t.user_attrs.get("steps") or 0) for t in done)
    states = [t.state.name for t in done]
    pre = sum(1 for t in done if str(t.user_attrs.get("reason", "")).startswith("pre-check"))
    saved = 1.0 - steps / (len(done) * full)
    print(
        f"demo plan search, {trials} trials: 1 worker {r1:.2f} trials/s, "
        f"2 workers {r2:.2f} trials/s"
    )
    print(
        f"the same {len([t for t in done if t.params])} trials, enqueued, no pruning: "
        f"1 worker {same1:.1f} s, 2 workers {same2:.1f} s (their start-up included)"
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
        f"speedup_2w={r2 / r1:.2f} speedup_2w_same_trials={same1 / same2:.2f} "
        f"pruned_fraction={saved:.2f} "
        f"evals_to_5pct_optuna={med(tpe):g} evals_to_5pct_random={med(rnd):g} evals_enumeration={n}"
    )


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 40)
