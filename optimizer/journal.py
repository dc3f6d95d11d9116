"""The default study storage: optuna's journal file, with a lock no killed process can keep.

optuna's own file locks are lock *files*: a worker killed while holding one leaves it
behind, and the others wait out a grace period (or, with a relative journal path, spin
for ever on a dangling symlink: measured with optuna 5.0). ``flock`` locks belong to the
open file and the kernel drops them when the process dies. The lock also repairs the one
thing a death mid-write could leave: a last line without its newline, which would corrupt
the next record appended after it.
"""

from __future__ import annotations

import os
from pathlib import Path

from optuna.storages import JournalStorage
from optuna.storages.journal import JournalFileBackend, JournalFileOpenLock

from . import interrupt

__all__ = [
    "FlockLock",
    "journal_storage",
]

try:
    import fcntl
except ImportError:  # pragma: no cover - not on POSIX
    fcntl = None  # type: ignore[assignment]


class FlockLock(JournalFileOpenLock):
    """An exclusive ``flock`` on ``<journal>.lock``; released by the kernel if we die.

    Subclasses optuna's public open-file lock only for its type; both methods are ours.
    """

    def __init__(self, journal: str) -> None:

        self._journal = journal
        self._path = journal + ".lock"
        self._fd: int | None = None

    def acquire(self) -> bool:
        interrupt.critical_enter()  # a Ctrl-C waits until the lock is released
        try:
            fd = os.open(self._path, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX)
            except BaseException:
                os.close(fd)
                raise
            self._fd = fd
            _drop_torn_tail(self._journal)
        except BaseException:
            interrupt.critical_exit()
            raise
        return True

    def release(self) -> None:
        if self._fd is not None:
            fd, self._fd = self._fd, None
            try:
                fcntl.flock(fd, fcntl.LOCK_UN)
                os.close(fd)
            finally:
                interrupt.critical_exit()


def _drop_torn_tail(journal: str) -> None:
    """Cut a last line that has no newline (a writer died mid-record)."""
    try:
        size = os.path.getsize(journal)
    except OSError:
        return
    if size == 0:
        return
    with open(journal, "rb+") as f:
        f.seek(size - 1)
        if f.read(1) == b"\n":
            return
        chunk = 4096
        pos = size
        while pos > 0:
            start = max(0, pos - chunk)
            f.seek(start)
            buf = f.read(pos - start)
            nl = buf.rfind(b"\n")
            if nl >= 0:
                f.truncate(start + nl + 1)
                return
            pos = start
        f.truncate(0)


def journal_storage(path: str | Path) -> JournalStorage:
    """A journal-file storage at ``path`` (folders made as needed), safe for worker processes."""
    p = Path(path).resolve()
    p.parent.mkdir(parents=True, exist_ok=True)
    lock = FlockLock(str(p)) if fcntl is not None else JournalFileOpenLock(str(p))
    return JournalStorage(JournalFileBackend(str(p), lock_obj=lock))
