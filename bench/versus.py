"""A demo search with this working tree against an earlier commit, side by side in one run.

For each tree (the earlier commit checked out into a temporary git worktree, and this
working tree) and each worker count, runs ``tierplan search`` on the demo with the same
budgets and seed in a fresh folder, and measures wall time and CPU time (the process and
its workers, from the kernel's accounting of children), after an untimed warm-up search
per tree (numba compiles and caches each tree's kernels). Prints a table, then one line per
worker count: ``workers=<w> cpu_ratio=<new/old> wall_ratio=<new/old>`` and for each tree
``speedup_2w=<wall 1 worker / wall 2 workers>`` when both counts ran. The machine is
shared: say what else ran when you quote it.

    python bench/versus.py --base <commit> [--trials 24] [--baseline-trials 8] [--workers 1 2]
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
DEMO = "problems/polish7/problem.toml"


def _run(tree: Path, workers: int, trials: int, baseline: int) -> tuple[float, float]:
    """(wall s, CPU s) of one search with the package from ``tree``."""
    with tempfile.TemporaryDirectory() as cwd:
        cmd = [
            sys.executable, "-m", "optimizer", "search", str(tree / DEMO), "--study", "bench",
            "--trials", str(trials), "--baseline-trials", str(baseline),
            "--workers", str(workers), "--seed", "1",
        ]  # fmt: skip
        env = {**os.environ, "PYTHONPATH": str(tree)}
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        t0 = time.perf_counter()
        done = subprocess.run(cmd, cwd=cwd, env=env, capture_output=True, text=True)
        wall = time.perf_counter() - t0
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        if done.returncode != 0:
            raise SystemExit(f"{tree}: search failed:\n{done.stderr[-2000:]}")
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--base", required=True, help="earlier commit to compare with")
    ap.add_argument("--trials", type=int, default=24)
    ap.add_argument("--baseline-trials", type=int, default=8)
    ap.add_argument("--workers", type=int, nargs="+", default=[1, 2])
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        base = Path(tmp) / "base"
        subprocess.run(
            ["git", "-C", str(ROOT), "worktree", "add", "--detach", str(base), args.base],
            check=True, capture_output=True,
        )  # fmt: skip
        try:
            for tree in (base, ROOT):  # numba compiles each tree's kernels once: not timed
                _run(tree, 1, 2, 1)
            rows: dict[tuple[str, int], tuple[float, float]] = {}
            for w in args.workers:  # interleaved, so drift in the machine's load hits both
                for label, tree in (("old", base), ("new", ROOT)):
                    rows[(label, w)] = _run(tree, w, args.trials, args.baseline_trials)
                    wall, cpu = rows[(label, w)]
                    which = args.base if label == "old" else "working tree"
                    print(f"{label} ({which}) workers={w}: wall {wall:.1f} s, CPU {cpu:.1f} s",
                          flush=True)  # fmt: skip
        finally:
            subprocess.run(
                ["git", "-C", str(ROOT), "worktree", "remove", "--force", str(base)],
                capture_output=True,
            )  # fmt: skip
    print(f"budgets: --trials {args.trials} --baseline-trials {args.baseline_trials}, seed 1")
    for w in args.workers:
        (ow, oc), (nw, nc) = rows[("old", w)], rows[("new", w)]
        print(f"workers={w} cpu_ratio={nc / oc:.2f} wall_ratio={nw / ow:.2f}")
    if 1 in args.workers and 2 in args.workers:
        for label in ("old", "new"):
            print(f"{label} speedup_2w={rows[(label, 1)][0] / rows[(label, 2)][0]:.2f}")


if __name__ == "__main__":
    main()
