"""Search tier plans with optuna; tune the baselines on the same budget.

Three studies share one storage: ``<name>`` (tier plans), ``<name>.osc`` (single-tier
OSC gains) and ``<name>.joint`` (joint-space CLIK + PD gains). Every candidate of every
study is scored the same way: on the nominal plant (with its stability margins) and on
the problem's fixed set of perturbed plants; the trial's value is the robust error (a
statistic over the plants). Every trial stores its full score under the user attribute
``score`` and sets the constraint ``feasible`` (> 0 is infeasible: how far a margin is
below its minimum, a divergence, too few plants feasible) on every path, so infeasible
trials steer the sampler instead of vanishing. No printing here: callers pass callbacks.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime
import logging
import math
import multiprocessing
import os
import random
import re
import signal
import socket
import time
import warnings
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np
import optuna
from optuna.trial import TrialState

from . import interrupt, ladder
from .control import Controller
from .evaluate import (
    joint_controller,
    joint_gains_text,
    make_loop,
    plan_controller,
)
from .exceptions import InputError
from .journal import journal_storage
from .objectives import directions, pareto_front
from .plan import Plan, Tier
from .problem import Problem, load_problem
from .ranking import Entry
from .robust import RobustScore, evaluate_robust, plant_set
from .stability import LinearLoop, Margins

__all__ = [
    "CONSTRAINT",
    "GRACE_S",
    "HEARTBEAT_S",
    "HOST",
    "KINDS",
    "PENALTY",
    "SAMPLERS",
    "STALE_S",
    "STOP_GRACE_S",
    "STUDY_SAMPLER",
    "Budget",
    "WorkerJob",
    "abandon_own",
    "abandoned",
    "best_value",
    "clip_to_space",
    "entries",
    "feasible",
    "finished",
    "fresh_seed",
    "job_sizes",
    "late_gain",
    "make_sampler",
    "objective",
    "open_storage",
    "open_study",
    "penalty",
    "plan_params",
    "quiet_optuna",
    "reclaim",
    "redact",
    "run_search",
    "run_worker",
    "stop_pool",
    "study_options",
    "suggest_plan",
    "worker_pool",
    "worker_start",
]

log = logging.getLogger(__name__)

#: Objective value of a trial that diverged or failed the pre-check (finite, for TPE).
PENALTY = 1e6
#: This host, as recorded on each trial with the worker's pid (stale-trial detection).
HOST = socket.gethostname()
#: A RUNNING trial with no worker recorded is stale after this long [s].
STALE_S = 60.0
#: Study kinds and the suffix of their study names.
KINDS = {"plan": "", "osc": ".osc", "joint_space": ".joint"}


def _values(
    objectives: Sequence[str], error: float, score: Any | None
) -> float | tuple[float, float]:
    """The trial's return value: the error, or (error, second objective)."""
    if len(objectives) == 1:
        return error
    if objectives[1] == "margin":
        m = score.nominal.stiffness_margin if score is not None else math.nan
        return error, (m if math.isfinite(m) else -1.0)
    e = score.nominal.tau_rms_nm if score is not None else math.nan
    return error, (e if math.isfinite(e) else PENALTY)


def quiet_optuna() -> None:
    """Silence optuna's per-trial log lines and experimental warnings."""
    optuna.logging.set_verbosity(optuna.logging.ERROR)
    warnings.filterwarnings("ignore", category=optuna.exceptions.ExperimentalWarning)
    warnings.filterwarnings("ignore", category=FutureWarning, module="optuna")
    # CMA-ES (baselines) does not use constraints; infeasible trials carry the penalty value
    warnings.filterwarnings("ignore", message="Constraints have been set, but CmaEsSampler")
    # the user's own [baseline] gains may lie outside the searched ranges: they are
    # evaluated exactly as given all the same
    warnings.filterwarnings("ignore", message="Fixed parameter .* is out of range")


# -- search space ------------------------------------------------------------------
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
            cuts = ladder.bandwidth_cuts(problem, prev)
            if not cuts:
                break  # every joint left has the same bandwidth: no faster subset
            joints = cuts[trial.suggest_int(f"t{k}_cut", 1, len(cuts)) - 1]
        else:
            joints = [
                j for j in prev if trial.suggest_categorical(f"t{k}_{names[j]}", [True, False])
            ]
            order = ladder.bandwidth_order(problem, prev)
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
    law = trial.suggest_categorical("law", list(sp.laws)) if len(sp.laws) > 1 else sp.laws[0]
    return Plan(
        tuple(tiers),
        label=f"trial {getattr(trial, 'number', '-')}",
        nested=True,
        joint_names=names,
        law=str(law),
    )


def plan_params(plan: Plan, problem: Problem) -> dict[str, Any] | None:
    """Parameters that make ``suggest_plan`` rebuild ``plan``, or None when it cannot."""
    sp = problem.search
    n = problem.arm.n
    names = problem.arm.joint_names
    if len(plan.tiers) > sp.max_tiers or plan.tiers[0].joints != tuple(range(n)):
        return None
    t1 = plan.tiers[0]
    r_t1 = (sp.tier1_kp_t_range or sp.kp_t_range, sp.tier1_kp_r_range or sp.kp_r_range)
    if not (_inside(t1.kp_t, r_t1[0]) and _inside(t1.kp_r, r_t1[1])):
        return None
    params: dict[str, Any] = {"t1_kp_t": t1.kp_t, "t1_kp_r": t1.kp_r, "t1_zeta": t1.zeta}
    if sp.max_tiers > 1:
        params["tiers"] = len(plan.tiers)
    if not all(_inside(t.zeta, sp.zeta_range) and t.damping is None for t in plan.tiers):
        return None
    if plan.law not in sp.laws:
        return None
    if len(sp.laws) > 1:
        params["law"] = plan.law
    prev = list(range(n))
    for k, tier in enumerate(plan.tiers[1:], start=2):
        if not set(tier.joints) < set(prev):
            return None
        if sp.subset_mode == "ranked":
            cuts = ladder.bandwidth_cuts(problem, prev)
            if list(tier.joints) not in cuts:
                return None
            params[f"t{k}_cut"] = cuts.index(list(tier.joints)) + 1
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
        if (tier.kp_t > 0 and not _inside(tier.kp_t, sp.kp_t_range)) or (
            tier.kp_r > 0 and not _inside(tier.kp_r, sp.kp_r_range)
        ):
            return None
        if tier.kp_t > 0:
            params[f"t{k}_kp_t"] = tier.kp_t
        if tier.kp_r > 0:
            params[f"t{k}_kp_r"] = tier.kp_r
        params[f"t{k}_zeta"] = tier.zeta
        prev = list(tier.joints)
    return params


def _inside(x: float, r: tuple[float, float]) -> bool:
    return r[0] * (1 - 1e-12) <= x <= r[1] * (1 + 1e-12)


def clip_to_space(plan: Plan, problem: Problem) -> Plan:
    """``plan`` with each tier's gains and ζ clipped into the search ranges."""
    sp = problem.search
    tiers = []
    for k, t in enumerate(plan.tiers):
        rt = (sp.tier1_kp_t_range or sp.kp_t_range) if k == 0 else sp.kp_t_range
        rr = (sp.tier1_kp_r_range or sp.kp_r_range) if k == 0 else sp.kp_r_range
        tiers.append(
            dataclasses.replace(
                t,
                kp_t=float(np.clip(t.kp_t, *rt)) if t.kp_t > 0 or k == 0 else 0.0,
                kp_r=float(np.clip(t.kp_r, *rr)) if t.kp_r > 0 or k == 0 else 0.0,
                zeta=float(np.clip(t.zeta, *sp.zeta_range)),
            )
        )
    return dataclasses.replace(plan, tiers=tuple(tiers))


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
    plants: Sequence[Problem],
    make: Callable[[Problem], Controller],
    label: str,
    text: str,
    prune: bool,
) -> tuple[float, RobustScore | None]:
    """Pre-check, rollouts on every plant with pruning, constraint; returns the robust
    error and the score."""
    limits = problem.scoring.margins
    trial.set_user_attr("plan_text", text)
    controller = make(problem)
    trial.set_user_attr("kind", controller.kind)
    loop = make_loop(problem, controller)
    loop.controller.bind(problem.references[0])
    home = LinearLoop(loop, 0, loop.initial_state())
    if not home.meets(limits):
        m = home.margins(limits=limits)
        v = max(limits.violation(m), 1e-3)
        why = limits.shortfall(m) or "linearised loop unstable"
        trial.set_user_attr("reason", f"pre-check at the home pose: {why}")
        trial.set_user_attr("steps", 0)
        trial.set_constraint(CONSTRAINT, v)
        return penalty(v), None

    def on_step(i: int, running: float) -> None:
        interrupt.checkpoint()  # a Ctrl-C held while the journal was locked
        if not prune or not math.isfinite(running):
            return
        trial.report(running, i)
        if trial.should_prune():
            trial.set_constraint(CONSTRAINT, 0.0)
            raise optuna.TrialPruned()

    score = evaluate_robust(
        problem, plants, make, label, text, stop_on_failure=True, on_step=on_step
    )
    trial.set_user_attr("score", score.to_dict())
    trial.set_user_attr("steps", score.nominal.steps + sum(d.steps for d in score.draws))
    trial.set_user_attr("reason", score.reason)
    v = _violation(problem, score)
    trial.set_constraint(CONSTRAINT, v)
    err = score.robust_error
    return (err if math.isfinite(err) and v <= 0 else penalty(max(v, 1e-3))), score


def penalty(violation: float) -> float:
    """Objective value of an infeasible trial: PENALTY and more the further it is from
    feasible, so that a sampler that ignores constraints (CMA-ES) still sees the way back."""
    return PENALTY * (1.0 + min(max(violation, 0.0), 10.0))


#: Name of the one constraint every trial sets (> 0: infeasible).
CONSTRAINT = "feasible"


def _violation(problem: Problem, score: RobustScore) -> float:
    """How infeasible a scored candidate is: ≤ 0 feasible; 1 and more for a divergence."""
    nom = score.nominal
    if any(t.diverged for t in nom.trajectories) or len(nom.trajectories) < len(problem.references):
        return 1.0
    worst = Margins(
        nom.stiffness_margin, nom.delay_margin_ms, nom.bandwidth_margin, math.nan, math.nan
    )
    v = problem.scoring.margins.violation(worst)
    if score.feasible_share < score.min_share - 1e-12:
        v = max(v, score.min_share - score.feasible_share)
    return v if v > 0 else 0.0


def objective(
    problem: Problem, kind: str, prune: bool, objectives: Sequence[str] = ("error",)
) -> Callable[[optuna.trial.Trial], float | tuple[float, float]]:
    """The objective of one study kind (``plan``, ``osc`` or ``joint_space``).

    With two objectives the trial returns (error, margin or effort) and is never pruned
    (optuna prunes single-objective studies only).
    """
    sp = problem.search
    n = problem.arm.n
    prune = prune and len(objectives) == 1
    plants = plant_set(problem, problem.perturb.plants)

    def run(
        trial: optuna.trial.Trial, make: Callable[[Problem], Controller], label: str, text: str
    ) -> float | tuple[float, float]:
        return _values(
            objectives, *_run_candidate(trial, problem, plants, make, label, text, prune)
        )

    def plan_objective(trial: optuna.trial.Trial) -> float | tuple[float, float]:
        plan = suggest_plan(trial, problem)
        trial.set_user_attr("plan_toml", plan.to_toml())
        trial.set_user_attr("tiers", len(plan.tiers))
        rule = _never_alone(plan, problem)
        if rule:
            trial.set_user_attr("reason", rule)
            trial.set_constraint(CONSTRAINT, 1.0)
            return _values(objectives, PENALTY, None)
        return run(trial, lambda p: plan_controller(p, plan), plan.label, plan.compact(n))

    def osc_objective(trial: optuna.trial.Trial) -> float | tuple[float, float]:
        zeta = trial.suggest_float("zeta", *sp.zeta_range)
        ratio = trial.suggest_float("ratio", *ladder.RATIO_RANGE, log=True)
        frac = trial.suggest_float("fraction", *ladder.FRACTION_RANGE)
        kp_t, kp_r = ladder.osc_from_coords(problem, zeta, ratio, frac)
        kp_t = float(np.clip(kp_t, *sp.kp_t_range)) if kp_t > 0 else sp.kp_t_range[0]
        kp_r = float(np.clip(kp_r, *sp.kp_r_range)) if kp_r > 0 else sp.kp_r_range[0]
        plan = Plan(
            (Tier(tuple(range(n)), kp_t, kp_r, zeta),),
            label="tuned single-tier OSC",
            joint_names=problem.arm.joint_names,
        )
        trial.set_user_attr("plan_toml", plan.to_toml())
        trial.set_user_attr("tiers", 1)
        return run(
            trial, lambda p: plan_controller(p, plan, kind="osc"), plan.label, plan.compact(n)
        )

    def joint_objective(trial: optuna.trial.Trial) -> float | tuple[float, float]:
        names = problem.arm.joint_names
        zeta = trial.suggest_float("zeta", *sp.zeta_range)
        dev = np.array([trial.suggest_float(f"dev_{nm}", *ladder.DEVIATION_RANGE) for nm in names])
        frac = trial.suggest_float("fraction", *ladder.FRACTION_RANGE)
        kp = ladder.joint_from_coords(problem, zeta, dev, frac)
        kp = np.where(kp > 0, np.clip(kp, *sp.joint_kp_range), sp.joint_kp_range[0])
        label = "tuned joint-space CLIK + PD"
        trial.set_user_attr("tiers", 1)
        trial.set_user_attr("joint_gains", {"kp": [float(x) for x in kp], "zeta": float(zeta)})
        return run(
            trial,
            lambda p: joint_controller(p, kp, zeta, label=label),
            label,
            joint_gains_text(kp, zeta),
        )

    chosen = {"plan": plan_objective, "osc": osc_objective, "joint_space": joint_objective}[kind]

    def guarded(trial: optuna.trial.Trial) -> float | tuple[float, float]:
        with interrupt.objective():  # a Ctrl-C ends the trial here, not in optuna's records
            try:
                return chosen(trial)
            except optuna.TrialPruned:
                raise
            except Exception as err:  # a failed candidate is a result: say why, go on
                trial.set_user_attr("reason", f"error: {type(err).__name__}: {err}"[:300])
                raise
            # KeyboardInterrupt and SystemExit leave no reason: the trial is abandoned

    return guarded


# -- storage and studies -----------------------------------------------------------
#: Database heartbeat of a running trial [s], and how long one may miss it before the trial
#: counts as stale (its worker died, on any host) and is failed and queued again once.
HEARTBEAT_S = 10
GRACE_S = 40


def open_storage(spec: str) -> Any:
    """An optuna storage: a URL (``sqlite:///…``, ``postgresql://…``) or a journal file path.

    A database storage runs a heartbeat: a trial whose worker stops beating for
    ``GRACE_S`` is failed by the next worker to start a trial, and queued again once.
    """
    if "://" in spec:
        quiet_optuna()
        last: Exception | None = None
        for attempt in range(6):
            try:
                return optuna.storages.RDBStorage(
                    spec,
                    engine_kwargs={"pool_pre_ping": True},
                    heartbeat_interval=HEARTBEAT_S,
                    grace_period=GRACE_S,
                    heartbeat_stale_trial_callback=(
                        optuna.storages.RetryHeartbeatStaleTrialCallback(max_retry=1)
                    ),
                )
            except ImportError as err:
                raise InputError(
                    "--storage",
                    "",
                    f"the driver for {spec.split('://')[0]} is not installed ({err}); for "
                    "PostgreSQL: pip install -e '.[postgres]'",
                ) from err
            except Exception as err:  # sqlalchemy: bad URL, server down, no such database...
                # ...or another host creating the tables of a new database at this moment:
                # that race resolves itself, so try again after a short random wait
                last = err
                time.sleep(0.2 * (attempt + 1) + random.random() * 0.3)
        text = str(last).strip()
        first = text.splitlines()[0] if text else type(last).__name__
        raise InputError("--storage", "", f"cannot open {redact(spec)}: {first}") from last
    return journal_storage(spec)


def redact(url: str) -> str:
    """The URL without its password."""
    return re.sub(r"(://[^:/@]+):[^@]*@", r"\1:***@", url)


# -- private attributes of other libraries, used here and nowhere else ---------------
# optuna has no public API to write to a trial that another process runs (recording the
# worker before the sampler proposes; failing a dead worker's trial), and
# concurrent.futures none to list a pool's processes (to stop them on Ctrl-C). Each use
# goes through one of these three functions, so a library change breaks one place.


def _storage_of(study: optuna.Study) -> Any:
    return study._storage


def _trial_id(trial: optuna.trial.FrozenTrial) -> int:
    return int(trial._trial_id)


def _pool_processes(pool: ProcessPoolExecutor) -> list[Any]:
    return list((getattr(pool, "_processes", None) or {}).values())


def _record_worker(study: optuna.Study, trial: optuna.trial.FrozenTrial) -> None:
    """Record the worker (host:pid) on a trial before anything else runs (stale-trial
    detection). No public API writes to another object's trial, so the storage is used."""
    _storage_of(study).set_trial_user_attr(_trial_id(trial), "worker", _worker_id())


class _TPE(optuna.samplers.TPESampler):
    """TPE that records the worker on each trial first."""

    def before_trial(self, study: optuna.Study, trial: optuna.trial.FrozenTrial) -> None:
        _record_worker(study, trial)
        super().before_trial(study, trial)


class _CMA(optuna.samplers.CmaEsSampler):
    """CMA-ES that records the worker on each trial first."""

    def before_trial(self, study: optuna.Study, trial: optuna.trial.FrozenTrial) -> None:
        _record_worker(study, trial)
        super().before_trial(study, trial)


def _worker_id() -> str:
    return f"{HOST}:{os.getpid()}"


#: Samplers by name: ``tpe`` for the conditional plan space, ``cmaes`` for the
#: continuous gains of the baselines (see ``bench/baselines.py`` for why).
SAMPLERS = ("tpe", "cmaes")
#: Sampler of each study kind.
STUDY_SAMPLER = {"plan": "tpe", "osc": "cmaes", "joint_space": "cmaes"}


def make_sampler(
    seed: int, name: str = "tpe", x0: dict[str, float] | None = None
) -> optuna.samplers.BaseSampler:
    """A seeded sampler: TPE over the conditional space (multivariate, grouped), or CMA-ES
    started at ``x0`` (its parameters in the study's units) with a step of a quarter of
    each (log) range."""
    quiet_optuna()
    if name == "cmaes":
        return _CMA(
            x0=x0,
            sigma0=None,
            seed=seed,
            n_startup_trials=0,
            warn_independent_sampling=False,
            consider_pruned_trials=True,
        )
    return _TPE(seed=seed, multivariate=True, group=True, n_startup_trials=10)


def open_study(
    storage: str,
    name: str,
    seed: int,
    prune: bool,
    objectives: Sequence[str] = ("error",),
    sampler: str = "tpe",
    x0: dict[str, float] | None = None,
    warmup: int = 0,
    opened: Any = None,
) -> optuna.Study:
    """Create or load a study (resume with the same name).

    ``warmup``: steps (trajectories) before pruning may stop a trial; ``opened``: the
    storage ``storage`` names, already open (a worker keeps one for all its jobs). Raises
    InputError when the stored study has other objectives than asked for.
    """
    quiet_optuna()
    pruner = (
        optuna.pruners.MedianPruner(n_startup_trials=5, n_warmup_steps=warmup)
        if prune and len(objectives) == 1
        else optuna.pruners.NopPruner()
    )
    want = directions(objectives)
    st = open_storage(storage) if opened is None else opened
    try:
        study = optuna.load_study(
            study_name=name, storage=st, sampler=make_sampler(seed, sampler, x0), pruner=pruner
        )
    except KeyError:
        return optuna.create_study(
            study_name=name,
            storage=st,
            sampler=make_sampler(seed, sampler, x0),
            pruner=pruner,
            directions=want,  # type: ignore[arg-type]
            load_if_exists=True,  # another worker may have made it meanwhile
        )
    have = [d.name.lower() for d in study.directions]
    if have != want:
        raise InputError(
            storage,
            "--objectives",
            f"study '{name}' was made with {len(have)} objective(s) ({', '.join(have)}); "
            f"use another --study name for {', '.join(objectives)}",
        )
    return study


def abandoned(t: optuna.trial.FrozenTrial) -> bool:
    """A trial that failed without a result: its worker was killed or interrupted."""
    return t.state == TrialState.FAIL and "reason" not in t.user_attrs


def finished(study: optuna.Study) -> int:
    """Trials that ended with a result: complete, pruned, or failed with a reason."""
    done = (TrialState.COMPLETE, TrialState.PRUNED, TrialState.FAIL)
    return sum(1 for t in study.get_trials(deepcopy=False, states=done) if not abandoned(t))


def _worker_gone(t: optuna.trial.FrozenTrial, now: datetime.datetime) -> bool:
    """Whether a RUNNING trial's worker process no longer runs (on this host)."""
    worker = t.user_attrs.get("worker")
    if worker is None:  # killed before its first write: stale once it is old
        start = t.datetime_start
        return start is not None and (now - start).total_seconds() > STALE_S
    host, _, pid = str(worker).rpartition(":")
    if host != HOST or not pid.isdigit():
        return False  # another machine's worker: the database heartbeat handles it
    try:
        os.kill(int(pid), 0)
    except ProcessLookupError:
        return True
    except PermissionError:
        return False
    return False


def _fail(study: optuna.Study, t: optuna.trial.FrozenTrial) -> None:
    """Mark another process's (or a dead one's) RUNNING trial failed: no public API does."""
    _storage_of(study).set_trial_state_values(_trial_id(t), TrialState.FAIL)


def abandon_own(study: optuna.Study) -> int:
    """After Ctrl-C: fail this process's RUNNING trials (and ones not yet claimed by any)."""
    n = 0
    for t in study.get_trials(deepcopy=False, states=(TrialState.RUNNING,)):
        if t.user_attrs.get("worker") in (None, _worker_id()):
            _fail(study, t)
            n += 1
    return n


def reclaim(study: optuna.Study) -> tuple[int, int]:
    """Fail trials left RUNNING by dead workers and queue abandoned trials again.

    Returns (trials marked failed, trials queued again). A retry keeps the abandoned
    trial's parameters and source and records ``retry_of``; each is retried once.
    """
    now = datetime.datetime.now()
    failed = 0
    for t in study.get_trials(deepcopy=False, states=(TrialState.RUNNING,)):
        if _worker_gone(t, now):
            _fail(study, t)
            failed += 1
    trials = study.get_trials(deepcopy=False)
    retried = {t.user_attrs.get("retry_of") for t in trials}
    queued = 0
    for t in trials:
        if abandoned(t) and t.number not in retried:
            attrs: dict[str, Any] = {
                k: t.user_attrs[k] for k in ("source", "label") if k in t.user_attrs
            }
            study.enqueue_trial(dict(t.params), user_attrs={**attrs, "retry_of": t.number})
            queued += 1
    return failed, queued


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
    objectives: tuple[str, ...] = ("error",)
    actuator_files: tuple[str, ...] = ()
    x0: tuple[tuple[str, float], ...] = ()
    """Start of a CMA-ES sampler (parameter, value) pairs."""
    total: int = 0
    """With a positive value, stop once the study holds this many ended or running trials
    (``--trials`` of several processes on one study do not overrun it)."""
    call: int = 0
    """The same for every job of one ``run_search`` call: a worker keeps the study and its
    sampler (seeded by the first of those jobs it runs) for the later ones."""


def study_options(
    problem: Problem, kind: str, enqueue: Sequence[tuple[dict[str, Any], dict[str, Any]]] = ()
) -> dict[str, Any]:
    """Sampler, CMA-ES start and pruning warm-up of a study kind: CMA-ES starts from the
    last enqueued candidate (the informed one); pruning waits for the whole nominal set."""
    name = STUDY_SAMPLER[kind]
    x0 = dict(enqueue[-1][0]) if name == "cmaes" and enqueue else None
    return {"sampler": name, "x0": x0, "warmup": max(0, len(problem.references) - 1)}


#: Seconds the parent gives its workers to end after Ctrl-C before it kills them (a
#: killed worker loses only its trial in flight, which a resume runs again).
STOP_GRACE_S = 20.0


def worker_start(problem_path: str | None = None, actuator_files: tuple[str, ...] = ()) -> None:
    """Pool initializer of a worker process: how it takes Ctrl-C, then (with
    ``problem_path``) the problem loaded ahead of the first job.

    A terminal's Ctrl-C reaches every process of the group, and the parent then sends
    SIGINT again to stop its workers. A Ctrl-C stops the trial in flight (KeyboardInterrupt
    in its objective: optuna ends that trial as failed, which a resume retries), once;
    one that comes outside an objective (starting, loading the problem, waiting for a job,
    optuna's bookkeeping) is held, and the worker then starts no further trial
    (``interrupt``).
    """
    interrupt.install()
    if hasattr(signal, "pthread_sigmask"):  # the parent spawned it with SIGINT blocked
        signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT})
    if problem_path is not None:
        # an error here would break the pool: the first job loads the file again and
        # reports what is wrong with it
        with contextlib.suppress(Exception):
            _loaded_problem(problem_path, actuator_files)


def _started() -> None:
    """A job that does nothing: submitting one per worker starts the processes now."""


@contextlib.contextmanager
def _sigint_blocked() -> Iterator[None]:
    """SIGINT held pending in this thread (and processes it starts) for the block."""
    if not hasattr(signal, "pthread_sigmask"):
        yield
        return
    old = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, old)


#: In a worker process: problems it has loaded, by file and actuator files, and storages
#: it has opened (a run's studies share one pool and a study's trials come in several
#: jobs, so a worker loads the problem and replays a journal once, not once per job).
_PROBLEMS: dict[tuple[str, tuple[str, ...]], Problem] = {}
_STORAGES: dict[str, Any] = {}
_STUDIES: dict[tuple[str, str, int], optuna.Study] = {}


def _loaded_problem(path: str, actuator_files: tuple[str, ...]) -> Problem:
    key = (path, actuator_files)
    if key not in _PROBLEMS:
        _PROBLEMS[key] = load_problem(path, check_reach=False, actuator_files=actuator_files)
    return _PROBLEMS[key]


def _opened_storage(spec: str) -> Any:
    if spec not in _STORAGES:
        _STORAGES[spec] = open_storage(spec)
    return _STORAGES[spec]


@contextlib.contextmanager
def worker_pool(
    workers: int, problem: Problem | None = None
) -> Iterator[ProcessPoolExecutor | None]:
    """One pool of ``workers`` processes for every study of a run (None for one worker):
    each process imports numba, pinocchio and scipy once and loads the problem once.

    The processes start at once (not at the first job), and with ``problem`` (loaded from
    a file) each loads it as it starts: their start-up overlaps what the caller computes
    before its first study."""
    if workers <= 1:
        yield None
        return
    from .blas import one_thread

    one_thread()  # the workers inherit the environment before their numpy loads
    ctx = multiprocessing.get_context("spawn")
    args: tuple[Any, ...] = ()
    if problem is not None and problem.path is not None:
        args = (str(problem.path), tuple(str(a) for a in problem.actuator_files))
    pool = ProcessPoolExecutor(
        max_workers=workers, mp_context=ctx, initializer=worker_start, initargs=args
    )
    try:
        with _sigint_blocked():  # see _run_jobs; a submit starts a process while none idles
            for _ in range(workers):
                pool.submit(_started)
        yield pool
    except BaseException:
        stop_pool(pool)
        raise
    pool.shutdown(wait=True)


def stop_pool(pool: ProcessPoolExecutor) -> None:
    """Ctrl-C to every worker (each abandons its trial in flight), a grace period, then
    SIGKILL for any that is still there; the pool is shut down."""
    procs = _pool_processes(pool)
    for proc in procs:
        with contextlib.suppress(ProcessLookupError):
            os.kill(proc.pid, signal.SIGINT)
    deadline = time.monotonic() + STOP_GRACE_S
    for proc in procs:
        proc.join(max(0.0, deadline - time.monotonic()))
    for proc in procs:  # one that did not end in time is killed, not waited for
        if proc.is_alive():
            proc.kill()
    pool.shutdown(wait=True, cancel_futures=True)


def run_worker(job: WorkerJob) -> tuple[int, bool]:
    """Run ``job.n_trials`` trials of one study in this process; returns (trials run,
    whether a Ctrl-C stopped it: then fewer ran, and the parent stops the run too)."""
    quiet_optuna()
    problem = _loaded_problem(job.problem_path, job.actuator_files)
    key = (job.storage, job.study_name, job.call)
    if key not in _STUDIES:  # one sampler per worker, as with one job per worker
        opts = study_options(problem, job.kind)
        opts["x0"] = dict(job.x0) or None
        _STUDIES[key] = open_study(
            job.storage, job.study_name, job.seed, job.prune, job.objectives, **opts,
            opened=_opened_storage(job.storage),
        )  # fmt: skip
    study = _STUDIES[key]
    n0 = finished(study)
    if interrupt.requested():  # Ctrl-C came while it started or waited: run nothing
        return 0, True
    try:
        study.optimize(
            objective(problem, job.kind, job.prune, job.objectives),
            n_trials=job.n_trials,
            catch=(Exception,),
            callbacks=[Budget(job.total)] if job.total else [],
        )
    except KeyboardInterrupt:  # the trial in flight is already ended; say so quietly
        return max(0, finished(study) - n0), True
    return job.n_trials, interrupt.requested()


class Budget:
    """Stop a study's optimisation once it holds ``total`` trials that ended with a result
    or are running: processes that each bring a study up to a total, started together,
    share that total instead of each adding to it."""

    def __init__(self, total: int) -> None:
        self.total = total

    def __call__(self, study: optuna.Study, trial: optuna.trial.FrozenTrial) -> None:
        running = len(study.get_trials(deepcopy=False, states=(TrialState.RUNNING,)))
        if finished(study) + running >= self.total:
            study.stop()


def fresh_seed(seed: int, study: optuna.Study, worker: int = 0) -> int:
    """The sampler seed of a worker: the run's seed for a new study, another one for each
    state a study is resumed from (so a resumed or added worker does not repeat the
    proposals of the first), and apart per worker."""
    return seed + 1000 * worker + 7919 * len(study.get_trials(deepcopy=False))


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
    objectives: Sequence[str] = ("error",),
    add: bool = False,
    pool: ProcessPoolExecutor | None = None,
) -> optuna.Study:
    """Bring study ``study_name`` up to ``total_trials`` ended trials (``add``: run that many).

    Resumes where a previous run stopped: only the missing trials are run. ``enqueue``
    holds (params, user_attrs) pairs (hand plans) evaluated first, once. With
    ``workers`` > 1 the trials are split over that many processes sharing the storage,
    each with its own sampler seed; ``on_progress`` is called about once a second.
    ``objectives`` is ``("error",)`` or ``("error", "margin" | "effort")``. ``pool``
    (from ``worker_pool``) runs the workers' shares; without it a pool is made for this
    study alone.
    """
    objectives = tuple(objectives)
    opts = study_options(problem, kind, enqueue)
    study = open_study(storage, study_name, seed, prune, objectives, **opts)
    reclaim(study)
    for params, attrs in enqueue:
        study.enqueue_trial(params, user_attrs=attrs, skip_if_exists=True)
    remaining = total_trials if add else max(0, total_trials - finished(study))
    if remaining == 0:
        return study
    if problem.path is None:
        raise ValueError("a search needs a problem loaded from a file")
    queued = len(study.get_trials(deepcopy=False, states=(TrialState.WAITING,)))
    resumed = len(study.get_trials(deepcopy=False)) > queued
    if resumed:  # a resumed study draws fresh proposals (the first ones are in it already)
        study.sampler = make_sampler(fresh_seed(seed, study), opts["sampler"], opts["x0"])
    if workers <= 1:
        cb: list[Callable[[optuna.Study, optuna.trial.FrozenTrial], None]] = (
            [(lambda s, t: on_progress(s))] if on_progress else []
        )
        if not add:
            cb.append(Budget(total_trials))
        with interrupt.taking():
            study.optimize(
                objective(problem, kind, prune, objectives),
                n_trials=remaining,
                callbacks=cb,
                catch=(Exception,),
            )
        return study
    jobs = [
        WorkerJob(
            str(problem.path),
            storage,
            study_name,
            kind,
            s,
            fresh_seed(seed, study, i) if resumed else seed + 1000 * i,
            prune,
            objectives,
            tuple(str(a) for a in problem.actuator_files),
            tuple((opts["x0"] or {}).items()),
            0 if add else total_trials,
            fresh_seed(seed, study) if resumed else seed,
        )
        for i, s in enumerate(job_sizes(remaining, workers))
    ]
    with contextlib.ExitStack() as own:
        if pool is None:
            pool = own.enter_context(worker_pool(min(workers, len(jobs)), problem))
        assert pool is not None
        _run_jobs(pool, jobs, study, on_progress)
    return study


def job_sizes(trials: int, workers: int) -> list[int]:
    """Trials per job when ``workers`` processes share ``trials``: jobs that shrink as
    the work left does (a worker that ends a job takes the next one from the pool's queue),
    so the processes finish close together whatever each trial costs. They sum to
    ``trials``."""
    out, left = [], trials
    while left > 0:
        out.append(max(1, left // (2 * workers)))
        left -= out[-1]
    return out


def _run_jobs(
    pool: ProcessPoolExecutor,
    jobs: Sequence[WorkerJob],
    study: optuna.Study,
    on_progress: Callable[[optuna.Study], None] | None,
) -> None:
    """Run the jobs on ``pool`` (from ``worker_pool``, which stops the workers when an
    exception or Ctrl-C leaves its block)."""
    # Workers start with SIGINT blocked (the mask survives exec) until worker_start
    # has installed their handler: a Ctrl-C while one imports stays pending instead
    # of printing a traceback; here it is delivered as soon as they are spawned.
    with _sigint_blocked():
        futures = [pool.submit(run_worker, j) for j in jobs]
    while not all(f.done() for f in futures):
        interrupt.check()  # one a finaliser swallowed: stop the workers now
        if on_progress:
            on_progress(study)
        for f in futures:
            try:
                f.result(timeout=1.0 / len(futures))
            except TimeoutError:
                pass
    stopped = [f.result()[1] for f in futures]  # re-raises a worker's error
    if any(stopped):
        # The Ctrl-C reached the workers; this process has had it too, and normally is
        # already unwinding. Should its KeyboardInterrupt have been lost (one Ctrl-C test in
        # 20 beside a CPU hog ended with exit 0 and the next studies run empty), the run
        # still ends as interrupted rather than ranking a cut-short study as finished.
        raise KeyboardInterrupt


# -- ranking -----------------------------------------------------------------------
def feasible(t: optuna.trial.FrozenTrial) -> bool:
    """Complete, scored and with every constraint satisfied."""
    return (
        t.state == TrialState.COMPLETE
        and "score" in t.user_attrs
        and all(c <= 0.0 for c in (t.constraints or {}).values())
    )


def late_gain(study: optuna.Study, share: float = 0.25) -> float | None:
    """How much the best feasible value improved over the last ``share`` of the study's
    ended trials, as a fraction (0.05: 5 % lower); None with no feasible trial before."""
    ended = sorted(
        (
            t
            for t in study.get_trials(deepcopy=False)
            if t.state in (TrialState.COMPLETE, TrialState.PRUNED, TrialState.FAIL)
        ),
        key=lambda t: t.number,
    )
    if not ended:
        return None
    cut = int(math.ceil(len(ended) * (1.0 - share)))
    before = [t.values[0] for t in ended[:cut] if feasible(t)]
    after = [t.values[0] for t in ended if feasible(t)]
    if not before or not after:
        return None
    return 1.0 - min(after) / min(before)


def best_value(study: optuna.Study) -> float | None:
    """Lowest error among feasible trials, or None."""
    vals = [t.values[0] for t in study.get_trials(deepcopy=False) if feasible(t)]
    return min(vals, default=None)


def entries(study: optuna.Study, source: str) -> list[Entry]:
    """Feasible trials as ranking entries (score, trial, source, label, plan), best first.

    In a two-objective study each entry also says whether it is on the feasible front.
    """
    out = []
    trials = [
        t for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,)) if feasible(t)
    ]
    dirs = [d.name.lower() for d in study.directions]
    front = pareto_front([t.values for t in trials], dirs) if len(dirs) > 1 else []
    for i, t in enumerate(trials):
        e = Entry.from_dict(t.user_attrs["score"])
        e.pareto = front[i] if front else None
        e.trial = t.number
        e.source = t.user_attrs.get("source", source)
        if t.user_attrs.get("label"):
            e.label = t.user_attrs["label"]
        e.plan_toml = t.user_attrs.get("plan_toml")
        e.joint_gains = t.user_attrs.get("joint_gains")
        out.append(e)
    return sorted(out, key=lambda e: e.value)
