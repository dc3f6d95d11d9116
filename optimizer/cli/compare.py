"""``tierplan compare``."""

from __future__ import annotations

import argparse
import functools
import sys
from pathlib import Path

from .common import (
    EXIT_INPUT,
    EXIT_OK,
    joint_for,
    load_problem_file,
    plants_line,
    refresh_option,
    tiered_for,
)

__all__ = [
    "add",
    "run",
]


def add(sub: argparse._SubParsersAction) -> None:
    """The command's options."""
    c2 = sub.add_parser(
        "compare",
        help="score plans side by side on the same trajectories and seeds, optionally on "
        "perturbed plants",
    )
    c2.add_argument("problem", type=Path, help="problem file (TOML)")
    c2.add_argument("plans", type=Path, nargs="*", metavar="PLAN", help="plan files (TOML)")
    c2.add_argument(
        "--from",
        dest="from_dir",
        type=Path,
        metavar="RUN",
        help="also compare a search's best plan, its hand plans and both tuned baselines "
        "(exact gains), and write robustness.json into that folder for its report",
    )
    c2.add_argument(
        "--figures",
        type=Path,
        metavar="DIR",
        help="draw the robustness and margin PNGs into DIR",
    )
    refresh_option(c2)
    c2.add_argument(
        "--perturb",
        type=int,
        default=0,
        metavar="N",
        help="also run N perturbed plants (spreads in the problem's [perturb] table)",
    )
    c2.add_argument(
        "--seed",
        type=int,
        help="seed of the perturbed plants (default: [perturb] seed, the search's own set; "
        "give another to check plans on plants the search never saw)",
    )
    c2.add_argument(
        "--baselines",
        action="store_true",
        help="include both baselines at the gains of the problem's [baseline] table",
    )
    c2.add_argument("--json", type=Path, metavar="FILE", help="write the results as JSON")


def run(args: argparse.Namespace) -> int:
    import json

    from rich.markup import escape

    from ..compare import compare
    from ..evaluate import joint_gains_text, osc_plan
    from ..outputs import write_atomic
    from ..plan import load_plan
    from ..report import (
        MARGIN_LEGEND,
        SAFETY_SHORT,
        console,
        reasons,
        robustness_table,
    )

    prob = load_problem_file(args.problem)
    if args.perturb < 0:
        print(f"tierplan: error: --perturb must be >= 0, got {args.perturb}", file=sys.stderr)
        return EXIT_INPUT
    if not args.plans and not args.from_dir and not args.baselines:
        print(
            "tierplan: error: compare needs plan files, --from RUN or --baselines",
            file=sys.stderr,
        )
        return EXIT_INPUT
    plans = [load_plan(p, prob.arm.joint_names) for p in args.plans]
    n = prob.arm.n
    cands: list = [(pl.label, pl.compact(n), functools.partial(tiered_for, pl)) for pl in plans]
    run = None
    if args.from_dir is not None:
        from ..rundir import read_run
        from ..runreport import changed_since, rebuild, roles

        if args.storage:
            from ..runs import refresh_run
            refresh_run(args.from_dir, prob, args.storage, args.study)
        run = read_run(args.from_dir)
        note = changed_since(run, prob)
        if note:
            print(f"tierplan: warning: {note}", file=sys.stderr)
        picked = [e for e in roles(run.ranking) if e is not None]
        picked += [e for e in run.ranking if e.source == "hand" and e not in picked]
        cands += [rebuild(e, run, prob) for e in picked]
    if args.baselines:
        b = prob.baseline
        op = osc_plan(prob, b.osc_kp_t, b.osc_kp_r, b.osc_zeta, label="baseline: single-tier OSC")
        cands.append((op.label, op.compact(n), functools.partial(tiered_for, op, kind="osc")))
        cands.append(
            (
                "baseline: joint-space CLIK + PD",
                joint_gains_text(b.joint_kp, b.joint_zeta),
                functools.partial(joint_for, b.joint_kp, b.joint_zeta),
            )
        )
    out = console()
    total = len(cands) * args.perturb
    with out.status("simulating…") as status:
        done = [0]

        def tick(_: int) -> None:
            done[0] += 1
            status.update(f"perturbed plants {done[0]}/{total}…")

        results = compare(prob, cands, args.perturb, on_draw=tick, seed=args.seed)
    out.print(robustness_table(results, args.perturb))
    for line in reasons(results):
        out.print(line)
    for r in results:
        out.print(f"  {escape(r.nominal.label)}: {escape(r.nominal.plan_text)}")
    out.print(MARGIN_LEGEND + ".")
    seed = prob.perturb.seed if args.seed is None else args.seed
    if args.perturb:
        out.print(plants_line(prob, args.perturb, seed))
        if seed == prob.perturb.seed and prob.perturb.plants:
            out.print(
                "[yellow]note:[/] these are the search's own plants (seed "
                f"{seed}); give --seed with another value for plants the search never saw"
            )
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    dicts = [r.to_dict() for r in results]
    text = json.dumps({"seed": seed, "plants": args.perturb, "entries": dicts}, indent=2) + "\n"
    if args.json:
        write_atomic(args.json, text)
        out.print(f"wrote {args.json}")
    if run is not None:
        from ..rundir import ROBUSTNESS, write_extra

        f = write_extra(run.path, ROBUSTNESS, text)
        out.print(f"wrote {f} (for 'tierplan report {run.path}')")
    if args.figures:
        from ..figures import margin_figure, plan_colors, robustness_figure, save

        labels = [r.nominal.label for r in results]
        margins = [
            (r.nominal.stiffness_margin, r.nominal.delay_margin_ms, r.nominal.bandwidth_margin)
            for r in results
        ]
        files = [args.figures / "fig-margin.png"]
        save(margin_figure(labels, margins, plan_colors(labels), prob.scoring.margins), files[0])
        if args.perturb:
            files.append(args.figures / "fig-robustness.png")
            save(robustness_figure(dicts), files[1])
        out.print(f"figures: {', '.join(str(f) for f in files)}")
    return EXIT_OK
