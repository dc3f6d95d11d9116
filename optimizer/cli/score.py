"""``tierplan score``."""

from __future__ import annotations

import argparse
import functools
import sys
from collections.abc import Callable
from pathlib import Path

from .common import (
    EXIT_FAILED,
    EXIT_INPUT,
    EXIT_OK,
    console_for,
    joint_for,
    load_problem_file,
    plants_line,
    tiered_for,
)

__all__ = [
    "add",
    "run",
]


def add(sub: argparse._SubParsersAction) -> None:
    """The command's options."""
    s = sub.add_parser("score", help="simulate plans (and baselines) on a problem's trajectories")
    s.add_argument(
        "problem",
        type=Path,
        nargs="?",
        help="problem file (TOML); with --from, default: the run's own",
    )
    s.add_argument(
        "--from",
        dest="from_dir",
        type=Path,
        metavar="RUN",
        help="re-score every ranked entry of a search's results folder and check that the "
        "numbers of its ranking.json are reproduced exactly",
    )
    s.add_argument(
        "--figures",
        type=Path,
        metavar="DIR",
        help="draw error-over-time, torque-per-tier and torque-spectrum PNGs into DIR",
    )
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
        "--rollouts",
        type=Path,
        metavar="DIR",
        help="write each rollout on the nominal plant as CSV into DIR (time, joints, commands, "
        "delivered torques, tip and reference pose; the format 'validate' reads)",
    )
    s.add_argument(
        "--no-margin",
        action="store_true",
        help="skip the stability margins (faster; they show as –)",
    )
    s.add_argument(
        "--plants",
        type=int,
        metavar="N",
        help="also run the first N perturbed plants of the search's set (default: "
        "[perturb] plants of the problem; 0 for the nominal plant only)",
    )


def run(args: argparse.Namespace) -> int:
    from rich.markup import escape

    from ..evaluate import joint_gains_text, osc_plan
    from ..plan import load_plan
    from ..report import MARGIN_LEGEND, plan_legend, reasons, robust_table, score_table
    from ..robust import evaluate_robust, plant_set

    if args.from_dir is not None:
        return _score_from(args)
    if args.problem is None:
        print("tierplan: error: score needs a problem file (or --from RUN)", file=sys.stderr)
        return EXIT_INPUT
    prob = load_problem_file(args.problem)
    plans = [load_plan(p, prob.arm.joint_names) for p in args.plan]
    if not plans and not args.baselines:
        print(
            "tierplan: error: score needs at least one --plan FILE or --baselines", file=sys.stderr
        )
        return EXIT_INPUT
    n_plants = prob.perturb.plants if args.plants is None else args.plants
    if n_plants < 0:
        print(f"tierplan: error: --plants must be >= 0, got {n_plants}", file=sys.stderr)
        return EXIT_INPUT
    out = console_for(prob)
    n = prob.arm.n
    jobs: list[tuple[str, str, Callable]] = [
        (
            pl.label,
            pl.compact(n),
            functools.partial(tiered_for, pl, kind="osc" if pl.is_single_tier(n) else "plan"),
        )
        for pl in plans
    ]
    if args.baselines:
        b = prob.baseline
        op = osc_plan(prob, b.osc_kp_t, b.osc_kp_r, b.osc_zeta, label="baseline: single-tier OSC")
        jobs.append((op.label, op.compact(n), functools.partial(tiered_for, op, kind="osc")))
        jobs.append(
            (
                "baseline: joint-space CLIK + PD",
                joint_gains_text(b.joint_kp, b.joint_zeta),
                functools.partial(joint_for, b.joint_kp, b.joint_zeta),
            )
        )
    plants = plant_set(prob, n_plants)
    results = []
    kept: list[list] = []
    with out.status("simulating…") as status:
        for i, (label, text, make) in enumerate(jobs, start=1):
            status.update(
                f"simulating {label} ({i}/{len(jobs)}) on {len(prob.references)} trajectories"
                + (f" and {n_plants} perturbed plants…" if n_plants else "…")
            )
            kept.append([])
            results.append(
                evaluate_robust(
                    prob,
                    plants,
                    make,
                    label,
                    text,
                    compute_margin=not args.no_margin,
                    keep_rollouts=kept[-1] if (args.figures or args.rollouts) else None,
                )
            )
    scores = [r.nominal for r in results]
    ref_i = next((i for i, s in enumerate(scores) if s.kind == "osc"), 0)
    out.print(score_table(scores, reference=scores[ref_i]))
    if n_plants:
        out.print(robust_table(results, reference=results[ref_i]))
    for line in reasons(results):
        out.print(line)
    out.print(escape("plans ([joints] t = kp_t, r = kp_r [1/s²], z = ζ):"))
    for line in plan_legend(scores):
        out.print(line)
    lim = prob.scoring.margins
    out.print(
        f"'vs OSC' compares with '{escape(scores[ref_i].label)}'. {MARGIN_LEGEND}; feasible "
        f"needs at least {lim.stiffness:g}×, {lim.delay_ms:g} ms and {lim.bandwidth:g}×."
    )
    if n_plants:
        out.print(plants_line(prob, n_plants))
    _score_outputs(args, out, prob, results, kept)
    return EXIT_OK


def _score_outputs(args, out, prob, results, kept) -> None:  # type: ignore[no-untyped-def]
    """The caution line, then --json and --figures of ``score``."""
    from ..outputs import write_atomic
    from ..report import SAFETY_SHORT, scores_json

    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    if args.json:
        write_atomic(args.json, scores_json(results))
        out.print(f"wrote {args.json}")
    if args.figures:
        _score_figures(out, args.figures, prob, [r.nominal for r in results], kept)
    if getattr(args, "rollouts", None):
        from ..rollout_log import rollout_csv, safe_name

        refs = {r.name: r for r in prob.references}
        names = []
        for res, rollouts in zip(results, kept):
            for ro in rollouts:
                f = args.rollouts / f"{safe_name(res.nominal.label)}-{safe_name(ro.name)}.csv"
                write_atomic(f, rollout_csv(ro, refs[ro.name], prob.arm.joint_names))
                names.append(f.name)
        out.print(f"rollouts: {args.rollouts}/ ({len(names)} CSV files)")


def _score_figures(out, folder: Path, prob, scores, kept) -> None:  # type: ignore[no-untyped-def]
    from ..runreport import rollout_figures

    role = {"osc": "osc", "joint_space": "joint"}
    first_plan = next((s.label for s in scores if s.kind == "plan"), None)
    series = [
        (s.label, "best" if s.label == first_plan else role.get(s.kind, ""), ro)
        for s, ro in zip(scores, kept)
    ]
    figs = rollout_figures(folder, prob, series)
    out.print(f"figures: {', '.join(str(folder / f) for f, _ in figs)}")


def _score_from(args: argparse.Namespace) -> int:
    from rich.markup import escape

    from ..report import reasons, robust_table, score_table
    from ..rundir import read_run
    from ..runreport import mismatches, rebuild, rescore, run_problem

    run = read_run(args.from_dir)
    prob, notes = run_problem(run, args.problem)
    out = console_for(prob)
    for n in notes:
        out.print(f"[yellow]warning:[/] {escape(n)}")
    scores: list = []
    kept: list[list] = []
    diffs: list[list[str]] = []
    with out.status("re-simulating…") as status:
        for i, e in enumerate(run.ranking, start=1):
            status.update(f"re-simulating rank {e.rank} ({i}/{len(run.ranking)})…")
            kept.append([])
            sc = rescore(
                prob,
                rebuild(e, run, prob),
                kept[-1] if (args.figures or args.rollouts) else None,
                compute_margin=not args.no_margin,
            )
            scores.append(sc)
            diffs.append(mismatches(e, sc) if not args.no_margin else [])
    ref = next((r for r in scores if r.nominal.kind == "osc"), scores[0]) if scores else None
    if ref is not None:
        out.print(score_table([r.nominal for r in scores], reference=ref.nominal))
        if prob.perturb.plants:
            out.print(robust_table(scores, reference=ref))
        for line in reasons(scores):
            out.print(line)
    bad = [(e, d) for e, d in zip(run.ranking, diffs) if d]
    for e, d in bad:
        out.print(f"[red]rank {e.rank} {escape(e.label)} differs:[/] " + escape("; ".join(d)))
    if args.no_margin:
        out.print("--no-margin: numbers shown, not checked against the run")
    elif not bad:
        out.print(
            f"[green]reproduced[/]: all {len(run.ranking)} ranked entries of {args.from_dir} "
            "match ranking.json exactly (error index, RMS and max errors, torque, margins, "
            "steps, robust figures)"
        )
    else:
        out.print(f"{len(run.ranking) - len(bad)} of {len(run.ranking)} ranked entries reproduced")
    _score_outputs(args, out, prob, scores, kept)
    return EXIT_FAILED if bad else EXIT_OK
