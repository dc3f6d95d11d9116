"""Where a Ctrl-C may interrupt a process that runs trials (``optimizer.interrupt``)."""

from __future__ import annotations

import signal

import pytest

from optimizer import interrupt


def _ctrl_c() -> None:
    signal.raise_signal(signal.SIGINT)  # the handler runs before the next line


def test_inside_an_objective_it_interrupts_at_once() -> None:
    ran = []
    with pytest.raises(KeyboardInterrupt), interrupt.taking(), interrupt.objective():
        _ctrl_c()
        ran.append("after")  # not reached
    assert ran == []


def test_outside_an_objective_it_is_held_to_the_end_of_the_trials() -> None:
    ran = []
    with pytest.raises(KeyboardInterrupt), interrupt.taking():
        _ctrl_c()  # optuna's bookkeeping, say
        ran.append("bookkeeping went on")
        assert interrupt.requested()
    assert ran == ["bookkeeping went on"]
    assert not interrupt.requested()  # the block reset it


def test_a_held_one_stops_the_next_objective_before_it_starts() -> None:
    ran = []
    with pytest.raises(KeyboardInterrupt), interrupt.taking():
        _ctrl_c()
        with interrupt.objective():
            ran.append("objective")  # not reached
    assert ran == []


def test_in_a_critical_section_it_waits_for_a_checkpoint() -> None:
    ran = []
    with pytest.raises(KeyboardInterrupt), interrupt.taking(), interrupt.objective():
        interrupt.critical_enter()  # the journal's lock, say
        _ctrl_c()
        ran.append("wrote the record")
        interrupt.critical_exit()
        ran.append("released the lock")
        interrupt.checkpoint()
        ran.append("past the checkpoint")  # not reached
    assert ran == ["wrote the record", "released the lock"]


def test_it_interrupts_once_per_objective_and_the_old_handler_comes_back() -> None:
    before = signal.getsignal(signal.SIGINT)
    ran = []
    with pytest.raises(KeyboardInterrupt), interrupt.taking():
        try:
            with interrupt.objective():
                _ctrl_c()
        except KeyboardInterrupt:
            _ctrl_c()  # a second Ctrl-C in optuna's clean-up: held, not raised there
            ran.append("clean-up finished")
    assert ran == ["clean-up finished"]  # and the block raised the held one at its end
    assert signal.getsignal(signal.SIGINT) is before


def test_a_worker_stopped_by_ctrl_c_stops_the_run_even_if_the_parent_missed_it() -> None:
    """A worker reports that a Ctrl-C stopped it; the parent raises KeyboardInterrupt
    instead of taking the cut-short study as finished (a lost interrupt in the parent once
    let a run go on and exit 0)."""
    from concurrent.futures import Future

    from optimizer import search as srch

    class Pool:
        def __init__(self, results):  # type: ignore[no-untyped-def]
            self.results = list(results)

        def submit(self, fn, job):  # type: ignore[no-untyped-def]
            f: Future = Future()
            f.set_result(self.results.pop(0))
            return f

    srch._run_jobs(Pool([(3, False), (2, False)]), [None, None], None, None)  # type: ignore[arg-type]
    with pytest.raises(KeyboardInterrupt):
        srch._run_jobs(Pool([(3, False), (1, True)]), [None, None], None, None)  # type: ignore[arg-type]


def test_a_ctrl_c_a_finaliser_swallows_is_raised_at_the_next_check(monkeypatch) -> None:
    """Python drops an exception raised in a ``__del__``: a Ctrl-C landing there was lost.
    Under ``noting`` it is noted too, and ``check`` raises it; ``clear`` forgets it."""

    class Finalised:
        def __del__(self) -> None:
            _ctrl_c()  # the KeyboardInterrupt raised here does not get out

    import sys

    dropped = []
    monkeypatch.setattr(sys, "unraisablehook", lambda u: dropped.append(u.exc_type))
    ran = []
    with interrupt.noting():
        obj = Finalised()
        del obj
        ran.append("went on")  # the interrupt was swallowed
        with pytest.raises(KeyboardInterrupt):
            interrupt.check()
        interrupt.clear()
        interrupt.check()  # handled: nothing pending
    assert ran == ["went on"]
    assert dropped == [KeyboardInterrupt]  # Python's "Exception ignored in ..."
