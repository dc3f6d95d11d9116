"""``tierplan sensitivity``."""

from __future__ import annotations

import argparse
from pathlib import Path

from ..exceptions import InputError
from .common import EXIT_OK, console_for

__all__ = [
    "add",
    "run",
]


def add(sub: argparse._SubParsersAction) -> None:
    """The command's options."""
    sv = sub.add_parser(
        "sensitivity",
        help="how a run's best plan reacts to a step of each plant parameter (tornado)",
    )
    sv.add_argument("run", type=Path, metavar="RUN", help="results folder of a search")
    sv.add_argument("--problem", type=Path, metavar="FILE", help="problem (default: the run's)")
    sv.add_argument("--json", type=Path, metavar="FILE", help="also write the table as JSON")


def run(args: argparse.Namespace) -> int:
    import json

    from rich.markup import escape

    from ..advice import sensitivities
    from ..outputs import write_atomic
    from ..report import SAFETY_SHORT, sensitivity_table
    from ..rundir import RANKING_JSON, SENSITIVITY, read_run, write_extra
    from ..runreport import rebuild, roles, run_problem

    run = read_run(args.run)
    prob, notes = run_problem(run, args.problem)
    out = console_for(prob)
    for n in notes:
        out.print(f"[yellow]warning:[/] {escape(n)}")
    best, _, _ = roles(run.ranking)
    if best is None:
        raise InputError(run.file(RANKING_JSON), "", "holds no ranked plan")
    label, text, make = rebuild(best, run, prob)
    with out.status("stepping each plant parameter…") as status:
        base, rows = sensitivities(
            prob,
            make,
            label,
            on_step=lambda i, n: status.update(f"stepping each plant parameter… {i}/{n}"),
        )
    out.print(sensitivity_table(base, rows, label))
    doc = {
        "label": label,
        "plan_text": text,
        "error_index": base.error_index,
        "rows": [r.to_dict() for r in rows],
    }
    body = json.dumps(doc, indent=2) + "\n"
    f = write_extra(run.path, SENSITIVITY, body)
    if args.json:
        write_atomic(args.json, body)
    out.print(f"wrote {f} (for 'tierplan report {run.path}')")
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    return EXIT_OK
