"""Search tier plans with optuna; tune the baselines on the same budget.

Three studies share one storage: ``<name>`` (tier plans), ``<name>.osc`` (single-tier
OSC gains) and ``<name>.joint`` (joint-space CLIK + PD gains). Every trial stores its
full score under the user attribute ``score`` and sets the constraint
``margin`` = min_margin − margin (> 0 is infeasible) on every path, so infeasible trials
steer the sampler instead of vanishing. No printing here: callers pass callbacks.
"""

from __future__ import annotations

import logging
import math
import multiprocessing
import warnings
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import optuna
from optuna.storages import JournalStorage
from optuna.storages.journal import JournalFileBackend
from optuna.trial import TrialState

from .control import Controller
from .evaluate import (
    evaluate,
    joint_controller,
    joint_gains_text,
    make_loop,
    plan_controller,
)
from .plan import Plan, Tier
from .problem import Problem, load_problem
from .stability import home_margin

log = logging.getLogger(__name__)

#: Objective value of a trial that diverged or failed the pre-check (finite, for TPE).
PENALTY = 1e6
#: Study kinds and the suffix of their study names.
KINDS = {"plan": "", "osc": ".osc", "joint_space": ".joint"}


def quiet_optuna() -> None:
    """Silence optuna's per-trial log lines and experimental warnings."""
    optuna.logging.set_verbosity(optuna.logging.ERROR)
    warnings.filterwarnings("ignore", category=optuna.exceptions.ExperimentalWarning)
    warnings.filterwarnings("ignore", category=FutureWarning, module="optuna")


# -- search space ------------------------------------------------------------------
def _bandwidth_order(problem: Problem, joints: Sequence[int]) -> list[int]:
    """``joints`` from the slowest to the fastest actuator (stable for ties)."""
    bw = [problem.actuators[j].model.bandwidth_hz() for j in joints]
    return [j for _, j in sorted(zip(bw, joints, strict=True), key=lambda x: x[0])]


def suggest_plan(trial: optuna.trial.BaseTrial, problem: Problem) -> Plan:
    """Define-by-run plan: tier count, nested or ranked subsets, per-tier parts and gains."""
    sp = problem.search
    names = problem.arm.joint_names
    n = problem.arm.n
    K = trial.suggest_int("tiers", 1, sp.max_tiers) if sp.max_tiers > 1 else 1
    tiers = [
        Tier(
            tuple(range(n)),
            trial.suggest_float("t1_kp_t", *(sp.tier1_kp_t_range or sp.kp_t_range), log=True),
            trial.suggest_float("t1_kp_r", *(sp.tier1_kp_r_range or sp.kp_r_range), log=True),
            trial.suggest_float("t1_zeta", *sp.zeta_range),
        )
    ]
    prev = list(range(n))
    for k in range(2, K + 1):
        if len(prev) < 2:
            break  # no strict non-empty subset left
        if sp.subset_mode == "ranked":
            keep = trial.suggest_int(f"t{k}_keep", 1, len(prev) - 1)
            joints = sorted(_bandwidth_order(problem, prev)[-keep:])
        else:
            joints = [
                j for j in prev if trial.suggest_categorical(f"t{k}_{names[j]}", [True, False])
            ]
            order = _bandwidth_order(problem, prev)
            if not joints:  # repair: the fastest joint of the previous tier
                joints = [order[-1]]
            elif len(joints) == len(prev):  # repair: drop the slowest
                joints = sorted(order[1:])
        part = (
            trial.suggest_categorical(f"t{k}_part", ["both", "position", "orientation"])
            if sp.tier_parts
            else "both"
        )
        kp_t = (
            trial.suggest_float(f"t{k}_kp_t", *sp.kp_t_range, log=True)
            if part != "orientation"
            else 0.0
        )
        kp_r = (
            trial.suggest_float(f"t{k}_kp_r", *sp.kp_r_range, log=True)
            if part != "position"
            else 0.0
        )
        zeta = trial.suggest_float(f"t{k}_zeta", *sp.zeta_range)
        tiers.append(Tier(tuple(joints), kp_t, kp_r, zeta))
        prev = joints
    return Plan(
        tuple(tiers), label=f"trial {getattr(trial, 'number', '-')}", nested=True, joint_names=names
    )


def plan_params(plan: Plan, problem: Problem) -> dict[str, Any] | None:
    """Parameters that make ``suggest_plan`` rebuild ``plan``, or None when it cannot."""
    sp = problem.search
    n = problem.arm.n
    names = problem.arm.joint_names
    if len(plan.tiers) > sp.max_tiers or plan.tiers[0].joints != tuple(range(n)):
        return None
    t1 = plan.tiers[0]
    params: dict[str, Any] = {"t1_kp_t": t1.kp_t, "t1_kp_r": t1.kp_r, "t1_zeta": t1.zeta}
    if sp.max_tiers > 1:
        params["tiers"] = len(plan.tiers)
    prev = list(range(n))
    for k, tier in enumerate(plan.tiers[1:], start=2):
        if not set(tier.joints) < set(prev):
            return None
        if sp.subset_mode == "ranked":
            keep = len(tier.joints)
            if sorted(_bandwidth_order(problem, prev)[-keep:]) != list(tier.joints):
                return None
            params[f"t{k}_keep"] = keep
        else:
            for j in prev:
                params[f"t{k}_{names[j]}"] = j in tier.joints
        part = (
            "both"
            if tier.kp_t > 0 and tier.kp_r > 0
            else ("position" if tier.kp_t > 0 else "orientation")
        )
        if not sp.tier_parts and part != "both":
            return None
        if sp.tier_parts:
            params[f"t{k}_part"] = part
        if tier.kp_t > 0:
            params[f"t{k}_kp_t"] = tier.kp_t
        if tier.kp_r > 0:
            params[f"t{k}_kp_r"] = tier.kp_r
        params[f"t{k}_zeta"] = tier.zeta
        prev = list(tier.joints)
    return params


def _never_alone(plan: Plan, problem: Problem) -> str | None:
    names = problem.arm.joint_names
    for k, tier in enumerate(plan.tiers, start=1):
        if len(tier.joints) == 1 and names[tier.joints[0]] in problem.search.never_alone:
            return f"tier {k} uses {names[tier.joints[0]]} alone, which the problem forbids"
    return None


# -- objectives --------------------------------------------------------------------
def _run_candidate(
    trial: optuna.trial.BaseTrial,
    problem: Problem,
    controller: Controller,
    label: str,
    text: str,
    prune: bool,
) -> float:
    """Pre-check, rollouts with pruning, constraint; returns the objective."""
    min_margin = problem.scoring.min_margin
    trial.set_user_attr("plan_text", text)
    trial.set_user_attr("kind", controller.kind)
    loop = make_loop(problem, controller)
    m0 = home_margin(loop, problem.references[0])
    if not (m0 >= min_margin):
        trial.set_user_attr("reason", f"pre-check: stability margin at home {m0:.4g}")
        trial.set_user_attr("steps", 0)
        trial.set_constraint("margin", (min_margin - m0) if math.isfinite(m0) else 1.0)
        return PENALTY

    def on_trajectory(i: int, running: float) -> None:
        if not prune or not math.isfinite(running):
            return
        trial.report(running, i)
        if trial.should_prune():
            trial.set_constraint("margin", 0.0)
            raise optuna.TrialPruned()

    score = evaluate(
        problem, controller, label, text, stop_on_failure=True, on_trajectory=on_trajectory
    )
    trial.set_user_attr("score", score.to_dict())
    trial.set_user_attr("steps", score.steps)
    trial.set_user_attr("reason", score.reason)
    diverged = any(t.diverged for t in score.trajectories)
    c = (min_margin - score.margin) if math.isfinite(score.margin) else 1.0
    trial.set_constraint("margin", max(c, 1.0) if diverged else c)
    return score.error_index if math.isfinite(score.error_index) else PENALTY


def objective(problem: Problem, kind: str, prune: bool) -> Callable[[optuna.trial.Trial], float]:
    """The objective of one study kind (``plan``, ``osc`` or ``joint_space``)."""
    sp = problem.search
    n = problem.arm.n

    def plan_objective(trial: optuna.trial.Trial) -> float:
        plan = suggest_plan(trial, problem)
        trial.set_user_attr("plan_toml", plan.to_toml())
        trial.set_user_attr("tiers", len(plan.tiers))
        rule = _never_alone(plan, problem)
        if rule:
            trial.set_user_attr("reason", rule)
            trial.set_constraint("margin", 1.0)
            return PENALTY
        return _run_candidate(
            trial, problem, plan_controller(problem, plan), plan.label, plan.compact(n), prune
        )

    def osc_objective(trial: optuna.trial.Trial) -> float:
        plan = Plan(
            (
                Tier(
                    tuple(range(n)),
                    trial.suggest_float("kp_t", *sp.kp_t_range, log=True),
                    trial.suggest_float("kp_r", *sp.kp_r_range, log=True),
                    trial.suggest_float("zeta", *sp.zeta_range),
                ),
            ),
            label="tuned single-tier OSC",
            joint_names=problem.arm.joint_names,
        )
        trial.set_user_attr("plan_toml", plan.to_toml())
        trial.set_user_attr("tiers", 1)
        return _run_candidate(
            trial,
            problem,
            plan_controller(problem, plan, kind="osc"),
            plan.label,
            plan.compact(n),
            prune,
        )

    def joint_objective(trial: optuna.trial.Trial) -> float:
        names = problem.arm.joint_names
        kp = np.array(
            [trial.suggest_float(f"kp_{nm}", *sp.joint_kp_range, log=True) for nm in names]
        )
        zeta = trial.suggest_float("zeta", *sp.zeta_range)
        ctrl = joint_controller(problem, kp, zeta, label="tuned joint-space CLIK + PD")
        trial.set_user_attr("tiers", 1)
        return _run_candidate(trial, problem, ctrl, ctrl.label, joint_gains_text(kp, zeta), prune)

    return {"plan": plan_objective, "osc": osc_objective, "joint_space": joint_objective}[kind]


# -- storage and studies -----------------------------------------------------------
def open_storage(spec: str) -> Any:
    """An optuna storage: a URL (``sqlite:///…``, ``postgresql://…``) or a journal file path."""
    if "://" in spec:
        return spec
    Path(spec).parent.mkdir(parents=True, exist_ok=True)
    return JournalStorage(JournalFileBackend(spec))


def make_sampler(seed: int) -> optuna.samplers.BaseSampler:
    """TPE over the conditional space (multivariate, grouped), seeded."""
    return optuna.samplers.TPESampler(seed=seed, multivariate=True, group=True, n_startup_trials=10)


def open_study(
    storage: str, name: str, seed: int, prune: bool, directions: Sequence[str] | None = None
) -> optuna.Study:
    """Create or load a study (resume with the same name)."""
    quiet_optuna()
    pruner = (
        optuna.pruners.MedianPruner(n_startup_trials=5, n_warmup_steps=0)
        if prune
        else optuna.pruners.NopPruner()
    )
    return optuna.create_study(
        study_name=name,
        storage=open_storage(storage),
        sampler=make_sampler(seed),
        pruner=pruner,
        load_if_exists=True,
        directions=list(directions) if directions else None,  # type: ignore[arg-type]
    )


def finished(study: optuna.Study) -> int:
    """Trials that ended (complete, pruned or failed)."""
    done = (TrialState.COMPLETE, TrialState.PRUNED, TrialState.FAIL)
    return len(study.get_trials(deepcopy=False, states=done))


@dataclass(frozen=True)
class WorkerJob:
    """What one worker process runs (picklable)."""

    problem_path: str
    storage: str
    study_name: str
    kind: str
    n_trials: int
    seed: int
    prune: bool


def run_worker(job: WorkerJob) -> int:
    """Run ``job.n_trials`` trials of one study in this process; returns trials run."""
    quiet_optuna()
    problem = load_problem(job.problem_path, check_reach=False)
    study = open_study(job.storage, job.study_name, job.seed, job.prune)
    study.optimize(
        objective(problem, job.kind, job.prune),
        n_trials=job.n_trials,
        catch=(ArithmeticError, ValueError, np.linalg.LinAlgError),
    )
    return job.n_trials


def run_search(
    problem: Problem,
    storage: str,
    study_name: str,
    kind: str,
    total_trials: int,
    seed: int,
    workers: int = 1,
    prune: bool = True,
    enqueue: Sequence[tuple[dict[str, Any], dict[str, Any]]] = (),
    on_progress: Callable[[optuna.Study], None] | None = None,
) -> optuna.Study:
    """Bring study ``study_name`` up to ``total_trials`` ended trials.

    Resumes where a previous run stopped: only the missing trials are run. ``enqueue``
    holds (params, user_attrs) pairs (hand plans) evaluated first, once. With
    ``workers`` > 1 the trials are split over that many processes sharing the storage,
    each with its own sampler seed; ``on_progress`` is called about once a second.
    """
    study = open_study(storage, study_name, seed, prune)
    for params, attrs in enqueue:
        study.enqueue_trial(params, user_attrs=attrs, skip_if_exists=True)
    remaining = max(0, total_trials - finished(study))
    if remaining == 0:
        return study
    if problem.path is None:
        raise ValueError("a search needs a problem loaded from a file")
    if workers <= 1:
        cb = [(lambda s, t: on_progress(s))] if on_progress else []
        study.optimize(
            objective(problem, kind, prune),
            n_trials=remaining,
            callbacks=cb,
            catch=(ArithmeticError, ValueError, np.linalg.LinAlgError),
        )
        return study
    shares = [remaining // workers + (1 if i < remaining % workers else 0) for i in range(workers)]
    jobs = [
        WorkerJob(str(problem.path), storage, study_name, kind, s, seed + 1000 * i, prune)
        for i, s in enumerate(shares)
        if s > 0
    ]
    ctx = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(max_workers=len(jobs), mp_context=ctx) as pool:
        futures = [pool.submit(run_worker, j) for j in jobs]
        while not all(f.done() for f in futures):
            if on_progress:
                on_progress(study)
            for f in futures:
                try:
                    f.result(timeout=1.0 / len(futures))
                except TimeoutError:
                    pass
        for f in futures:
            f.result()  # re-raise a worker's error
    return study


# -- ranking -----------------------------------------------------------------------
def feasible(t: optuna.trial.FrozenTrial) -> bool:
    """Complete, scored and with every constraint satisfied."""
    return (
        t.state == TrialState.COMPLETE
        and "score" in t.user_attrs
        and all(c <= 0.0 for c in (t.constraints or {}).values())
    )


def entries(study: optuna.Study, source: str) -> list[dict[str, Any]]:
    """Feasible trials as ranking entries (the score dict plus trial, source, plan)."""
    out = []
    for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,)):
        if not feasible(t):
            continue
        e = dict(t.user_attrs["score"])
        e["trial"] = t.number
        e["source"] = t.user_attrs.get("source", source)
        if t.user_attrs.get("label"):
            e["label"] = t.user_attrs["label"]
        e["plan_toml"] = t.user_attrs.get("plan_toml")
        out.append(e)
    return sorted(out, key=lambda e: e["error_index"])


def rank(
    plan_entries: list[dict[str, Any]], baselines: list[dict[str, Any]], top: int
) -> list[dict[str, Any]]:
    """Top ``top`` plans plus every hand plan and the tuned baselines, ranked by error."""
    keep = plan_entries[:top] + [e for e in plan_entries[top:] if e["source"] == "hand"]
    allr = sorted(keep + baselines, key=lambda e: e["error_index"])
    return [{"rank": i + 1, **e} for i, e in enumerate(allr)]
