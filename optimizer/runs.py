"""A search run: the plan study and both tuned-baseline studies, the ranking, the files.

``search`` and ``swap`` both go through ``run_studies`` and ``write_run``. No printing:
progress goes through a callback; the caller shows the results.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import os
import platform
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import optuna

from . import __version__, interrupt, ladder, rundir
from . import search as srch
from .evaluate import plan_controller
from .exceptions import InputError
from .plan import Plan, load_plan, parse_plan
from .problem import Problem
from .ranking import Entry, rank, relative
from .robust import evaluate_robust, plant_set
from .tomlio import tomllib

__all__ = [
    "CONVERGED_GAIN",
    "SEEDED_SOURCES",
    "RunResult",
    "RunSettings",
    "Seeded",
    "SwapBasis",
    "baseline_seeds",
    "convergence_note",
    "previous_plans",
    "refresh_run",
    "run_record",
    "run_studies",
    "score_robust",
    "swap_basis",
    "tier_depth",
    "trial_rows",
    "write_run",
]


@dataclass(frozen=True)
class RunSettings:
    """What one search run asks for."""

    storage: str
    """Optuna storage URL or journal file."""
    study: str
    """Plan study name; the baselines use ``<study>.osc`` and ``<study>.joint``."""
    trials: int
    """Ended trials the plan study is brought up to."""
    baseline_trials: int
    """Ended trials each baseline study is brought up to."""
    seed: int
    """Sampler seed (worker i adds 1000·i)."""
    workers: int = 1
    """Worker processes."""
    prune: bool = True
    """Median pruning after each trajectory (single objective only)."""
    top: int = 10
    """Optimised plans kept in the ranking (hand and previous plans are always kept)."""
    objectives: tuple[str, ...] = ("error",)
    """``("error",)`` or ``("error", "margin" | "effort")`` for the plan study."""
    add: bool = False
    """``trials`` and ``baseline_trials`` are run by this process on top of what the studies
    hold (many hosts on one database), instead of being study totals."""
    informed: bool = True
    """Evaluate physically informed candidates first: the gain ladder's suggested plan
    and informed baseline gains (``ladder.py``)."""


@dataclass(frozen=True)
class Seeded:
    """A plan evaluated first in the plan study (hand plan or a previous run's plan)."""

    plan: Plan
    """The plan."""
    source: str
    """``hand`` or ``previous``."""
    extra: dict[str, Any] = field(default_factory=dict)
    """More user attributes (``previous_rank``...)."""


@dataclass
class RunResult:
    """What a run produced."""

    studies: dict[str, optuna.Study]
    """By kind: ``plan``, ``osc``, ``joint_space``."""
    ranked: list[Entry]
    """Ranking entries, best first, each with its rank."""
    plan_entries: list[Entry]
    """Every feasible plan entry, best first (the ranking keeps the top ones)."""
    osc: Entry | None
    """Best tuned single-tier OSC entry."""
    joint: Entry | None
    """Best tuned joint-space entry."""
    seeded_scores: list[tuple[Seeded, Entry]]
    """Each seeded plan with its score under this problem (feasible or not; a plan that
    was not scored has only ``feasible`` and ``reason``)."""
    elapsed_s: float
    """Wall time of the studies [s]."""
    interrupted: bool = False
    """True when Ctrl-C stopped the run: the ranking holds what had finished."""


def run_studies(
    problem: Problem,
    settings: RunSettings,
    seeded: Sequence[Seeded] = (),
    on_progress: Callable[[str, int, optuna.Study], None] | None = None,
) -> RunResult:
    """Bring the three studies up to their budgets (resuming) and rank the results.

    Seeded plans the search space can express are enqueued as trials (once, even over
    a resume); the others are scored as they are. ``on_progress(kind, total, study)``
    is called about once a second while a study runs, and once when it ends.
    """
    runs = [  # baselines first: the plan study starts from the tuned single-tier OSC
        ("osc", settings.study + ".osc", settings.baseline_trials, settings.objectives[:1]),
        ("joint_space", settings.study + ".joint", settings.baseline_trials, ("error",)),
        ("plan", settings.study, settings.trials, settings.objectives),
    ]
    # one pool for the three studies, started first: its processes import and load the
    # problem while this one computes the ladder plans and the baselines' seeds (none
    # when every study already holds its budget: a resume that only ranks)
    workers = settings.workers if _trials_to_run(settings, runs) else 1
    with srch.worker_pool(workers, problem) as pool:
        if settings.informed:
            plans = ladder.ladder_variants(problem)
            for law in problem.search.laws:  # every law the search may choose gets the ladder
                if law != "summed":
                    plans += [
                        dataclasses.replace(p, law=law, label=f"{p.label}, {law}")
                        for p in plans[:1]
                    ]
            seeded = [*(Seeded(p, "ladder") for p in plans), *seeded]
        enqueue, direct = [], []
        for s in seeded:
            params = srch.plan_params(s.plan, problem)
            if params is None:
                direct.append(s)
            else:
                attrs = {"source": s.source, "label": s.plan.label, **s.extra}
                enqueue.append((params, attrs))
        t0 = time.perf_counter()
        studies: dict[str, optuna.Study] = {}
        interrupted = False
        try:
            for kind, name, budget, objectives in runs:
                interrupt.check()  # a Ctrl-C a finaliser swallowed
                n = budget
                if kind == "plan":
                    enqueue += _tuned_osc_seed(problem, studies["osc"])
                if settings.add:  # the progress total: what is there now plus what this adds
                    n += srch.finished(
                        srch.open_study(
                            settings.storage, name, settings.seed, settings.prune, objectives
                        )
                    )

                def progress(study: optuna.Study, kind: str = kind, n: int = n) -> None:
                    if on_progress:
                        on_progress(kind, n, study)

                studies[kind] = srch.run_search(
                    problem,
                    settings.storage,
                    name,
                    kind,
                    budget,
                    settings.seed,
                    settings.workers,
                    prune=settings.prune,
                    enqueue=enqueue
                    if kind == "plan"
                    else baseline_seeds(problem, kind, seeded, settings.informed),
                    on_progress=progress,
                    objectives=objectives,
                    add=settings.add,
                    pool=pool,
                )
                progress(studies[kind])
            interrupt.check()
        except KeyboardInterrupt:
            interrupted = True
            if pool is not None:  # the workers end before what finished is read
                srch.stop_pool(pool)
            interrupt.clear()  # handled: rank what finished
            for kind, name, _, objectives in runs:  # what had finished, for the ranking
                if kind not in studies:
                    studies[kind] = srch.open_study(
                        settings.storage, name, settings.seed, settings.prune, objectives
                    )
            for st in studies.values():
                srch.abandon_own(st)
    elapsed = time.perf_counter() - t0

    plan_e = srch.entries(studies["plan"], "search")
    seeded_scores: list[tuple[Seeded, Entry]] = []
    by_label = {
        t.user_attrs.get("label"): t
        for t in studies["plan"].get_trials(deepcopy=False)
        if t.user_attrs.get("source") in SEEDED_SOURCES
    }
    for s in seeded:
        t = by_label.get(s.plan.label)
        if s in direct and interrupted:
            d = Entry(feasible=False, reason="not scored: the run was interrupted")
        elif s in direct:  # the search space cannot express it: scored as it is
            d = score_robust(problem, s.plan)
            if d.feasible:
                plan_e.append(
                    dataclasses.replace(
                        d,
                        trial=None,
                        source=s.source,
                        label=s.plan.label,
                        plan_toml=s.plan.to_toml(),
                        extra={**d.extra, **s.extra},
                    )
                )
        elif t is not None and "score" in t.user_attrs:
            d = Entry.from_dict(t.user_attrs["score"])
            if not srch.feasible(t):
                d.feasible = False
                d.reason = d.reason or t.user_attrs.get("reason")
        else:  # pruned or stopped by the pre-check
            reason = t.user_attrs.get("reason") if t is not None else None
            d = Entry(feasible=False, reason=reason or "pruned: worse than the median trial")
        seeded_scores.append((s, d))
    plan_e.sort(key=lambda e: e.value)
    osc_e = srch.entries(studies["osc"], "tuned")
    joint_e = srch.entries(studies["joint_space"], "tuned")
    osc, joint = (osc_e[0] if osc_e else None), (joint_e[0] if joint_e else None)
    for e, kind in ((osc, "osc"), (joint, "joint_space")):
        if e is not None:  # convergence: did the last quarter of the trials still improve it?
            e.late_gain = srch.late_gain(studies[kind])
            e.converged = e.late_gain is not None and e.late_gain <= CONVERGED_GAIN
    if osc is not None:  # the plan study's copy of tuned OSC is not a second row
        plan_e = [
            e for e in plan_e if not (e.source == "tuned-osc" and e.plan_text == osc.plan_text)
        ]
    ranked = rank(plan_e, [e for e in (osc, joint) if e], settings.top)
    for e in ranked:
        e.vs_tuned_osc = relative(e, osc)
        e.vs_tuned_joint = relative(e, joint)
    return RunResult(studies, ranked, plan_e, osc, joint, seeded_scores, elapsed, interrupted)


def score_robust(problem: Problem, plan: Plan) -> Entry:
    """A plan scored as a search trial is (nominal plant with margins, the problem's
    perturbed plants), as a ranking entry."""
    plants = plant_set(problem, problem.perturb.plants)
    kind = "osc" if plan.is_single_tier(problem.arm.n) else "plan"
    return Entry.from_dict(
        evaluate_robust(
            problem,
            plants,
            lambda p: plan_controller(p, plan, kind=kind),
            plan.label,
            plan.compact(problem.arm.n),
        ).to_dict()
    )


#: A tuned baseline counts as converged when the last quarter of its trials improved its
#: best value by no more than this fraction.
CONVERGED_GAIN = 0.02


def convergence_note(entry: Entry | None) -> str | None:
    """Why a tuned baseline may not have converged, in words, or None when it has."""
    if entry is None or entry.converged is not False:
        return None
    g = entry.late_gain
    return (
        f"the last quarter of its trials still lowered its error by {g:.0%}"
        if g is not None
        else "too few of its trials were feasible to tell"
    )


#: Sources of plans evaluated first in the plan study (always kept in the ranking).
SEEDED_SOURCES = ("hand", "previous", "ladder")


def _trials_to_run(
    settings: RunSettings, runs: Sequence[tuple[str, str, int, Sequence[str]]]
) -> bool:
    """Whether any of the run's studies is short of its budget (or ``add`` asks for more)."""
    if settings.add:
        return True
    return any(
        budget > srch.finished(
            srch.open_study(settings.storage, name, settings.seed, settings.prune, objectives)
        )
        for _, name, budget, objectives in runs
    )


def baseline_seeds(
    problem: Problem, kind: str, seeded: Sequence[Seeded] = (), informed: bool = True
) -> list[tuple[dict[str, Any], dict[str, Any]]]:
    """What a baseline study evaluates first, so that a tuned baseline is never worse than
    what the user already has: the problem's ``[baseline]`` gains and, for single-tier
    OSC, every hand plan that is one all-joint tier; with ``informed``, also the informed
    gains of ``ladder.py`` (all clipped into the search ranges).
    """
    b = problem.baseline
    names = problem.arm.joint_names
    out: list[tuple[dict[str, Any], dict[str, Any]]] = []
    if kind == "osc":
        gains = [(b.osc_kp_t, b.osc_kp_r, b.osc_zeta, "baseline: single-tier OSC", "baseline")]
        gains += [
            (s.plan.tiers[0].kp_t, s.plan.tiers[0].kp_r, s.plan.tiers[0].zeta, s.plan.label, "hand")
            for s in seeded
            if s.source == "hand" and s.plan.is_single_tier(problem.arm.n)
        ]
        if informed and (io := ladder.informed_osc(problem)) is not None:
            gains.append((*io, "informed single-tier OSC", "informed"))
        for kp_t, kp_r, zeta, label, source in gains:
            if not (kp_t > 0 and kp_r > 0):
                continue
            ratio, frac = ladder.osc_to_coords(problem, kp_t, kp_r, zeta)
            if math.isfinite(frac):
                params = {"zeta": zeta, "ratio": ratio, "fraction": frac}
                out.append((params, {"source": source, "label": label}))
    elif kind == "joint_space":
        kp = list(b.joint_kp) * (problem.arm.n if len(b.joint_kp) == 1 else 1)
        sets = [(kp, b.joint_zeta, "baseline: joint-space CLIK + PD", "baseline")]
        if informed and (ij := ladder.informed_joint_gains(problem)) is not None:
            sets.append((list(ij[0]), ij[1], "informed joint-space CLIK + PD", "informed"))
        for kps, zeta, label, source in sets:
            if not all(k > 0 for k in kps):
                continue
            dev, frac = ladder.joint_to_coords(problem, np.array(kps), zeta)
            if math.isfinite(frac):
                params = {
                    "zeta": zeta,
                    **{f"dev_{nm}": float(d) for nm, d in zip(names, dev)},
                    "fraction": frac,
                }
                out.append((params, {"source": source, "label": label}))
    return out


def _tuned_osc_seed(
    problem: Problem, osc: optuna.Study
) -> list[tuple[dict[str, Any], dict[str, Any]]]:
    """The best tuned single-tier OSC as a one-tier plan trial, so the plan search never
    starts below it (a trial of the plan budget, source ``tuned-osc``)."""
    best = srch.entries(osc, "tuned")
    if not best or not best[0].plan_toml:
        return []
    plan = _plan_of(best[0].plan_toml, problem.arm.joint_names)
    params = srch.plan_params(srch.clip_to_space(plan, problem), problem)
    if params is None:
        return []
    return [(params, {"source": "tuned-osc", "label": "from tuned single-tier OSC"})]


def trial_rows(studies: dict[str, optuna.Study]) -> list[dict[str, Any]]:
    """One row per trial of every study (for trials.csv)."""
    rows = []
    for kind, st in studies.items():
        for t in st.get_trials(deepcopy=False):
            sc = t.user_attrs.get("score", {})
            rows.append(
                {
                    "study": st.study_name,
                    "kind": kind,
                    "number": t.number,
                    "state": t.state.name,
                    "feasible": srch.feasible(t),
                    "value": t.values[0] if t.values else None,
                    "value_2": t.values[1] if t.values and len(t.values) > 1 else None,
                    "constraint": (t.constraints or {}).get(srch.CONSTRAINT),
                    "source": t.user_attrs.get("source", "search"),
                    "tiers": t.user_attrs.get("tiers"),
                    "plan_text": t.user_attrs.get("plan_text"),
                    "pos_rms_mm": sc.get("pos_rms_mm"),
                    "rot_rms_deg": sc.get("rot_rms_deg"),
                    "stiffness_margin": sc.get("stiffness_margin"),
                    "delay_margin_ms": sc.get("delay_margin_ms"),
                    "bandwidth_margin": sc.get("bandwidth_margin"),
                    "feasible_share": sc.get("feasible_share"),
                    "robust_error": sc.get("robust_error"),
                    "steps": t.user_attrs.get("steps"),
                    "reason": t.user_attrs.get("reason"),
                }
            )
    return rows


def run_record(
    problem: Problem, settings: RunSettings, result: RunResult, **extra: Any
) -> dict[str, Any]:
    """The run.json contents: hashes, seeds, budgets, versions, command line."""
    import numpy as np
    import pinocchio
    import scipy

    return {
        "problem": str(problem.path),
        "cwd": os.getcwd(),
        "problem_name": problem.name,
        "problem_sha256": problem.digest,
        "urdf": str(problem.arm.source),
        "urdf_sha256": _file_sha256(problem.arm.source),
        "actuator_files": [str(a) for a in problem.actuator_files],
        "study": settings.study,
        "storage": srch.redact(settings.storage),
        "seed": settings.seed,
        "workers": settings.workers,
        "trials": settings.trials,
        "baseline_trials": settings.baseline_trials,
        "trials_added_here": settings.add,
        "objectives": list(settings.objectives),
        "pruning": settings.prune and len(settings.objectives) == 1,
        "elapsed_s": round(result.elapsed_s, 2),
        "interrupted": result.interrupted,
        "finished_trials": {k: srch.finished(st) for k, st in result.studies.items()},
        "command": sys.argv,
        "versions": {
            "tierplan": __version__,
            "optuna": optuna.__version__,
            "pinocchio": pinocchio.__version__,
            "numpy": np.__version__,
            "scipy": scipy.__version__,
            "python": platform.python_version(),
        },
        **extra,
    }


def _file_sha256(path: object) -> str | None:
    """SHA-256 of a file's bytes (the URDF as given), or None when it cannot be read."""
    try:
        return hashlib.sha256(Path(str(path)).read_bytes()).hexdigest()
    except OSError:
        return None


def write_run(
    out_dir: Path, problem: Problem, result: RunResult, record: dict[str, Any]
) -> list[str]:
    """Write the run folder (``rundir.write_run``); returns the names written."""
    return rundir.write_run(
        out_dir, problem.name, result.ranked, trial_rows(result.studies), record
    )


def previous_plans(run_dir: Path, problem: Problem, top: int) -> list[Seeded]:
    """The top ``top`` plans of an earlier run (its ranked plan files).

    Raises InputError (via the loaders) when the folder or its files are unreadable.
    """
    ranking = rundir.read_ranking(
        run_dir, "no ranking.json here: --from takes a search's results folder"
    )
    out: list[Seeded] = []
    for e, f in rundir.ranked_plan_paths(run_dir, ranking)[:top]:
        place = int(e.rank or 1)
        plan = dataclasses.replace(
            load_plan(f, problem.arm.joint_names), label=f"previous #{place}"
        )
        extra = {"previous_rank": place, "previous_error_index": e.error_index}
        out.append(Seeded(plan, "previous", extra))
    return out


def _plan_of(plan_toml: str, joint_names: Sequence[str]) -> Plan:
    """A plan from the TOML text a trial stored (``plan_toml``)."""
    return parse_plan(tomllib.loads(plan_toml), joint_names, "<stored plan>")


def tier_depth(plan_toml: str | None, joint_names: Sequence[str]) -> dict[str, int]:
    """How many tiers each joint is in (the deepest tier that uses it)."""
    if not plan_toml:
        return {}
    plan = _plan_of(plan_toml, joint_names)
    return {nm: sum(1 for t in plan.tiers if j in t.joints) for j, nm in enumerate(joint_names)}


def refresh_run(run_dir: Path, problem: Problem, storage: str, study: str | None) -> None:
    """Rewrite a run folder's ranking from the studies in ``storage`` (no trial is run):
    what several hosts searched on one database, gathered into the folder."""
    old = rundir.read_run(run_dir).record
    settings = RunSettings(
        storage=storage,
        study=study or str(old.get("study") or Path(run_dir).name),
        trials=0,
        baseline_trials=0,
        seed=int(old.get("seed") or 0),
        objectives=tuple(old.get("objectives") or ("error",)),
        add=True,
        informed=False,
    )
    result = run_studies(problem, settings)
    record = {
        **old,
        "study": settings.study,
        "finished_trials": {k: srch.finished(st) for k, st in result.studies.items()},
        "refreshed_from": srch.redact(storage),
    }
    write_run(run_dir, problem, result, record)


@dataclass(frozen=True)
class SwapBasis:
    """What a swap run takes over from the earlier run (a value given for the swap wins)."""

    study: str
    """The swap's plan study: given, or ``<earlier study>.swap-<last file>-<hash of the
    actuator files>`` (the same files resume the same study)."""
    trials: int | None
    """Plan trials: given, else the earlier run's (None: the problem's)."""
    baseline_trials: int | None
    """Baseline trials: given, else the earlier run's."""
    seed: int | None
    """Sampler seed: given, else the earlier run's."""
    storage: str | None
    """The earlier run's storage (used unless another is given)."""

    def options(self) -> dict[str, Any]:
        """As command-line option values (``study``, ``trials``, ``baseline_trials``,
        ``seed``)."""
        return {"study": self.study, "trials": self.trials,
                "baseline_trials": self.baseline_trials, "seed": self.seed}


def swap_basis(
    from_dir: Path,
    actuator_files: Sequence[Path],
    study: str | None = None,
    trials: int | None = None,
    baseline_trials: int | None = None,
    seed: int | None = None,
    storage: str | None = None,
) -> SwapBasis:
    """The settings of a swap run from the earlier run's run.json and what was given.

    Raises InputError when the earlier storage URL was kept without its password and no
    other storage is given.
    """
    old = rundir.read_record(Path(from_dir))
    if study is None:
        tag = hashlib.sha256(b"".join(Path(a).read_bytes() for a in actuator_files))
        old_study = str(old.get("study") or Path(from_dir).name)
        study = f"{old_study}.swap-{Path(actuator_files[-1]).stem}-{tag.hexdigest()[:6]}"
    if trials is None and old.get("trials"):
        trials = int(old["trials"])
    if baseline_trials is None and old.get("baseline_trials"):
        baseline_trials = int(old["baseline_trials"])
    if seed is None and old.get("seed") is not None:
        seed = int(old["seed"])
    old_storage = old.get("storage")
    if old_storage and "***" in str(old_storage) and not storage:
        raise InputError(
            Path(from_dir) / rundir.RUN_JSON,
            "storage",
            "the earlier run's storage URL is kept without its password: give --storage",
        )
    return SwapBasis(study, trials, baseline_trials, seed,
                     None if old_storage is None else str(old_storage))
