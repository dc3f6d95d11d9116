"""One bounded reader for every input file: regular files only, a size cap per kind.

A special file (``/dev/zero``, a FIFO nobody writes, a device) is refused before it is
opened for reading, and no file is read past its kind's cap, so no input can hang the
tool or exhaust memory. Every refusal is the caller's error class naming the file.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

from .exceptions import InputError

__all__ = [
    "LIMITS",
    "read_bytes",
    "read_text",
]

#: Largest file of each kind the tool reads [bytes].
LIMITS = {
    "problem": 2 * 2**20,
    "plan": 1 * 2**20,
    "actuator file": 1 * 2**20,
    "URDF": 8 * 2**20,
    "MJCF": 8 * 2**20,
    "trajectory CSV": 64 * 2**20,
    "bench log": 64 * 2**20,
    "results file": 64 * 2**20,
}


def read_bytes(
    path: Path | str, kind: str, error: type[InputError] = InputError, key: str = "",
    where: object = None,
) -> bytes:
    """The bytes of a regular file of ``kind`` no larger than its cap.

    ``where`` is the file the error names (default: ``path`` itself), with ``key``.
    """
    path = Path(path)
    blame = path if where is None else where
    this = "" if where is None else f"{kind} file {path}: "
    limit = LIMITS[kind]
    try:
        st = os.stat(path)  # follows links; never opens the file
    except FileNotFoundError as err:
        msg = "file not found" if where is None else f"{kind} file not found: {path}"
        raise error(blame, key, msg) from err
    except OSError as err:
        raise error(blame, key, f"{this}could not be read: {err.strerror}") from err
    if stat.S_ISDIR(st.st_mode):
        raise error(blame, key, f"{this}is a folder, expected a file")
    if not stat.S_ISREG(st.st_mode):
        raise error(blame, key, f"{this}is not a regular file (a device, pipe or socket)")
    if st.st_size > limit:
        raise error(
            blame, key,
            f"{this}is {st.st_size / 2**20:.1f} MiB; the limit for a {kind} is "
            f"{limit / 2**20:g} MiB",
        )
    try:
        with open(path, "rb") as f:
            data = f.read(limit + 1)
    except OSError as err:
        raise error(blame, key, f"{this}could not be read: {err.strerror}") from err
    if len(data) > limit:  # grew while we looked
        raise error(blame, key, f"{this}is larger than {limit / 2**20:g} MiB")
    return data


def read_text(
    path: Path | str, kind: str, error: type[InputError] = InputError, key: str = "",
    where: object = None,
) -> str:
    """``read_bytes`` decoded as UTF-8 (an error names the file when it is not)."""
    data = read_bytes(path, kind, error, key, where)
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as err:
        this = "" if where is None else f"{kind} file {path} "
        raise error(path if where is None else where, key, f"{this}is not UTF-8 text") from err
