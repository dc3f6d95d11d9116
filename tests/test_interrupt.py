"""A search killed or interrupted part way loses no finished trial and repeats none."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import optuna
import pytest
from problems import PLANAR

from optimizer import search as srch


def _command(trials: int, workers: int = 1) -> list[str]:
    return [
        sys.executable, "-m", "optimizer", "search", str(PLANAR), "--study", "k",
        "--trials", str(trials), "--baseline-trials", "2", "--workers", str(workers),
        "--seed", "3",
    ]  # fmt: skip


def _study(cwd: Path) -> optuna.Study | None:
    journal = cwd / "results" / "planar3" / "studies.journal"
    if not journal.exists():
        return None
    try:
        return optuna.load_study(study_name="k", storage=srch.open_storage(str(journal)))
    except KeyError:
        return None


def _start_and_wait(cwd: Path, trials: int, at_least: int, workers: int = 1) -> subprocess.Popen:
    """Start a search and return once the plan study has ``at_least`` finished trials."""
    proc = subprocess.Popen(
        _command(trials, workers),
        cwd=cwd,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        start_new_session=True,
    )
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        st = _study(cwd)
        if st is not None and srch.finished(st) >= at_least:
            return proc
        assert proc.poll() is None, proc.stderr.read().decode() if proc.stderr else ""
        time.sleep(0.05)
    proc.kill()
    raise AssertionError("the search did not get going in 120 s")


def _wait_group_gone(pgid: int) -> None:
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        try:
            os.killpg(pgid, 0)
        except ProcessLookupError:
            return
        time.sleep(0.05)
    raise AssertionError(f"process group {pgid} still runs 30 s after SIGKILL")


def _snapshot(study: optuna.Study) -> dict[int, tuple]:
    done = (optuna.trial.TrialState.COMPLETE, optuna.trial.TrialState.PRUNED)
    return {t.number: (t.state, t.params, t.values) for t in study.get_trials(states=done)}


def _check_whole(study: optuna.Study, total: int, before: dict[int, tuple]) -> None:
    trials = study.get_trials()
    numbers = [t.number for t in trials]
    assert len(set(numbers)) == len(numbers) == max(numbers) + 1  # none duplicated
    assert srch.finished(study) == total
    assert not [t for t in trials if t.state.name in ("RUNNING", "WAITING")]
    after = _snapshot(study)
    for n, v in before.items():  # every trial finished before the stop is kept as it was
        assert after[n] == v, n
    retried = [t.user_attrs["retry_of"] for t in trials if "retry_of" in t.user_attrs]
    assert sorted(retried) == sorted(t.number for t in trials if srch.abandoned(t))


@pytest.mark.parametrize("workers", [1, 2])
def test_killed_search_resumes_without_loss(tmp_path, workers) -> None:
    """SIGKILL to the whole process group part way, then the same command again."""
    proc = _start_and_wait(tmp_path, 30, 6, workers)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    _wait_group_gone(proc.pid)  # the workers too: a live pid is never reclaimed
    study = _study(tmp_path)
    assert study is not None
    before = _snapshot(study)
    assert 6 <= len(before) < 30
    again = subprocess.run(_command(30, workers), cwd=tmp_path, capture_output=True, text=True)
    assert again.returncode == 0, again.stderr
    _check_whole(_study(tmp_path), 30, before)
    ranking = json.loads((tmp_path / "results" / "planar3" / "k" / "ranking.json").read_text())
    assert ranking


def test_ctrl_c_writes_the_ranking_so_far_and_says_so(tmp_path) -> None:
    """SIGINT (as Ctrl-C sends it): exit code 130, files written, the resume completes."""
    proc = _start_and_wait(tmp_path, 400, 5)
    os.killpg(proc.pid, signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    out = tmp_path / "results" / "planar3" / "k"
    run = json.loads((out / "run.json").read_text())
    assert run["interrupted"] is True and 5 <= run["finished_trials"]["plan"] < 400
    assert json.loads((out / "ranking.json").read_text()) is not None
    before = _snapshot(_study(tmp_path))
    n = run["finished_trials"]["plan"] + 3
    again = subprocess.run(_command(n), cwd=tmp_path, capture_output=True, text=True)
    assert again.returncode == 0, again.stderr
    _check_whole(_study(tmp_path), n, before)


def _files_whole(out: Path) -> int:
    """Every result file present parses whole (JSON, CSV, plan TOML); returns how many."""
    import csv

    from optimizer.tomlio import tomllib

    n = 0
    for name in ("ranking.json", "run.json"):
        if (out / name).exists():
            json.loads((out / name).read_text())
            n += 1
    for name in ("ranking.csv", "trials.csv"):
        if (out / name).exists():
            rows = list(csv.reader((out / name).open(newline="")))
            assert rows and all(len(r) == len(rows[0]) for r in rows), name
            n += 1
    for f in (out / "plans").glob("rank-*.toml") if (out / "plans").is_dir() else []:
        tomllib.loads(f.read_text())
        n += 1
    if (out / "best-plan.toml").exists():
        tomllib.loads((out / "best-plan.toml").read_text())
        n += 1
    return n


def _kill_loop(
    tmp_path: Path, cycles: int, seed: int, workers: int = 1, latest: float = 7.0
) -> None:
    import random

    rng = random.Random(seed)
    out = tmp_path / "results" / "planar3" / "k"
    before: dict[int, tuple] = {}
    for _ in range(cycles):
        proc = subprocess.Popen(
            _command(16, workers), cwd=tmp_path, stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            start_new_session=True,
        )  # fmt: skip
        time.sleep(rng.uniform(0.3, latest))  # start-up, trials, ranking or file writing
        try:
            os.killpg(proc.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass  # it had finished
        proc.wait()
        _wait_group_gone(proc.pid)
        study = _study(tmp_path)
        if study is not None:
            trials = study.get_trials()
            numbers = [t.number for t in trials]
            assert len(set(numbers)) == len(numbers)  # no trial number twice
            now = _snapshot(study)
            for n, v in before.items():  # nothing finished is lost or changed
                assert now[n] == v, n
            before = now
        _files_whole(out)
    again = subprocess.run(_command(16, workers), cwd=tmp_path, capture_output=True, text=True)
    assert again.returncode == 0, again.stderr
    _check_whole(_study(tmp_path), 16, before)
    assert _files_whole(out) >= 5


def test_kills_at_random_moments_lose_nothing(tmp_path) -> None:
    """SIGKILL at seeded random moments, 3 times, then resume: storage and files stay whole.
    A whole run here takes about 3.5 s, so the moments are drawn up to that (up to 7 s,
    two kills of three landed after the run had ended)."""
    _kill_loop(tmp_path, 3, seed=1, latest=3.5)


@pytest.mark.slow
def test_many_kills_at_random_moments_lose_nothing(tmp_path) -> None:
    """The same with 20 kills."""
    _kill_loop(tmp_path, 20, seed=2)


# --- faults on a loaded machine (slow): both cores kept busy by other processes ---


@pytest.fixture
def cpu_hog():
    """Two busy processes beside the test, as on a shared machine with both cores taken."""
    hogs = [subprocess.Popen([sys.executable, "-c", "while True: pass"]) for _ in range(2)]
    yield
    for h in hogs:
        h.kill()
        h.wait()


@pytest.mark.slow
def test_ctrl_c_under_load_never_prints_a_traceback(tmp_path, cpu_hog) -> None:
    """Ctrl-C (SIGINT to the whole group) at 20 seeded random moments of a two-worker
    search, from start-up to ranking: exit 130 each time (or -2 when it lands before the
    interpreter has set up its handlers), one line, no traceback; a final resume completes
    the study with every finished trial kept."""
    import random

    rng = random.Random(7)
    before: dict[int, tuple] = {}
    for i in range(20):
        proc = subprocess.Popen(  # a budget no run reaches in 20 s: each one is stopped
            _command(4000, workers=2), cwd=tmp_path, stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE, start_new_session=True,
        )  # fmt: skip
        time.sleep(rng.uniform(0.3, 20.0))  # start-up, baselines, plan trials, ranking
        try:
            os.killpg(proc.pid, signal.SIGINT)
        except ProcessLookupError:
            pass
        _, err_bytes = proc.communicate(timeout=120)
        err = err_bytes.decode()
        assert "Traceback" not in err and "Error" not in err, (i, err)
        assert proc.returncode in (130, -signal.SIGINT), (i, proc.returncode, err)
        _wait_group_gone(proc.pid)
        study = _study(tmp_path)
        if study is not None:
            now = _snapshot(study)
            for n, v in before.items():
                assert now[n] == v, (i, n)
            before = now
    assert before, "no Ctrl-C landed after a plan trial had finished: widen the moments"
    total = srch.finished(_study(tmp_path)) + 12  # past the enqueued starting points
    again = subprocess.run(_command(total), cwd=tmp_path, capture_output=True, text=True)
    assert again.returncode == 0, again.stderr
    _check_whole(_study(tmp_path), total, before)


@pytest.mark.slow
def test_kills_under_load_with_two_workers_lose_nothing(tmp_path, cpu_hog) -> None:
    """SIGKILL at 20 seeded random moments of a two-worker search beside the hog, then
    resume: storage and files stay whole, nothing finished is lost or repeated."""
    _kill_loop(tmp_path, 20, seed=4, workers=2)
