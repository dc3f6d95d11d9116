"""What several commands share: exit codes, option groups, the console, the search
run shown on screen. Parsing and printing only."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

__all__ = [
    "EXIT_FAILED",
    "EXIT_INPUT",
    "EXIT_INTERRUPTED",
    "EXIT_OK",
    "budgets_of",
    "console_for",
    "finish",
    "joint_for",
    "load_problem_file",
    "parse_objectives",
    "plants_line",
    "refresh_option",
    "report_if",
    "run_and_show",
    "search_options",
    "settings_from",
    "tiered_for",
]

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_INPUT = 2
EXIT_INTERRUPTED = 130


def refresh_option(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--storage",
        metavar="URL_OR_FILE",
        help="first re-read the run's studies from this storage (any optuna URL, e.g. the "
        "PostgreSQL database several hosts searched on) and rewrite the run's ranking files",
    )
    p.add_argument("--study", help="with --storage: the plan study (default: the run's)")


def search_options(r: argparse.ArgumentParser, study_default: str | None) -> None:
    """Options shared by ``search`` and ``swap``."""
    r.add_argument(
        "--trials",
        type=int,
        help="plan trials the study is brought up to (default: [search] trials); the same "
        "command again resumes",
    )
    r.add_argument(
        "--worker-trials",
        type=int,
        metavar="N",
        help="instead of --trials: run exactly N plan trials in this process, on top of what "
        "the study holds (several hosts on one database: the study gets the sum); "
        "0 runs none and writes the ranking of what the studies hold",
    )
    r.add_argument(
        "--baseline-trials",
        type=int,
        help="trials for each baseline study (default: the same as --trials)",
    )
    r.add_argument("--workers", type=int, default=1, help="worker processes (default 1)")
    r.add_argument("--seed", type=int, help="sampler seed (default: [search] seed)")
    r.add_argument(
        "--study",
        default=study_default,
        help="study name; the same name resumes a stopped search (default: "
        + (study_default or "<earlier study>.swap-<file>-<hash>")
        + ")",
    )
    r.add_argument(
        "--storage",
        metavar="URL_OR_FILE",
        help="optuna storage URL (sqlite:///..., postgresql://...) or a journal file; "
        "default results/<problem>/studies.journal",
    )
    r.add_argument(
        "--objectives",
        default="error",
        help="'error' (default), or two objectives with a Pareto front: 'error,margin' "
        "(maximise the stiffness margin) or 'error,effort' (minimise RMS torque); "
        "two objectives turn pruning off",
    )
    r.add_argument("--top", type=int, default=10, help="plans shown and written (default 10)")
    r.add_argument("--no-prune", action="store_true", help="run every trajectory of every trial")
    r.add_argument("--out", type=Path, help="results folder (default results/<problem>/<study>)")
    r.add_argument(
        "--figures",
        action="store_true",
        help="write report.md and its figures into the results folder when done",
    )


def console_for(prob):  # type: ignore[no-untyped-def]
    """The output console, after the problem's warnings."""
    from rich.markup import escape

    from ..report import console

    out = console()
    for w in prob.warnings:  # escaped: a warning may name a table, "[actuators.x]"
        out.print(f"[yellow]warning:[/] {escape(w)}")
    return out


def load_problem_file(path: Path):  # type: ignore[no-untyped-def]
    from ..problem import load_problem

    return load_problem(path)


def plants_line(prob, n: int, seed: int | None = None) -> str:  # type: ignore[no-untyped-def]
    """One line on how the perturbed plants were drawn."""
    sp = prob.perturb
    own = seed is None or seed == sp.seed
    corner = (
        "the first is the worst corner of the spreads, the others are "
        if (sp.corner and own and n > 0)
        else ""
    )
    return (
        f"perturbed plants: {n}; {corner}drawn with seed {sp.seed if seed is None else seed} "
        f"(bandwidth ±{sp.bandwidth_rel:.0%}, 2nd-order damping ±{sp.damping_rel:.0%}, delay "
        f"±{sp.delay_ticks} ticks, payload mass ±{sp.payload_rel:.0%} and position "
        f"±{sp.payload_offset_m * 1000:g} mm, friction ±{sp.friction_rel:.0%}, own noise seed "
        f"each); the same plants for every entry. 'plants ok' counts the perturbed plants where "
        f"the entry neither diverged nor went unstable; p90, worst and mean run over those and "
        f"the nominal plant, failures counting as inf."
    )


def tiered_for(plan, problem, kind: str = "plan"):  # type: ignore[no-untyped-def]
    from ..evaluate import plan_controller

    return plan_controller(problem, plan, kind=kind)


def joint_for(kp, zeta, problem):  # type: ignore[no-untyped-def]
    from ..evaluate import joint_controller

    return joint_controller(problem, kp, zeta, label="baseline: joint-space CLIK + PD")


def budgets_of(args: argparse.Namespace, prob) -> tuple[int, int, int] | None:  # type: ignore[no-untyped-def]
    """trials, baseline trials, seed from the options and the problem; None after an error."""
    sp = prob.search
    add = getattr(args, "worker_trials", None) is not None
    if add and args.trials is not None:
        print("tierplan: error: give --trials or --worker-trials, not both", file=sys.stderr)
        return None
    trials = args.worker_trials if add else args.trials if args.trials is not None else sp.trials
    btrials = args.baseline_trials if args.baseline_trials is not None else trials
    seed = args.seed if args.seed is not None else sp.seed
    least = 0 if add else 1
    for name, v, lo in (
        ("--worker-trials" if add else "--trials", trials, least),
        ("--baseline-trials", btrials, least),
        ("--workers", args.workers, 1),
        ("--top", args.top, 1),
    ):
        if v < lo:
            print(f"tierplan: error: {name} must be >= {lo}, got {v}", file=sys.stderr)
            return None
    return trials, btrials, seed


def parse_objectives(text: str) -> tuple[str, ...] | None:
    from ..objectives import SECOND_OBJECTIVES

    parts = tuple(p.strip() for p in text.split(",") if p.strip())
    if parts == ("error",) or (
        len(parts) == 2 and parts[0] == "error" and parts[1] in SECOND_OBJECTIVES
    ):
        return parts
    print(
        f"tierplan: error: --objectives '{text}' is not one of: error, "
        + ", ".join(f"error,{o}" for o in SECOND_OBJECTIVES),
        file=sys.stderr,
    )
    return None


def run_and_show(out, prob, settings, seeded):  # type: ignore[no-untyped-def]
    """Run the three studies under a progress display; print the ranking."""
    import optuna
    from rich.markup import escape
    from rich.progress import (
        BarColumn,
        Progress,
        TaskID,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )

    from .. import search as srch
    from ..report import ranking_table
    from ..runs import run_studies

    with Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        TextColumn("{task.completed}/{task.total}"),
        TextColumn("{task.fields[info]}"),
        TimeElapsedColumn(),
        TextColumn("left"),
        TimeRemainingColumn(),
        console=out,
    ) as progress:
        tasks: dict[str, TaskID] = {}

        def update(kind: str, n: int, study) -> None:  # type: ignore[no-untyped-def]
            if kind not in tasks:
                tasks[kind] = progress.add_task(f"{kind:12s}", total=n, info="")
            ts = study.get_trials(deepcopy=False)
            feas = sum(1 for t in ts if srch.feasible(t))
            best = srch.best_value(study)
            info = f"feasible {feas}" + (f", best {best:.3g}" if best is not None else "")
            progress.update(tasks[kind], completed=min(srch.finished(study), n), info=info)

        result = run_studies(prob, settings, seeded, on_progress=update)
    out.print(ranking_table(result.ranked))
    for e in result.ranked:
        out.print(f"  {e.rank}. {escape(e.label)}: {escape(e.plan_text)}")
    if len(settings.objectives) > 1:
        front = [e for e in result.plan_entries if e.pareto]
        out.print(
            f"two objectives (error, {settings.objectives[1]}): {len(front)} plans on the "
            "feasible Pareto front, all kept in the ranking (column 'Pareto'); the baselines "
            "are tuned for error alone."
        )
    for s, d in result.seeded_scores:
        if s.source == "hand" and not d.feasible:
            out.print(
                f"[yellow]hand plan '{escape(s.plan.label)}' did not make the ranking: "
                f"{escape(str(d.reason))}[/]"
            )
    from ..runs import convergence_note

    for tuned, what in ((result.osc, "tuned single-tier OSC"), (result.joint, "tuned joint-space")):
        note = convergence_note(tuned)
        if note:
            out.print(
                f"[yellow]{what} may not have converged[/]: {note}; give it more trials "
                "(--baseline-trials) before trusting a margin over it"
            )
    if not result.plan_entries:
        out.print("[red]no feasible plan was found[/]: widen the gain ranges or give more trials")
    for kind, st in result.studies.items():
        errs = [
            t.user_attrs["reason"]
            for t in st.get_trials(deepcopy=False, states=(optuna.trial.TrialState.FAIL,))
            if str(t.user_attrs.get("reason", "")).startswith("error:")
        ]
        if errs:
            out.print(
                f"[yellow]{len(errs)} {kind} trials failed with an error (recorded in "
                f"trials.csv); the first: {escape(errs[0])}[/]"
            )
    return result


def finish(out, result, out_dir: Path, names: list[str], what: str) -> int:  # type: ignore[no-untyped-def]
    from ..report import SAFETY_SHORT

    out.print(f"{what} took {result.elapsed_s:.0f} s; wrote {out_dir}/ ({', '.join(names)})")
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    if result.interrupted:
        out.print(
            "[yellow]interrupted[/]: the ranking holds the trials that had finished; "
            "run the same command again to resume (nothing finished is lost or repeated)"
        )
        return EXIT_INTERRUPTED
    return EXIT_OK


def settings_from(args, prob, storage_default=None):  # type: ignore[no-untyped-def]
    from ..rundir import default_storage
    from ..runs import RunSettings

    budgets = budgets_of(args, prob)
    objectives = parse_objectives(args.objectives)
    if budgets is None or objectives is None:
        return None
    trials, btrials, seed = budgets
    return RunSettings(
        storage=args.storage or storage_default or str(default_storage(prob.name)),
        study=args.study,
        trials=trials,
        baseline_trials=btrials,
        seed=seed,
        workers=args.workers,
        prune=not args.no_prune,
        top=args.top,
        objectives=objectives,
        add=getattr(args, "worker_trials", None) is not None,
    )


def report_if(args, out, result, out_dir: Path, prob) -> list[str]:  # type: ignore[no-untyped-def]
    """With --figures: report.md and its PNGs in the results folder."""
    if not args.figures or not result.ranked:
        return []
    from ..rundir import read_run
    from ..runreport import write_report

    with out.status("drawing the report's figures…"):
        return write_report(read_run(out_dir), prob)
