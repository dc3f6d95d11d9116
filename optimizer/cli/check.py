"""``tierplan check``."""

from __future__ import annotations

import argparse
from pathlib import Path

from .common import EXIT_OK, console_for, load_problem_file

__all__ = [
    "add",
    "run",
]


def add(sub: argparse._SubParsersAction) -> None:
    """The command's options."""
    c = sub.add_parser("check", help="validate a problem file and print its summary")
    c.add_argument("problem", type=Path, help="problem file (TOML)")



def run(args: argparse.Namespace) -> int:
    from rich.markup import escape

    from ..ladder import FRACTION, MIN_GAIN_STEP, gain_ladder, suggested_plan
    from ..report import check_table, ladder_table, plant_line

    prob = load_problem_file(args.problem)
    out = console_for(prob)
    for t in check_table(prob):
        out.print(t)
    out.print(plant_line(prob))
    with out.status("climbing the gain ladder…"):
        rungs = gain_ladder(prob)
    out.print(ladder_table(prob, rungs))
    plan = suggested_plan(prob, rungs)
    if plan is None:
        out.print(
            "[red]no stiffness holds the minimum margins even with every joint[/]: "
            "check the actuators, delays and [simulation] min_* margins"
        )
    else:
        out.print(
            f"suggested plan (one tier per rung that adds at least {MIN_GAIN_STEP:g}× "
            f"stiffness, at {FRACTION:.0%} of its limit; search evaluates it first): "
            + escape(plan.compact(prob.arm.n))
        )
    out.print(
        f"[green]ok[/]: {args.problem} is valid; every trajectory is reachable within the "
        "joint limits."
    )
    return EXIT_OK
