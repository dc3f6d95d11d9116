"""Tally of the generated bad inputs, by kind, printed at the end of the test run.

Each property test of the ``test_fuzz_*`` modules calls ``tally(kind, outcome)`` once per
generated example; ``conftest.pytest_terminal_summary`` prints the counts, so a run shows
how many inputs of each kind it tried and how many were refused.
"""

from __future__ import annotations

from collections import Counter

#: (kind, outcome) -> examples run in this session.
COUNTS: Counter[tuple[str, str]] = Counter()


def tally(kind: str, outcome: str) -> None:
    """Count one generated example of ``kind`` ("problem", "URDF", ...) and its outcome
    ("refused" or "accepted")."""
    COUNTS[(kind, outcome)] += 1


def summary() -> list[str]:
    """Lines for the terminal: one per kind, then the total; empty when none ran."""
    kinds = sorted({k for k, _ in COUNTS})
    if not kinds:
        return []
    lines = []
    for k in kinds:
        n = sum(v for (kk, _), v in COUNTS.items() if kk == k)
        parts = ", ".join(f"{o} {v}" for (kk, o), v in sorted(COUNTS.items()) if kk == k)
        lines.append(f"  {k:<14} {n:>5}  ({parts})")
    total = sum(COUNTS.values())
    lines.append(f"  {'total':<14} {total:>5}")
    return lines
