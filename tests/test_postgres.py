"""Three ``tierplan search`` processes on one PostgreSQL study: the sum of trials, none twice.

The server is the one named by ``TIERPLAN_TEST_PG`` (a URL), or a private one this test
starts with ``.ci/pg-server`` (temporary data folder, loopback port). When neither works the
test is skipped with the reason, unless ``TIERPLAN_REQUIRE_PG=1`` (CI), which fails it.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import subprocess
import sys
import tempfile
import uuid
from pathlib import Path

import optuna
import pytest
from problems import PLANAR, ROOT

from optimizer import search as srch

WORKERS = 3
PER_WORKER = 5
BASELINE_PER_WORKER = 2


def _unavailable(reason: str) -> None:
    if os.environ.get("TIERPLAN_REQUIRE_PG") == "1":
        pytest.fail(f"PostgreSQL required here but {reason}")
    pytest.skip(reason)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture(scope="module")
def pg_url():
    try:
        import psycopg  # noqa: F401
    except ImportError:
        _unavailable("the PostgreSQL driver is not installed (pip install -e '.[postgres]')")
    url = os.environ.get("TIERPLAN_TEST_PG")
    if url:
        yield url
        return
    folder = tempfile.mkdtemp(prefix="tierplan-pg-", dir="/tmp")
    os.chmod(folder, 0o755)  # the server runs as another user when we are root
    data = os.path.join(folder, "pg")
    script = str(ROOT / ".ci" / "pg-server")
    try:
        r = subprocess.run(
            ["bash", script, "start", data, str(_free_port())],
            capture_output=True, text=True, timeout=180,
        )  # fmt: skip
    except (OSError, subprocess.TimeoutExpired) as err:
        shutil.rmtree(folder, ignore_errors=True)
        _unavailable(f"no PostgreSQL server could be started ({err})")
    if r.returncode != 0:
        shutil.rmtree(folder, ignore_errors=True)
        last = (r.stderr.strip().splitlines() or ["no output"])[-1]
        _unavailable(f"no PostgreSQL server could be started: {last}")
    try:
        yield r.stdout.strip().splitlines()[-1]
    finally:
        subprocess.run(["bash", script, "stop", data], capture_output=True, timeout=120)
        shutil.rmtree(folder, ignore_errors=True)


def _search(url: str, study: str, out: Path, n: int, b: int, seed: int) -> list[str]:
    return [
        sys.executable, "-m", "optimizer", "search", str(PLANAR), "--storage", url,
        "--study", study, "--worker-trials", str(n), "--baseline-trials", str(b),
        "--seed", str(seed), "--out", str(out),
    ]  # fmt: skip


def test_three_workers_on_one_postgres_study(pg_url, tmp_path):
    """3 processes × 5 plan trials: 15 trials, no number twice, each ended with a result or a
    reason; the ranking written afterwards equals the one computed from the database."""
    study = f"pg-{uuid.uuid4().hex[:8]}"
    procs = [
        subprocess.Popen(
            _search(pg_url, study, tmp_path / f"host{i}", PER_WORKER, BASELINE_PER_WORKER, 10 + i),
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
            text=True,
        )
        for i in range(WORKERS)
    ]
    for p in procs:
        _, err = p.communicate(timeout=900)
        assert p.returncode == 0, err
    final = tmp_path / "final"
    r = subprocess.run(
        _search(pg_url, study, final, 0, 0, 99), capture_output=True, text=True, timeout=300
    )
    assert r.returncode == 0, r.stderr
    storage = srch.open_storage(pg_url)
    totals = {"": PER_WORKER, ".osc": BASELINE_PER_WORKER, ".joint": BASELINE_PER_WORKER}
    studies = {}
    for suffix, per in totals.items():
        st = optuna.load_study(study_name=study + suffix, storage=storage)
        studies[suffix] = st
        trials = st.get_trials()
        numbers = sorted(t.number for t in trials)
        assert numbers == list(range(WORKERS * per)), (suffix, numbers)  # the sum, none twice
        for t in trials:
            ok = t.state.name in ("COMPLETE", "PRUNED") or (
                t.state.name == "FAIL" and t.user_attrs.get("reason")
            )
            assert ok, (suffix, t.number, t.state, t.user_attrs.get("reason"))
        workers = {t.user_attrs.get("worker") for t in trials}
        assert len(workers) == WORKERS, workers  # every process ran its share
    ranking = json.loads((final / "ranking.json").read_text())
    best = sorted(
        (t.values[0], t.number)
        for t in studies[""].get_trials()
        if srch.feasible(t) and t.user_attrs.get("source", "search") == "search"
    )
    ranked_plans = [  # trials of the search (seeded plans may be scored outside the study)
        (e["error_index"], e["trial"])
        for e in ranking
        if e["kind"] == "plan" and e.get("trial") is not None and e["source"] == "search"
    ]
    assert ranked_plans == best[: len(ranked_plans)]
    assert any(e["kind"] == "plan" for e in ranking)  # seeded (ladder) or searched
    osc = min((t.values[0], t.number) for t in studies[".osc"].get_trials() if srch.feasible(t))
    assert next((e["error_index"], e["trial"]) for e in ranking if e["kind"] == "osc") == osc
    run = json.loads((final / "run.json").read_text())
    assert run["trials_added_here"] is True and run["finished_trials"]["plan"] == WORKERS * PER_WORKER
    # report (and compare) re-read the studies from the database into a host's folder
    from optimizer.cli import main

    assert main(["report", str(tmp_path / "host0"), "--storage", pg_url]) == 0
    host0 = json.loads((tmp_path / "host0" / "ranking.json").read_text())
    host0_plans = [
        (e["error_index"], e["trial"])
        for e in host0
        if e["kind"] == "plan" and e.get("trial") is not None and e["source"] == "search"
    ]
    assert host0_plans == best[: len(host0_plans)] and len(host0_plans) >= len(ranked_plans)
    assert (tmp_path / "host0" / "report.md").is_file()
    for i in range(1, WORKERS):  # each other host's own snapshot names real trials with their values
        values = {t.number: t.values[0] for t in studies[""].get_trials() if t.values}
        for e in json.loads((tmp_path / f"host{i}" / "ranking.json").read_text()):
            if e["kind"] == "plan" and e.get("trial") is not None:
                assert values[e["trial"]] == e["error_index"]


def test_a_dead_hosts_trial_is_failed_by_the_heartbeat_and_retried(pg_url, monkeypatch, planar):
    """A RUNNING trial of another host whose heartbeat stopped is failed and queued again once."""
    import time

    monkeypatch.setattr(srch, "HEARTBEAT_S", 1)
    monkeypatch.setattr(srch, "GRACE_S", 2)
    name = f"hb-{uuid.uuid4().hex[:8]}"
    study = srch.open_study(pg_url, name, seed=1, prune=True)
    stale = study.ask()  # a trial left by a worker on a host that then died
    from optimizer import ladder

    stale.suggest_float("zeta", *planar.search.zeta_range)
    stale.suggest_float("ratio", *ladder.RATIO_RANGE, log=True)
    stale.suggest_float("fraction", *ladder.FRACTION_RANGE)
    study._storage.set_trial_user_attr(stale._trial_id, "worker", "elsewhere.invalid:4242")
    study._storage.record_heartbeat(stale._trial_id)
    time.sleep(3.5)  # longer than the grace period
    st = srch.run_search(planar, pg_url, name, "osc", 3, seed=1, add=True)
    trials = st.get_trials()
    first = next(t for t in trials if t.number == stale.number)
    assert first.state.name == "FAIL"  # failed by the heartbeat check, not left RUNNING
    retries = [t for t in trials if t.system_attrs.get("failed_trial") == stale.number]
    assert len(retries) == 1 and retries[0].params == first.params
    assert not [t for t in trials if t.state.name == "RUNNING"]
