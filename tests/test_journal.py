"""The journal storage's lock: released by the kernel when its holder dies, and a record
torn by a death mid-write is cut before the next one is appended."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import optuna
import pytest

from optimizer.journal import FlockLock, journal_storage

fcntl = pytest.importorskip("fcntl")


def test_a_killed_holder_does_not_keep_the_lock(tmp_path) -> None:
    """A process that takes the lock and is then SIGKILLed: the lock is free at once
    (optuna's own lock files would stay behind and make the others wait)."""
    journal = str(tmp_path / "s.journal")
    holder = subprocess.Popen(
        [sys.executable, "-c",
         "import sys, time; from optimizer.journal import FlockLock\n"
         f"FlockLock({journal!r}).acquire(); print('held', flush=True); time.sleep(60)"],
        stdout=subprocess.PIPE, text=True,
    )  # fmt: skip
    assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
    fd = os.open(journal + ".lock", os.O_RDWR)
    try:
        with pytest.raises(BlockingIOError):  # held by the other process
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        holder.send_signal(signal.SIGKILL)
        holder.wait()
        deadline = time.monotonic() + 5
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                assert time.monotonic() < deadline, "the lock outlived its holder"
                time.sleep(0.01)
    finally:
        os.close(fd)


def test_a_torn_last_record_is_cut_and_the_study_still_loads(tmp_path) -> None:
    """A writer that died mid-record leaves a last line without its newline; taking the
    lock cuts it, so the next record starts on a line of its own and the study loads
    with every whole trial."""
    path = tmp_path / "s.journal"
    study = optuna.create_study(storage=journal_storage(path), study_name="t")
    study.optimize(lambda t: t.suggest_float("x", 0, 1), n_trials=3)
    whole = path.read_bytes()
    path.write_bytes(whole + b'{"op_code": 4, "worker_id": "dead", "tri')  # torn record
    lock = FlockLock(str(path))
    assert lock.acquire()
    lock.release()
    assert path.read_bytes() == whole
    again = optuna.load_study(storage=journal_storage(path), study_name="t")
    again.optimize(lambda t: t.suggest_float("x", 0, 1), n_trials=1)
    assert len(again.trials) == 4
