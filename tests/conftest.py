"""Shared fixtures: loaded problems are cached per session (loading runs inverse kinematics)."""

from __future__ import annotations

import sys
from pathlib import Path

from optimizer.blas import one_thread

one_thread()  # as the command line does, before numpy loads its BLAS (idle threads spin)

import pytest  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))

from problems import DEMO, PLANAR  # noqa: E402

from optimizer.problem import Problem, load_problem  # noqa: E402


@pytest.fixture(scope="session")
def demo() -> Problem:
    return load_problem(DEMO)


@pytest.fixture(scope="session")
def planar() -> Problem:
    return load_problem(PLANAR)


def pytest_terminal_summary(terminalreporter) -> None:  # type: ignore[no-untyped-def]
    """Counts of the generated bad inputs by kind (the fuzz tests' tally)."""
    from fuzzing import summary

    lines = summary()
    if lines:
        terminalreporter.write_sep("-", "generated bad inputs by kind")
        for line in lines:
            terminalreporter.write_line(line)
