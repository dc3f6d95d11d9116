"""Errors of the tool: one base class, each error keeps what was wrong as attributes."""

from __future__ import annotations

__all__ = [
    "InputError",
    "PlanError",
    "ProblemError",
    "SimulationError",
    "TierplanError",
    "printable",
]


class TierplanError(Exception):
    """Base class of every error this package raises on purpose."""


def printable(text: str, limit: int = 2000) -> str:
    """``text`` safe for a terminal line: control characters (newlines, escape sequences)
    shown escaped, at most ``limit`` characters."""
    out = "".join(
        c if (32 <= ord(c) != 127 and not 0x80 <= ord(c) < 0xA0) else repr(c)[1:-1] for c in text
    )
    return out if len(out) <= limit else out[: limit - 1] + "…"


class InputError(TierplanError):
    """A user file is wrong: says which file, which key, and what is wrong.

    Attributes:
        path: the file that holds the bad value (or ``None`` when built in code).
        key: dotted key inside the file (``actuators.elbow.corner_hz``), or ``""``.
        reason: what is wrong and, where possible, how to fix it.
    """

    def __init__(self, path: object, key: str, reason: str) -> None:
        self.path = None if path is None else str(path)
        self.key = key
        self.reason = reason
        where = self.path or "<in memory>"
        if key:
            where = f"{where}: {key}"
        super().__init__(f"{where}: {reason}")


class ProblemError(InputError):
    """A problem file (or a file it names: URDF, CSV) is wrong."""


class PlanError(InputError):
    """A plan file is wrong."""


class SimulationError(TierplanError):
    """The simulator was asked for something it cannot do (not a divergence: those are results)."""
