"""Command line: ``tierplan check`` and ``tierplan score``. Parsing and printing only."""

from __future__ import annotations

import argparse
import functools
import logging
import sys
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

from . import __version__
from .exceptions import InputError, TierplanError

if TYPE_CHECKING:
    from .evaluate import Score

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_INPUT = 2
EXIT_INTERRUPTED = 130


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="tierplan",
        description="Choose tiered task-space controller plans for arms whose actuators differ "
        "in torque bandwidth, by closed-loop simulation. Simulation only: see the README's "
        "safety section before any plan goes near hardware.",
    )
    p.add_argument("--version", action="version", version=f"tierplan {__version__}")
    p.add_argument("--debug", action="store_true", help="show tracebacks and debug logging")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    c = sub.add_parser("check", help="validate a problem file and print its summary")
    c.add_argument("problem", type=Path, help="problem file (TOML)")

    s = sub.add_parser("score", help="simulate plans (and baselines) on a problem's trajectories")
    s.add_argument("problem", type=Path, help="problem file (TOML)")
    s.add_argument(
        "--plan",
        type=Path,
        action="append",
        default=[],
        metavar="FILE",
        help="plan file (TOML); repeat for several",
    )
    s.add_argument(
        "--baselines",
        action="store_true",
        help="also score single-tier OSC and joint-space CLIK + PD at the gains of "
        "the problem's [baseline] table",
    )
    s.add_argument("--json", type=Path, metavar="FILE", help="write the scores as JSON")
    s.add_argument(
        "--no-margin",
        action="store_true",
        help="skip the linearised stability margin (faster, margin shows as –)",
    )
    r = sub.add_parser(
        "search",
        help="search tier plans with optuna; tune both baselines on the same budget; rank all",
    )
    r.add_argument("problem", type=Path, help="problem file (TOML)")
    r.add_argument("--trials", type=int, help="plan trials in the study (default: [search] trials)")
    r.add_argument(
        "--baseline-trials",
        type=int,
        help="trials for each baseline study (default: the same as --trials)",
    )
    r.add_argument("--workers", type=int, default=1, help="worker processes (default 1)")
    r.add_argument("--seed", type=int, help="sampler seed (default: [search] seed)")
    r.add_argument(
        "--study",
        default="main",
        help="study name; the same name resumes a stopped search (default: main)",
    )
    r.add_argument(
        "--storage",
        metavar="URL_OR_FILE",
        help="optuna storage URL (sqlite:///..., postgresql://...) or a journal file; "
        "default results/<problem>/studies.journal",
    )
    r.add_argument(
        "--plan",
        type=Path,
        action="append",
        default=[],
        metavar="FILE",
        help="hand plan to rank beside the optimized ones; repeatable",
    )
    r.add_argument("--top", type=int, default=10, help="plans shown and written (default 10)")
    r.add_argument("--no-prune", action="store_true", help="run every trajectory of every trial")
    r.add_argument("--out", type=Path, help="results folder (default results/<problem>/<study>)")
    c2 = sub.add_parser(
        "compare",
        help="score plans side by side on the same trajectories and seeds, optionally on "
        "perturbed plants",
    )
    c2.add_argument("problem", type=Path, help="problem file (TOML)")
    c2.add_argument("plans", type=Path, nargs="+", metavar="PLAN", help="plan files (TOML)")
    c2.add_argument(
        "--perturb",
        type=int,
        default=0,
        metavar="N",
        help="also run N perturbed plants (spreads in the problem's [perturb] table)",
    )
    c2.add_argument(
        "--baselines",
        action="store_true",
        help="include both baselines at the gains of the problem's [baseline] table",
    )
    c2.add_argument("--json", type=Path, metavar="FILE", help="write the results as JSON")
    return p


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    args = _parser().parse_args(argv)
    logging.basicConfig(
        level=logging.DEBUG if args.debug else logging.WARNING, format="%(levelname)s: %(message)s"
    )
    if not args.debug:
        warnings.filterwarnings("ignore")
    if args.command is None:
        _parser().print_help()
        return EXIT_INPUT
    try:
        if args.command == "check":
            return _check(args)
        if args.command == "score":
            return _score(args)
        if args.command == "search":
            return _search(args)
        if args.command == "compare":
            return _compare(args)
    except InputError as err:
        if args.debug:
            raise
        print(f"tierplan: error: {err}", file=sys.stderr)
        return EXIT_INPUT
    except TierplanError as err:
        if args.debug:
            raise
        print(f"tierplan: error: {err}", file=sys.stderr)
        return EXIT_FAILED
    except KeyboardInterrupt:
        print("tierplan: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    return EXIT_INPUT


def _load(path: Path):  # type: ignore[no-untyped-def]
    from .problem import load_problem

    return load_problem(path)


def _check(args: argparse.Namespace) -> int:
    from .report import check_table, console, plant_line

    prob = _load(args.problem)
    out = console()
    for w in prob.warnings:
        out.print(f"[yellow]warning:[/] {w}")
    for t in check_table(prob):
        out.print(t)
    out.print(plant_line(prob))
    out.print(
        f"[green]ok[/]: {args.problem} is valid; every trajectory is reachable within the "
        "joint limits."
    )
    return EXIT_OK


def _score(args: argparse.Namespace) -> int:
    from rich.markup import escape

    from .evaluate import score_joint_baseline, score_osc_baseline, score_plan
    from .plan import load_plan
    from .report import (
        SAFETY_SHORT,
        console,
        plan_legend,
        score_table,
        scores_json,
        write_atomic,
    )

    prob = _load(args.problem)
    plans = [load_plan(p, prob.arm.joint_names) for p in args.plan]
    if not plans and not args.baselines:
        print(
            "tierplan: error: score needs at least one --plan FILE or --baselines", file=sys.stderr
        )
        return EXIT_INPUT
    out = console()
    for w in prob.warnings:
        out.print(f"[yellow]warning:[/] {w}")
    kw = {"compute_margin": not args.no_margin}
    scores = []
    jobs: list[tuple[str, Callable[[], Score]]] = [
        (pl.label, functools.partial(score_plan, prob, pl, **kw)) for pl in plans
    ]
    if args.baselines:
        jobs += [
            ("baseline: single-tier OSC", functools.partial(score_osc_baseline, prob, **kw)),
            ("baseline: joint-space", functools.partial(score_joint_baseline, prob, **kw)),
        ]
    with out.status("simulating…") as status:
        for i, (label, job) in enumerate(jobs, start=1):
            status.update(
                f"simulating {label} ({i}/{len(jobs)}) on {len(prob.references)} trajectories…"
            )
            scores.append(job())
    ref = next((s for s in scores if s.kind == "osc"), scores[0])
    out.print(score_table(scores, reference=ref))
    out.print(escape("plans ([joints] t = kp_t, r = kp_r [1/s²], z = ζ):"))
    for line in plan_legend(scores):
        out.print(line)
    out.print(
        f"'vs OSC' compares the error index with '{ref.label}'. "
        f"Margin = 1 − spectral radius of the linearised one-period loop (< "
        f"{prob.scoring.min_margin:g}: unstable)."
    )
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    if args.json:
        write_atomic(args.json, scores_json(scores))
        out.print(f"wrote {args.json}")
    return EXIT_OK


def _compare(args: argparse.Namespace) -> int:
    import json

    from rich.markup import escape

    from .compare import compare
    from .evaluate import joint_gains_text, osc_plan
    from .plan import load_plan
    from .report import SAFETY_SHORT, console, robustness_table, write_atomic

    prob = _load(args.problem)
    if args.perturb < 0:
        print(f"tierplan: error: --perturb must be >= 0, got {args.perturb}", file=sys.stderr)
        return EXIT_INPUT
    plans = [load_plan(p, prob.arm.joint_names) for p in args.plans]
    n = prob.arm.n
    cands = [(pl.label, pl.compact(n), functools.partial(_tiered_for, pl)) for pl in plans]
    if args.baselines:
        b = prob.baseline
        op = osc_plan(prob, b.osc_kp_t, b.osc_kp_r, b.osc_zeta, label="baseline: single-tier OSC")
        cands.append((op.label, op.compact(n), functools.partial(_tiered_for, op, kind="osc")))
        cands.append(
            (
                "baseline: joint-space CLIK + PD",
                joint_gains_text(b.joint_kp, b.joint_zeta),
                functools.partial(_joint_for, b.joint_kp, b.joint_zeta),
            )
        )
    out = console()
    total = len(cands) * args.perturb
    with out.status("simulating…") as status:
        done = [0]

        def tick(_: int) -> None:
            done[0] += 1
            status.update(f"perturbed plants {done[0]}/{total}…")

        results = compare(prob, cands, args.perturb, on_draw=tick)
    out.print(robustness_table(results, args.perturb))
    for r in results:
        out.print(f"  {escape(r.nominal.label)}: {escape(r.nominal.plan_text)}")
    sp = prob.perturb
    if args.perturb:
        out.print(
            f"perturbed plants: bandwidth ±{sp.bandwidth_rel:.0%}, delay ±{sp.delay_ticks} "
            f"ticks, payload ±{sp.payload_rel:.0%}, friction ±{sp.friction_rel:.0%}, "
            f"own noise seed each (draw seed {sp.seed}); the same plants for every plan."
        )
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    if args.json:
        write_atomic(args.json, json.dumps([r.to_dict() for r in results], indent=2) + "\n")
        out.print(f"wrote {args.json}")
    return EXIT_OK


def _tiered_for(plan, problem, kind: str = "plan"):  # type: ignore[no-untyped-def]
    from .evaluate import plan_controller

    return plan_controller(problem, plan, kind=kind)


def _joint_for(kp, zeta, problem):  # type: ignore[no-untyped-def]
    from .evaluate import joint_controller

    return joint_controller(problem, kp, zeta, label="baseline: joint-space CLIK + PD")


def _search(args: argparse.Namespace) -> int:
    import json
    import platform
    import time

    import numpy as np
    import optuna
    import pinocchio
    import scipy
    from rich.markup import escape
    from rich.progress import BarColumn, Progress, TaskID, TextColumn, TimeElapsedColumn

    from . import search as srch
    from .evaluate import score_plan
    from .plan import load_plan
    from .report import SAFETY_SHORT, console, csv_text, ranking_table, write_atomic

    prob = _load(args.problem)
    sp = prob.search
    trials = args.trials if args.trials is not None else sp.trials
    btrials = args.baseline_trials if args.baseline_trials is not None else trials
    seed = args.seed if args.seed is not None else sp.seed
    for name, v in (
        ("--trials", trials),
        ("--baseline-trials", btrials),
        ("--workers", args.workers),
        ("--top", args.top),
    ):
        if v < 1:
            print(f"tierplan: error: {name} must be >= 1, got {v}", file=sys.stderr)
            return EXIT_INPUT
    plans = [load_plan(p, prob.arm.joint_names) for p in args.plan]
    storage = args.storage or str(Path("results") / prob.name / "studies.journal")
    out_dir = args.out or Path("results") / prob.name / args.study
    out = console()
    for w in prob.warnings:
        out.print(f"[yellow]warning:[/] {w}")
    enqueue, direct = [], []
    for pl in plans:
        params = srch.plan_params(pl, prob)
        if params is None:
            direct.append(pl)
        else:
            enqueue.append((params, {"source": "hand", "label": pl.label}))
    t0 = time.perf_counter()
    studies = {}
    runs = [
        ("plan", args.study, trials, enqueue),
        ("osc", args.study + ".osc", btrials, []),
        ("joint_space", args.study + ".joint", btrials, []),
    ]
    with Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        TextColumn("{task.completed}/{task.total}"),
        TextColumn("{task.fields[info]}"),
        TimeElapsedColumn(),
        console=out,
    ) as progress:
        for kind, name, n, enq in runs:
            task = progress.add_task(f"{kind:12s}", total=n, info="")

            def update(study: optuna.Study, task: TaskID = task, n: int = n) -> None:
                ts = study.get_trials(deepcopy=False)
                done = srch.finished(study)
                feas = [t for t in ts if srch.feasible(t)]
                best = min((t.value for t in feas if t.value is not None), default=None)
                info = f"feasible {len(feas)}" + (f", best {best:.3g}" if best is not None else "")
                progress.update(task, completed=min(done, n), info=info)

            studies[kind] = srch.run_search(
                prob,
                storage,
                name,
                kind,
                n,
                seed,
                args.workers,
                prune=not args.no_prune,
                enqueue=enq,
                on_progress=update,
            )
            update(studies[kind])
    elapsed = time.perf_counter() - t0
    plan_e = srch.entries(studies["plan"], "search")
    for pl in direct:  # hand plans the search space cannot express: scored as they are
        d = score_plan(prob, pl).to_dict()
        if d["feasible"]:
            plan_e.append({**d, "trial": None, "source": "hand", "plan_toml": pl.to_toml()})
        else:
            out.print(
                f"[yellow]hand plan '{escape(pl.label)}' is infeasible: "
                f"{escape(str(d['reason']))}[/]"
            )
    plan_e.sort(key=lambda e: e["error_index"])
    osc_e = srch.entries(studies["osc"], "tuned")
    joint_e = srch.entries(studies["joint_space"], "tuned")
    osc, joint = (osc_e[0] if osc_e else None), (joint_e[0] if joint_e else None)
    ranked = srch.rank(plan_e, [e for e in (osc, joint) if e], args.top)
    for e in ranked:
        e["vs_tuned_osc"] = (e["error_index"] / osc["error_index"] - 1) if osc else None
        e["vs_tuned_joint"] = (e["error_index"] / joint["error_index"] - 1) if joint else None
    out.print(ranking_table(ranked, osc, joint))
    for e in ranked:
        out.print(f"  {e['rank']}. {escape(e['label'])}: {escape(e['plan_text'])}")
    hand_missing = [
        pl.label
        for pl in plans
        if not any(e.get("source") == "hand" and e["label"] == pl.label for e in ranked)
    ]
    for lab in hand_missing:
        out.print(
            f"[yellow]hand plan '{escape(lab)}' did not make the ranking (infeasible or pruned)[/]"
        )
    if not plan_e:
        out.print("[red]no feasible plan was found[/]: widen the gain ranges or give more trials")
    cols = [
        "rank",
        "label",
        "kind",
        "source",
        "trial",
        "tiers",
        "plan_text",
        "pos_rms_mm",
        "rot_rms_deg",
        "pos_max_mm",
        "rot_max_deg",
        "margin",
        "peak_torque_ratio",
        "tau_rms_nm",
        "error_index",
        "vs_tuned_osc",
        "vs_tuned_joint",
        "feasible",
    ]
    write_atomic(
        out_dir / "ranking.json",
        json.dumps([{k: v for k, v in e.items() if k != "plan_toml"} for e in ranked], indent=2)
        + "\n",
    )
    write_atomic(out_dir / "ranking.csv", csv_text(ranked, cols))
    trial_rows = []
    for kind, st in studies.items():
        for t in st.get_trials(deepcopy=False):
            sc = t.user_attrs.get("score", {})
            trial_rows.append(
                {
                    "study": st.study_name,
                    "kind": kind,
                    "number": t.number,
                    "state": t.state.name,
                    "value": t.value,
                    "constraint": (t.constraints or {}).get("margin"),
                    "source": t.user_attrs.get("source", "search"),
                    "tiers": t.user_attrs.get("tiers"),
                    "plan_text": t.user_attrs.get("plan_text"),
                    "pos_rms_mm": sc.get("pos_rms_mm"),
                    "rot_rms_deg": sc.get("rot_rms_deg"),
                    "margin": sc.get("margin"),
                    "steps": t.user_attrs.get("steps"),
                    "reason": t.user_attrs.get("reason"),
                }
            )
    write_atomic(
        out_dir / "trials.csv",
        csv_text(trial_rows, list(trial_rows[0]) if trial_rows else ["study"]),
    )
    best = next((e for e in ranked if e["kind"] == "plan"), None)
    if best and best.get("plan_toml"):
        write_atomic(
            out_dir / "best-plan.toml",
            f"# best plan of study '{args.study}' on {prob.name} (simulation only)\n"
            + best["plan_toml"].replace('label = "', 'label = "best: ', 1),
        )
    run = {
        "problem": str(args.problem),
        "problem_name": prob.name,
        "problem_sha256": prob.digest,
        "study": args.study,
        "storage": storage,
        "seed": seed,
        "workers": args.workers,
        "trials": trials,
        "baseline_trials": btrials,
        "pruning": not args.no_prune,
        "elapsed_s": round(elapsed, 2),
        "command": sys.argv,
        "versions": {
            "tierplan": __version__,
            "optuna": optuna.__version__,
            "pinocchio": pinocchio.__version__,
            "numpy": np.__version__,
            "scipy": scipy.__version__,
            "python": platform.python_version(),
        },
    }
    write_atomic(out_dir / "run.json", json.dumps(run, indent=2) + "\n")
    out.print(
        f"search took {elapsed:.0f} s; wrote {out_dir}/ (ranking.csv, ranking.json, trials.csv, "
        f"{'best-plan.toml, ' if best else ''}run.json)"
    )
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
