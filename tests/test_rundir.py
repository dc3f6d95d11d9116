"""The run folder: one module owns its layout; what it writes it reads back."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from optimizer import rundir
from optimizer.exceptions import InputError
from optimizer.ranking import Entry

PLAN_TOML = 'label = "p"\n\n[[tier]]\njoints = "all"\nkp_t = 100.0\nkp_r = 10.0\n'


def _ranked() -> list[Entry]:
    return [
        Entry(rank=1, kind="plan", label="a", error_index=1.5, plan_toml=PLAN_TOML),
        Entry(rank=2, kind="osc", label="b", error_index=2.5, plan_toml=PLAN_TOML),
        Entry(rank=3, kind="joint_space", label="c", error_index=3.5),
    ]


def _write(tmp_path: Path, ranked: list[Entry] | None = None) -> list[str]:
    rows = [{"study": "s", "kind": "plan", "number": 0, "value": 1.5}]
    return rundir.write_run(tmp_path, "demo", ranked or _ranked(), rows, {"study": "s"})


def test_what_write_run_writes_read_run_reads_back(tmp_path: Path) -> None:
    names = _write(tmp_path)
    assert names == ["ranking.csv", "ranking.json", "trials.csv", "plans/", "best-plan.toml",
                     "run.json"]
    run = rundir.read_run(tmp_path)
    assert run.record == {"study": "s"}
    assert [e.label for e in run.ranking] == ["a", "b", "c"]
    assert all(e.plan_toml is None for e in run.ranking)  # the plan files hold the plans
    assert "plan_toml" not in (tmp_path / "ranking.json").read_text()
    # what was written is what is read back, but for the plan text
    import dataclasses

    assert run.ranking == [dataclasses.replace(e, plan_toml=None) for e in _ranked()]
    assert run.trials == [{"study": "s", "kind": "plan", "number": "0", "value": "1.5"}]
    assert run.robustness is None and run.sensitivity is None and run.upgrade is None
    assert rundir.plan_path(tmp_path, 2).read_text().endswith(PLAN_TOML)
    assert not rundir.plan_path(tmp_path, 3).exists()  # joint space has gains, not a plan
    assert 'label = "best: p"' in (tmp_path / rundir.BEST_PLAN).read_text()
    header = (tmp_path / "ranking.csv").read_text().splitlines()[0].split(",")
    assert header == rundir.RANKING_COLUMNS


def test_a_shorter_ranking_removes_the_plan_files_it_no_longer_has(tmp_path: Path) -> None:
    _write(tmp_path)
    assert rundir.plan_path(tmp_path, 2).exists()
    _write(tmp_path, _ranked()[:1])
    assert rundir.plan_path(tmp_path, 1).exists()
    assert not rundir.plan_path(tmp_path, 2).exists()


def test_ranked_plan_paths_by_kind_and_the_old_single_file_layout(tmp_path: Path) -> None:
    _write(tmp_path)
    ranking = rundir.read_ranking(tmp_path)
    assert [e.rank for e, _ in rundir.ranked_plan_paths(tmp_path, ranking)] == [1]
    both = rundir.ranked_plan_paths(tmp_path, ranking, kinds=("plan", "osc"))
    assert [f.name for _, f in both] == ["rank-01.toml", "rank-02.toml"]
    for f in (tmp_path / "plans").iterdir():  # a run from before plans/ existed
        f.unlink()
    (tmp_path / "plans").rmdir()
    old = rundir.ranked_plan_paths(tmp_path, ranking)
    assert [(e.rank, f.name) for e, f in old] == [(1, "best-plan.toml")]
    assert old[0][0].error_index == 1.5


def test_extras_are_read_back_and_checked(tmp_path: Path) -> None:
    _write(tmp_path)
    rob = {"seed": 7, "entries": [{"label": "a"}]}
    f = rundir.write_extra(tmp_path, rundir.ROBUSTNESS, json.dumps(rob))
    assert f == tmp_path / "robustness.json"
    rundir.write_extra(tmp_path, rundir.SENSITIVITY, json.dumps({"rows": []}))
    rundir.write_extra(tmp_path, rundir.UPGRADE, json.dumps([{"joint": "j"}]))
    run = rundir.read_run(tmp_path)
    assert run.robustness == [{"label": "a"}] and run.robustness_seed == 7
    assert run.sensitivity == {"rows": []} and run.upgrade == [{"joint": "j"}]
    rundir.write_extra(tmp_path, rundir.ROBUSTNESS, json.dumps([{"label": "x"}]))  # first form
    assert rundir.read_run(tmp_path).robustness == [{"label": "x"}]
    with pytest.raises(ValueError, match="not a run folder file"):
        rundir.write_extra(tmp_path, "run.json", "{}")  # only the writers' own files


@pytest.mark.parametrize(
    ("name", "text", "message"),
    [
        ("run.json", "[]", "must hold a JSON object"),
        ("ranking.json", "{}", "must hold a list of ranked entries"),
        ("ranking.json", "{not json", "could not be read as JSON"),
        ("upgrade.json", "{}", "must hold a list"),
        ("sensitivity.json", "[]", "must hold a JSON object"),
        ("robustness.json", '{"entries": 3}', "must be a list of entries"),
        ("ranking.json", '[{"rank": 1}, {"error_index": "low"}]',
         "[1].error_index: must be a number or null"),
        ("ranking.json", '[{"feasible": 1}]', "[0].feasible: must be bool"),
    ],
)
def test_bad_files_are_one_input_error_naming_the_file(
    tmp_path: Path, name: str, text: str, message: str
) -> None:
    _write(tmp_path)
    (tmp_path / name).write_text(text)
    with pytest.raises(InputError, match=re.escape(message)) as err:
        rundir.read_run(tmp_path)
    assert name in str(err.value)


def test_missing_folder_and_files(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="is not a folder"):
        rundir.read_run(tmp_path / "nowhere")
    with pytest.raises(InputError, match=r"run\.json.*not found"):
        rundir.read_run(tmp_path)
    assert rundir.read_record(tmp_path) == {}


def test_labels_from_a_run_folder_are_made_printable(tmp_path: Path) -> None:
    _write(tmp_path, [Entry(rank=1, kind="plan", label="a\x1b[2Jb", plan_toml=PLAN_TOML)])
    label = rundir.read_run(tmp_path).ranking[0].label
    assert "\x1b" not in label and label.startswith("a") and label.endswith("b")


def test_no_other_module_builds_a_run_folder_path() -> None:
    """The layout has one owner: no module but rundir joins a run folder's file names."""
    names = "|".join(
        re.escape(n)
        for n in ("run.json", "ranking.json", "ranking.csv", "trials.csv", "best-plan.toml",
                  "plans", "robustness.json", "sensitivity.json", "upgrade.json", "report.md",
                  "studies.journal")
    )
    pattern = re.compile(rf"/\s*[\"']({names})[\"']|rank-\{{")
    package = Path(rundir.__file__).parent
    offenders = [
        f"{f.relative_to(package)}:{i}"
        for f in package.rglob("*.py")
        if f.name != "rundir.py"
        for i, line in enumerate(f.read_text(encoding="utf-8").splitlines(), 1)
        if pattern.search(line)
    ]
    assert offenders == []
    assert pattern.search('x = run_dir / "run.json"')  # the pattern does catch a join
    assert pattern.search("f\"rank-{r:02d}.toml\"")
