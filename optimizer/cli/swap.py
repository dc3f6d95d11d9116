"""``tierplan swap``."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from ..exceptions import InputError
from .common import (
    EXIT_INPUT,
    console_for,
    finish,
    report_if,
    run_and_show,
    search_options,
    settings_from,
)

__all__ = [
    "add",
    "run",
]


def add(sub: argparse._SubParsersAction) -> None:
    """The command's options."""
    w = sub.add_parser(
        "swap",
        help="apply new actuator settings, re-score a previous run's plans, search again "
        "from them, show what changed",
    )
    w.add_argument("problem", type=Path, help="problem file (TOML)")
    w.add_argument(
        "--actuators",
        type=Path,
        action="append",
        required=True,
        metavar="FILE",
        help="actuator file: [actuators.<joint>] tables with the keys of the problem file; "
        "repeatable, applied in order",
    )
    w.add_argument(
        "--from",
        dest="from_dir",
        type=Path,
        required=True,
        metavar="RUN",
        help="results folder of the earlier search (results/<problem>/<study>)",
    )
    search_options(r=w, study_default=None)


def run(args: argparse.Namespace) -> int:
    from rich.markup import escape

    from ..problem import load_problem
    from ..report import fmt, swap_table, tier_moves
    from ..rundir import default_dir
    from ..runs import previous_plans, run_record, swap_basis, tier_depth, write_run

    from_dir: Path = args.from_dir
    if not from_dir.is_dir():
        print(
            f"tierplan: error: {from_dir}: --from needs a search's results folder", file=sys.stderr
        )
        return EXIT_INPUT
    prob = load_problem(args.problem, actuator_files=args.actuators)
    basis = swap_basis(
        from_dir, args.actuators, args.study, args.trials, args.baseline_trials, args.seed,
        args.storage,
    )
    given = argparse.Namespace(**{**vars(args), **basis.options()})  # args itself is kept
    settings = settings_from(given, prob, storage_default=basis.storage)
    if settings is None:
        return EXIT_INPUT
    seeded = previous_plans(from_dir, prob, args.top)
    if not seeded:
        raise InputError(from_dir, "", "holds no ranked plan to carry over (plans/rank-NN.toml)")
    out_dir = args.out or default_dir(prob.name, basis.study)
    if out_dir.resolve() == from_dir.resolve():
        print(
            "tierplan: error: --out must differ from --from (the old run is kept)", file=sys.stderr
        )
        return EXIT_INPUT
    out = console_for(prob)
    names = prob.arm.joint_names
    changed = ", ".join(
        f"{a.joint} {a.model.bandwidth_hz():.3g} Hz"
        for a in prob.actuators
        if a.joint in prob.swapped_joints
    )
    out.print(
        f"swap: {escape(changed)} (from {', '.join(str(a) for a in args.actuators)}); "
        f"{len(seeded)} plans of {from_dir} re-scored and enqueued in study '{basis.study}'"
    )
    result = run_and_show(out, prob, settings, seeded)
    rows = [
        (s.plan.label, s.plan.compact(prob.arm.n), s.extra.get("previous_error_index"), d)
        for s, d in result.seeded_scores
        if s.source == "previous"
    ]
    out.print(swap_table(rows))
    old_best = seeded[0]
    new_best = next((e for e in result.ranked if e.kind == "plan"), None)
    moves: list[str] = []
    summary: dict = {"from": str(from_dir), "actuator_files": [str(a) for a in args.actuators]}
    before = old_best.extra.get("previous_error_index")
    if new_best is not None:
        moves = tier_moves(
            tier_depth(old_best.plan.to_toml(), names), tier_depth(new_best.plan_toml, names)
        )
        out.print(
            f"best plan before: {escape(old_best.plan.compact(prob.arm.n))} "
            f"(error idx {fmt(before)})"
        )
        out.print(
            f"best plan now:    {escape(new_best.plan_text)} "
            f"(error idx {fmt(new_best.error_index)}"
            + (
                f", {(new_best.error_index / before - 1) * 100:+.0f} %"
                if before and new_best.error_index is not None
                else ""
            )
            + ")"
        )
        out.print("joints that moved between tiers: " + ("; ".join(moves) if moves else "none"))
        summary.update(
            best_before=before,
            best_now=new_best.error_index,
            best_plan_before=old_best.plan.compact(prob.arm.n),
            best_plan_now=new_best.plan_text,
            moved=moves,
        )
    summary["previous_plans"] = [
        {"label": lab, "plan_text": txt, "error_index_before": b, "now": d.to_dict()}
        for lab, txt, b, d in rows
    ]
    names_written = write_run(
        out_dir, prob, result, run_record(prob, settings, result, swap=summary)
    )
    names_written += report_if(args, out, result, out_dir, prob)
    return finish(out, result, out_dir, names_written, "swap search")
