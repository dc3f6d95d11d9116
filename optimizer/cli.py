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


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
