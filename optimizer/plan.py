"""Tier plans: which joints each tier uses and its task-space gains.

A plan file (TOML)::

    label = "three tiers"
    nested = true                 # optional: each tier's joints inside the previous tier's
    [[tier]]
    joints = "all"                # or a list of URDF joint names
    kp_t = 1500.0                 # translational stiffness [1/s²]
    kp_r = 1500.0                 # rotational stiffness [1/s²]
    zeta = 0.8                    # damping ratio [-]; Kd = 2 ζ √Kp
    [[tier]]
    joints = ["wrist_pitch", "wrist_yaw", "wrist_roll"]
    kp_t = 0.0                    # 0: this tier leaves position alone
    kp_r = 6000.0
    zeta = 0.7
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .exceptions import PlanError
from .tomlio import TableReader, load_toml, suggestion

__all__ = [
    "LAWS",
    "Plan",
    "Tier",
    "load_plan",
    "parse_plan",
    "single_tier",
]


@dataclass(frozen=True)
class Tier:
    """One tier of a plan."""

    joints: tuple[int, ...]
    """Indices of the joints the tier may use (sorted, 0-based)."""
    kp_t: float
    """Translational stiffness [1/s²]; 0 leaves position to the other tiers."""
    kp_r: float
    """Rotational stiffness [1/s²]; 0 leaves orientation to the other tiers."""
    zeta: float
    """Damping ratio [-]: Kd = 2 ζ √Kp per part."""
    damping: float | None = None
    """Regularisation λ of this tier's solve; None takes the problem's."""

    def __post_init__(self) -> None:
        if not self.joints:
            raise ValueError("a tier needs at least one joint")
        if len(set(self.joints)) != len(self.joints):
            raise ValueError(f"a joint appears twice in one tier: {list(self.joints)}")
        object.__setattr__(self, "joints", tuple(sorted(int(j) for j in self.joints)))
        for name in ("kp_t", "kp_r"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v >= 0.0):
                raise ValueError(f"{name} must be finite and >= 0, got {v}")
        if not (math.isfinite(self.zeta) and self.zeta > 0.0):
            raise ValueError(f"zeta must be finite and > 0, got {self.zeta}")
        if self.damping is not None and not (math.isfinite(self.damping) and self.damping >= 0.0):
            raise ValueError(f"damping must be finite and >= 0, got {self.damping}")

    @property
    def kd_t(self) -> float:
        """Translational damping 2ζ√kp_t [1/s]."""
        return 2.0 * self.zeta * math.sqrt(self.kp_t)

    @property
    def kd_r(self) -> float:
        """Rotational damping 2ζ√kp_r [1/s]."""
        return 2.0 * self.zeta * math.sqrt(self.kp_r)


#: Control laws a plan may use.
LAWS = ("summed", "bounded")


@dataclass(frozen=True)
class Plan:
    """A tier plan: tier 1 first. Single-tier OSC is one tier over every joint."""

    tiers: tuple[Tier, ...]
    """Tiers in order; torques of all tiers are summed."""
    label: str = "plan"
    """Name shown in tables."""
    nested: bool = False
    """When true, each tier's joints must lie inside the previous tier's."""
    joint_names: tuple[str, ...] = field(default=(), compare=False)
    """URDF joint names, for printing (may be empty)."""
    law: str = "summed"
    """``summed``: the tiers' torques are summed, then clipped; ``bounded``: a small QP keeps
    the sum within the effort and rate limits, earlier tiers first (``control/bounded.py``)."""

    def __post_init__(self) -> None:
        if not self.tiers:
            raise ValueError("a plan needs at least one tier")
        if self.law not in LAWS:
            raise ValueError(f"law '{self.law}' is not one of {', '.join(LAWS)}")
        for k, tier in enumerate(self.tiers[1:], start=2):
            if tier.kp_t == 0.0 and tier.kp_r == 0.0:
                raise ValueError(f"tier {k} has kp_t = kp_r = 0 and would do nothing")
        if self.nested:
            for k in range(1, len(self.tiers)):
                extra = set(self.tiers[k].joints) - set(self.tiers[k - 1].joints)
                if extra:
                    names = [self._name(j) for j in sorted(extra)]
                    raise ValueError(
                        f"plan is declared nested but tier {k + 1} uses {', '.join(names)} "
                        f"which tier {k} does not"
                    )

    def is_single_tier(self, n: int) -> bool:
        """One tier over all ``n`` joints: single-tier OSC."""
        return len(self.tiers) == 1 and self.tiers[0].joints == tuple(range(n))

    def _name(self, j: int) -> str:
        return self.joint_names[j] if j < len(self.joint_names) else f"j{j + 1}"

    def joints_text(self, tier: Tier, n: int | None = None) -> str:
        """The tier's joints as text: ``all`` or the names joined by commas."""
        n = n if n is not None else len(self.joint_names)
        if n and tier.joints == tuple(range(n)):
            return "all"
        return ",".join(self._name(j) for j in tier.joints)

    def compact(self, n: int | None = None) -> str:
        """One-line form, e.g. ``[all] t1500 r1500 z0.8 | [wrist_pitch,wrist_roll] r6000 z0.7``."""
        parts = []
        for tier in self.tiers:
            gains = []
            if tier.kp_t > 0:
                gains.append(f"t{tier.kp_t:.4g}")
            if tier.kp_r > 0:
                gains.append(f"r{tier.kp_r:.4g}")
            gains.append(f"z{tier.zeta:.3g}")
            parts.append(f"[{self.joints_text(tier, n)}] {' '.join(gains)}")
        return " | ".join(parts) + (" (bounded)" if self.law == "bounded" else "")

    def to_toml(self) -> str:
        """Plan file text that ``load_plan`` reads back to an equal plan."""
        lines = [f"label = {_quote(self.label)}", f"nested = {'true' if self.nested else 'false'}"]
        if self.law != "summed":
            lines.append(f"law = {_quote(self.law)}")
        for tier in self.tiers:
            lines += ["", "[[tier]]"]
            if self.joint_names and tier.joints == tuple(range(len(self.joint_names))):
                lines.append('joints = "all"')
            else:
                lines.append(
                    "joints = [" + ", ".join(_quote(self._name(j)) for j in tier.joints) + "]"
                )
            lines += [
                f"kp_t = {tier.kp_t!r}",
                f"kp_r = {tier.kp_r!r}",
                f"zeta = {tier.zeta!r}",
            ]
            if tier.damping is not None:
                lines.append(f"damping = {tier.damping!r}")
        return "\n".join(lines) + "\n"


def _quote(s: str) -> str:
    return '"' + s.replace("\\", "\\\\").replace('"', '\\"') + '"'


def single_tier(
    n: int,
    kp_t: float,
    kp_r: float,
    zeta: float,
    joint_names: Sequence[str] = (),
    label: str = "single-tier OSC",
) -> Plan:
    """Single-tier OSC: one tier over all ``n`` joints."""
    return Plan(
        tiers=(Tier(tuple(range(n)), kp_t, kp_r, zeta),),
        label=label,
        joint_names=tuple(joint_names),
    )


def parse_plan(data: dict[str, Any], joint_names: Sequence[str], path: object) -> Plan:
    """Build a plan from parsed TOML; errors name ``path`` and the key."""
    r = TableReader(data, path, "", PlanError)
    label = r.str("label", Path(str(path)).stem if path else "plan")
    if any(ord(c) < 32 or ord(c) == 127 or 0x80 <= ord(c) < 0xA0 for c in label):
        raise r.fail("label", "contains control characters (a newline or an escape sequence)")
    if len(label) > 200:
        raise r.fail("label", f"is {len(label)} characters long; at most 200")
    nested = r.bool("nested", False)
    law = r.str("law", "summed", choices=LAWS)
    tier_tables = r.table_list("tier")
    r.done()
    if not tier_tables:
        raise PlanError(path, "tier", "a plan needs at least one [[tier]] table")
    tiers = []
    n = len(joint_names)
    for k, tr in enumerate(tier_tables):
        spec = tr.raw("joints")
        key = f"{tr.prefix}joints"
        if spec == "all":
            joints: tuple[int, ...] = tuple(range(n))
        elif isinstance(spec, list) and spec and all(isinstance(s, str) for s in spec):
            unknown = [s for s in spec if s not in joint_names]
            if unknown:
                raise PlanError(
                    path,
                    key,
                    f"unknown joint '{unknown[0]}'{suggestion(unknown[0], joint_names)}; "
                    f"joints: {', '.join(joint_names)}",
                )
            dup = sorted({s for s in spec if spec.count(s) > 1})
            if dup:
                raise PlanError(path, key, f"joint '{dup[0]}' appears twice in tier {k + 1}")
            joints = tuple(joint_names.index(s) for s in spec)
        else:
            raise PlanError(path, key, 'must be "all" or a non-empty list of joint names')
        kp_t = tr.float("kp_t", min_value=0.0)
        kp_r = tr.float("kp_r", min_value=0.0)
        zeta = tr.float("zeta", 0.8, min_value=0.0, strict_min=True)
        damping = tr.float("damping", None, min_value=0.0)
        tr.done()
        try:
            tiers.append(Tier(joints, kp_t, kp_r, zeta, damping))
        except ValueError as err:
            raise PlanError(path, f"tier[{k}]", str(err)) from err
    try:
        return Plan(
            tuple(tiers), label=label, nested=nested, joint_names=tuple(joint_names), law=law
        )
    except ValueError as err:
        raise PlanError(path, "tier", str(err)) from err


def load_plan(path: Path, joint_names: Sequence[str]) -> Plan:
    """Read and validate a plan file."""
    return parse_plan(load_toml(path, PlanError, kind="plan"), joint_names, path)
