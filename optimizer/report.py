"""Terminal tables (rich) and results files. Everything a user sees is built here."""

from __future__ import annotations

import json
import math
import os
import sys
import tempfile
from collections.abc import Sequence
from pathlib import Path

from rich.console import Console
from rich.markup import escape
from rich.table import Table

from .evaluate import Score
from .problem import Problem

SAFETY_SHORT = (
    "Simulation only. Unmodelled friction, elasticity, noise and delay can destabilise gains "
    "that pass here. First hardware trials at reduced speed, gains and torque limits, with a "
    "tested emergency stop in reach and nobody in the workspace; follow the applicable "
    "robot-safety standards (ISO 10218-1/-2), local codes and licensed practice."
)

#: The cautions in full (README and every report), after REFERENCES.md §8.
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


def plant_line(problem: Problem) -> str:
    """One line on how the plant differs from the model."""
    d = problem.arm.deviation
    parts = [f"payload {d.payload_kg:g} kg", f"mass scale {d.mass_scale:g}"]
    if d.link_mass_scale:
        parts.append("link scales " + ", ".join(f"{k} {v:g}" for k, v in d.link_mass_scale.items()))
    parts.append(f"velocity noise σ {problem.sim.velocity_noise:g} rad/s (seed {problem.sim.seed})")
    return "plant vs model: " + "; ".join(parts)


def score_table(scores: Sequence[Score], reference: Score | None = None) -> Table:
    """Rows per plan: aggregate figures, then one row per trajectory."""
    t = Table(title="closed-loop scores (aggregate = mean over trajectories)")
    cols = (
        "plan",
        "trajectory",
        "pos RMS mm",
        "pos max mm",
        "rot RMS deg",
        "rot max deg",
        "τ RMS N·m",
        "peak τ/lim",
        "margin",
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
        change = "–"
        if (
            reference is not None
            and reference is not s
            and math.isfinite(reference.error_index)
            and reference.error_index > 0
            and math.isfinite(s.error_index)
        ):
            change = f"{(s.error_index / reference.error_index - 1.0) * 100:+.0f} %"
        feas = "[green]yes[/]" if s.feasible else f"[red]no[/]: {escape(s.reason or '')}"
        t.add_row(
            f"[bold]{escape(s.label)}[/] ({s.tiers} tier{'s' if s.tiers > 1 else ''})",
            "[bold]all[/]",
            fmt(s.pos_rms_mm),
            fmt(s.pos_max_mm),
            fmt(s.rot_rms_deg),
            fmt(s.rot_max_deg),
            fmt(s.tau_rms_nm),
            fmt(s.peak_torque_ratio),
            fmt(s.margin, 2),
            fmt(s.error_index),
            change,
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
                fmt(tr.margin, 2),
                fmt(tr.error_index),
                "",
                "" if not tr.diverged else f"[red]{escape(tr.reason or '')}[/]",
                end_section=i == len(s.trajectories) - 1,
            )
    return t


def write_atomic(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` via a temporary file and rename: never half a file."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def scores_json(scores: Sequence[Score]) -> str:
    """The scores as a JSON list (see ``Score.to_dict``)."""
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


def ranking_table(ranked: Sequence[dict], osc: dict | None, joint: dict | None) -> Table:
    """The ranked search result: plans, hand plans and tuned baselines together."""
    t = Table(title="ranking (feasible candidates; lower error index is better)")
    front = any("pareto" in e for e in ranked)
    cols = (
        "rank",
        "entry",
        "tiers",
        "pos RMS mm",
        "rot RMS deg",
        "margin",
        "τ RMS N·m",
        "peak τ/lim",
        "error idx",
        "vs tuned OSC",
        "vs tuned joint",
    ) + (("Pareto",) if front else ())
    for c in cols:
        t.add_column(c, justify="left" if c == "entry" else "right")
    ro = osc["error_index"] if osc else None
    rj = joint["error_index"] if joint else None
    for e in ranked:
        style = "bold" if e["kind"] != "plan" or e.get("source") == "hand" else ""
        t.add_row(
            str(e["rank"]),
            escape(f"{e['label']} [{e.get('source', '')}]"),
            str(e["tiers"]),
            fmt(e["pos_rms_mm"]),
            fmt(e["rot_rms_deg"]),
            fmt(e["margin"], 2),
            fmt(e["tau_rms_nm"]),
            fmt(e["peak_torque_ratio"]),
            fmt(e["error_index"]),
            change(e["error_index"], ro),
            change(e["error_index"], rj),
            *(("yes" if e.get("pareto") else "",) if front else ()),
            style=style,
        )
    return t


def swap_table(rows: Sequence[tuple[str, str, float | None, dict]]) -> Table:
    """A previous run's plans re-scored after a swap: (label, plan text, old error, new score)."""
    t = Table(title="previous plans under the new actuators")
    for c in ("entry", "error idx before", "error idx now", "change", "margin now", "feasible now"):
        t.add_column(c, justify="left" if c == "entry" else "right")
    for label, _text, before, d in rows:
        now = d.get("error_index") if d.get("feasible") else None
        t.add_row(
            escape(label),
            fmt(before),
            fmt(now),
            change(now, before),
            fmt(d.get("margin"), 2),
            "yes" if d.get("feasible") else escape(f"no: {d.get('reason') or '?'}"),
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


def csv_text(rows: Sequence[dict], columns: Sequence[str]) -> str:
    """Rows as CSV text with the given columns (missing values empty)."""
    import csv
    import io

    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(columns)
    for r in rows:
        w.writerow(["" if r.get(c) is None else r.get(c) for c in columns])
    return buf.getvalue()


def robustness_table(results: Sequence, n: int) -> Table:
    """Nominal figures and, with perturbed plants, mean / p90 / worst error and feasible share."""
    t = Table(
        title="side by side" + (f" on the nominal plant and {n} perturbed plants" if n else "")
    )
    cols = ["entry", "tiers", "pos RMS mm", "rot RMS deg", "margin", "error idx", "feasible"]
    if n:
        cols += ["mean err", "p90 err", "worst err", "feasible share"]
    for c in cols:
        t.add_column(c, justify="left" if c == "entry" else "right")
    for r in results:
        s = r.nominal
        row = [
            escape(s.label),
            str(s.tiers),
            fmt(s.pos_rms_mm),
            fmt(s.rot_rms_deg),
            fmt(s.margin, 2),
            fmt(s.error_index),
            "[green]yes[/]" if s.feasible else f"[red]no[/]: {escape(s.reason or '')}",
        ]
        if n:
            row += [
                fmt(r.mean_error),
                fmt(r.p90_error),
                fmt(r.worst_error),
                f"{r.feasible_fraction:.0%}",
            ]
        t.add_row(*row)
    return t
