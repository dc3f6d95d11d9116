"""``tierplan validate``."""

from __future__ import annotations

import argparse
from pathlib import Path

from ..exceptions import InputError, printable
from .common import EXIT_OK, console_for, load_problem_file

__all__ = [
    "add",
    "run",
]


def add(sub: argparse._SubParsersAction) -> None:
    """The command's options."""
    va = sub.add_parser(
        "validate",
        help="replay a plan on a trajectory beside a measured run's log; calibrate the plant's "
        "deviation (payload, friction, delay, bandwidth) from it",
    )
    va.add_argument("problem", type=Path, help="problem file (TOML)")
    va.add_argument("--plan", type=Path, required=True, metavar="FILE", help="the plan that ran")
    va.add_argument(
        "--log",
        type=Path,
        required=True,
        metavar="CSV",
        help="the run in the rollout-log format (see 'score --rollouts')",
    )
    va.add_argument(
        "--trajectory",
        required=True,
        metavar="NAME",
        help="the problem's trajectory the run followed",
    )
    va.add_argument(
        "--write",
        type=Path,
        metavar="TOML",
        help="write the calibrated problem file here (comments kept)",
    )
    va.add_argument(
        "--from",
        dest="from_dir",
        type=Path,
        metavar="RUN",
        help="re-score that run's ranked plans under the calibrated plant",
    )
    va.add_argument(
        "--figure",
        type=Path,
        metavar="PNG",
        help="error spectra, measured against predicted (default results/validate/<log name>.png)",
    )


def run(args: argparse.Namespace) -> int:
    import math

    import numpy as np
    from rich.markup import escape
    from rich.table import Table

    from ..calibrate import calibrate
    from ..evaluate import make_loop, plan_controller
    from ..plan import load_plan
    from ..report import SAFETY_SHORT, fmt
    from ..rollout_log import position_error_mm, read_run_log, rotation_error_deg

    prob = load_problem_file(args.problem)
    plan = load_plan(args.plan, prob.arm.joint_names)
    names = [r.name for r in prob.references]
    if args.trajectory not in names:
        raise InputError(
            args.problem,
            "trajectory",
            f"no trajectory named "
            f"'{printable(args.trajectory)[:40]}'; the problem has {', '.join(names)}",
        )
    ref = prob.references[names.index(args.trajectory)]
    log = read_run_log(args.log, prob.arm.joint_names)
    if abs(log.dt - prob.dt) > 1e-6 * prob.dt:
        raise InputError(
            args.log,
            "time_s",
            f"samples every {log.dt * 1e3:g} ms; the problem's "
            f"control period is {prob.dt * 1e3:g} ms",
        )
    if log.t[-1] + 0.5 * prob.dt < ref.t[-1]:
        raise InputError(
            args.log,
            "rows",
            f"the log ends at {log.t[-1]:g} s, before the trajectory ({ref.t[-1]:g} s)",
        )
    out = console_for(prob)

    def replay(p):  # type: ignore[no-untyped-def]
        ro = make_loop(p, plan_controller(p, plan)).rollout(ref)
        e_p = np.linalg.norm(ro.e[:, :3], axis=1) * 1e3
        e_r = np.degrees(np.linalg.norm(ro.e[:, 3:], axis=1))
        return ro, e_p, e_r

    settle = int(round(prob.scoring.settle_s / prob.dt))
    m_p, m_r = position_error_mm(log)[settle:], rotation_error_deg(log)[settle:]
    with out.status("replaying the run on the model…"):
        _, p_p, p_r = replay(prob)
    with out.status("calibrating the plant against the log…"):
        cal = calibrate(prob, log)
    calibrated = cal.apply(prob)
    with out.status("replaying on the calibrated plant…"):
        _, c_p, c_r = replay(calibrated)

    def rms(x):  # type: ignore[no-untyped-def]
        return float(np.sqrt(np.mean(np.square(x)))) if len(x) else math.nan

    t = Table(title=f"'{escape(args.trajectory)}': measured against predicted tip error")
    for col in ("", "pos RMS mm", "pos max mm", "rot RMS deg", "rot max deg"):
        t.add_column(col, justify="left" if not col else "right")
    for label, a, b in (
        ("measured (log)", m_p, m_r),
        ("predicted, problem as given", p_p[settle:], p_r[settle:]),
        ("predicted, calibrated plant", c_p[settle:], c_r[settle:]),
    ):
        t.add_row(label, fmt(rms(a)), fmt(float(np.max(a))), fmt(rms(b)), fmt(float(np.max(b))))
    out.print(t)
    ct = Table(title="calibrated plant deviation (± 1σ from the fit)")
    for col in ("parameter", "value", "± 1σ", "problem had"):
        ct.add_column(col, justify="left" if col == "parameter" else "right")
    had = {"payload_kg": prob.arm.deviation.payload_kg}
    for i, ax in enumerate("xyz"):
        had[f"payload_{ax}_m"] = prob.arm.deviation.payload_offset_m[i]
    for a in prob.actuators:
        had[f"coulomb:{a.joint}"] = a.coulomb_nm
        had[f"viscous:{a.joint}"] = a.viscous_nms
        had[f"bandwidth_scale:{a.joint}"] = 1.0
    for k, v in cal.values.items():
        ct.add_row(escape(k), f"{v:.4g}", f"{cal.sigma[k]:.2g}", fmt(had.get(k)))
    ct.add_row(escape("extra delay [periods]"), str(cal.extra_delay_ticks), "exact", "0")
    out.print(ct)
    out.print(f"torque residual RMS {cal.residual_rms_nm:.3g} N·m (equation error per period)")
    for w in cal.warnings:
        out.print(f"[yellow]warning:[/] {escape(w)}")
    png = args.figure or Path("results") / "validate" / f"{args.log.stem}.png"
    from ..figures import save, validation_figure

    save(validation_figure(prob.dt, m_p, p_p[settle:], c_p[settle:]), png)
    out.print(f"figure: {png}")
    if args.write:
        _write_calibration(args, prob, cal)
        out.print(f"wrote {escape(str(args.write))} (the calibrated problem; comments kept)")
    if args.from_dir:
        from ..report import swap_table
        from ..runs import previous_plans, score_robust

        rows = []
        for s in previous_plans(args.from_dir, calibrated, 10):
            d = score_robust(calibrated, s.plan)
            rows.append(
                (s.plan.label, s.plan.compact(prob.arm.n), s.extra.get("previous_error_index"), d)
            )
        out.print(swap_table(rows))
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    return EXIT_OK


def _write_calibration(args, prob, cal) -> None:  # type: ignore[no-untyped-def]
    import datetime
    import math

    from ..actuator_file import write_calibrated
    from ..problem import load_problem

    plant = {
        "payload_kg": round(cal.payload_kg, 4),
        "payload_offset_m": [round(x, 4) for x in cal.payload_offset_m],
    }
    joints = {}
    ms = prob.dt * 1e3
    for j, a in enumerate(prob.actuators):
        model = a.model.scaled(cal.bandwidth_scale[j])
        vals: dict = {"model": model.kind}
        for k in model.units:  # a parameter the calibration changed: 4 significant digits
            v, was = getattr(model, k), getattr(a.model, k)
            vals[k] = v if v == was else float(f"{v:.4g}")
        vals["delay_ms"] = max(0, a.delay_ticks + cal.extra_delay_ticks) * ms
        vals["coulomb_nm"] = float(f"{cal.coulomb_nm[j]:.4g}")
        vals["viscous_nms_per_rad"] = float(f"{cal.viscous_nms[j]:.4g}")
        if not all(math.isfinite(float(x)) for x in vals.values() if isinstance(x, float)):
            continue
        joints[a.joint] = vals
    note = (
        f"calibrated from {args.log.name} on {datetime.date.today().isoformat()} by "
        "tierplan validate (simulation model; check before use)"
    )
    write_calibrated(
        prob.path,
        args.write,
        plant,
        joints,
        note,
        validate=lambda p: load_problem(p, check_reach=False),
    )
