"""``tierplan upgrade``."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from ..exceptions import InputError
from .common import EXIT_INPUT, EXIT_OK, console_for, load_problem_file

__all__ = [
    "add",
    "run",
]


def add(sub: argparse._SubParsersAction) -> None:
    """The command's options."""
    up = sub.add_parser(
        "upgrade",
        help="which joint's drive is worth making faster: each upgraded in turn, best plan "
        "re-scored on the robust objective",
    )
    up.add_argument("problem", type=Path, help="problem file (TOML)")
    up.add_argument(
        "--from",
        dest="from_dir",
        type=Path,
        required=True,
        metavar="RUN",
        help="results folder of a search: its ranked plans are the candidates",
    )
    up.add_argument(
        "--factor",
        type=float,
        default=2.0,
        help="how much faster the upgraded drive is (default 2: twice the bandwidth)",
    )
    up.add_argument(
        "--top", type=int, default=5, help="ranked plans of the run used as candidates (default 5)"
    )
    up.add_argument("--json", type=Path, metavar="FILE", help="also write the table as JSON")


def run(args: argparse.Namespace) -> int:
    import json

    from rich.markup import escape

    from ..advice import upgrade_advice
    from ..outputs import write_atomic
    from ..report import SAFETY_SHORT, upgrade_table
    from ..rundir import UPGRADE, write_extra
    from ..runs import previous_plans

    if not args.factor > 1.0:
        print(f"tierplan: error: --factor must be > 1, got {args.factor}", file=sys.stderr)
        return EXIT_INPUT
    prob = load_problem_file(args.problem)
    out = console_for(prob)
    if args.top < 1:
        print(f"tierplan: error: --top must be >= 1, got {args.top}", file=sys.stderr)
        return EXIT_INPUT
    plans = [s.plan for s in previous_plans(args.from_dir, prob, args.top)]
    if not plans:
        raise InputError(args.from_dir, "", "holds no ranked plan (plans/rank-NN.toml)")
    with out.status("upgrading each drive in turn…") as status:
        rows = upgrade_advice(
            prob,
            plans,
            args.factor,
            on_joint=lambda j: status.update(f"upgrading each drive in turn… {j}"),
        )
    out.print(upgrade_table(rows, args.factor))
    for r in rows[:3]:
        out.print(f"  {escape(r.joint)}: {escape(r.best_plan)}")
    out.print(
        f"candidates: the {len(plans)} ranked plans of {escape(str(args.from_dir))} and the "
        "gain ladder's plans of each upgraded problem, on the nominal plant and the "
        "problem's perturbed plants (robust error)"
    )
    body = json.dumps([r.to_dict() for r in rows], indent=2) + "\n"
    f = write_extra(args.from_dir, UPGRADE, body)
    if args.json:
        write_atomic(args.json, body)
    out.print(f"wrote {f} (for 'tierplan report {args.from_dir}')")
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    return EXIT_OK
