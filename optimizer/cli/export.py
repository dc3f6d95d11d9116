"""``tierplan export``."""

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
    ex = sub.add_parser(
        "export",
        help="write a plan's law as a header-only C++ file (Eigen 3) with a check program",
    )
    ex.add_argument("problem", type=Path, help="problem file (TOML)")
    ex.add_argument("--plan", type=Path, required=True, metavar="FILE", help="plan file (TOML)")
    ex.add_argument("--out", type=Path, required=True, metavar="DIR", help="folder to write")


def run(args: argparse.Namespace) -> int:
    from rich.markup import escape

    from ..export import export_files
    from ..outputs import write_atomic
    from ..plan import load_plan
    from ..report import SAFETY_SHORT

    prob = load_problem_file(args.problem)
    plan = load_plan(args.plan, prob.arm.joint_names)
    out = console_for(prob)
    files = export_files(prob, plan)
    for name, text in files.items():
        write_atomic(args.out / name, text)
    out.print(
        f"wrote {escape(str(args.out))}/ ({', '.join(files)}): build and check with\n"
        f"  cd {escape(str(args.out))} && g++ -O2 -std=c++17 -I/usr/include/eigen3 check.cpp "
        "-o check && ./check"
    )
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    return EXIT_OK
