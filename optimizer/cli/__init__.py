"""Command line: one module per command (``check``, ``score``, ``search``, ``swap``,
``compare``, ``report``, ``sensitivity``, ``upgrade``, ``export``, ``validate``, ``fit``),
each with ``add`` (its options) and ``run`` (parse, call the library, print); ``common``
holds what several share. The only package besides ``report`` that prints.

A command module imports the library inside ``run``, so ``tierplan --help`` loads no
numerical module.
"""

from __future__ import annotations

import argparse
import logging
import sys
import warnings
from collections.abc import Sequence
from types import ModuleType

from .. import __version__, interrupt
from ..exceptions import InputError, TierplanError, printable
from . import (
    check,
    compare,
    export,
    fit,
    report,
    score,
    search,
    sensitivity,
    swap,
    upgrade,
    validate,
)
from .common import EXIT_FAILED, EXIT_INPUT, EXIT_INTERRUPTED, EXIT_OK

__all__ = ["COMMANDS", "EXIT_FAILED", "EXIT_INPUT", "EXIT_INTERRUPTED", "EXIT_OK", "main",
           "parser"]

#: The commands, in the order ``--help`` lists them.
COMMANDS: dict[str, ModuleType] = {
    "check": check,
    "score": score,
    "search": search,
    "swap": swap,
    "compare": compare,
    "report": report,
    "sensitivity": sensitivity,
    "upgrade": upgrade,
    "export": export,
    "validate": validate,
    "fit": fit,
}


def parser() -> argparse.ArgumentParser:
    """The whole command line's parser."""
    p = argparse.ArgumentParser(
        prog="tierplan",
        description="Choose tiered task-space controller plans for arms whose actuators differ "
        "in torque bandwidth, by closed-loop simulation. Simulation only: see the README's "
        "safety section before any plan goes near hardware.",
    )
    p.add_argument("--version", action="version", version=f"tierplan {__version__}")
    p.add_argument("--debug", action="store_true", help="show tracebacks and debug logging")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    for module in COMMANDS.values():
        module.add(sub)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    args = parser().parse_args(argv)
    logging.basicConfig(
        level=logging.DEBUG if args.debug else logging.WARNING, format="%(levelname)s: %(message)s"
    )
    if not args.debug:
        warnings.filterwarnings("ignore")
    if args.command is None:
        parser().print_help()
        return EXIT_INPUT
    with interrupt.noting():
        return _run(args)


def _run(args: argparse.Namespace) -> int:
    try:
        rc = COMMANDS[args.command].run(args)
        interrupt.check()  # a Ctrl-C that a finaliser swallowed on its way
        return rc
    except InputError as err:
        if args.debug:
            raise
        print(f"tierplan: error: {printable(str(err))}", file=sys.stderr)
        return EXIT_INPUT
    except TierplanError as err:
        if args.debug:
            raise
        print(f"tierplan: error: {printable(str(err))}", file=sys.stderr)
        return EXIT_FAILED
    except OSError as err:  # a results folder or file that cannot be written
        if args.debug:
            raise
        where = f"{err.filename}: " if getattr(err, "filename", None) else ""
        print(
            f"tierplan: error: {printable(where)}could not write: {err.strerror or err} "
            "(nothing already written was changed)",
            file=sys.stderr,
        )
        return EXIT_FAILED
    except KeyboardInterrupt:
        print("tierplan: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    return EXIT_INPUT

