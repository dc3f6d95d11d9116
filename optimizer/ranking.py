"""The ranking entry: one scored candidate of a run, typed, from search to report.

A search trial's score (``RobustScore.to_dict``), where it came from (trial, source,
label, plan), and what the run adds (rank, comparison with the tuned baselines, their
convergence) travel as one :class:`Entry`. ``ranking.json`` holds ``Entry.to_dict()`` per
entry (without the plan text: the plan files hold it); :meth:`Entry.from_dict` reads it
back, a run written before a field existed included. Non-finite figures are None, as in
the JSON. No optuna, no printing.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields, replace
from typing import Any

__all__ = ["ROBUST_FIELDS", "SCORE_FIELDS", "Entry", "EntryError", "rank", "relative"]

#: Figures of a score on the nominal plant, in the order of ``Score.to_dict``.
SCORE_FIELDS = (
    "label",
    "kind",
    "tiers",
    "plan_text",
    "feasible",
    "reason",
    "pos_rms_mm",
    "rot_rms_deg",
    "pos_max_mm",
    "rot_max_deg",
    "tau_rms_nm",
    "peak_torque_ratio",
    "path_at_mm",
    "stiffness_margin",
    "delay_margin_ms",
    "bandwidth_margin",
    "slowest_mode_s",
    "delay_cap_ms",
    "error_index",
    "steps",
    "law",
    "bounded_ticks",
    "qp_failures",
    "trajectories",
)
#: Figures over the perturbed plants (``RobustScore.summary``); present together or not.
ROBUST_FIELDS = (
    "plants",
    "plants_feasible",
    "feasible_share",
    "p90_error",
    "worst_error",
    "mean_error",
    "statistic",
    "robust_error",
    "draws",
)
#: Fields written only when set (a run's additions and a trial's origin).
_OPTIONAL = (
    "pareto",
    "trial",
    "source",
    "plan_toml",
    "joint_gains",
    "late_gain",
    "converged",
    "vs_tuned_osc",
    "vs_tuned_joint",
)


class EntryError(ValueError):
    """A ranking entry field of the wrong type: ``key`` names it."""

    def __init__(self, key: str, reason: str) -> None:
        super().__init__(f"{key}: {reason}")
        self.key = key
        self.reason = reason


@dataclass
class Entry:
    """One ranked (or rankable) candidate: its score and where it came from."""

    label: str = ""
    """Name shown in tables."""
    kind: str = "plan"
    """``plan``, ``osc`` or ``joint_space``."""
    tiers: int = 0
    """Tier count."""
    plan_text: str = ""
    """The plan in one line (or the baseline's gains)."""
    feasible: bool = False
    """Stable with margin on the nominal plant and the required share of the others."""
    reason: str | None = None
    """Why not feasible, or None."""
    pos_rms_mm: float | None = None
    """Mean over trajectories of the RMS position error [mm]."""
    rot_rms_deg: float | None = None
    """Mean over trajectories of the RMS orientation error [deg]."""
    pos_max_mm: float | None = None
    """Largest position error [mm]."""
    rot_max_deg: float | None = None
    """Largest orientation error [deg]."""
    tau_rms_nm: float | None = None
    """Mean RMS commanded torque [N·m]."""
    peak_torque_ratio: float | None = None
    """Largest |command| / limit [-]."""
    path_at_mm: float | None = None
    """Largest path accuracy AT_p [mm] (None: not computed or nothing moves)."""
    stiffness_margin: float | None = None
    """Smallest stiffness margin over the set [-]."""
    delay_margin_ms: float | None = None
    """Smallest delay margin [ms]."""
    bandwidth_margin: float | None = None
    """Smallest bandwidth margin [-]."""
    slowest_mode_s: float | None = None
    """Time constant of the slowest mode [s]."""
    delay_cap_ms: float | None = None
    """Largest extra delay the delay-margin search looked at [ms]."""
    error_index: float | None = None
    """Error index on the nominal plant [-]."""
    steps: int = 0
    """Ticks simulated on the nominal plant."""
    law: str = "summed"
    """``summed`` or ``bounded``."""
    bounded_ticks: int = 0
    """Ticks where the bounded law's QP was solved."""
    qp_failures: int = 0
    """Ticks where that QP failed."""
    trajectories: list[dict[str, Any]] = field(default_factory=list)
    """Per-trajectory figures (``Score.to_dict``'s rows)."""
    plants: int | None = None
    """Perturbed plants in the set (None: scored on the nominal plant only)."""
    plants_feasible: int | None = None
    """Perturbed plants on which it stayed feasible."""
    feasible_share: float | None = None
    """Their share [-]."""
    p90_error: float | None = None
    """90th percentile of the error index over all plants [-]."""
    worst_error: float | None = None
    """Largest error index over all plants [-]."""
    mean_error: float | None = None
    """Mean error index over all plants [-]."""
    statistic: str | None = None
    """Which of them is the robust error (``p90``, ``worst``, ``mean``)."""
    robust_error: float | None = None
    """The error the ranking sorts by [-]."""
    draws: list[dict[str, Any]] = field(default_factory=list)
    """Figures per perturbed plant."""
    rank: int | None = None
    """Place in the ranking (1 = best), None before ranking."""
    pareto: bool | None = None
    """On the feasible Pareto front (two-objective studies only)."""
    trial: int | None = None
    """Trial number in its study (None: scored outside a study)."""
    source: str | None = None
    """``search``, ``tuned``, ``hand``, ``previous``, ``ladder``, ``tuned-osc``..."""
    plan_toml: str | None = None
    """The plan as a TOML document (plans and OSC; kept out of ranking.json)."""
    joint_gains: dict[str, Any] | None = None
    """Exact joint-space gains ``{"kp": [...], "zeta": z}``."""
    late_gain: float | None = None
    """Tuned baselines: how much the last quarter of trials improved the best [-]."""
    converged: bool | None = None
    """Tuned baselines: late gain within the convergence threshold."""
    vs_tuned_osc: float | None = None
    """Ranking value against the tuned OSC's (−0.3: 30 % lower)."""
    vs_tuned_joint: float | None = None
    """Ranking value against the tuned joint-space baseline's."""
    extra: dict[str, Any] = field(default_factory=dict)
    """Other keys (``previous_rank``...), kept as they came."""

    # -- what the ranking sorts by --------------------------------------------------
    @property
    def robust(self) -> bool:
        """Scored on perturbed plants too."""
        return self.plants is not None

    @property
    def value(self) -> float:
        """The ranking value: the robust error (the nominal error index for an entry
        scored without perturbed plants); inf when not finite."""
        v = self.robust_error if self.robust else self.error_index
        return math.inf if v is None else float(v)

    def figure(self, key: str) -> Any:
        """A field by its JSON name (tables and CSV columns name their fields)."""
        if key in _NAMES:
            return getattr(self, key)
        return self.extra.get(key)

    def ranked(self, rank: int) -> Entry:
        """A copy at place ``rank``."""
        return replace(self, rank=rank)

    # -- JSON ------------------------------------------------------------------------
    def to_dict(self, plan: bool = True) -> dict[str, Any]:
        """The entry as ranking.json holds it (``plan=False``: without ``plan_toml``)."""
        d: dict[str, Any] = {}
        if self.rank is not None:
            d["rank"] = self.rank
        for k in SCORE_FIELDS:
            d[k] = getattr(self, k)
        if self.robust:
            for k in ROBUST_FIELDS:
                d[k] = getattr(self, k)
        for k in _OPTIONAL:
            v = getattr(self, k)
            if v is not None or self._always(k):
                d[k] = v
        if not plan:
            d.pop("plan_toml", None)
        d.update(self.extra)
        return d

    def _always(self, key: str) -> bool:
        """Optional fields written even when None: a run entry's trial, a ranked
        entry's comparisons, a tuned baseline's late gain."""
        if key == "trial":
            return self.source is not None
        if key in ("vs_tuned_osc", "vs_tuned_joint"):
            return self.rank is not None
        return key == "late_gain" and self.converged is not None

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Entry:
        """An entry from a score dict or a ranking.json row; EntryError names a field
        of the wrong type."""
        kw: dict[str, Any] = {}
        for f in fields(cls):
            if f.name == "extra" or f.name not in d:
                continue
            kw[f.name] = _typed(f.name, d[f.name])
        extra = {k: v for k, v in d.items() if k not in _NAMES}
        return cls(**kw, extra=extra)


_NAMES = frozenset(f.name for f in fields(Entry)) - {"extra"}

_TYPES: dict[str, tuple[type, ...]] = {
    "label": (str,),
    "kind": (str,),
    "plan_text": (str,),
    "law": (str,),
    "reason": (str, type(None)),
    "statistic": (str, type(None)),
    "source": (str, type(None)),
    "plan_toml": (str, type(None)),
    "feasible": (bool,),
    "pareto": (bool, type(None)),
    "converged": (bool, type(None)),
    "trajectories": (list,),
    "draws": (list,),
    "joint_gains": (dict, type(None)),
}
_INTS = frozenset(
    {"tiers", "steps", "bounded_ticks", "qp_failures", "plants", "plants_feasible", "rank", "trial"}
)


def _typed(key: str, v: Any) -> Any:
    if key in _TYPES:
        if not isinstance(v, _TYPES[key]):
            raise EntryError(key, f"must be {' or '.join(t.__name__ for t in _TYPES[key])}")
        return v
    if v is None:
        return None
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise EntryError(key, "must be a number or null")
    if key in _INTS:
        if not float(v).is_integer():
            raise EntryError(key, "must be a whole number")
        return int(v)
    return v


# -- ranking ---------------------------------------------------------------------------
def relative(e: Entry, ref: Entry | None) -> float | None:
    """Change of ``e``'s ranking value against ``ref``'s (−0.3: 30 % lower), or None."""
    if ref is None:
        return None
    a, b = e.value, ref.value
    if not (math.isfinite(a) and math.isfinite(b)) or b <= 0:
        return None
    return a / b - 1.0


#: Sources of plans that are always kept in a ranking (evaluated first in a study).
KEPT_SOURCES = ("hand", "previous")
#: The ladder's suggested plan keeps its place too (the report measures the search by it).
SUGGESTED_LABEL = "ladder: suggested plan"


def rank(plan_entries: Sequence[Entry], baselines: Sequence[Entry], top: int) -> list[Entry]:
    """Top ``top`` plans, every hand or previous plan, the Pareto front, the ladder's
    suggested plan and the baselines, by ranking value, each with its rank."""
    keep = list(plan_entries[:top]) + [
        e
        for e in plan_entries[top:]
        if e.source in KEPT_SOURCES or e.pareto or e.label == SUGGESTED_LABEL
    ]
    ordered = sorted([*keep, *baselines], key=lambda e: e.value)
    return [e.ranked(i + 1) for i, e in enumerate(ordered)]
