"""The run folder: the one module that knows its layout and reads and writes its files.

A search or swap writes ``results/<problem>/<study>/`` (or ``--out``)::

    run.json              how the run was made: hashes, seeds, budgets, versions, command
    ranking.json          the ranked entries, best first (ranking.csv: the same as a table)
    trials.csv            one row per trial of every study
    best-plan.toml        the best plan, ready for ``score``
    plans/rank-NN.toml    the plan of every ranked plan or OSC entry
    robustness.json       written by ``compare --from``
    sensitivity.json      written by ``sensitivity``
    upgrade.json          written by ``upgrade``
    report.md, fig-*.png  written by ``report`` (and ``search --figures``)

Other modules ask this one for paths and contents; none builds a name of this folder
itself. Every write is atomic (``outputs.write_atomic``). No printing.
"""

from __future__ import annotations

import csv
import json
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .exceptions import InputError, printable
from .outputs import csv_text, write_atomic
from .ranking import Entry, EntryError

__all__ = [
    "BEST_PLAN",
    "RANKING_COLUMNS",
    "RANKING_JSON",
    "REPORT",
    "ROBUSTNESS",
    "RUN_JSON",
    "SENSITIVITY",
    "TRIALS_CSV",
    "UPGRADE",
    "RunFolder",
    "default_dir",
    "default_storage",
    "plan_path",
    "ranked_plan_paths",
    "read_json",
    "read_ranking",
    "read_record",
    "read_run",
    "write_extra",
    "write_run",
]

RUN_JSON = "run.json"
RANKING_JSON = "ranking.json"
RANKING_CSV = "ranking.csv"
TRIALS_CSV = "trials.csv"
BEST_PLAN = "best-plan.toml"
PLANS = "plans"
ROBUSTNESS = "robustness.json"
SENSITIVITY = "sensitivity.json"
UPGRADE = "upgrade.json"
REPORT = "report.md"

#: Columns of ranking.csv.
RANKING_COLUMNS = [
    "rank",
    "label",
    "kind",
    "source",
    "trial",
    "tiers",
    "plan_text",
    "pos_rms_mm",
    "rot_rms_deg",
    "pos_max_mm",
    "rot_max_deg",
    "stiffness_margin",
    "delay_margin_ms",
    "bandwidth_margin",
    "slowest_mode_s",
    "peak_torque_ratio",
    "tau_rms_nm",
    "error_index",
    "plants",
    "plants_feasible",
    "feasible_share",
    "p90_error",
    "worst_error",
    "mean_error",
    "statistic",
    "robust_error",
    "late_gain",
    "converged",
    "vs_tuned_osc",
    "vs_tuned_joint",
    "pareto",
    "feasible",
]

#: What each optional file must hold at its top level (and what ``write_extra`` accepts).
_EXTRAS: dict[str, tuple[type, ...]] = {
    ROBUSTNESS: (dict, list),  # a list: entries only, as the first releases wrote it
    SENSITIVITY: (dict,),
    UPGRADE: (list,),
}


def default_dir(problem_name: str, study: str) -> Path:
    """Where a search writes when no ``--out`` is given."""
    return Path("results") / problem_name / study


def default_storage(problem_name: str) -> Path:
    """The journal file a problem's studies share when no ``--storage`` is given (beside
    its run folders)."""
    return Path("results") / problem_name / "studies.journal"


def plan_path(run_dir: Path, rank: int) -> Path:
    """The plan file of ranked entry ``rank``."""
    return Path(run_dir) / PLANS / f"rank-{int(rank):02d}.toml"


@dataclass(frozen=True)
class RunFolder:
    """The files of one search run."""

    path: Path
    """The run folder."""
    record: dict[str, Any]
    """run.json."""
    ranking: list[Entry]
    """ranking.json entries, best first."""
    trials: list[dict[str, str]]
    """trials.csv rows."""
    robustness: list[dict[str, Any]] | None
    """Entries of robustness.json (``compare --from``), or None."""
    robustness_seed: int | None = None
    """Seed of the perturbed plants of robustness.json, or None."""
    sensitivity: dict[str, Any] | None = None
    """sensitivity.json (``tierplan sensitivity``), or None."""
    upgrade: list[dict[str, Any]] | None = None
    """upgrade.json (``tierplan upgrade``), or None."""

    def file(self, name: str) -> Path:
        """A file of this run folder (one of this module's names, or a figure's)."""
        return self.path / name


def read_json(path: Path, missing: str = "not found: give a search's results folder") -> Any:
    """A JSON file; missing or unreadable is an InputError naming it."""
    from .inputs import read_text

    if not Path(path).exists():
        raise InputError(path, "", missing)
    try:
        return json.loads(read_text(path, "results file"))
    except ValueError as err:
        raise InputError(path, "", f"could not be read as JSON: {err}") from err


def read_record(run_dir: Path) -> dict[str, Any]:
    """run.json, or {} when the folder has none (a run from before it was written)."""
    f = Path(run_dir) / RUN_JSON
    if not f.is_file():
        return {}
    record = read_json(f)
    if not isinstance(record, dict):
        raise InputError(f, "", "must hold a JSON object")
    return record


def read_ranking(
    run_dir: Path, missing: str = "not found: give a search's results folder"
) -> list[Entry]:
    """ranking.json's entries, best first; labels and plan texts made printable. A field
    of the wrong type is an InputError naming the entry and the field."""
    f = Path(run_dir) / RANKING_JSON
    ranking = read_json(f, missing)
    if not isinstance(ranking, list) or not all(isinstance(e, dict) for e in ranking):
        raise InputError(f, "", "must hold a list of ranked entries")
    out = []
    for i, d in enumerate(ranking):
        try:
            e = Entry.from_dict(d)
        except EntryError as err:
            raise InputError(f, f"[{i}].{err.key}", err.reason) from None
        # labels and plan texts reach the terminal and the report
        e.label, e.plan_text = printable(e.label, 300), printable(e.plan_text, 300)
        if e.source is not None:
            e.source = printable(e.source, 300)
        out.append(e)
    return out


def _read_extra(run_dir: Path, name: str) -> Any:
    f = run_dir / name
    if not f.is_file():
        return None
    doc = read_json(f)
    if not isinstance(doc, _EXTRAS[name]):
        what = "a JSON object" if dict in _EXTRAS[name] else "a list"
        raise InputError(f, "", f"must hold {what}")
    return doc


def read_run(path: Path) -> RunFolder:
    """Read a run folder; a missing or unreadable file is an InputError naming it."""
    path = Path(path)
    if not path.is_dir():
        raise InputError(path, "", "is not a folder: give a search's results folder")
    if not (path / RUN_JSON).exists():
        raise InputError(path / RUN_JSON, "", "not found: give a search's results folder")
    record = read_record(path)
    ranking = read_ranking(path)
    trials: list[dict[str, str]] = []
    if (path / TRIALS_CSV).is_file():
        with open(path / TRIALS_CSV, newline="", encoding="utf-8") as f:
            trials = list(csv.DictReader(f))
    rob = _read_extra(path, ROBUSTNESS)
    seed = None
    if isinstance(rob, dict):
        seed = rob.get("seed")
        rob = rob.get("entries")
    if rob is not None:
        if not isinstance(rob, list) or not all(isinstance(r, dict) for r in rob):
            raise InputError(path / ROBUSTNESS, "entries", "must be a list of entries")
    return RunFolder(
        path,
        record,
        ranking,
        trials,
        rob,
        seed,
        _read_extra(path, SENSITIVITY),
        _read_extra(path, UPGRADE),
    )


def ranked_plan_paths(
    run_dir: Path, ranking: Sequence[Entry], kinds: Sequence[str] = ("plan",)
) -> list[tuple[Entry, Path]]:
    """The ranked entries of the given kinds that have a plan file, with the file, best
    first. A run from before ``plans/`` gives its best-plan.toml as rank 1."""
    out = []
    for e in ranking:
        if e.kind not in kinds or e.rank is None:
            continue
        f = plan_path(run_dir, e.rank)
        if f.is_file():
            out.append((e, f))
    if not out and "plan" in kinds and (Path(run_dir) / BEST_PLAN).is_file():
        best = next((e for e in ranking if e.kind == "plan"), Entry())
        out.append((best.ranked(1), Path(run_dir) / BEST_PLAN))
    return out


def write_run(
    out_dir: Path,
    problem_name: str,
    ranked: Sequence[Entry],
    trial_rows: Sequence[dict[str, Any]],
    record: dict[str, Any],
) -> list[str]:
    """Write ranking.json/.csv, trials.csv, best-plan.toml, plans/rank-NN.toml, run.json.

    ``ranked`` entries carry their plan as ``plan_toml`` (kept out of ranking.json: the
    plan files hold it) and their rank. Each file is written whole or not at all; plan files of an
    earlier, longer ranking are removed. Returns the names written.
    """
    out_dir = Path(out_dir)
    write_atomic(
        out_dir / RANKING_JSON,
        json.dumps([e.to_dict(plan=False) for e in ranked], indent=2) + "\n",
    )
    write_atomic(out_dir / RANKING_CSV, csv_text([e.to_dict() for e in ranked], RANKING_COLUMNS))
    cols = list(trial_rows[0]) if trial_rows else ["study"]
    write_atomic(out_dir / TRIALS_CSV, csv_text(trial_rows, cols))
    names = [RANKING_CSV, RANKING_JSON, TRIALS_CSV]
    study = record.get("study", "")
    plan_files = set()
    for e in ranked:
        if e.plan_toml and e.rank is not None:
            f = plan_path(out_dir, e.rank)
            write_atomic(
                f,
                f"# rank {e.rank} of study '{study}' on {problem_name} (simulation only)\n"
                + e.plan_toml,
            )
            plan_files.add(f.name)
    for old in (out_dir / PLANS).glob("rank-*.toml"):  # left by an earlier, longer ranking
        if old.name not in plan_files:
            old.unlink()
    if plan_files:
        names.append(PLANS + "/")
    best = next((e for e in ranked if e.kind == "plan"), None)
    if best and best.plan_toml:
        write_atomic(
            out_dir / BEST_PLAN,
            f"# best plan of study '{study}' on {problem_name} (simulation only)\n"
            + best.plan_toml.replace('label = "', 'label = "best: ', 1),
        )
        names.append(BEST_PLAN)
    write_atomic(out_dir / RUN_JSON, json.dumps(record, indent=2) + "\n")
    names.append(RUN_JSON)
    return names


def write_extra(run_dir: Path, name: str, text: str) -> Path:
    """Write one of the files other commands add to a run (robustness, sensitivity,
    upgrade); returns its path."""
    if name not in _EXTRAS:
        raise ValueError(f"not a run folder file other commands write: {name}")
    f = Path(run_dir) / name
    write_atomic(f, text)
    return f
