"""Terminal tables (rich) and results files. Everything a user sees is built here."""

from __future__ import annotations

import json
import math
import sys
from collections.abc import Sequence
from typing import Protocol

from rich.console import Console
from rich.markup import escape
from rich.table import Table

from .evaluate import Score
from .problem import Problem
from .ranking import Entry
from .robust import RobustScore

__all__ = [
    "MARGIN_COLS",
    "MARGIN_LEGEND",
    "SAFETY_FULL",
    "SAFETY_SHORT",
    "HasMargins",
    "change",
    "check_table",
    "console",
    "fmt",
    "ladder_table",
    "margin_cells",
    "margin_text",
    "margin_texts",
    "percent",
    "plan_legend",
    "plant_line",
    "ranking_cells",
    "ranking_table",
    "reasons",
    "robust_table",
    "robustness_table",
    "score_table",
    "scores_json",
    "sensitivity_table",
    "swap_table",
    "tier_moves",
    "upgrade_table",
]

SAFETY_SHORT = (
    "Simulation only. Unmodelled friction, elasticity, noise and delay can destabilise gains "
    "that pass here. First hardware trials at reduced speed, gains and torque limits, with a "
    "tested emergency stop in reach and nobody in the workspace; follow the applicable "
    "robot-safety standards (ISO 10218-1/-2), local codes and licensed practice."
)

#: The cautions in full (README and every report), after tests/REFERENCES.md §7.
SAFETY_FULL = """\
Results come from simulation of models. Unmodelled friction, elasticity, backlash, sensor
noise and delay can destabilise gains that pass here, and the tool certifies nothing:

- First hardware trials at reduced speed (manual reduced speed is commonly 250 mm/s at the
  tool), reduced gains, and torque and velocity limits switched on.
- An emergency stop (ISO 13850) tested before the trial and within reach; nobody in the
  workspace.
- Follow the applicable robot-safety standards — ISO 10218-1:2025 and ISO 10218-2:2025
  (which take in the collaborative-operation content of ISO/TS 15066), risk assessment per
  ISO 12100, stop categories per IEC 60204-1 — local codes and licensed practice. A plan
  from this tool does not replace a risk assessment by qualified people."""


def fmt(x: float | None, digits: int = 3) -> str:
    """Number for a table: a dash for None or nan, 'inf' kept."""
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "–"
    if isinstance(x, float) and math.isinf(x):
        return "inf"
    return f"{x:.{digits}g}" if abs(x) < 1e4 else f"{x:.3e}"


def check_table(problem: Problem) -> list[Table]:
    """Summary of a problem: joints with their drives, then the trajectory set."""
    arm = problem.arm
    tj = Table(
        title=f"{problem.name}: {arm.n} joints, tip '{arm.tip_frame}', "
        f"control {problem.control.rate_hz:g} Hz"
    )
    any_rate = any(math.isfinite(a.rate_limit_nm_s) for a in problem.actuators)
    cols = ["joint", "effort N·m", "actuator", "BW Hz", "delay ms", "friction C N·m / v N·m·s/rad"]
    cols += ["rate N·m/s"] if any_rate else []
    cols += ["home"]
    for col in cols:
        tj.add_column(col, justify="left" if col in ("joint", "actuator") else "right")
    for j, a in enumerate(problem.actuators):
        is_rev = arm.model.joints[j + 1].shortname().startswith("JointModelR")
        home = f"{math.degrees(arm.home[j]):.1f}°" if is_rev else f"{arm.home[j]:.3f} m"
        row = [
            arm.joint_names[j],
            fmt(a.effort_nm),
            a.model.describe(),
            fmt(a.model.bandwidth_hz()),
            fmt(a.delay_ticks * problem.dt * 1e3),
            f"{fmt(a.coulomb_nm)} / {fmt(a.viscous_nms)}",
        ]
        if any_rate:
            row.append("none" if math.isinf(a.rate_limit_nm_s) else fmt(a.rate_limit_nm_s))
        tj.add_row(*row, home)
    tt = Table(title="trajectories")
    for col in ("name", "kind", "duration s", "peak speed m/s", "peak rate deg/s"):
        tt.add_column(col, justify="left" if col in ("name", "kind") else "right")
    for spec, ref in zip(problem.trajectories, problem.references):
        tt.add_row(
            spec.name,
            spec.kind.kind,
            fmt(spec.duration_s),
            fmt(ref.peak_speed),
            fmt(math.degrees(ref.peak_rate)),
        )
    return [tj, tt]


def ladder_table(problem: Problem, rungs: Sequence) -> Table:
    """The gain ladder: one row per rung (``ladder.Rung``)."""
    lim = problem.scoring.margins
    t = Table(
        title=f"gain ladder: highest stiffness per joint subset, home pose, margins "
        f"{lim.stiffness:g}× / {lim.delay_ms:g} ms / {lim.bandwidth:g}× held"
    )
    for c in ("joints", "slowest", "BW Hz", "acts on", "highest kp 1/s²", "over the tier below"):
        t.add_column(c, justify="left" if c in ("joints", "slowest", "acts on") else "right")
    names = problem.arm.joint_names
    n = problem.arm.n
    for r in rungs:
        joints = "all" if len(r.joints) == n else ", ".join(names[j] for j in r.joints)
        t.add_row(
            escape(joints),
            escape(r.slowest),
            fmt(r.slowest_hz),
            r.part,
            f"{r.limit:.0f}" if r.limit > 0 else "none holds",
            "–" if math.isinf(r.gain_step) else f"{r.gain_step:.2g}×",
        )
    return t


def plant_line(problem: Problem) -> str:
    """One line on how the plant differs from the model."""
    d = problem.arm.deviation
    parts = [f"payload {d.payload_kg:g} kg", f"mass scale {d.mass_scale:g}"]
    if d.link_mass_scale:
        parts.append("link scales " + ", ".join(f"{k} {v:g}" for k, v in d.link_mass_scale.items()))
    parts.append(f"velocity noise σ {problem.sim.velocity_noise:g} rad/s (seed {problem.sim.seed})")
    return "plant vs model: " + "; ".join(parts)


def margin_text(x: float | None, cap: float, digits: int = 2) -> str:
    """A margin for a table: ``≥cap`` when the search stopped at its cap, a dash for none."""
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "–"
    if x >= cap * (1.0 - 1e-9):
        return f"≥{cap:g}"
    return f"{x:.{digits}g}" if x < 100 else f"{x:.0f}"


class HasMargins(Protocol):
    """What ``margin_cells`` reads: a Score, an Entry, a sensitivity row..."""

    @property
    def stiffness_margin(self) -> float | None: ...
    @property
    def delay_margin_ms(self) -> float | None: ...
    @property
    def bandwidth_margin(self) -> float | None: ...


def margin_cells(d: HasMargins) -> list[str]:
    """Stiffness ×, delay ms, bandwidth × of a Score, an Entry or a sensitivity row (a
    delay cap when it has one)."""
    return margin_texts(
        d.stiffness_margin, d.delay_margin_ms, d.bandwidth_margin,
        getattr(d, "delay_cap_ms", None),
    )


def margin_texts(
    st: float | None, de: float | None, bw: float | None, cap_ms: float | None = None
) -> list[str]:
    """Stiffness ×, delay ms (up to the delay cap), bandwidth × as table cells."""
    from .stability import BANDWIDTH_CAP, STIFFNESS_CAP

    return [
        margin_text(st, STIFFNESS_CAP),
        margin_text(de, cap_ms if cap_ms else math.inf),
        margin_text(bw, BANDWIDTH_CAP),
    ]


#: Column headings of the three margins, and the legend line that explains them.
MARGIN_COLS = ("stiff ×", "delay ms", "BW ×")
MARGIN_LEGEND = (
    "margins (linearised loop, worst sampled instant): stiff × = factor every stiffness may "
    "grow (ζ held), delay ms = extra delay every joint tolerates, BW × = factor every drive "
    "may slow down, before the loop oscillates"
)


def score_table(scores: Sequence[Score], reference: Score | None = None) -> Table:
    """Rows per plan: aggregate figures on the nominal plant, then one row per trajectory."""
    t = Table(title="closed-loop scores on the nominal plant (aggregate = mean over trajectories)")
    cols = (
        "plan",
        "trajectory",
        "pos RMS mm",
        "pos max mm",
        "rot RMS deg",
        "rot max deg",
        "τ RMS N·m",
        "peak τ/lim",
        *MARGIN_COLS,
        "error idx",
        "vs OSC",
        "feasible",
    )
    for c in cols:
        t.add_column(
            c,
            justify="left" if c in ("plan", "trajectory", "feasible") else "right",
            overflow="fold",
        )
    for s in scores:
        feas = "[green]yes[/]" if s.feasible else "[red]no[/] (below)"
        t.add_row(
            f"[bold]{escape(s.label)}[/] ({s.tiers} tier{'s' if s.tiers > 1 else ''})",
            "[bold]all[/]",
            fmt(s.pos_rms_mm),
            fmt(s.pos_max_mm),
            fmt(s.rot_rms_deg),
            fmt(s.rot_max_deg),
            fmt(s.tau_rms_nm),
            fmt(s.peak_torque_ratio),
            *margin_cells(s),
            fmt(s.error_index),
            change(s.error_index, reference.error_index)
            if reference is not None and reference is not s
            else "–",
            feas,
        )
        for i, tr in enumerate(s.trajectories):
            m = tr.metrics
            t.add_row(
                "",
                tr.name,
                fmt(m.pos_rms_mm),
                fmt(m.pos_max_mm),
                fmt(m.rot_rms_deg),
                fmt(m.rot_max_deg),
                fmt(m.tau_rms_nm),
                fmt(m.peak_torque_ratio),
                *margin_texts(
                    tr.margins.stiffness, tr.margins.delay_ms, tr.margins.bandwidth, s.delay_cap_ms
                ),
                fmt(tr.error_index),
                "",
                "" if not tr.diverged else "[red]failed[/]",
                end_section=i == len(s.trajectories) - 1,
            )
    return t


def robust_table(
    results: Sequence[RobustScore], reference: RobustScore | None = None, title: str = ""
) -> Table:
    """Per candidate: feasible share of the perturbed plants first, then p90, worst and
    mean error over all plants, the robust error and its change against ``reference``."""
    n = max((r.plants for r in results), default=0)
    t = Table(title=title or f"robustness: the nominal plant and {n} perturbed plants")
    cols = (
        "entry",
        "plants ok",
        "p90 err",
        "worst err",
        "mean err",
        "nominal err",
        "robust err",
        "vs OSC",
        "feasible",
    )
    for c in cols:
        t.add_column(c, justify="left" if c in ("entry", "feasible") else "right")
    for r in results:
        sm = r.summary()
        t.add_row(
            escape(r.nominal.label),
            f"{r.plants_feasible}/{r.plants}",
            fmt(sm["p90_error"]),  # type: ignore[arg-type]
            fmt(sm["worst_error"]),  # type: ignore[arg-type]
            fmt(sm["mean_error"]),  # type: ignore[arg-type]
            fmt(r.nominal.error_index),
            f"{fmt(r.robust_error)} ({r.how})",
            change(r.robust_error, reference.robust_error)
            if reference is not None and reference is not r
            else "–",
            "[green]yes[/]" if r.feasible else "[red]no[/] (below)",
        )
    return t


def reasons(items: Sequence[Score | RobustScore]) -> list[str]:
    """One line per infeasible entry saying why (printed under a table)."""
    out = []
    for x in items:
        label = x.nominal.label if isinstance(x, RobustScore) else x.label
        if not x.feasible:
            out.append(f"[red]not feasible[/]: {escape(label)}: {escape(x.reason or '?')}")
    return out


def scores_json(scores: Sequence[Score | RobustScore]) -> str:
    """The scores as a JSON list (see ``Score.to_dict`` and ``RobustScore.to_dict``)."""
    return json.dumps([s.to_dict() for s in scores], indent=2, allow_nan=False) + "\n"


def console(stderr: bool = False) -> Console:
    """A console; output that is not a terminal gets 160 columns so tables do not wrap."""
    stream = sys.stderr if stderr else sys.stdout
    width = None if stream.isatty() else 160
    return Console(stderr=stderr, highlight=False, width=width)


def plan_legend(scores: Sequence[Score]) -> list[str]:
    """One line per scored entry: its label and the plan (or gains) in compact form."""
    return [f"  {escape(s.label)}: {escape(s.plan_text)}" for s in scores]


def change(value: float | None, ref: float | None) -> str:
    """Relative change of an error index against a reference, as text."""
    if value is None or ref is None or not ref > 0 or not math.isfinite(ref):
        return "–"
    return f"{(value / ref - 1.0) * 100:+.0f} %"


def ranking_table(ranked: Sequence[Entry]) -> Table:
    """The ranked search result: plans, hand plans and tuned baselines together."""
    t = Table(title="ranking (feasible candidates; lower robust error is better)")
    front = any(e.pareto is not None for e in ranked)
    cols = (
        "rank",
        "entry",
        "tiers",
        "plants ok",
        "p90 err",
        "worst err",
        "nominal err",
        "pos RMS mm",
        "rot RMS deg",
        *MARGIN_COLS,
        "peak τ/lim",
        "vs tuned OSC",
        "vs tuned joint",
    ) + (("Pareto",) if front else ())
    for c in cols:
        t.add_column(c, justify="left" if c == "entry" else "right")
    for e in ranked:
        style = "bold" if e.kind != "plan" or e.source == "hand" else ""
        t.add_row(
            str(e.rank),
            escape(f"{e.label} [{e.source or ''}]"),
            str(e.tiers),
            *ranking_cells(e),
            *(("yes" if e.pareto else "",) if front else ()),
            style=style,
        )
    return t


def ranking_cells(e: Entry) -> list[str]:
    """An entry's figures as the ranking shows them (screen and report.md alike): plants
    ok, p90, worst and nominal error, RMS errors, the margins, peak torque, and the change
    against each tuned baseline."""
    plants = e.plants or 0
    return [
        f"{e.plants_feasible or 0}/{plants}" if plants else "–",
        fmt(e.p90_error),
        fmt(e.worst_error),
        fmt(e.error_index),
        fmt(e.pos_rms_mm),
        fmt(e.rot_rms_deg),
        *margin_cells(e),
        fmt(e.peak_torque_ratio),
        percent(e.vs_tuned_osc),
        percent(e.vs_tuned_joint),
    ]


def percent(x: float | None) -> str:
    """A relative change (−0.3) as text (−30 %), a dash for None."""
    return "–" if x is None or not math.isfinite(x) else f"{x * 100:+.0f} %"


def swap_table(rows: Sequence[tuple[str, str, float | None, Entry]]) -> Table:
    """A previous run's plans re-scored after a swap: (label, plan text, old error, new score)."""
    t = Table(title="previous plans under the new actuators")
    from .stability import STIFFNESS_CAP

    for c in (
        "entry",
        "error idx before",
        "error idx now",
        "change",
        "stiff × now",
        "feasible now",
    ):
        t.add_column(c, justify="left" if c == "entry" else "right")
    for label, _text, before, d in rows:
        now = d.error_index if d.feasible else None
        t.add_row(
            escape(label),
            fmt(before),
            fmt(now),
            change(now, before),
            margin_text(d.stiffness_margin, STIFFNESS_CAP),
            "yes" if d.feasible else escape(f"no: {d.reason or '?'}"),
        )
    return t


def tier_moves(before: dict[str, int], after: dict[str, int]) -> list[str]:
    """Lines naming the joints whose tier count changed between two plans."""
    lines = []
    for j in after:
        a, b = before.get(j, 0), after[j]
        if a != b:
            lines.append(f"{j}: in {a} tier{'s' if a != 1 else ''} before, {b} now")
    return lines


def robustness_table(results: Sequence[RobustScore], n: int) -> Table:
    """``compare``: nominal figures and margins, then the robust figures when ``n`` > 0;
    'feasible' is on the nominal plant and the required share of the perturbed ones."""
    t = Table(
        title="side by side" + (f" on the nominal plant and {n} perturbed plants" if n else "")
    )
    cols = ["entry", "tiers", "pos RMS mm", "rot RMS deg", *MARGIN_COLS, "nominal err", "feasible"]
    if n:
        cols[2:2] = ["plants ok", "p90 err", "worst err", "mean err"]
    for c in cols:
        t.add_column(c, justify="left" if c == "entry" else "right")
    for r in results:
        s = r.nominal
        row = [escape(s.label), str(s.tiers)]
        if n:
            sm = r.summary()
            row += [
                f"{r.plants_feasible}/{r.plants}",
                fmt(sm["p90_error"]),  # type: ignore[arg-type]
                fmt(sm["worst_error"]),  # type: ignore[arg-type]
                fmt(sm["mean_error"]),  # type: ignore[arg-type]
            ]
        row += [
            fmt(s.pos_rms_mm),
            fmt(s.rot_rms_deg),
            *margin_cells(s),
            fmt(s.error_index),
            # on the plants too, as the line under the table says (it said "yes" beside
            # a candidate the line called not feasible on 49 of 50 plants)
            "[green]yes[/]" if r.feasible else "[red]no[/] (below)",
        ]
        t.add_row(*row)
    return t


def sensitivity_table(base: Score, rows: Sequence, label: str) -> Table:
    """One row per stepped plant parameter (``advice.Sensitivity``), largest change first."""
    t = Table(
        title=f"sensitivity of '{escape(label)}' (nominal error index {fmt(base.error_index)})"
    )
    for c in ("parameter", "step", "error idx", "change", *MARGIN_COLS, "feasible"):
        t.add_column(c, justify="left" if c in ("parameter", "step") else "right")
    for r in rows:
        t.add_row(
            escape(r.parameter),
            escape(r.step),
            fmt(r.error_index),
            percent(r.error_change),
            *margin_cells(r),
            "yes" if r.feasible else "[red]no[/]",
        )
    return t


def upgrade_table(rows: Sequence, factor: float) -> Table:
    """One row per joint (``advice.Upgrade``), best improvement first."""
    t = Table(title=f"each drive {factor:g}× faster in turn: best robust error of the candidates")
    for c in (
        "joint",
        "BW Hz now",
        "BW Hz upgraded",
        "error now",
        "error upgraded",
        "improvement",
        "tiers now → upgraded",
    ):
        t.add_column(c, justify="left" if c == "joint" else "right")
    for r in rows:
        t.add_row(
            escape(r.joint),
            fmt(r.bandwidth_hz),
            fmt(r.upgraded_bandwidth_hz),
            fmt(r.error_now),
            fmt(r.error_upgraded),
            "–" if not math.isfinite(r.improvement) else f"{r.improvement:.0%}",
            f"{r.tiers_now} → {r.tiers_upgraded}",
        )
    return t
