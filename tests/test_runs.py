"""One search run: its ranking with the comparisons, what a swap takes over, the notes a
run prints about its baselines."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from optimizer import runs
from optimizer.exceptions import InputError
from optimizer.problem import load_problem
from optimizer.ranking import Entry
from optimizer.rundir import read_run

ROOT = Path(__file__).resolve().parents[1]
PLANAR = ROOT / "problems" / "planar3" / "problem.toml"


@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    """A tiny run on the planar arm (4 plan trials, 3 per baseline, no informed seeds)."""
    folder = tmp_path_factory.mktemp("run")
    prob = load_problem(PLANAR)
    settings = runs.RunSettings(
        storage=str(folder / "studies.journal"), study="t", trials=4, baseline_trials=3,
        seed=5, informed=False,
    )
    result = runs.run_studies(prob, settings)
    runs.write_run(folder / "out", prob, result, runs.run_record(prob, settings, result))
    return prob, result, folder / "out"


def test_the_ranking_is_ordered_and_compared_with_the_tuned_baselines(small_run) -> None:
    _, result, _ = small_run
    ranked = result.ranked
    assert [e.rank for e in ranked] == list(range(1, len(ranked) + 1))
    values = [e.value for e in ranked]
    assert values == sorted(values)
    osc, joint = result.osc, result.joint
    # the best trial of each baseline study (the problem's own gains are its first trial)
    assert osc is not None and osc.kind == "osc" and osc.trial is not None
    assert joint is not None and joint.kind == "joint_space" and joint.joint_gains
    for e in ranked:  # (a / b − 1) against each tuned baseline's ranking value
        assert e.vs_tuned_osc == pytest.approx(e.value / osc.value - 1.0, rel=1e-12)
        assert e.vs_tuned_joint == pytest.approx(e.value / joint.value - 1.0, rel=1e-12)
    for tuned in (osc, joint):  # convergence is judged for the tuned baselines only
        assert tuned.converged is not None
    assert all(e.converged is None for e in ranked if e.kind == "plan")


def test_the_folder_holds_the_ranking_and_previous_plans_come_back_from_it(small_run) -> None:
    prob, result, out = small_run
    run = read_run(out)
    assert [e.rank for e in run.ranking] == [e.rank for e in result.ranked]
    assert [e.to_dict(plan=False) for e in run.ranking] == json.loads(
        json.dumps([e.to_dict(plan=False) for e in result.ranked])
    )
    assert run.record["trials"] == 4 and run.record["seed"] == 5
    prev = runs.previous_plans(out, prob, top=3)
    plans = [e for e in result.ranked if e.kind == "plan"][:3]
    assert [s.extra["previous_rank"] for s in prev] == [e.rank for e in plans]
    assert all(s.source == "previous" and s.plan.label.startswith("previous #") for s in prev)


def _record(folder: Path, **rec: object) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "run.json").write_text(json.dumps(rec))
    return folder


def test_a_swap_takes_over_the_earlier_settings_unless_given(tmp_path: Path) -> None:
    old = _record(tmp_path / "main", study="main", trials=40, baseline_trials=12, seed=9,
                  storage="results/x/studies.journal")
    acts = tmp_path / "faster-wrist.toml"
    acts.write_text("[actuators.wrist]\ncorner_hz = 90.0\n")
    b = runs.swap_basis(old, [acts])
    assert (b.trials, b.baseline_trials, b.seed) == (40, 12, 9)
    assert b.storage == "results/x/studies.journal"
    assert b.study.startswith("main.swap-faster-wrist-") and len(b.study.split("-")[-1]) == 6
    assert runs.swap_basis(old, [acts]).study == b.study  # same files: the same study
    acts.write_text("[actuators.wrist]\ncorner_hz = 95.0\n")
    assert runs.swap_basis(old, [acts]).study != b.study  # other content: another one
    given = runs.swap_basis(old, [acts], study="mine", trials=5, seed=1)
    assert (given.study, given.trials, given.baseline_trials, given.seed) == ("mine", 5, 12, 1)


def test_a_swap_needs_a_storage_when_the_earlier_url_lost_its_password(tmp_path: Path) -> None:
    old = _record(tmp_path / "main", study="main", storage="postgresql://u:***@db/t")
    acts = tmp_path / "a.toml"
    acts.write_text("[actuators.wrist]\ncorner_hz = 90.0\n")
    with pytest.raises(InputError) as err:
        runs.swap_basis(old, [acts])
    assert err.value.key == "storage" and "run.json" in str(err.value)
    assert runs.swap_basis(old, [acts], storage="sqlite:///x.db").study.startswith("main.swap-a-")


def test_convergence_notes() -> None:
    assert runs.convergence_note(None) is None
    assert runs.convergence_note(Entry(converged=True, late_gain=0.01)) is None
    assert "lowered its error by 12%" in runs.convergence_note(
        Entry(converged=False, late_gain=0.12)
    )
    assert "too few" in runs.convergence_note(Entry(converged=False, late_gain=None))


def test_tier_depth_counts_the_tiers_each_joint_is_in() -> None:
    toml = (
        'label = "p"\n[[tier]]\njoints = "all"\nkp_t = 100.0\nkp_r = 100.0\n'
        '[[tier]]\njoints = ["elbow", "wrist"]\nkp_t = 900.0\nkp_r = 900.0\n'
        '[[tier]]\njoints = ["wrist"]\nkp_t = 0.0\nkp_r = 2000.0\n'
    )
    names = ("shoulder", "elbow", "wrist")
    assert runs.tier_depth(toml, names) == {"shoulder": 1, "elbow": 2, "wrist": 3}
    assert runs.tier_depth(None, names) == {}


def test_a_resume_with_nothing_left_starts_no_worker_processes(small_run, monkeypatch) -> None:
    """The same run again with two workers: every study holds its budget, so the pool is
    opened with one worker (no process spawned just to rank); one trial more needs two."""
    prob, _, out = small_run
    folder = out.parent
    from optimizer import search as srch

    asked: list[int] = []
    real = srch.worker_pool

    def spy(workers: int, problem=None):
        asked.append(workers)
        return real(1, problem)  # runs in this process either way

    monkeypatch.setattr(srch, "worker_pool", spy)
    base = dict(storage=str(folder / "studies.journal"), study="t", baseline_trials=3, seed=5,
                informed=False, workers=2)
    runs.run_studies(prob, runs.RunSettings(trials=4, **base))
    assert asked == [1]
    assert runs._trials_to_run(runs.RunSettings(trials=5, **base), [
        ("plan", "t", 5, ("error",)),
    ])
