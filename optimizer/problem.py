"""Problem files (TOML): the arm, its actuators, the plant deviation, trajectories, settings.

See ``problems/polish7/problem.toml`` for a commented example of every table.
Loading validates everything and raises ``ProblemError(file, key, reason)``.
"""

from __future__ import annotations

import copy
import dataclasses
import hashlib
import logging
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .actuators import ACTUATOR_MODELS, JointActuator, make_model
from .actuators.base import ModelParameterError
from .arm import Arm, PlantDeviation, build_model, read_urdf
from .control import AXES, ControlSettings, clik_cached
from .exceptions import ProblemError
from .simulate import SimSettings
from .stability import MarginLimits
from .tomlio import TableReader, load_toml, suggestion
from .trajectories import (
    TRAJECTORY_KINDS,
    Reference,
    sample,
)

__all__ = [
    "MAX_RATE_HZ",
    "MAX_TICKS",
    "MIN_RATE_HZ",
    "MODEL_KEYS",
    "REACH_POS_M",
    "REACH_ROT_RAD",
    "SAFE_NAME",
    "BaselineGains",
    "PerturbSpread",
    "Problem",
    "Scoring",
    "SearchSpace",
    "TrajectorySpec",
    "apply_actuator_file",
    "check_reachable",
    "load_problem",
    "parse_problem",
]

log = logging.getLogger(__name__)

#: What a problem's name may be (it names a folder under results/).
SAFE_NAME = re.compile(r"[A-Za-z0-9_-][A-Za-z0-9._-]{0,63}")

#: Largest IK error along a trajectory before it counts as out of reach [m], [rad].
REACH_POS_M = 1e-3
REACH_ROT_RAD = math.radians(0.5)


@dataclass(frozen=True)
class Scoring:
    """How per-trajectory figures become one error index."""

    pos_scale_mm: float = 1.0
    """Position RMS that counts as one unit of error [mm]."""
    rot_scale_deg: float = 0.1
    """Orientation RMS that counts as one unit of error [deg]."""
    pos_weight: float = 1.0
    """Weight of the position part [-]."""
    rot_weight: float = 1.0
    """Weight of the orientation part [-]."""
    aggregate: str = "mean"
    """``mean`` over trajectories, or ``worst``."""
    settle_s: float = 0.1
    """Start of the scored window in every trajectory [s]."""
    margins: MarginLimits = field(default_factory=MarginLimits)
    """Smallest stiffness, delay and bandwidth margins a feasible plan may have."""


@dataclass(frozen=True)
class BaselineGains:
    """Gains of the two baselines when scored without a search."""

    osc_kp_t: float = 400.0
    """Single-tier OSC translational stiffness [1/s²]."""
    osc_kp_r: float = 400.0
    """Single-tier OSC rotational stiffness [1/s²]."""
    osc_zeta: float = 0.8
    """Single-tier OSC damping ratio [-]."""
    joint_kp: tuple[float, ...] = (400.0,)
    """Joint-space PD stiffness, one value or one per joint [1/s²]."""
    joint_zeta: float = 0.8
    """Joint-space PD damping ratio [-]."""
    clik_gain: float = 200.0
    """CLIK error gain [1/s]."""
    clik_damping: float = 0.01
    """CLIK damped least-squares λ [-]."""
    posture_gain: float = 2.0
    """CLIK null-space pull toward the home pose [1/s]."""


@dataclass(frozen=True)
class SearchSpace:
    """What the plan search may choose, from the problem's ``[search]`` table."""

    max_tiers: int = 4
    """Most tiers a plan may have [-]."""
    subset_mode: str = "ranked"
    """``nested`` (joint by joint, each tier inside the previous) or ``ranked`` (each tier
    keeps the joints of the previous one whose drives are at least as fast as a cut)."""
    kp_t_range: tuple[float, float] = (100.0, 20000.0)
    """Log-uniform range of kp_t per tier [1/s²]."""
    kp_r_range: tuple[float, float] = (100.0, 40000.0)
    """Log-uniform range of kp_r per tier [1/s²]."""
    zeta_range: tuple[float, float] = (0.5, 1.2)
    """Range of the damping ratio per tier [-]."""
    tier1_kp_t_range: tuple[float, float] | None = None
    """kp_t range of tier 1 (every joint, capped by the slowest); None: kp_t_range [1/s²]."""
    tier1_kp_r_range: tuple[float, float] | None = None
    """kp_r range of tier 1; None: kp_r_range [1/s²]."""
    tier_parts: bool = True
    """Whether tiers after the first may act on position only or orientation only."""
    never_alone: tuple[str, ...] = ()
    """Joints that may not make up a tier on their own."""
    joint_kp_range: tuple[float, float] = (100.0, 20000.0)
    """Log-uniform range of the joint-space baseline's per-joint kp [1/s²]."""
    laws: tuple[str, ...] = ("summed",)
    """Control laws the plan search may choose (``summed``, ``bounded``)."""
    trials: int = 60
    """Default trial budget of ``search`` [-]."""
    seed: int = 0
    """Default sampler seed [-]."""


@dataclass(frozen=True)
class PerturbSpread:
    """Perturbed plants: how they are drawn, how many the search scores every candidate
    on, and how their figures become one robust error (the ``[perturb]`` table)."""

    bandwidth_rel: float = 0.15
    """Each actuator's frequencies scaled by U(1 − s, 1 + s) [-]."""
    damping_rel: float = 0.1
    """Each second-order actuator's damping ratio scaled by U(1 − s, 1 + s) [-]."""
    delay_ticks: int = 1
    """Each actuator's delay moved by a whole number in [−d, d] ticks, not below 0 [-]."""
    payload_rel: float = 0.3
    """Payload mass scaled by U(1 − s, 1 + s) [-]."""
    payload_offset_m: float = 0.02
    """Each coordinate of the payload's centre of mass moved by U(−d, d) [m]."""
    friction_rel: float = 0.3
    """Coulomb and viscous friction scaled by U(1 − s, 1 + s), per joint [-]."""
    seed: int = 0
    """Seed of the draws (each draw also gets its own noise seed)."""
    plants: int = 0
    """Perturbed plants every search candidate is scored on besides the nominal one [-]."""
    corner: bool = True
    """Whether the first of them is the worst corner of the spreads (slowest drives, one
    more delay period, heaviest payload, least friction) instead of a random draw."""
    statistic: str = "p90"
    """Robust error over the plants: ``p90``, ``worst`` or ``mean``."""
    min_feasible_share: float = 1.0
    """Share of the perturbed plants a feasible candidate must stay feasible on [-]."""


@dataclass(frozen=True)
class TrajectorySpec:
    """One trajectory of the set as written in the problem file."""

    name: str
    """Unique name."""
    kind: Any
    """A trajectory kind object (see ``trajectories``)."""
    duration_s: float
    """Length of the rollout [s]."""


@dataclass(frozen=True)
class Problem:
    """A loaded, validated problem."""

    path: Path | None
    """The problem file (None when built in code)."""
    name: str
    """Problem name (results go to results/<name>/)."""
    description: str
    """One paragraph on the scenario."""
    arm: Arm
    """Controller and plant models."""
    actuators: tuple[JointActuator, ...]
    """One drive per joint, in joint order."""
    control: ControlSettings
    """Controller settings."""
    sim: SimSettings
    """Simulation settings."""
    scoring: Scoring
    """Scoring settings."""
    baseline: BaselineGains
    """Baseline gains for ``score --baselines``."""
    search: SearchSpace
    """What the plan search may choose."""
    perturb: PerturbSpread
    """Spreads of the perturbed plants of ``compare --perturb``."""
    trajectories: tuple[TrajectorySpec, ...]
    """The test set."""
    references: tuple[Reference, ...] = field(repr=False)
    """The test set sampled at the control rate."""
    digest: str = ""
    """SHA-256 of the problem file and the URDF (reproducibility)."""
    warnings: tuple[str, ...] = ()
    """Things the user should know (rounded delays, ...)."""
    actuator_files: tuple[Path, ...] = ()
    """Actuator files applied over the problem file's own settings (``swap``), in order."""
    swapped_joints: tuple[str, ...] = ()
    """Joints whose settings those files changed."""

    @property
    def dt(self) -> float:
        """Control period [s]."""
        return self.control.dt


def load_problem(
    path: Path | str, check_reach: bool = True, actuator_files: Sequence[Path | str] = ()
) -> Problem:
    """Read, validate and build a problem file.

    ``actuator_files`` (applied in order) replace joints' actuator settings: see
    ``apply_actuator_file``. The digest then covers those files too.
    """
    path = Path(path)
    data = load_toml(path, ProblemError)
    extra = b""
    swapped: list[tuple[Path, tuple[str, ...]]] = []
    for af in actuator_files:
        data, joints = apply_actuator_file(data, Path(af), path)
        swapped.append((Path(af), joints))
        extra += Path(af).read_bytes()
    prob = _parse_blaming(data, path, check_reach, swapped)
    if swapped:
        prob = dataclasses.replace(
            prob,
            digest=hashlib.sha256(prob.digest.encode() + extra).hexdigest(),
            actuator_files=tuple(af for af, _ in swapped),
            swapped_joints=tuple(dict.fromkeys(j for _, js in swapped for j in js)),
        )
    return prob


def _parse_blaming(
    data: dict[str, Any],
    path: Path,
    check_reach: bool,
    swapped: Sequence[tuple[Path, tuple[str, ...]]],
) -> Problem:
    """parse_problem; an error in a swapped joint's settings names the actuator file."""
    try:
        return parse_problem(data, path, check_reach=check_reach)
    except ProblemError as err:
        for af, joints in reversed(swapped):
            if any(
                err.key == f"actuators.{j}" or err.key.startswith(f"actuators.{j}.") for j in joints
            ):
                raise ProblemError(af, err.key, err.reason) from err
        raise


#: Keys that belong to an actuator model's parameters (dropped when ``model`` changes).
MODEL_KEYS = frozenset(k for _, ks in ACTUATOR_MODELS.values() for k in ks) | {"model"}


def apply_actuator_file(
    data: dict[str, Any], act_path: Path, problem_path: Path
) -> tuple[dict[str, Any], tuple[str, ...]]:
    """Problem ``data`` with the ``[actuators.<joint>]`` tables of ``act_path`` applied.

    Each table updates that joint's own settings key by key; a table that names a
    ``model`` replaces the joint's model and its parameters as a whole (friction,
    delay, limits and armature not given stay as they were). Returns a new dict;
    ``data`` is not changed; the second item names the joints changed. Joint names
    are checked against the URDF when the result is parsed.
    """
    new = load_toml(act_path, ProblemError, kind="actuator file")
    root = TableReader(new, act_path, "", ProblemError)
    root.str("description", "")
    tacts = root.table("actuators", required=True)
    root.done()
    if not tacts.data:
        raise ProblemError(act_path, "actuators", "names no joint: add [actuators.<joint>] tables")
    out = copy.deepcopy(data)
    acts = out.setdefault("actuators", {})
    if not isinstance(acts, dict):
        raise ProblemError(problem_path, "actuators", "must be a table")
    for joint, table in tacts.data.items():
        if not isinstance(table, dict):
            raise ProblemError(act_path, f"actuators.{joint}", "must be a table")
        if joint == "default":
            raise ProblemError(
                act_path, "actuators.default", "an actuator file changes named joints only"
            )
        own = dict(acts.get(joint, {})) if isinstance(acts.get(joint), dict) else {}
        if "model" in table:
            own = {k: v for k, v in own.items() if k not in MODEL_KEYS}
        own.update(table)
        acts[joint] = own
    return out, tuple(tacts.data)


def parse_problem(data: dict[str, Any], path: Path, check_reach: bool = True) -> Problem:
    """Build a problem from parsed TOML ``data`` that came from ``path``: one reader per
    table, called in the order their errors are reported. The arm's pinocchio model is
    built once."""
    root = TableReader(data, path, "", ProblemError)
    warnings: list[str] = []
    name, description = _read_name(root, path)
    src = _read_arm_source(root, path, warnings)
    deviation = _read_plant(root)
    tacts = root.table("actuators", required=True)
    model = build_model(src.xml, src.path)  # joint names and kinds before the actuators
    names = list(model.names[1:])
    control_tab = root.table("control", required=True)
    rate = control_tab.float("rate_hz", min_value=MIN_RATE_HZ, max_value=MAX_RATE_HZ)
    act_specs, armature = _read_actuators(tacts, names, rate, path, warnings)
    arm, acts = _build_arm(src, model, deviation, armature, act_specs, path)
    control = _read_control(control_tab, arm.n, rate, path)
    sim, scoring = _read_simulation(root, rate, path)
    baseline = _read_baseline(root, arm.n, control, path)
    specs = _read_trajectories(root, path, rate, scoring.settle_s)
    search = _read_search(root.table("search"), names)
    perturb = _read_perturb(root.table("perturb"))
    root.done()

    p0, R0 = arm.tip_pose(arm.home)
    refs = tuple(sample(s.name, s.kind, s.duration_s, rate, p0, R0) for s in specs)
    digest = (
        hashlib.sha256(path.read_bytes() + src.xml.encode()).hexdigest() if path.exists() else ""
    )
    prob = Problem(
        path=path,
        name=name,
        description=description,
        arm=arm,
        actuators=tuple(acts),
        control=control,
        sim=sim,
        scoring=scoring,
        baseline=baseline,
        search=search,
        perturb=perturb,
        trajectories=tuple(specs),
        references=refs,
        digest=digest,
        warnings=tuple(warnings),
    )
    if check_reach:
        check_reachable(prob)
    for w in warnings:
        log.debug("%s", w)  # the caller shows Problem.warnings
    return prob


def _read_name(root: TableReader, path: Path) -> tuple[str, str]:
    """``name`` (it names a results folder) and ``description``."""
    name = root.str("name", path.parent.name if path.name == "problem.toml" else path.stem)
    if not SAFE_NAME.fullmatch(name):
        raise ProblemError(
            path, "name", f"'{name[:40]}' cannot name a results folder: use letters, digits, "
            "'.', '_' and '-' (at most 64, not starting with '.')"
        )
    return name, root.str("description", "")


@dataclass(frozen=True)
class _ArmSource:
    """The ``[arm]`` table: the model as URDF text (MJCF converted), tip frame, home."""

    xml: str
    path: Path
    tip: str
    home: tuple[float, ...] | None


def _read_arm_source(root: TableReader, path: Path, warnings: list[str]) -> _ArmSource:
    ta = root.table("arm", required=True)
    if ta.has("urdf") == ta.has("mjcf"):
        raise ProblemError(
            path, "arm", "needs exactly one of urdf = \"<file>\" and mjcf = \"<file>\""
        )
    if ta.has("urdf"):
        urdf_path = (path.parent / ta.str("urdf")).resolve()
        urdf_xml = read_urdf(urdf_path, "arm.urdf", path)
    else:
        from .mjcf import read_mjcf

        urdf_path = (path.parent / ta.str("mjcf")).resolve()
        urdf_xml, mjcf_warnings = read_mjcf(urdf_path, "arm.mjcf", path)
        warnings += mjcf_warnings
    tip = ta.str("tip_frame")
    home_raw = ta.floats("home", None)
    ta.done()
    return _ArmSource(urdf_xml, urdf_path, tip, None if home_raw is None else tuple(home_raw))


def _read_plant(root: TableReader) -> PlantDeviation:
    """``[plant]``: how the simulated plant differs from the controller's model."""
    tp = root.table("plant")
    dev_args: dict[str, Any] = {}
    dev_args["payload_kg"] = tp.float("payload_kg", 0.0, min_value=0.0, max_value=10_000.0)
    dev_args["payload_offset_m"] = tp.floats(
        "payload_offset_m", (0.0, 0.0, 0.0), length=3, min_value=-10.0, max_value=10.0
    )
    dev_args["payload_radius_m"] = tp.float(
        "payload_radius_m", 0.03, min_value=0.0, strict_min=True, max_value=10.0
    )
    dev_args["mass_scale"] = tp.float(
        "mass_scale", 1.0, min_value=0.0, max_value=100.0, strict_min=True
    )
    tl = tp.table("link_mass_scale")
    lms = {k: tl.float(k, min_value=0.0, strict_min=True, max_value=100.0) for k in list(tl.data)}
    tl.done()
    dev_args["link_mass_scale"] = lms
    tp.done()
    return PlantDeviation(**dev_args)


def _read_actuators(
    tacts: TableReader, names: Sequence[str], rate: float, path: Path, warnings: list[str]
) -> tuple[list[JointActuator], np.ndarray]:
    """``[actuators.<joint>]`` (over ``[actuators.default]``): one drive per joint, and
    the armatures the arm's model needs."""
    default = tacts.table("default") if tacts.has("default") else None
    act_specs = []
    armature = np.zeros(len(names))
    for key in list(tacts.data):
        if key != "default" and key not in names:
            raise ProblemError(
                path,
                f"actuators.{key}",
                f"no joint named '{key}' in the URDF{suggestion(key, names)}; "
                f"joints: {', '.join(names)}",
            )
    for j, jname in enumerate(names):
        if not tacts.has(jname) and default is None:
            raise ProblemError(
                path,
                f"actuators.{jname}",
                f"joint '{jname}' has no actuator: add an [actuators.{jname}] table "
                "(or an [actuators.default] table)",
            )
        own = tacts.data.get(jname, {})
        if not isinstance(own, dict):
            raise ProblemError(path, f"actuators.{jname}", "must be a table")
        merged = dict(default.data) if default is not None else {}
        if "model" in own:  # a joint's own model does not inherit the default's parameters
            merged = {k: v for k, v in merged.items() if k not in MODEL_KEYS}
        merged.update(own)
        tj = TableReader(merged, path, f"actuators.{jname}.", ProblemError)
        tacts.seen.add(jname)
        act, arm_j, warn = _read_actuator(tj, jname, rate, path)
        armature[j] = arm_j
        act_specs.append(act)
        if warn:
            warnings.append(warn)
        tj.done()
    if default is not None:
        tacts.seen.add("default")
    tacts.done()
    return act_specs, armature


def _build_arm(
    src: _ArmSource,
    model: Any,
    deviation: PlantDeviation,
    armature: np.ndarray,
    act_specs: Sequence[JointActuator],
    path: Path,
) -> tuple[Arm, list[JointActuator]]:
    """The arm (from the model already built) at its home posture, and each drive with
    its effort limit (its own, else the URDF's)."""
    n = model.nv
    names = list(model.names[1:])
    if src.home is None:
        home = np.zeros(n)
    else:
        if len(src.home) != n:
            raise ProblemError(
                path, "arm.home", f"needs {n} values (one per joint), got {len(src.home)}"
            )
        home = np.array(src.home, dtype=float)
    # home: degrees for revolute joints, metres for prismatic ones
    home_q = np.array(
        [math.radians(h) if _revolute(model, j) else h for j, h in enumerate(home)]
    )
    try:
        arm = Arm(
            src.xml, src.tip, home=home_q, deviation=deviation, source=src.path,
            armature=armature, model=model,
        )
    except ProblemError as err:
        if err.key.startswith("plant."):
            raise ProblemError(path, err.key, err.reason) from err
        if err.key == "tip_frame":
            raise ProblemError(path, "arm.tip_frame", err.reason) from err
        raise
    for j in range(n):
        if not (arm.lower[j] <= home_q[j] <= arm.upper[j]):
            raise ProblemError(
                path,
                "arm.home",
                f"{names[j]} = {home[j]:g} is outside its URDF limits "
                f"[{_show(model, j, arm.lower[j])}, {_show(model, j, arm.upper[j])}]",
            )
    effort = np.array(arm.effort)
    acts = []
    for j, a in enumerate(act_specs):
        eff = a.effort_nm if math.isfinite(a.effort_nm) else float(effort[j])
        if not eff > 0.0:
            raise ProblemError(
                path,
                f"actuators.{names[j]}.effort_nm",
                "the arm model gives no effort limit (0 or none): give effort_nm here",
            )
        acts.append(dataclasses.replace(a, effort_nm=eff))
    return _with_effort(arm, np.array([a.effort_nm for a in acts])), acts


def _read_control(control_tab: TableReader, n: int, rate: float, path: Path) -> ControlSettings:
    """``[control]`` (its ``rate_hz`` already read)."""
    axes_names = control_tab.strings("task_axes", AXES)
    for a in axes_names:
        if a not in AXES:
            raise ProblemError(
                path, "control.task_axes", f"'{a}' is not an axis; use {', '.join(AXES)}"
            )
    if len(set(axes_names)) != len(axes_names) or not axes_names:
        raise ProblemError(
            path, "control.task_axes", "must list each axis at most once, at least one"
        )
    axes = tuple(sorted(AXES.index(a) for a in axes_names))
    ns = _per_joint(control_tab, "null_stiffness_nm_per_rad", n, 0.0)
    nd = _per_joint(control_tab, "null_damping_nms_per_rad", n, 0.0)
    lam = control_tab.float("tier_damping", 1e-4, min_value=0.0, max_value=1e3)
    control_tab.done()
    return ControlSettings(
        rate_hz=rate, task_axes=axes, null_stiffness=ns, null_damping=nd, tier_damping=lam
    )


def _read_simulation(root: TableReader, rate: float, path: Path) -> tuple[SimSettings, Scoring]:
    """``[simulation]``, ``[sensing]`` and ``[scoring]`` (the settle time and margin
    minimums are in ``[simulation]``)."""
    tsim = root.table("simulation")
    tsense = root.table("sensing")
    sim = SimSettings(
        substeps=tsim.int("substeps", 1, min_value=1, max_value=100),
        velocity_noise=tsense.float("velocity_noise_rad_s", 0.0, min_value=0.0, max_value=100.0),
        seed=tsense.int("seed", 0, min_value=0),
        max_error_m=tsim.float("max_error_m", 0.2, min_value=0.0, max_value=100.0, strict_min=True),
        pinned_s=tsim.float("pinned_s", 0.2, min_value=0.0, strict_min=True),
        margin_samples=tsim.int("margin_samples", 3, min_value=1, max_value=50),
    )
    tsense.done()
    tsc = root.table("scoring")
    scoring = Scoring(
        pos_scale_mm=tsc.float("pos_scale_mm", 1.0, min_value=0.0, strict_min=True),
        rot_scale_deg=tsc.float("rot_scale_deg", 0.1, min_value=0.0, strict_min=True),
        pos_weight=tsc.float("pos_weight", 1.0, min_value=0.0),
        rot_weight=tsc.float("rot_weight", 1.0, min_value=0.0),
        aggregate=tsc.str("aggregate", "mean", choices=("mean", "worst")),
        settle_s=tsim.float("settle_s", 0.1, min_value=0.0),
        margins=_read_margin_limits(tsim, rate),
    )
    tsim.done()
    tsc.done()
    if scoring.pos_weight == 0.0 and scoring.rot_weight == 0.0:
        raise ProblemError(
            path, "scoring.pos_weight", "and rot_weight are both 0: every plan would score 0"
        )
    return sim, scoring


def _read_baseline(
    root: TableReader, n: int, control: ControlSettings, path: Path
) -> BaselineGains:
    """``[baseline]``: the untuned baselines' gains and the CLIK settings."""
    tb = root.table("baseline")
    baseline = BaselineGains(
        osc_kp_t=tb.float("osc_kp_t", 400.0, min_value=0.0),
        osc_kp_r=tb.float("osc_kp_r", 400.0, min_value=0.0),
        osc_zeta=tb.float("osc_zeta", 0.8, min_value=0.0, strict_min=True),
        joint_kp=_per_joint(tb, "joint_kp", n, 400.0),
        joint_zeta=tb.float("joint_zeta", 0.8, min_value=0.0, strict_min=True),
        clik_gain=tb.float("clik_gain", 200.0, min_value=0.0, strict_min=True),
        clik_damping=tb.float("clik_damping", 0.01, min_value=0.0),
        posture_gain=tb.float("posture_gain", 2.0, min_value=0.0),
    )
    if baseline.clik_gain * control.dt >= 2.0:
        raise ProblemError(
            path,
            "baseline.clik_gain",
            f"clik_gain × period must be < 2 for a stable CLIK step, got "
            f"{baseline.clik_gain * control.dt:g}",
        )
    tb.done()
    return baseline


def _read_trajectories(
    root: TableReader, path: Path, rate: float, settle_s: float
) -> list[TrajectorySpec]:
    """``[[trajectory]]``: at least one, unique names, bounded length, longer than the
    settle time."""
    specs = [_read_trajectory(tr, path.parent, path) for tr in root.table_list("trajectory")]
    if not specs:
        raise ProblemError(path, "trajectory", "the problem needs at least one [[trajectory]]")
    seen: set[str] = set()
    for i, s in enumerate(specs):
        if s.name in seen:
            raise ProblemError(path, f"trajectory[{i}].name", f"name '{s.name}' is used twice")
        seen.add(s.name)
        ticks = s.duration_s * rate
        if ticks > MAX_TICKS:
            raise ProblemError(
                path,
                f"trajectory[{i}].duration_s",
                f"{s.duration_s:g} s at {rate:g} Hz is {ticks:.3g} control periods; the limit "
                f"is {MAX_TICKS:.0e} per trajectory (shorten it or lower control.rate_hz)",
            )
    if all(s.duration_s <= settle_s for s in specs):
        raise ProblemError(
            path, "simulation.settle_s", f"{settle_s:g} s is as long as every "
            "trajectory: nothing would be scored (make it shorter than the trajectories)"
        )
    return specs


def _read_perturb(tpert: TableReader) -> PerturbSpread:
    """``[perturb]``: spreads of the perturbed plants."""
    perturb = PerturbSpread(
        bandwidth_rel=tpert.float("bandwidth_rel", 0.15, min_value=0.0, max_value=0.9),
        damping_rel=tpert.float("damping_rel", 0.1, min_value=0.0, max_value=0.9),
        delay_ticks=tpert.int("delay_ticks", 1, min_value=0, max_value=100),
        payload_rel=tpert.float("payload_rel", 0.3, min_value=0.0, max_value=1.0),
        payload_offset_m=tpert.float("payload_offset_m", 0.02, min_value=0.0, max_value=1.0),
        friction_rel=tpert.float("friction_rel", 0.3, min_value=0.0, max_value=1.0),
        seed=tpert.int("seed", 0, min_value=0),
        plants=tpert.int("plants", 0, min_value=0, max_value=200),
        corner=tpert.bool("corner", True),
        statistic=tpert.str("statistic", "p90", choices=("p90", "worst", "mean")),
        min_feasible_share=tpert.float(
            "min_feasible_share", 1.0, min_value=0.0, max_value=1.0
        ),
    )
    tpert.done()
    return perturb


def check_reachable(prob: Problem) -> None:
    """Raise when inverse kinematics cannot follow a trajectory within the joint limits."""
    arm = prob.arm
    for i, ref in enumerate(prob.references):
        sol = clik_cached(
            arm,
            ref,
            prob.control.task_axes,
            prob.baseline.clik_gain,
            prob.baseline.clik_damping,
            prob.baseline.posture_gain,
        )
        ax = np.array(prob.control.task_axes)
        mask_p = ax[ax < 3]
        mask_r = ax[ax >= 3]
        ep = np.linalg.norm(sol.error[:, mask_p], axis=1) if mask_p.size else np.zeros(len(ref.t))
        er = np.linalg.norm(sol.error[:, mask_r], axis=1) if mask_r.size else np.zeros(len(ref.t))
        bad = np.flatnonzero((ep > REACH_POS_M) | (er > REACH_ROT_RAD))
        key = f"trajectory[{i}]"
        if bad.size:
            k = int(bad[0])
            x, y, z = ref.p[k]
            raise ProblemError(
                prob.path,
                key,
                f"'{ref.name}' is out of reach at t={ref.t[k]:.3f} s, point ({x:.3f}, {y:.3f}, "
                f"{z:.3f}) m: inverse kinematics is {ep[k] * 1e3:.1f} mm / "
                f"{math.degrees(er[k]):.2f} deg off",
            )
        lo = sol.q < np.array(arm.lower)
        hi = sol.q > np.array(arm.upper)
        viol = np.argwhere(lo | hi)
        if viol.size:
            k, j = (int(v) for v in viol[0])
            x, y, z = ref.p[k]
            raise ProblemError(
                prob.path,
                key,
                f"'{ref.name}' needs {arm.joint_names[j]} beyond its limits at t={ref.t[k]:.3f} s, "
                f"point ({x:.3f}, {y:.3f}, {z:.3f}) m",
            )


# -- helpers -------------------------------------------------------------------
def _with_effort(arm: Arm, effort: np.ndarray) -> Arm:
    e = effort.copy()
    e.setflags(write=False)
    arm.effort = e
    return arm


def _revolute(model: Any, j: int) -> bool:
    """Joint ``j`` (0-based) of a pinocchio model turns (degrees in problem files)."""
    return bool(model.joints[j + 1].shortname().startswith("JointModelR"))


def _show(model: Any, j: int, value: float) -> str:
    return f"{math.degrees(value):.1f}" if _revolute(model, j) else f"{value:g}"


def _per_joint(t: TableReader, key: str, n: int, default: float) -> tuple[float, ...]:
    v = t.raw(key, default)
    if isinstance(v, list):
        vals = t.floats(key, min_value=0.0)
        if len(vals) != n:
            raise t.fail(key, f"needs 1 or {n} values (one per joint), got {len(vals)}")
        return tuple(vals)
    return (t.float(key, default, min_value=0.0),)


def _read_actuator(
    t: TableReader, joint: str, rate: float, path: Path
) -> tuple[JointActuator, float, str | None]:
    kind = t.str("model", choices=tuple(ACTUATOR_MODELS))
    _, keys = ACTUATOR_MODELS[kind]
    params = {k: t.float(k) for k in keys}
    for k, v in params.items():
        if not v > 0.0:
            raise t.fail(k, f"must be > 0, got {v:g}")
    try:
        model = make_model(kind, **params)
    except ModelParameterError as err:
        raise t.fail(err.name, err.reason) from err
    except ValueError as err:
        raise t.fail(keys[0], str(err)) from err
    nyq = rate / 2.0
    if model.fastest_hz() >= nyq:
        raise t.fail(
            keys[0],
            f"{model.fastest_hz():g} Hz is at or above the Nyquist frequency "
            f"{nyq:g} Hz of the {rate:g} Hz control rate",
        )
    delay_ms = t.float("delay_ms", 0.0, min_value=0.0, max_value=1000.0)
    exact = delay_ms * rate / 1000.0
    ticks = int(round(exact))
    warn = None
    if abs(exact - ticks) > 1e-9:
        warn = (
            f"{path}: actuators.{joint}.delay_ms: {delay_ms:g} ms is not a whole number of "
            f"{1000.0 / rate:g} ms periods; using {ticks} ({ticks * 1000.0 / rate:g} ms)"
        )
    other = {k for _, ks in ACTUATOR_MODELS.values() for k in ks} - set(keys)
    for k in sorted(other):
        if t.has(k):
            raise t.fail(k, f"does not apply to model '{kind}' (it takes {', '.join(keys)})")
    act = JointActuator(
        joint=joint,
        model=model,
        delay_ticks=ticks,
        effort_nm=t.float("effort_nm", math.inf, min_value=0.0, strict_min=True),
        rate_limit_nm_s=t.float("rate_limit_nm_per_s", math.inf, min_value=0.0, strict_min=True),
        coulomb_nm=t.float("coulomb_nm", 0.0, min_value=0.0),
        viscous_nms=t.float("viscous_nms_per_rad", 0.0, min_value=0.0),
    )
    arm_j = t.float("armature_kgm2", 0.0, min_value=0.0)
    return act, arm_j, warn


def _read_kind(t: TableReader, kind: str, allowed: Sequence[str], base: Path, path: Path) -> Any:
    if kind not in allowed:
        raise t.fail(
            "kind", f"'{kind}' is not one of {', '.join(allowed)}{suggestion(kind, allowed)}"
        )
    cls = TRAJECTORY_KINDS[kind]
    if hasattr(cls, "from_table"):  # a kind with parts or a file reads its own table
        return cls.from_table(
            t, lambda part, kinds: _read_kind(part, part.str("kind"), kinds, base, path), base
        )
    args: dict[str, Any] = {}
    for f in dataclasses.fields(cls):
        has_default = f.default is not dataclasses.MISSING
        if "tuple" in str(f.type):
            args[f.name] = (
                t.floats(f.name, f.default, length=3) if has_default else t.floats(f.name, length=3)
            )
        else:
            args[f.name] = t.float(f.name, f.default) if has_default else t.float(f.name)
    try:
        return cls(**args)
    except ValueError as err:
        msg = str(err)
        key = next((f.name for f in dataclasses.fields(cls) if msg.startswith(f.name)), "kind")
        raise t.fail(key, msg) from err


#: Control rates the simulator accepts [Hz], and the most control periods per trajectory.
MIN_RATE_HZ = 10.0
MAX_RATE_HZ = 100_000.0
MAX_TICKS = 2_000_000


def _read_trajectory(t: TableReader, base: Path, path: Path) -> TrajectorySpec:
    name = t.str("name")
    duration = t.float("duration_s", min_value=0.0, strict_min=True)
    if duration > 600.0:
        raise t.fail("duration_s", f"{duration:g} s is longer than the 600 s this tool simulates")
    kind_name = t.str("kind")
    kind = _read_kind(t, kind_name, tuple(TRAJECTORY_KINDS), base, path)
    t.done()
    return TrajectorySpec(name=name, kind=kind, duration_s=duration)


def _read_margin_limits(t: TableReader, rate: float) -> MarginLimits:
    if t.has("min_margin"):
        raise t.fail(
            "min_margin",
            "was replaced by min_stiffness_margin (factor), min_delay_margin_ms and "
            "min_bandwidth_margin (factor); see the README",
        )
    return MarginLimits(
        stiffness=t.float("min_stiffness_margin", 2.0, min_value=0.0, max_value=100.0),
        delay_ms=t.float(
            "min_delay_margin_ms", 1000.0 / rate, min_value=0.0, max_value=50.0
        ),
        bandwidth=t.float("min_bandwidth_margin", 1.25, min_value=0.0, max_value=20.0),
    )


def _range(
    t: TableReader, key: str, default: tuple[float, float], positive: bool
) -> tuple[float, float]:
    lo, hi = t.floats(key, default, length=2, min_value=0.0)
    if positive and lo <= 0.0:
        raise t.fail(key, f"the lower end must be > 0 (log-uniform), got {lo:g}")
    if hi < lo:
        raise t.fail(key, f"must be [low, high] with low <= high, got [{lo:g}, {hi:g}]")
    return (lo, hi)


def _laws(t: TableReader) -> tuple[str, ...]:
    from .plan import LAWS

    laws = t.strings("laws", ("summed",))
    bad = [x for x in laws if x not in LAWS]
    if bad or not laws or len(set(laws)) != len(laws):
        raise t.fail("laws", f"must list each of {', '.join(LAWS)} at most once, at least one"
                     + (f"; '{bad[0]}' is not one" if bad else ""))
    return tuple(laws)


def _read_search(t: TableReader, names: Sequence[str]) -> SearchSpace:
    never = t.strings("never_alone", ())
    for j in never:
        if j not in names:
            raise t.fail("never_alone", f"no joint named '{j}'{suggestion(j, names)}")
    t.seen.update({"tier1_kp_t_range", "tier1_kp_r_range"})
    space = SearchSpace(
        max_tiers=t.int("max_tiers", 4, min_value=1, max_value=8),
        subset_mode=t.str("subset_mode", "ranked", choices=("ranked", "nested")),
        kp_t_range=_range(t, "kp_t_range", (100.0, 20000.0), True),
        kp_r_range=_range(t, "kp_r_range", (100.0, 40000.0), True),
        zeta_range=_range(t, "zeta_range", (0.5, 1.2), True),
        tier1_kp_t_range=_range(t, "tier1_kp_t_range", (0.0, 0.0), True)
        if t.has("tier1_kp_t_range")
        else None,
        tier1_kp_r_range=_range(t, "tier1_kp_r_range", (0.0, 0.0), True)
        if t.has("tier1_kp_r_range")
        else None,
        tier_parts=t.bool("tier_parts", True),
        never_alone=tuple(never),
        joint_kp_range=_range(t, "joint_kp_range", (100.0, 20000.0), True),
        laws=_laws(t),
        trials=t.int("trials", 60, min_value=1, max_value=1_000_000),
        seed=t.int("seed", 0, min_value=0),
    )
    t.done()
    return space
