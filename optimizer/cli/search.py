"""``tierplan search``."""

from __future__ import annotations

import argparse
from pathlib import Path

from .common import (
    EXIT_INPUT,
    console_for,
    finish,
    load_problem_file,
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
    r = sub.add_parser(
        "search",
        help="search tier plans with optuna; tune both baselines on the same budget; rank all",
    )
    r.add_argument("problem", type=Path, help="problem file (TOML)")
    search_options(r, "main")
    r.add_argument(
        "--plan",
        type=Path,
        action="append",
        default=[],
        metavar="FILE",
        help="hand plan to rank beside the optimized ones; repeatable",
    )


def run(args: argparse.Namespace) -> int:
    from ..plan import load_plan
    from ..rundir import default_dir
    from ..runs import Seeded, run_record, write_run

    prob = load_problem_file(args.problem)
    settings = settings_from(args, prob)
    if settings is None:
        return EXIT_INPUT
    seeded = [Seeded(load_plan(p, prob.arm.joint_names), "hand") for p in args.plan]
    out_dir = args.out or default_dir(prob.name, args.study)
    out = console_for(prob)
    result = run_and_show(out, prob, settings, seeded)
    names = write_run(out_dir, prob, result, run_record(prob, settings, result))
    names += report_if(args, out, result, out_dir, prob)
    return finish(out, result, out_dir, names, "search")
