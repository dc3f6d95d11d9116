"""What the bench scripts share: the best CPU time of a few repeats."""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any


def best_cpu(f: Callable[[], Any], repeat: int = 3) -> float:
    """The smallest CPU time [s] of ``repeat`` calls of ``f`` (the least disturbed one on a
    shared machine)."""
    out = float("inf")
    for _ in range(repeat):
        t0 = time.process_time()
        f()
        out = min(out, time.process_time() - t0)
    return out
