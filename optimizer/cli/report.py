"""``tierplan report``."""

from __future__ import annotations

import argparse
from pathlib import Path

from .common import EXIT_OK, console_for, refresh_option

__all__ = [
    "add",
    "run",
]


def add(sub: argparse._SubParsersAction) -> None:
    """The command's options."""
    rp = sub.add_parser(
        "report",
        help="write report.md with figures for a search's results folder",
    )
    rp.add_argument(
        "run", type=Path, metavar="RUN", help="results folder (results/<problem>/<study>)"
    )
    rp.add_argument(
        "--problem",
        type=Path,
        metavar="FILE",
        help="problem file (default: the one named in the run's run.json)",
    )
    refresh_option(rp)


def run(args: argparse.Namespace) -> int:
    from rich.markup import escape

    from ..rundir import REPORT, read_run
    from ..runreport import run_problem, write_report

    run = read_run(args.run)
    prob, notes = run_problem(run, args.problem)
    if args.storage:
        from ..runs import refresh_run
        refresh_run(args.run, prob, args.storage, args.study)
        run = read_run(args.run)
    out = console_for(prob)
    for n in notes:
        out.print(f"[yellow]warning:[/] {escape(n)}")
    with out.status("re-simulating the best plan and both baselines for the figures…"):
        names = write_report(run, prob, notes)
    out.print(f"wrote {run.file(REPORT)} ({', '.join(names[1:])})")
    return EXIT_OK
