"""Actuator files over a problem, and ``tierplan swap``: re-score, warm start, what changed."""

from __future__ import annotations

import csv
import json

import pytest
from problems import DEMO, PLANAR, PLANAR_PLANS

from optimizer.cli import main
from optimizer.exceptions import ProblemError
from optimizer.problem import load_problem
from optimizer.runs import tier_depth


def _act(tmp_path, text: str, name: str = "new.toml"):
    f = tmp_path / name
    f.write_text(text)
    return f


def test_actuator_file_updates_only_the_named_joint(planar, tmp_path) -> None:
    f = _act(tmp_path, "[actuators.wrist]\ncorner_hz = 5.0\n")
    p = load_problem(PLANAR, actuator_files=[f])
    by = {a.joint: a for a in p.actuators}
    old = {a.joint: a for a in planar.actuators}
    assert by["wrist"].model.bandwidth_hz() == pytest.approx(5.0)
    assert by["wrist"].coulomb_nm == old["wrist"].coulomb_nm  # friction kept
    for j in ("shoulder", "elbow"):
        assert by[j] == old[j]
    assert p.digest != planar.digest and p.swapped_joints == ("wrist",)
    assert p.actuator_files == (f,)


def test_a_new_model_replaces_the_old_parameters(tmp_path) -> None:
    """A second-order table over a first-order joint drops corner_hz instead of failing."""
    f = _act(
        tmp_path,
        '[actuators.elbow]\nmodel = "second_order"\nnatural_hz = 9.0\ndamping_ratio = 0.7\n',
    )
    p = load_problem(PLANAR, actuator_files=[f])
    elbow = next(a for a in p.actuators if a.joint == "elbow")
    assert elbow.model.kind == "second_order"


@pytest.mark.parametrize(
    "text, key, why",
    [
        ("[actuators.wirst]\ncorner_hz = 5.0\n", "actuators.wirst", "did you mean 'wrist'"),
        ("[actuators.wrist]\ncorner_hz = -5.0\n", "actuators.wrist.corner_hz", "must be > 0"),
        ("[actuators.wrist]\ncorner_hz = 900.0\n", "actuators.wrist.corner_hz", "Nyquist"),
        ("[actuators.default]\ncorner_hz = 5.0\n", "actuators.default", "named joints only"),
        ("[actuators]\n", "actuators", "names no joint"),
        ("[actuator.wrist]\ncorner_hz = 5.0\n", "actuators", "found 'actuator': misspelt?"),
    ],
)
def test_bad_actuator_file_names_that_file(tmp_path, text, key, why) -> None:
    f = _act(tmp_path, text)
    with pytest.raises(ProblemError) as err:
        load_problem(PLANAR, actuator_files=[f])
    assert err.value.path == str(f), err.value
    assert err.value.key == key and why in err.value.reason, err.value


def test_swap_command_bad_input_is_one_line(tmp_path, capsys, monkeypatch) -> None:
    monkeypatch.chdir(tmp_path)
    f = _act(tmp_path, "[actuators.wrist]\ncorner_hz = 5.0\n")
    rc = main(["swap", str(PLANAR), "--actuators", str(f), "--from", str(tmp_path / "nope")])
    err = capsys.readouterr().err.strip()
    assert rc == 2 and len(err.splitlines()) == 1 and "--from" in err
    empty = tmp_path / "empty-run"
    empty.mkdir()
    rc = main(["swap", str(PLANAR), "--actuators", str(f), "--from", str(empty)])
    err = capsys.readouterr().err.strip()
    assert rc == 2 and len(err.splitlines()) == 1 and "ranking.json" in err


def test_swap_rescores_and_warm_starts_from_the_previous_run(tmp_path, monkeypatch, capsys) -> None:
    """The previous plans are enqueued (source 'previous') and scored under the new actuators."""
    monkeypatch.chdir(tmp_path)
    rc = main(
        ["search", str(PLANAR), "--trials", "12", "--seed", "2", "--plan",
         str(PLANAR_PLANS / "two-tier.toml")]
    )  # fmt: skip
    assert rc == 0
    run = tmp_path / "results" / "planar3" / "main"
    old = json.loads((run / "ranking.json").read_text())
    old_plans = [e for e in old if e["kind"] == "plan"]
    assert old_plans and all(
        (run / "plans" / f"rank-{e['rank']:02d}.toml").is_file() for e in old_plans
    )
    f = _act(tmp_path, "[actuators.wrist]\ncorner_hz = 5.0\n", "slow-wrist.toml")
    capsys.readouterr()
    rc = main(["swap", str(PLANAR), "--actuators", str(f), "--from", str(run), "--trials", "14"])
    out = capsys.readouterr().out
    assert rc == 0
    assert "previous plans under the new actuators" in out and "Simulation only" in out
    new_dirs = [
        d for d in (tmp_path / "results" / "planar3").iterdir() if "swap-slow-wrist" in d.name
    ]
    assert len(new_dirs) == 1
    rec = json.loads((new_dirs[0] / "run.json").read_text())
    assert rec["actuator_files"] == [str(f)] and rec["trials"] == 14
    assert rec["problem_sha256"] != json.loads((run / "run.json").read_text())["problem_sha256"]
    prev = rec["swap"]["previous_plans"]
    assert len(prev) == len(old_plans)
    for p, e in zip(prev, old_plans, strict=True):
        assert p["error_index_before"] == e["error_index"]
    with open(new_dirs[0] / "trials.csv") as fh:
        rows = [r for r in csv.DictReader(fh) if r["kind"] == "plan"]
    assert len(rows) == 14
    # previous plans the (ranked) space still expresses after the swap are enqueued; the
    # others (a tier that is no longer the fastest joints) are scored as they are
    from optimizer.plan import load_plan
    from optimizer.search import plan_params

    swapped = load_problem(PLANAR, actuator_files=[f])
    expressible = sum(
        plan_params(
            load_plan(run / "plans" / f"rank-{e['rank']:02d}.toml", swapped.arm.joint_names),
            swapped,
        )
        is not None
        for e in old_plans
    )
    assert expressible < len(old_plans)  # the slow wrist left the fastest group
    assert sum(r["source"] == "previous" for r in rows) == expressible
    # a previous plan that stayed feasible was re-scored: its new number differs from the old
    # one because the wrist changed
    for p in prev:
        if p["now"]["feasible"]:
            assert p["now"]["error_index"] != p["error_index_before"]
    assert "best_now" in rec["swap"] and isinstance(rec["swap"]["moved"], list)
    assert main(["report", str(new_dirs[0])]) == 0  # the report says what the swap changed
    text = (new_dirs[0] / "report.md").read_text()
    assert "## After the actuator swap" in text and str(f) in text


@pytest.mark.slow
def test_a_slow_wrist_moves_out_of_the_fast_tiers_on_the_demo(tmp_path, monkeypatch) -> None:
    """An 8 Hz second-order wrist_pitch (was 80 Hz) leaves the later tiers of the best plan.

    Why (common practice, no source): a tier through a slow actuator caps that tier's
    stable gain, so the stiff tiers should run through the fast joints only. Measured:
    with a first-order 6 or 12 Hz drive the previous best plan stays best (its tiers
    through wrist_pitch carry low gains), and with 2 workers the outcome varied with timing.
    """
    monkeypatch.chdir(tmp_path)
    args = ["--trials", "60", "--baseline-trials", "20", "--seed", "7"]  # 1 worker: repeatable
    assert main(["search", str(DEMO), *args]) == 0
    run = tmp_path / "results" / "polish7" / "main"
    names = load_problem(DEMO).arm.joint_names
    before = tier_depth((run / "best-plan.toml").read_text(), names)
    assert before["wrist_pitch"] >= 2  # a fast joint the best plan used beyond tier 1
    f = DEMO.parent / "swap-wrist-pitch.toml"  # 8 Hz second order
    assert main(["swap", str(DEMO), "--actuators", str(f), "--from", str(run), *args]) == 0
    new = next(d for d in run.parent.iterdir() if "swap-wrist-pitch" in d.name)
    after = tier_depth((new / "best-plan.toml").read_text(), names)
    assert after["wrist_pitch"] < before["wrist_pitch"]
    ranking = json.loads((new / "ranking.json").read_text())
    assert next(e for e in ranking if e["kind"] == "plan")["feasible"]
