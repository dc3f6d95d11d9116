"""When a Ctrl-C may interrupt a process that runs trials.

optuna ends a trial whose objective raises KeyboardInterrupt as failed and passes the
interrupt on; but an interrupt that lands in its own bookkeeping around the objective
(asking the sampler, recording the result) breaks its clean-up: optuna 5's ``_run_trial``
then fails with UnboundLocalError and a traceback (seen in 2 of 22 Ctrl-C tests beside a
CPU hog). And one that lands while the journal's lock is held could leave the lock taken
by this process, which a later lock from the same process would wait on for ever.

So while trials run (``taking``), a Ctrl-C raises KeyboardInterrupt only inside an
objective and outside a ``critical`` section; one that comes at any other moment is
held, and raised at the next safe point: a ``checkpoint`` in the objective (after each
trajectory), the start of the next objective, or the end of the trials.

Everywhere else in the command line (``noting``) a Ctrl-C raises at once, as Python's own
handler does, and is also noted: Python drops an exception raised inside a finaliser (a
``__del__`` the garbage collector happens to run), so a Ctrl-C landing there was lost
(twice in 40 Ctrl-C tests beside a CPU hog: one run went on to its end, one ranked
studies its workers had cut short). ``check`` raises a noted one again at the points the
search passes often; code that handles a KeyboardInterrupt calls ``clear``.
"""

from __future__ import annotations

import contextlib
import signal
import threading
from collections.abc import Callable, Iterator
from typing import Any

__all__ = [
    "check",
    "checkpoint",
    "clear",
    "critical_enter",
    "critical_exit",
    "install",
    "noting",
    "objective",
    "requested",
    "taking",
]


class _State:
    in_objective = False
    critical = 0
    requested = False


_S = _State()


def _raise_now() -> None:
    _S.in_objective = False  # once: a later Ctrl-C cannot land in optuna's clean-up
    raise KeyboardInterrupt


def _handler(signum: int, frame: Any) -> None:
    _S.requested = True
    if _S.in_objective and _S.critical == 0:
        _raise_now()


def _noting_handler(signum: int, frame: Any) -> None:
    _S.requested = True
    raise KeyboardInterrupt


@contextlib.contextmanager
def _handled_by(handler: Callable[[int, Any], None]) -> Iterator[list[bool]]:
    """``handler`` takes SIGINT in the block (in the main thread; elsewhere the block runs
    as it is); the handler before it comes back after it, and nothing stays pending. The
    list it gives says, after the block, whether a Ctrl-C was held at its end."""
    held = [False]
    if threading.current_thread() is not threading.main_thread():
        yield held
        return
    old = signal.signal(signal.SIGINT, handler)
    try:
        yield held
    finally:
        signal.signal(signal.SIGINT, old)  # from here a Ctrl-C goes to the old handler
        held[0] = _S.requested
        _S.requested, _S.in_objective, _S.critical = False, False, 0


@contextlib.contextmanager
def noting() -> Iterator[None]:
    """In the block a Ctrl-C raises KeyboardInterrupt at once and is noted (see above)."""
    with _handled_by(_noting_handler):
        yield


def check() -> None:
    """Raise KeyboardInterrupt if a Ctrl-C came and was not handled (``clear``)."""
    if _S.requested:
        raise KeyboardInterrupt


def clear() -> None:
    """A KeyboardInterrupt was handled: the Ctrl-C behind it is no longer pending."""
    _S.requested = False


def install() -> None:
    """Take Ctrl-C as described above in this process from now on (a worker process)."""
    signal.signal(signal.SIGINT, _handler)


def requested() -> bool:
    """Whether a Ctrl-C has come and is held."""
    return _S.requested


@contextlib.contextmanager
def taking() -> Iterator[None]:
    """Trials run in this block (see above). A Ctrl-C held to its end is raised after it."""
    with _handled_by(_handler) as held:
        yield
    if held[0]:
        raise KeyboardInterrupt


@contextlib.contextmanager
def objective() -> Iterator[None]:
    """An objective runs in this block: a Ctrl-C interrupts it (one held raises at once)."""
    _S.in_objective = True
    checkpoint()  # after the flag is set: no Ctrl-C slips in between unraised
    try:
        yield
    finally:
        _S.in_objective = False


def critical_enter() -> None:
    """A section a Ctrl-C must not cut starts (a held lock); pair with critical_exit."""
    _S.critical += 1


def critical_exit() -> None:
    """The section ends (a Ctrl-C that came during it stays held: the code that left the
    section may be optuna's, half way through recording; ``checkpoint`` raises it)."""
    _S.critical = max(0, _S.critical - 1)


def checkpoint() -> None:
    """A safe point inside an objective: a held Ctrl-C raises here."""
    if _S.requested and _S.in_objective and _S.critical == 0:
        _raise_now()
