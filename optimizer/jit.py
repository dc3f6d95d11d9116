"""Where numba caches compiled kernels."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

__all__ = ["writable_cache"]


def writable_cache(here: Path) -> None:
    """Compiled kernels are cached in ``here`` (the ``__pycache__`` beside their module);
    where that folder cannot be written (an installed, read-only package) they go to a
    folder of the user's in the temporary directory instead of failing at import."""
    if os.environ.get("NUMBA_CACHE_DIR"):
        return
    try:
        here.mkdir(exist_ok=True)
        ok = os.access(here, os.W_OK)
    except OSError:
        ok = False
    if not ok:
        import numba

        uid = os.getuid() if hasattr(os, "getuid") else 0
        numba.config.CACHE_DIR = str(  # type: ignore[attr-defined]
            Path(tempfile.gettempdir()) / f"tierplan-numba-{uid}"
        )
