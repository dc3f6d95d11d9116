"""Task-space test trajectories: one kind per class, all sampled to a ``Reference``."""

from __future__ import annotations

from typing import Any

import numpy as np

from .base import Reference, TrajectoryKind, smooth_phase
from .composite import CSV_COLUMNS, ROTATION_KINDS, TRANSLATION_KINDS, Combined, CsvPoses
from .simple import Circle, Hold, Line, Rotate, Sine

#: Kinds by the name used in problem files. A kind is read from its table field by field
#: (floats; 3-tuples for vectors), unless it has ``from_table(t, read_part, base)``.
TRAJECTORY_KINDS: dict[str, type[Any]] = {
    k.kind: k for k in (Hold, Line, Circle, Sine, Rotate, Combined, CsvPoses)
}


def sample(
    name: str,
    kind: TrajectoryKind,
    duration_s: float,
    rate_hz: float,
    p0: np.ndarray,
    R0: np.ndarray,
) -> Reference:
    """Sample ``kind`` from the start pose (p0, R0) at every tick of ``duration_s``."""
    n = int(round(duration_s * rate_hz)) + 1
    t = np.arange(n) / rate_hz
    dp, dv, da, dR, w, dw = kind.offsets(t, R0)
    R = np.broadcast_to(R0, (n, 3, 3)) if dR is None else dR @ R0
    return Reference(
        name=name,
        t=t,
        p=p0[None, :] + dp,
        R=R,
        twist=np.hstack([dv, w]),
        acc=np.hstack([da, dw]),
    )


__all__ = [
    "CSV_COLUMNS",
    "ROTATION_KINDS",
    "TRAJECTORY_KINDS",
    "TRANSLATION_KINDS",
    "Circle",
    "Combined",
    "CsvPoses",
    "Hold",
    "Line",
    "Reference",
    "Rotate",
    "Sine",
    "TrajectoryKind",
    "sample",
    "smooth_phase",
]
