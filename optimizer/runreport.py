"""A search run read back from its folder: candidates rebuilt, numbers reproduced, report.md.

The folder's files are read through ``rundir`` (which alone knows the layout); here
the entries become candidates again, are re-scored against the problem file named in
run.json, and the report is written. Nothing prints.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from .compare import Candidate
from .evaluate import Score, evaluate, joint_controller, joint_gains_text, plan_controller
from .exceptions import InputError
from .outputs import write_atomic
from .plan import load_plan
from .problem import Problem, load_problem
from .ranking import Entry
from .report import SAFETY_FULL, change, fmt
from .robust import RobustScore, evaluate_robust, plant_set
from .rundir import RANKING_JSON, REPORT, RUN_JSON, RunFolder, plan_path
from .simulate import Rollout

__all__ = [
    "REPRODUCED",
    "changed_since",
    "mismatches",
    "problem_paragraph",
    "ranking_markdown",
    "rebuild",
    "report_text",
    "rescore",
    "result_sentences",
    "robustness_markdown",
    "roles",
    "rollout_figures",
    "run_problem",
    "swap_markdown",
    "write_report",
]

#: Figures of a ranked entry that ``score --from`` must reproduce exactly.
REPRODUCED = (
    "error_index",
    "pos_rms_mm",
    "rot_rms_deg",
    "pos_max_mm",
    "rot_max_deg",
    "tau_rms_nm",
    "peak_torque_ratio",
    "stiffness_margin",
    "delay_margin_ms",
    "bandwidth_margin",
    "steps",
    "plants_feasible",
    "p90_error",
    "worst_error",
    "robust_error",
)


def run_problem(run: RunFolder, problem_path: Path | None = None) -> tuple[Problem, list[str]]:
    """The run's problem (with its actuator files), and warnings when it changed since."""
    rec = run.record
    if problem_path is None:
        given = rec.get("problem")
        if not given:
            raise InputError(run.file(RUN_JSON), "problem", "missing; give --problem FILE")
        cand = Path(given)
        if not cand.is_absolute() and not cand.is_file() and rec.get("cwd"):
            cand = Path(rec["cwd"]) / given
        problem_path = cand
    acts = [Path(a) for a in rec.get("actuator_files") or []]
    acts = [a if a.is_file() or not rec.get("cwd") else Path(rec["cwd"]) / a for a in acts]
    problem = load_problem(problem_path, actuator_files=acts)
    note = changed_since(run, problem)
    return problem, [note] if note else []


def changed_since(run: RunFolder, problem: Problem) -> str | None:
    """A warning when ``problem`` is not the one the run was made with, else None."""
    want = run.record.get("problem_sha256")
    if want and want != problem.digest:
        return (
            f"{problem.path} (or its URDF or actuator files) differs from the problem of "
            f"{run.path}: the numbers come from the files as they are now"
        )
    return None


def rebuild(entry: Entry, run: RunFolder, problem: Problem) -> Candidate:
    """The candidate (label, plan text, controller factory) of one ranked entry."""
    where = run.file(RANKING_JSON)
    key = f"[rank {entry.rank}]"
    label = entry.label
    if entry.kind == "joint_space":
        g = entry.joint_gains
        if not isinstance(g, dict) or "kp" not in g or "zeta" not in g:
            raise InputError(
                where,
                f"{key}.joint_gains",
                "missing: this run predates exact joint gains in ranking.json; search again",
            )
        kp, zeta = [float(x) for x in g["kp"]], float(g["zeta"])

        def make_joint(p: Problem) -> Any:
            return joint_controller(p, kp, zeta, label=label)

        return label, joint_gains_text(tuple(kp), zeta), make_joint
    f = plan_path(run.path, entry.rank or 0)
    if not f.is_file():
        raise InputError(f, "", f"missing: the plan of {key} in {where}")
    plan = load_plan(f, problem.arm.joint_names)
    kind = "osc" if entry.kind == "osc" else "plan"

    def make_plan(p: Problem) -> Any:
        return plan_controller(p, plan, kind=kind)

    return label, plan.compact(problem.arm.n), make_plan


def rescore(
    problem: Problem,
    cand: Candidate,
    keep: list[Rollout] | None = None,
    compute_margin: bool = True,
) -> RobustScore:
    """Score a rebuilt candidate on ``problem`` and its perturbed plants (as the search
    scored it, but on every plant)."""
    label, text, make = cand
    return evaluate_robust(
        problem,
        plant_set(problem, problem.perturb.plants),
        make,
        label,
        text,
        compute_margin=compute_margin,
        keep_rollouts=keep,
    )


def mismatches(entry: Entry, score: Score | RobustScore) -> list[str]:
    """Figures where a re-score differs from the ranked entry (empty: reproduced exactly)."""
    now = json.loads(json.dumps(score.to_dict()))
    out = []
    for k in REPRODUCED:
        a, b = entry.figure(k), now.get(k)
        if a != b:
            out.append(f"{k} {fmt(a, 6)} → {fmt(b, 6)}")
    return out


# -- the report ----------------------------------------------------------------------
def roles(ranking: Sequence[Entry]) -> tuple[Entry | None, Entry | None, Entry | None]:
    """(best plan, tuned OSC, tuned joint-space) entries of a ranking."""
    best = next((e for e in ranking if e.kind == "plan"), None)
    osc = next((e for e in ranking if e.kind == "osc"), None)
    joint = next((e for e in ranking if e.kind == "joint_space"), None)
    return best, osc, joint


def _name(e: Entry) -> str:
    return f"#{e.rank} {e.label}"


def rollout_figures(
    out_dir: Path,
    problem: Problem,
    series: Sequence[tuple[str, str, Sequence[Rollout]]],
    prefix: str = "fig-",
) -> list[tuple[str, str]]:
    """Error-over-time, torque-per-tier and spectrum PNGs; returns (file name, caption).

    ``series`` holds (label, role, rollouts) with role ``best``, ``osc``, ``joint`` or
    ``""``. The torque figure is drawn for the first tiered entry (role ``best`` first), the
    spectrum for it against single-tier OSC when there is one.
    """
    from . import figures as fg

    colors = fg.plan_colors([s[0] for s in series], {s[0]: s[1] for s in series})
    figs: list[tuple[str, str]] = []

    def put(fig: Any, name: str, caption: str) -> None:
        fg.save(fig, out_dir / name)
        figs.append((name, caption))

    if not series:
        return figs
    names = problem.arm.joint_names
    put(
        fg.error_figure([(s[0], s[2]) for s in series], colors),
        f"{prefix}error.png",
        "Tip position and orientation error over time, one row per trajectory.",
    )
    tiered = sorted(
        (s for s in series if s[2] and s[2][0].tier_tau.shape[1] > 0 and s[1] != "joint"),
        key=lambda s: s[1] != "best",
    )
    if tiered:
        label, _, rollouts = tiered[0]
        worst = max(rollouts, key=lambda ro: float(abs(ro.tau_cmd).max(initial=0.0)))
        limits = [a.effort_nm for a in problem.actuators]
        put(
            fg.torque_figure(worst, names, limits, f"{label}: torque per tier on '{worst.name}'"),
            f"{prefix}torque.png",
            f"Torque of each tier and the command per joint for {label} on '{worst.name}' "
            "(the trajectory with its largest torque); effort limits dashed where in range.",
        )
        pick = [(label, rollouts)] + [(s[0], s[2]) for s in series if s[1] == "osc"][:1]
        put(
            fg.spectrum_figure(
                pick,
                colors,
                names,
                [a.model.bandwidth_hz() for a in problem.actuators],
                problem.dt,
            ),
            f"{prefix}spectrum.png",
            "Spectrum of each joint's commanded torque against that actuator's −3 dB "
            "bandwidth (dashed): where the high-frequency effort went.",
        )
    return figs


def write_report(run: RunFolder, problem: Problem, notes: Sequence[str] = ()) -> list[str]:
    """Write report.md and its PNGs into the run folder; returns the file names written."""
    from . import figures as fg

    best, osc, joint = roles(run.ranking)
    series: list[tuple[str, str, Sequence[Rollout]]] = []
    for e, role in ((best, "best"), (osc, "osc"), (joint, "joint")):
        if e is None:
            continue
        keep: list[Rollout] = []
        label, text, make = rebuild(e, run, problem)
        evaluate(problem, make(problem), label, text, compute_margin=False, keep_rollouts=keep)
        series.append((_name(e), role, keep))
    figs = rollout_figures(run.path, problem, series)

    def put(fig: Any, name: str, caption: str) -> None:
        fg.save(fig, run.file(name))
        figs.append((name, caption))

    if run.trials:
        put(
            fg.history_figure(
                run.trials, {"plan": fg.BEST, "osc": fg.OSC, "joint_space": fg.JOINT}
            ),
            "fig-history.png",
            "Best feasible error index so far against trial number, per study.",
        )
    objectives = list(run.record.get("objectives") or ["error"])
    if len(objectives) > 1 and run.trials:
        put(
            fg.pareto_figure(run.trials, objectives[1], best.trial if best else None),
            "fig-pareto.png",
            f"Feasible plan trials, error index against {objectives[1]}; the Pareto front "
            "and the best-error plan (star).",
        )
    ranked = [e for e in run.ranking if e.stiffness_margin is not None]
    if ranked:
        roles_of = {_name(e): r for e, r in ((best, "best"), (osc, "osc"), (joint, "joint")) if e}
        colors = fg.plan_colors([_name(e) for e in run.ranking], roles_of)
        put(
            fg.margin_figure(
                [_name(e) for e in ranked],
                [(e.stiffness_margin, e.delay_margin_ms, e.bandwidth_margin) for e in ranked],
                colors,
                problem.scoring.margins,
            ),
            "fig-margin.png",
            "Margins of each ranked entry, from the linearised loop at the worst sampled "
            "instant: how much every stiffness may grow (damping ratios held), how much "
            "delay every joint may gain, and how much every drive may slow down before the "
            "loop oscillates. Below a dashed line a plan is rejected.",
        )
    if run.robustness:
        rob = run.robustness
        put(
            fg.robustness_figure(rob),
            "fig-robustness.png",
            "Error index of each entry on every perturbed plant of the check after the "
            "search; crosses at the right are plants on which it diverged or went unstable.",
        )
    if run.sensitivity:
        put(
            fg.tornado_figure(run.sensitivity),
            "fig-sensitivity.png",
            "Change of the best plan's error index for a one-sided step of each plant "
            "parameter (heavier payload; per joint one more period of delay, more friction, "
            "a slower drive); red: the plan fails there.",
        )
    if run.upgrade:
        put(
            fg.upgrade_figure(run.upgrade),
            "fig-upgrade.png",
            "How much lower the best robust error gets with each joint's drive made faster.",
        )
    write_atomic(run.file(REPORT), report_text(run, problem, figs, notes))
    return [REPORT] + [f for f, _ in figs]


def problem_paragraph(problem: Problem, record: dict[str, Any]) -> str:
    """The problem in a paragraph."""
    acts = problem.actuators
    bw = sorted((a.model.bandwidth_hz(), a.joint) for a in acts)
    dl = [a.delay_ticks for a in acts]
    trajs = ", ".join(f"'{r.name}' ({r.t[-1]:.3g} s)" for r in problem.references)
    axes = " ".join(("x", "y", "z", "rx", "ry", "rz")[i] for i in problem.control.task_axes)
    d = problem.arm.deviation
    c = problem.control
    return (
        f"Problem **{problem.name}** (`{record.get('problem', problem.path)}`): an arm of "
        f"{problem.arm.n} joints ({', '.join(problem.arm.joint_names)}), tip frame "
        f"`{problem.arm.tip_frame}`, controlled at {c.rate_hz:g} Hz on task axes "
        f"{axes}. Actuator torque bandwidths range from {bw[0][0]:.3g} Hz "
        f"({bw[0][1]}) to {bw[-1][0]:.3g} Hz ({bw[-1][1]}); delay "
        f"{'–'.join(str(x) for x in sorted({min(dl), max(dl)}))} control period(s). "
        f"The simulated plant differs from the controller's model by a "
        f"{d.payload_kg:g} kg payload and mass scale {d.mass_scale:g}, with velocity noise "
        f"σ {problem.sim.velocity_noise:g} rad/s. Trajectories: {trajs}; the error index is "
        f"the {problem.scoring.aggregate} over trajectories of position RMS / "
        f"{problem.scoring.pos_scale_mm:g} mm + orientation RMS / "
        f"{problem.scoring.rot_scale_deg:g}° (weighted). Search: "
        f"{record.get('trials')} plan trials and {record.get('baseline_trials')} per baseline, "
        f"seed {record.get('seed')}, {record.get('workers')} worker(s), objectives "
        f"{', '.join(record.get('objectives') or ['error'])}, {record.get('elapsed_s')} s."
    )


def ranking_markdown(ranking: Sequence[Entry]) -> str:
    """The ranked table as Markdown (the numbers of ranking.json, 3 significant digits)."""
    from .report import ranking_cells

    front = any(e.pareto is not None for e in ranking)
    cols = [
        "rank",
        "entry",
        "source",
        "tiers",
        "plants ok",
        "p90 error",
        "worst error",
        "nominal error",
        "pos RMS [mm]",
        "rot RMS [deg]",
        "stiffness margin [×]",
        "delay margin [ms]",
        "bandwidth margin [×]",
        "peak τ / limit",
        "vs tuned OSC",
        "vs tuned joint",
    ] + (["Pareto"] if front else [])
    lines = ["| " + " | ".join(cols) + " |", "|" + "---|" * len(cols)]
    for e in ranking:
        row = [
            str(e.rank),
            str(e.label).replace("|", "/"),
            str(e.source),
            str(e.tiers),
            *ranking_cells(e),
        ]
        if front:
            row.append("yes" if e.pareto else "")
        lines.append("| " + " | ".join(row) + " |")
    return "\n".join(lines)


def result_sentences(
    ranking: Sequence[Entry],
    problem: Problem,
    robustness: Sequence[dict[str, Any]] | None,
    check_seed: object = None,
) -> list[str]:
    """The result in sentences: the best plan's robust and nominal error against each tuned
    baseline, its margins, and how it fared on the plants drawn after the search."""
    from .report import margin_cells

    best, osc, joint = roles(ranking)
    if best is None:
        return ["No feasible tier plan was found."]
    plants = int(best.plants or 0)
    how = best.statistic or "p90"
    what = (
        f"a robust error ({how} of the error index over the nominal plant and {plants} "
        f"perturbed plants) of {fmt(best.robust_error)}"
        if plants
        else f"an error index of {fmt(best.error_index)}"
    )
    sent = (
        f"The best plan, {best.label} ({best.tiers} "
        f"tier{'s' if best.tiers != 1 else ''}: `{best.plan_text}`), reaches "
        f"{what} (nominal {fmt(best.error_index)}: {fmt(best.pos_rms_mm)} mm, "
        f"{fmt(best.rot_rms_deg)}° RMS)"
    )
    comp = []
    for e, who in ((osc, "tuned single-tier OSC"), (joint, "tuned joint-space CLIK + PD")):
        if e is None:
            continue
        rel = best.vs_tuned_osc if e is osc else best.vs_tuned_joint
        if rel is None:
            continue
        pct = rel * 100.0
        side = "level with" if round(pct) == 0 else "below" if pct < 0 else "above"
        comp.append(
            (f"{abs(pct):.0f} % " if round(pct) else "") + f"{side} {who} "
            f"({fmt(e.robust_error if e.robust else e.error_index)}; nominal "
            f"{fmt(e.error_index)})"
        )
    out = [sent + (": " + "; ".join(comp) if comp else "") + "."]
    from .runs import convergence_note

    for e, who in ((osc, "tuned single-tier OSC"), (joint, "tuned joint-space CLIK + PD")):
        note = convergence_note(e)
        if note:
            out.append(
                f"The {who} may not have converged: {note}; more baseline trials "
                "could narrow the gap."
            )
    st, de, bw = margin_cells(best)
    lim = problem.scoring.margins
    out.append(
        f"Its margins: every stiffness may grow {st}× (damping ratios held), every joint may "
        f"take {de} ms more delay, and every drive may be {bw}× slower before the linearised "
        f"loop oscillates (minimums {lim.stiffness:g}×, {lim.delay_ms:g} ms, "
        f"{lim.bandwidth:g}×); its peak command is {fmt(best.peak_torque_ratio)} of "
        "the effort limit."
    )
    lad = next(
        (e for e in ranking if e.source == "ladder" and e.label == "ladder: suggested plan"),
        None,
    )
    if lad is not None and lad is not best and lad.robust_error and best.robust_error:
        gain = (best.robust_error / lad.robust_error - 1.0) * 100.0
        out.append(
            f"The gain ladder's suggested plan (`{lad.plan_text}`, evaluated first) "
            f"reaches {fmt(lad.robust_error)}; the search "
            + (f"improved on it by {abs(gain):.0f} %." if gain < -0.5 else "did not improve on it.")
        )
    elif lad is not None and lad is best:
        out.append(
            "The best plan is the gain ladder's suggested plan: the search found none better."
        )
    mine = next(
        (
            r
            for r in robustness or []
            if r.get("label") == best.label and r.get("plan_text") == best.plan_text
        ),
        None,
    )
    if mine is not None and mine.get("plants"):
        seed = f" (seed {check_seed})" if check_seed is not None else ""
        out.append(
            f"On {mine.get('plants')} perturbed plants drawn after the search{seed} it stays "
            f"feasible on {mine.get('plants_feasible')} of {mine.get('plants')}, with p90 error "
            f"{fmt(mine.get('p90_error'))} and worst {fmt(mine.get('worst_error'))}."
        )
    else:
        out.append(
            "It has not been checked on plants drawn after the search: run `tierplan compare "
            "--from <this folder> --perturb 50 --seed <another seed>` and the report again."
        )
    return out


def report_text(
    run: RunFolder,
    problem: Problem,
    figs: Sequence[tuple[str, str]],
    notes: Sequence[str] = (),
) -> str:
    """The report's Markdown."""
    rec = run.record
    out = [
        f"# Tier plans for {problem.name}, study '{rec.get('study')}'",
        "",
        "> **Simulation only.** These results come from simulation of models; read the "
        "safety section at the end before any plan goes near hardware.",
        "",
    ]
    out += [f"> Note: {n}" for n in notes] + ([""] if notes else [])
    out += ["## Problem", "", problem_paragraph(problem, rec), ""]
    out += ["## Result", ""]
    for line in result_sentences(run.ranking, problem, run.robustness, run.robustness_seed):
        out += [line, ""]
    out.pop()
    out += ["", "## Ranking", "", ranking_markdown(run.ranking), ""]
    out += ["Plans (`[joints] t = kp_t, r = kp_r` [1/s²], `z` = ζ):", ""]
    out += [f"{e.rank}. {e.label}: `{e.plan_text}`" for e in run.ranking]
    out += ["", "## Figures", ""]
    for name, caption in figs:
        out += [f"![{name}]({name})", "", caption, ""]
    out += ["## Robustness", ""]
    if run.robustness:
        out.append(robustness_markdown(run.robustness))
    else:
        out.append(
            "Not run. `tierplan compare --from <this folder> --perturb 50 --seed <another "
            "seed>` scores the ranked plans on perturbed plants drawn after the search, and "
            "`tierplan report` adds them here."
        )
    out.append("")
    if run.sensitivity or run.upgrade:
        out += ["## Sensitivity and upgrades", ""]
    if run.sensitivity:
        rows = run.sensitivity.get("rows") or []
        out.append("The best plan on plants stepped one parameter at a time (largest first):")
        out.append("")
        out.append("| parameter | step | error index | change | feasible |")
        out.append("|---|---|---|---|---|")
        for r in rows[:12]:
            ch = r.get("error_change")
            out.append(
                f"| {r.get('parameter')} | {r.get('step')} | {fmt(r.get('error_index'))} | "
                + ("–" if ch is None else f"{ch * 100:+.0f} %")
                + f" | {'yes' if r.get('feasible') else 'no'} |"
            )
        out.append("")
    if run.upgrade:
        out.append(
            "Each drive made faster in turn (best robust error of the run's plans and "
            "the ladder's plans):"
        )
        out.append("")
        out.append("| joint | bandwidth now → upgraded [Hz] | error now | upgraded | improvement |")
        out.append("|---|---|---|---|---|")
        for r in run.upgrade:
            imp = r.get("improvement")
            out.append(
                f"| {r.get('joint')} | {fmt(r.get('bandwidth_hz'))} → "
                f"{fmt(r.get('upgraded_bandwidth_hz'))} | {fmt(r.get('error_now'))} | "
                f"{fmt(r.get('error_upgraded'))} | "
                + ("–" if imp is None else f"{imp * 100:.0f} %")
                + " |"
            )
        out.append("")
    swap = rec.get("swap")
    if swap:
        out += ["## After the actuator swap", "", swap_markdown(swap), ""]
    out += ["## Safety", "", SAFETY_FULL, ""]
    out += [
        "## Reproduce",
        "",
        f"`tierplan score --from {run.path}` re-simulates every ranked entry and checks the "
        "numbers above. Versions: "
        + ", ".join(f"{k} {v}" for k, v in (rec.get("versions") or {}).items())
        + f". Problem SHA-256 `{rec.get('problem_sha256')}`; URDF SHA-256 "
        f"`{rec.get('urdf_sha256')}`.",
        "",
    ]
    return "\n".join(out)


def robustness_markdown(rob: Sequence[dict[str, Any]]) -> str:
    """The compare --perturb figures as Markdown."""
    n = max((int(r.get("plants") or 0) for r in rob), default=0)
    lines = [
        f"On the nominal plant and {n} perturbed plants (the same plants for every entry; a "
        "plant where an entry diverged or went unstable counts as a failure):",
        "",
        "| entry | plants ok | p90 error | worst error | mean error | nominal error |",
        "|---|---|---|---|---|---|",
    ]
    for r in rob:
        lines.append(
            f"| {r.get('label')} | {r.get('plants_feasible')}/{r.get('plants')} | "
            f"{fmt(r.get('p90_error'))} | {fmt(r.get('worst_error'))} | "
            f"{fmt(r.get('mean_error'))} | {fmt(r.get('error_index'))} |"
        )
    return "\n".join(lines)


def swap_markdown(swap: dict[str, Any]) -> str:
    """What changed after a swap (run.json's ``swap`` section)."""
    lines = [
        f"Actuator files {', '.join(swap.get('actuator_files') or [])} applied to the run in "
        f"`{swap.get('from')}`.",
        "",
    ]
    if swap.get("best_now") is not None:
        before, now = swap.get("best_before"), swap["best_now"]
        lines.append(
            f"Best plan before: `{swap.get('best_plan_before')}` (error index {fmt(before)}); "
            f"now: `{swap.get('best_plan_now')}` (error index {fmt(now)}"
            + (f", {change(now, before)}" if before else "")
            + ")."
        )
        lines.append("")
        lines.append(
            "Joints that moved between tiers: " + ("; ".join(swap.get("moved") or []) or "none")
        )
    prev = swap.get("previous_plans") or []
    if prev:
        lines += [
            "",
            "| earlier plan | error before | error now | feasible now |",
            "|---|---|---|---|",
        ]
        for p in prev:
            now = p.get("now") or {}
            lines.append(
                f"| {p.get('label')} | {fmt(p.get('error_index_before'))} | "
                f"{fmt(now.get('error_index'))} | {'yes' if now.get('feasible') else 'no'} |"
            )
    return "\n".join(lines)
