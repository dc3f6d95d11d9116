"""Writing output files whole: a file is either the old one or the new one, never half.

Every file the tool writes (run folders, ``--json``, exported code, fitted actuator
files) goes through ``write_atomic``. No printing.
"""

from __future__ import annotations

import csv
import io
import os
import tempfile
from collections.abc import Sequence
from pathlib import Path

__all__ = ["csv_text", "write_atomic"]


def write_atomic(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` via a temporary file and rename: never half a file."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def csv_text(rows: Sequence[dict], columns: Sequence[str]) -> str:
    """Rows as CSV text with the given columns (missing values empty)."""
    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(columns)
    for r in rows:
        w.writerow(["" if r.get(c) is None else r.get(c) for c in columns])
    return buf.getvalue()
