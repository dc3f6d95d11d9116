"""Command line: ``check``, ``score``, ``search``, ``compare``, ``swap``, ``fit``, ``report``,
``sensitivity``, ``upgrade``, ``export``.

Parsing and printing only."""

from __future__ import annotations

import argparse
import contextlib
import functools
import logging
import sys
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

from . import __version__
from .exceptions import InputError, TierplanError, printable

if TYPE_CHECKING:
    pass

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_INPUT = 2
EXIT_INTERRUPTED = 130


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="tierplan",
        description="Choose tiered task-space controller plans for arms whose actuators differ "
        "in torque bandwidth, by closed-loop simulation. Simulation only: see the README's "
        "safety section before any plan goes near hardware.",
    )
    p.add_argument("--version", action="version", version=f"tierplan {__version__}")
    p.add_argument("--debug", action="store_true", help="show tracebacks and debug logging")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    c = sub.add_parser("check", help="validate a problem file and print its summary")
    c.add_argument("problem", type=Path, help="problem file (TOML)")

    s = sub.add_parser("score", help="simulate plans (and baselines) on a problem's trajectories")
    s.add_argument(
        "problem",
        type=Path,
        nargs="?",
        help="problem file (TOML); with --from, default: the run's own",
    )
    s.add_argument(
        "--from",
        dest="from_dir",
        type=Path,
        metavar="RUN",
        help="re-score every ranked entry of a search's results folder and check that the "
        "numbers of its ranking.json are reproduced exactly",
    )
    s.add_argument(
        "--figures",
        type=Path,
        metavar="DIR",
        help="draw error-over-time, torque-per-tier and torque-spectrum PNGs into DIR",
    )
    s.add_argument(
        "--plan",
        type=Path,
        action="append",
        default=[],
        metavar="FILE",
        help="plan file (TOML); repeat for several",
    )
    s.add_argument(
        "--baselines",
        action="store_true",
        help="also score single-tier OSC and joint-space CLIK + PD at the gains of "
        "the problem's [baseline] table",
    )
    s.add_argument("--json", type=Path, metavar="FILE", help="write the scores as JSON")
    s.add_argument(
        "--rollouts",
        type=Path,
        metavar="DIR",
        help="write each rollout on the nominal plant as CSV into DIR (time, joints, commands, "
        "delivered torques, tip and reference pose; the format 'validate' reads)",
    )
    s.add_argument(
        "--no-margin",
        action="store_true",
        help="skip the stability margins (faster; they show as –)",
    )
    s.add_argument(
        "--plants",
        type=int,
        metavar="N",
        help="also run the first N perturbed plants of the search's set (default: "
        "[perturb] plants of the problem; 0 for the nominal plant only)",
    )
    r = sub.add_parser(
        "search",
        help="search tier plans with optuna; tune both baselines on the same budget; rank all",
    )
    r.add_argument("problem", type=Path, help="problem file (TOML)")
    _search_options(r, "main")
    r.add_argument(
        "--plan",
        type=Path,
        action="append",
        default=[],
        metavar="FILE",
        help="hand plan to rank beside the optimized ones; repeatable",
    )
    w = sub.add_parser(
        "swap",
        help="apply new actuator settings, re-score a previous run's plans, search again "
        "from them, show what changed",
    )
    w.add_argument("problem", type=Path, help="problem file (TOML)")
    w.add_argument(
        "--actuators",
        type=Path,
        action="append",
        required=True,
        metavar="FILE",
        help="actuator file: [actuators.<joint>] tables with the keys of the problem file; "
        "repeatable, applied in order",
    )
    w.add_argument(
        "--from",
        dest="from_dir",
        type=Path,
        required=True,
        metavar="RUN",
        help="results folder of the earlier search (results/<problem>/<study>)",
    )
    _search_options(r=w, study_default=None)
    c2 = sub.add_parser(
        "compare",
        help="score plans side by side on the same trajectories and seeds, optionally on "
        "perturbed plants",
    )
    c2.add_argument("problem", type=Path, help="problem file (TOML)")
    c2.add_argument("plans", type=Path, nargs="*", metavar="PLAN", help="plan files (TOML)")
    c2.add_argument(
        "--from",
        dest="from_dir",
        type=Path,
        metavar="RUN",
        help="also compare a search's best plan, its hand plans and both tuned baselines "
        "(exact gains), and write robustness.json into that folder for its report",
    )
    c2.add_argument(
        "--figures",
        type=Path,
        metavar="DIR",
        help="draw the robustness and margin PNGs into DIR",
    )
    _refresh_option(c2)
    c2.add_argument(
        "--perturb",
        type=int,
        default=0,
        metavar="N",
        help="also run N perturbed plants (spreads in the problem's [perturb] table)",
    )
    c2.add_argument(
        "--seed",
        type=int,
        help="seed of the perturbed plants (default: [perturb] seed, the search's own set; "
        "give another to check plans on plants the search never saw)",
    )
    c2.add_argument(
        "--baselines",
        action="store_true",
        help="include both baselines at the gains of the problem's [baseline] table",
    )
    c2.add_argument("--json", type=Path, metavar="FILE", help="write the results as JSON")
    rp = sub.add_parser(
        "report",
        help="write report.md with figures for a search's results folder",
    )
    rp.add_argument(
        "run", type=Path, metavar="RUN", help="results folder (results/<problem>/<study>)"
    )
    rp.add_argument(
        "--problem",
        type=Path,
        metavar="FILE",
        help="problem file (default: the one named in the run's run.json)",
    )
    _refresh_option(rp)
    sv = sub.add_parser(
        "sensitivity",
        help="how a run's best plan reacts to a step of each plant parameter (tornado)",
    )
    sv.add_argument("run", type=Path, metavar="RUN", help="results folder of a search")
    sv.add_argument("--problem", type=Path, metavar="FILE", help="problem (default: the run's)")
    sv.add_argument("--json", type=Path, metavar="FILE", help="also write the table as JSON")
    up = sub.add_parser(
        "upgrade",
        help="which joint's drive is worth making faster: each upgraded in turn, best plan "
        "re-scored on the robust objective",
    )
    up.add_argument("problem", type=Path, help="problem file (TOML)")
    up.add_argument(
        "--from",
        dest="from_dir",
        type=Path,
        required=True,
        metavar="RUN",
        help="results folder of a search: its ranked plans are the candidates",
    )
    up.add_argument(
        "--factor",
        type=float,
        default=2.0,
        help="how much faster the upgraded drive is (default 2: twice the bandwidth)",
    )
    up.add_argument(
        "--top", type=int, default=5, help="ranked plans of the run used as candidates (default 5)"
    )
    up.add_argument("--json", type=Path, metavar="FILE", help="also write the table as JSON")
    ex = sub.add_parser(
        "export",
        help="write a plan's law as a header-only C++ file (Eigen 3) with a check program",
    )
    ex.add_argument("problem", type=Path, help="problem file (TOML)")
    ex.add_argument("--plan", type=Path, required=True, metavar="FILE", help="plan file (TOML)")
    ex.add_argument("--out", type=Path, required=True, metavar="DIR", help="folder to write")
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
    f = sub.add_parser(
        "fit",
        help="fit an actuator model (lag + delay) to a bench log: frequency response or "
        "commanded/measured torque over time",
    )
    f.add_argument(
        "log",
        type=Path,
        help="CSV with header 'frequency_hz,magnitude_db,phase_deg' or "
        "'time_s,commanded_nm,measured_nm'",
    )
    f.add_argument("--joint", help="URDF joint the log belongs to (needed by --write)")
    f.add_argument(
        "--model",
        default="auto",
        choices=["auto", "first_order", "second_order"],
        help="model kind; 'auto' (default) fits both and picks by BIC",
    )
    f.add_argument(
        "--phase-at",
        type=float,
        default=10.0,
        metavar="HZ",
        help="report the phase lag at this frequency (default 10 Hz)",
    )
    f.add_argument("--json", type=Path, metavar="FILE", help="write the fit as JSON ('-': stdout)")
    f.add_argument(
        "--plot",
        type=Path,
        metavar="FILE",
        help="PNG of data against fit (default results/fits/<log name>.png)",
    )
    f.add_argument("--no-plot", action="store_true", help="draw no PNG")
    f.add_argument(
        "--write",
        type=Path,
        metavar="TOML",
        help="set [actuators.<joint>] model, parameters and delay_ms in this actuator or "
        "problem file (created if absent); every other setting in it is kept",
    )
    return p


def _refresh_option(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--storage",
        metavar="URL_OR_FILE",
        help="first re-read the run's studies from this storage (any optuna URL, e.g. the "
        "PostgreSQL database several hosts searched on) and rewrite the run's ranking files",
    )
    p.add_argument("--study", help="with --storage: the plan study (default: the run's)")


def _refresh(run_dir: Path, prob, storage: str, study: str | None) -> None:  # type: ignore[no-untyped-def]
    """Rewrite a run folder's ranking from the studies in ``storage`` (no trial is run)."""
    from . import search as srch
    from .rundir import read_run
    from .runs import RunSettings, run_studies, write_run

    old = read_run(run_dir).record
    settings = RunSettings(
        storage=storage,
        study=study or str(old.get("study") or run_dir.name),
        trials=0,
        baseline_trials=0,
        seed=int(old.get("seed") or 0),
        objectives=tuple(old.get("objectives") or ("error",)),
        add=True,
        informed=False,
    )
    result = run_studies(prob, settings)
    record = {
        **old,
        "study": settings.study,
        "finished_trials": {k: srch.finished(st) for k, st in result.studies.items()},
        "refreshed_from": srch._redact(storage),
    }
    write_run(run_dir, prob, result, record)


def _search_options(r: argparse.ArgumentParser, study_default: str | None) -> None:
    """Options shared by ``search`` and ``swap``."""
    r.add_argument(
        "--trials",
        type=int,
        help="plan trials the study is brought up to (default: [search] trials); the same "
        "command again resumes",
    )
    r.add_argument(
        "--worker-trials",
        type=int,
        metavar="N",
        help="instead of --trials: run exactly N plan trials in this process, on top of what "
        "the study holds (several hosts on one database: the study gets the sum); "
        "0 runs none and writes the ranking of what the studies hold",
    )
    r.add_argument(
        "--baseline-trials",
        type=int,
        help="trials for each baseline study (default: the same as --trials)",
    )
    r.add_argument("--workers", type=int, default=1, help="worker processes (default 1)")
    r.add_argument("--seed", type=int, help="sampler seed (default: [search] seed)")
    r.add_argument(
        "--study",
        default=study_default,
        help="study name; the same name resumes a stopped search (default: "
        + (study_default or "<earlier study>.swap-<file>-<hash>")
        + ")",
    )
    r.add_argument(
        "--storage",
        metavar="URL_OR_FILE",
        help="optuna storage URL (sqlite:///..., postgresql://...) or a journal file; "
        "default results/<problem>/studies.journal",
    )
    r.add_argument(
        "--objectives",
        default="error",
        help="'error' (default), or two objectives with a Pareto front: 'error,margin' "
        "(maximise the stiffness margin) or 'error,effort' (minimise RMS torque); "
        "two objectives turn pruning off",
    )
    r.add_argument("--top", type=int, default=10, help="plans shown and written (default 10)")
    r.add_argument("--no-prune", action="store_true", help="run every trajectory of every trial")
    r.add_argument("--out", type=Path, help="results folder (default results/<problem>/<study>)")
    r.add_argument(
        "--figures",
        action="store_true",
        help="write report.md and its figures into the results folder when done",
    )


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    args = _parser().parse_args(argv)
    logging.basicConfig(
        level=logging.DEBUG if args.debug else logging.WARNING, format="%(levelname)s: %(message)s"
    )
    if not args.debug:
        warnings.filterwarnings("ignore")
    if args.command is None:
        _parser().print_help()
        return EXIT_INPUT
    try:
        if args.command == "check":
            return _check(args)
        if args.command == "score":
            return _score(args)
        if args.command == "search":
            return _search(args)
        if args.command == "compare":
            return _compare(args)
        if args.command == "swap":
            return _swap(args)
        if args.command == "fit":
            return _fit(args)
        if args.command == "report":
            return _report(args)
        if args.command == "sensitivity":
            return _sensitivity(args)
        if args.command == "upgrade":
            return _upgrade(args)
        if args.command == "export":
            return _export(args)
        if args.command == "validate":
            return _validate(args)
    except InputError as err:
        if args.debug:
            raise
        print(f"tierplan: error: {printable(str(err))}", file=sys.stderr)
        return EXIT_INPUT
    except TierplanError as err:
        if args.debug:
            raise
        print(f"tierplan: error: {printable(str(err))}", file=sys.stderr)
        return EXIT_FAILED
    except OSError as err:  # a results folder or file that cannot be written
        if args.debug:
            raise
        where = f"{err.filename}: " if getattr(err, "filename", None) else ""
        print(
            f"tierplan: error: {printable(where)}could not write: {err.strerror or err} "
            "(nothing already written was changed)",
            file=sys.stderr,
        )
        return EXIT_FAILED
    except KeyboardInterrupt:
        print("tierplan: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    return EXIT_INPUT


def _console_for(prob):  # type: ignore[no-untyped-def]
    """The output console, after the problem's warnings."""
    from rich.markup import escape

    from .report import console

    out = console()
    for w in prob.warnings:  # escaped: a warning may name a table, "[actuators.x]"
        out.print(f"[yellow]warning:[/] {escape(w)}")
    return out


def _load(path: Path):  # type: ignore[no-untyped-def]
    from .problem import load_problem

    return load_problem(path)


def _check(args: argparse.Namespace) -> int:
    from rich.markup import escape

    from .ladder import FRACTION, MIN_GAIN_STEP, gain_ladder, suggested_plan
    from .report import check_table, ladder_table, plant_line

    prob = _load(args.problem)
    out = _console_for(prob)
    for t in check_table(prob):
        out.print(t)
    out.print(plant_line(prob))
    with out.status("climbing the gain ladder…"):
        rungs = gain_ladder(prob)
    out.print(ladder_table(prob, rungs))
    plan = suggested_plan(prob, rungs)
    if plan is None:
        out.print(
            "[red]no stiffness holds the minimum margins even with every joint[/]: "
            "check the actuators, delays and [simulation] min_* margins"
        )
    else:
        out.print(
            f"suggested plan (one tier per rung that adds at least {MIN_GAIN_STEP:g}× "
            f"stiffness, at {FRACTION:.0%} of its limit; search evaluates it first): "
            + escape(plan.compact(prob.arm.n))
        )
    out.print(
        f"[green]ok[/]: {args.problem} is valid; every trajectory is reachable within the "
        "joint limits."
    )
    return EXIT_OK


def _score(args: argparse.Namespace) -> int:
    from rich.markup import escape

    from .evaluate import joint_gains_text, osc_plan
    from .plan import load_plan
    from .report import MARGIN_LEGEND, plan_legend, reasons, robust_table, score_table
    from .robust import evaluate_robust, plant_set

    if args.from_dir is not None:
        return _score_from(args)
    if args.problem is None:
        print("tierplan: error: score needs a problem file (or --from RUN)", file=sys.stderr)
        return EXIT_INPUT
    prob = _load(args.problem)
    plans = [load_plan(p, prob.arm.joint_names) for p in args.plan]
    if not plans and not args.baselines:
        print(
            "tierplan: error: score needs at least one --plan FILE or --baselines", file=sys.stderr
        )
        return EXIT_INPUT
    n_plants = prob.perturb.plants if args.plants is None else args.plants
    if n_plants < 0:
        print(f"tierplan: error: --plants must be >= 0, got {n_plants}", file=sys.stderr)
        return EXIT_INPUT
    out = _console_for(prob)
    n = prob.arm.n
    jobs: list[tuple[str, str, Callable]] = [
        (
            pl.label,
            pl.compact(n),
            functools.partial(_tiered_for, pl, kind="osc" if pl.is_single_tier(n) else "plan"),
        )
        for pl in plans
    ]
    if args.baselines:
        b = prob.baseline
        op = osc_plan(prob, b.osc_kp_t, b.osc_kp_r, b.osc_zeta, label="baseline: single-tier OSC")
        jobs.append((op.label, op.compact(n), functools.partial(_tiered_for, op, kind="osc")))
        jobs.append(
            (
                "baseline: joint-space CLIK + PD",
                joint_gains_text(b.joint_kp, b.joint_zeta),
                functools.partial(_joint_for, b.joint_kp, b.joint_zeta),
            )
        )
    plants = plant_set(prob, n_plants)
    results = []
    kept: list[list] = []
    with out.status("simulating…") as status:
        for i, (label, text, make) in enumerate(jobs, start=1):
            status.update(
                f"simulating {label} ({i}/{len(jobs)}) on {len(prob.references)} trajectories"
                + (f" and {n_plants} perturbed plants…" if n_plants else "…")
            )
            kept.append([])
            results.append(
                evaluate_robust(
                    prob,
                    plants,
                    make,
                    label,
                    text,
                    compute_margin=not args.no_margin,
                    keep_rollouts=kept[-1] if (args.figures or args.rollouts) else None,
                )
            )
    scores = [r.nominal for r in results]
    ref_i = next((i for i, s in enumerate(scores) if s.kind == "osc"), 0)
    out.print(score_table(scores, reference=scores[ref_i]))
    if n_plants:
        out.print(robust_table(results, reference=results[ref_i]))
    for line in reasons(results):
        out.print(line)
    out.print(escape("plans ([joints] t = kp_t, r = kp_r [1/s²], z = ζ):"))
    for line in plan_legend(scores):
        out.print(line)
    lim = prob.scoring.margins
    out.print(
        f"'vs OSC' compares with '{escape(scores[ref_i].label)}'. {MARGIN_LEGEND}; feasible "
        f"needs at least {lim.stiffness:g}×, {lim.delay_ms:g} ms and {lim.bandwidth:g}×."
    )
    if n_plants:
        out.print(_plants_line(prob, n_plants))
    _score_outputs(args, out, prob, results, kept)
    return EXIT_OK


def _plants_line(prob, n: int, seed: int | None = None) -> str:  # type: ignore[no-untyped-def]
    """One line on how the perturbed plants were drawn."""
    sp = prob.perturb
    own = seed is None or seed == sp.seed
    corner = (
        "the first is the worst corner of the spreads, the others are "
        if (sp.corner and own and n > 0)
        else ""
    )
    return (
        f"perturbed plants: {n}; {corner}drawn with seed {sp.seed if seed is None else seed} "
        f"(bandwidth ±{sp.bandwidth_rel:.0%}, 2nd-order damping ±{sp.damping_rel:.0%}, delay "
        f"±{sp.delay_ticks} ticks, payload mass ±{sp.payload_rel:.0%} and position "
        f"±{sp.payload_offset_m * 1000:g} mm, friction ±{sp.friction_rel:.0%}, own noise seed "
        f"each); the same plants for every entry. 'plants ok' counts the perturbed plants where "
        f"the entry neither diverged nor went unstable; p90, worst and mean run over those and "
        f"the nominal plant, failures counting as inf."
    )


def _score_outputs(args, out, prob, results, kept) -> None:  # type: ignore[no-untyped-def]
    """The caution line, then --json and --figures of ``score``."""
    from .outputs import write_atomic
    from .report import SAFETY_SHORT, scores_json

    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    if args.json:
        write_atomic(args.json, scores_json(results))
        out.print(f"wrote {args.json}")
    if args.figures:
        _score_figures(out, args.figures, prob, [r.nominal for r in results], kept)
    if getattr(args, "rollouts", None):
        from .rollout_log import rollout_csv, safe_name

        refs = {r.name: r for r in prob.references}
        names = []
        for res, rollouts in zip(results, kept):
            for ro in rollouts:
                f = args.rollouts / f"{safe_name(res.nominal.label)}-{safe_name(ro.name)}.csv"
                write_atomic(f, rollout_csv(ro, refs[ro.name], prob.arm.joint_names))
                names.append(f.name)
        out.print(f"rollouts: {args.rollouts}/ ({len(names)} CSV files)")


def _score_figures(out, folder: Path, prob, scores, kept) -> None:  # type: ignore[no-untyped-def]
    from .runreport import rollout_figures

    role = {"osc": "osc", "joint_space": "joint"}
    first_plan = next((s.label for s in scores if s.kind == "plan"), None)
    series = [
        (s.label, "best" if s.label == first_plan else role.get(s.kind, ""), ro)
        for s, ro in zip(scores, kept)
    ]
    figs = rollout_figures(folder, prob, series)
    out.print(f"figures: {', '.join(str(folder / f) for f, _ in figs)}")


def _score_from(args: argparse.Namespace) -> int:
    from rich.markup import escape

    from .report import reasons, robust_table, score_table
    from .rundir import read_run
    from .runreport import mismatches, rebuild, rescore, run_problem

    run = read_run(args.from_dir)
    prob, notes = run_problem(run, args.problem)
    out = _console_for(prob)
    for n in notes:
        out.print(f"[yellow]warning:[/] {escape(n)}")
    scores: list = []
    kept: list[list] = []
    diffs: list[list[str]] = []
    with out.status("re-simulating…") as status:
        for i, e in enumerate(run.ranking, start=1):
            status.update(f"re-simulating rank {e.rank} ({i}/{len(run.ranking)})…")
            kept.append([])
            sc = rescore(
                prob,
                rebuild(e, run, prob),
                kept[-1] if (args.figures or args.rollouts) else None,
                compute_margin=not args.no_margin,
            )
            scores.append(sc)
            diffs.append(mismatches(e, sc) if not args.no_margin else [])
    ref = next((r for r in scores if r.nominal.kind == "osc"), scores[0]) if scores else None
    if ref is not None:
        out.print(score_table([r.nominal for r in scores], reference=ref.nominal))
        if prob.perturb.plants:
            out.print(robust_table(scores, reference=ref))
        for line in reasons(scores):
            out.print(line)
    bad = [(e, d) for e, d in zip(run.ranking, diffs) if d]
    for e, d in bad:
        out.print(f"[red]rank {e.rank} {escape(e.label)} differs:[/] " + escape("; ".join(d)))
    if args.no_margin:
        out.print("--no-margin: numbers shown, not checked against the run")
    elif not bad:
        out.print(
            f"[green]reproduced[/]: all {len(run.ranking)} ranked entries of {args.from_dir} "
            "match ranking.json exactly (error index, RMS and max errors, torque, margins, "
            "steps, robust figures)"
        )
    else:
        out.print(f"{len(run.ranking) - len(bad)} of {len(run.ranking)} ranked entries reproduced")
    _score_outputs(args, out, prob, scores, kept)
    return EXIT_FAILED if bad else EXIT_OK


def _report(args: argparse.Namespace) -> int:
    from rich.markup import escape

    from .rundir import REPORT, read_run
    from .runreport import run_problem, write_report

    run = read_run(args.run)
    prob, notes = run_problem(run, args.problem)
    if args.storage:
        _refresh(args.run, prob, args.storage, args.study)
        run = read_run(args.run)
    out = _console_for(prob)
    for n in notes:
        out.print(f"[yellow]warning:[/] {escape(n)}")
    with out.status("re-simulating the best plan and both baselines for the figures…"):
        names = write_report(run, prob, notes)
    out.print(f"wrote {run.file(REPORT)} ({', '.join(names[1:])})")
    return EXIT_OK


def _compare(args: argparse.Namespace) -> int:
    import json

    from rich.markup import escape

    from .compare import compare
    from .evaluate import joint_gains_text, osc_plan
    from .outputs import write_atomic
    from .plan import load_plan
    from .report import (
        MARGIN_LEGEND,
        SAFETY_SHORT,
        console,
        reasons,
        robustness_table,
    )

    prob = _load(args.problem)
    if args.perturb < 0:
        print(f"tierplan: error: --perturb must be >= 0, got {args.perturb}", file=sys.stderr)
        return EXIT_INPUT
    if not args.plans and not args.from_dir and not args.baselines:
        print(
            "tierplan: error: compare needs plan files, --from RUN or --baselines",
            file=sys.stderr,
        )
        return EXIT_INPUT
    plans = [load_plan(p, prob.arm.joint_names) for p in args.plans]
    n = prob.arm.n
    cands: list = [(pl.label, pl.compact(n), functools.partial(_tiered_for, pl)) for pl in plans]
    run = None
    if args.from_dir is not None:
        from .rundir import read_run
        from .runreport import changed_since, rebuild, roles

        if args.storage:
            _refresh(args.from_dir, prob, args.storage, args.study)
        run = read_run(args.from_dir)
        note = changed_since(run, prob)
        if note:
            print(f"tierplan: warning: {note}", file=sys.stderr)
        picked = [e for e in roles(run.ranking) if e is not None]
        picked += [e for e in run.ranking if e.source == "hand" and e not in picked]
        cands += [rebuild(e, run, prob) for e in picked]
    if args.baselines:
        b = prob.baseline
        op = osc_plan(prob, b.osc_kp_t, b.osc_kp_r, b.osc_zeta, label="baseline: single-tier OSC")
        cands.append((op.label, op.compact(n), functools.partial(_tiered_for, op, kind="osc")))
        cands.append(
            (
                "baseline: joint-space CLIK + PD",
                joint_gains_text(b.joint_kp, b.joint_zeta),
                functools.partial(_joint_for, b.joint_kp, b.joint_zeta),
            )
        )
    out = console()
    total = len(cands) * args.perturb
    with out.status("simulating…") as status:
        done = [0]

        def tick(_: int) -> None:
            done[0] += 1
            status.update(f"perturbed plants {done[0]}/{total}…")

        results = compare(prob, cands, args.perturb, on_draw=tick, seed=args.seed)
    out.print(robustness_table(results, args.perturb))
    for line in reasons(results):
        out.print(line)
    for r in results:
        out.print(f"  {escape(r.nominal.label)}: {escape(r.nominal.plan_text)}")
    out.print(MARGIN_LEGEND + ".")
    seed = prob.perturb.seed if args.seed is None else args.seed
    if args.perturb:
        out.print(_plants_line(prob, args.perturb, seed))
        if seed == prob.perturb.seed and prob.perturb.plants:
            out.print(
                "[yellow]note:[/] these are the search's own plants (seed "
                f"{seed}); give --seed with another value for plants the search never saw"
            )
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    dicts = [r.to_dict() for r in results]
    text = json.dumps({"seed": seed, "plants": args.perturb, "entries": dicts}, indent=2) + "\n"
    if args.json:
        write_atomic(args.json, text)
        out.print(f"wrote {args.json}")
    if run is not None:
        from .rundir import ROBUSTNESS, write_extra

        f = write_extra(run.path, ROBUSTNESS, text)
        out.print(f"wrote {f} (for 'tierplan report {run.path}')")
    if args.figures:
        from .figures import margin_figure, plan_colors, robustness_figure, save

        labels = [r.nominal.label for r in results]
        margins = [
            (r.nominal.stiffness_margin, r.nominal.delay_margin_ms, r.nominal.bandwidth_margin)
            for r in results
        ]
        files = [args.figures / "fig-margin.png"]
        save(margin_figure(labels, margins, plan_colors(labels), prob.scoring.margins), files[0])
        if args.perturb:
            files.append(args.figures / "fig-robustness.png")
            save(robustness_figure(dicts), files[1])
        out.print(f"figures: {', '.join(str(f) for f in files)}")
    return EXIT_OK


def _tiered_for(plan, problem, kind: str = "plan"):  # type: ignore[no-untyped-def]
    from .evaluate import plan_controller

    return plan_controller(problem, plan, kind=kind)


def _joint_for(kp, zeta, problem):  # type: ignore[no-untyped-def]
    from .evaluate import joint_controller

    return joint_controller(problem, kp, zeta, label="baseline: joint-space CLIK + PD")


def _budgets(args: argparse.Namespace, prob) -> tuple[int, int, int] | None:  # type: ignore[no-untyped-def]
    """trials, baseline trials, seed from the options and the problem; None after an error."""
    sp = prob.search
    add = getattr(args, "worker_trials", None) is not None
    if add and args.trials is not None:
        print("tierplan: error: give --trials or --worker-trials, not both", file=sys.stderr)
        return None
    trials = args.worker_trials if add else args.trials if args.trials is not None else sp.trials
    btrials = args.baseline_trials if args.baseline_trials is not None else trials
    seed = args.seed if args.seed is not None else sp.seed
    least = 0 if add else 1
    for name, v, lo in (
        ("--worker-trials" if add else "--trials", trials, least),
        ("--baseline-trials", btrials, least),
        ("--workers", args.workers, 1),
        ("--top", args.top, 1),
    ):
        if v < lo:
            print(f"tierplan: error: {name} must be >= {lo}, got {v}", file=sys.stderr)
            return None
    return trials, btrials, seed


def _objectives(text: str) -> tuple[str, ...] | None:
    from .objectives import SECOND_OBJECTIVES

    parts = tuple(p.strip() for p in text.split(",") if p.strip())
    if parts == ("error",) or (
        len(parts) == 2 and parts[0] == "error" and parts[1] in SECOND_OBJECTIVES
    ):
        return parts
    print(
        f"tierplan: error: --objectives '{text}' is not one of: error, "
        + ", ".join(f"error,{o}" for o in SECOND_OBJECTIVES),
        file=sys.stderr,
    )
    return None


def _run_and_show(out, prob, settings, seeded):  # type: ignore[no-untyped-def]
    """Run the three studies under a progress display; print the ranking."""
    import optuna
    from rich.markup import escape
    from rich.progress import (
        BarColumn,
        Progress,
        TaskID,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )

    from . import search as srch
    from .report import ranking_table
    from .runs import run_studies

    with Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        TextColumn("{task.completed}/{task.total}"),
        TextColumn("{task.fields[info]}"),
        TimeElapsedColumn(),
        TextColumn("left"),
        TimeRemainingColumn(),
        console=out,
    ) as progress:
        tasks: dict[str, TaskID] = {}

        def update(kind: str, n: int, study) -> None:  # type: ignore[no-untyped-def]
            if kind not in tasks:
                tasks[kind] = progress.add_task(f"{kind:12s}", total=n, info="")
            ts = study.get_trials(deepcopy=False)
            feas = sum(1 for t in ts if srch.feasible(t))
            best = srch.best_value(study)
            info = f"feasible {feas}" + (f", best {best:.3g}" if best is not None else "")
            progress.update(tasks[kind], completed=min(srch.finished(study), n), info=info)

        result = run_studies(prob, settings, seeded, on_progress=update)
    out.print(ranking_table(result.ranked))
    for e in result.ranked:
        out.print(f"  {e.rank}. {escape(e.label)}: {escape(e.plan_text)}")
    if len(settings.objectives) > 1:
        front = [e for e in result.plan_entries if e.pareto]
        out.print(
            f"two objectives (error, {settings.objectives[1]}): {len(front)} plans on the "
            "feasible Pareto front, all kept in the ranking (column 'Pareto'); the baselines "
            "are tuned for error alone."
        )
    for s, d in result.seeded_scores:
        if s.source == "hand" and not d.feasible:
            out.print(
                f"[yellow]hand plan '{escape(s.plan.label)}' did not make the ranking: "
                f"{escape(str(d.reason))}[/]"
            )
    from .runs import convergence_note

    for tuned, what in ((result.osc, "tuned single-tier OSC"), (result.joint, "tuned joint-space")):
        note = convergence_note(tuned)
        if note:
            out.print(
                f"[yellow]{what} may not have converged[/]: {note}; give it more trials "
                "(--baseline-trials) before trusting a margin over it"
            )
    if not result.plan_entries:
        out.print("[red]no feasible plan was found[/]: widen the gain ranges or give more trials")
    for kind, st in result.studies.items():
        errs = [
            t.user_attrs["reason"]
            for t in st.get_trials(deepcopy=False, states=(optuna.trial.TrialState.FAIL,))
            if str(t.user_attrs.get("reason", "")).startswith("error:")
        ]
        if errs:
            out.print(
                f"[yellow]{len(errs)} {kind} trials failed with an error (recorded in "
                f"trials.csv); the first: {escape(errs[0])}[/]"
            )
    return result


def _finish(out, result, out_dir: Path, names: list[str], what: str) -> int:  # type: ignore[no-untyped-def]
    from .report import SAFETY_SHORT

    out.print(f"{what} took {result.elapsed_s:.0f} s; wrote {out_dir}/ ({', '.join(names)})")
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    if result.interrupted:
        out.print(
            "[yellow]interrupted[/]: the ranking holds the trials that had finished; "
            "run the same command again to resume (nothing finished is lost or repeated)"
        )
        return EXIT_INTERRUPTED
    return EXIT_OK


def _settings(args, prob, storage_default=None):  # type: ignore[no-untyped-def]
    from .rundir import default_storage
    from .runs import RunSettings

    budgets = _budgets(args, prob)
    objectives = _objectives(args.objectives)
    if budgets is None or objectives is None:
        return None
    trials, btrials, seed = budgets
    return RunSettings(
        storage=args.storage or storage_default or str(default_storage(prob.name)),
        study=args.study,
        trials=trials,
        baseline_trials=btrials,
        seed=seed,
        workers=args.workers,
        prune=not args.no_prune,
        top=args.top,
        objectives=objectives,
        add=getattr(args, "worker_trials", None) is not None,
    )


def _search(args: argparse.Namespace) -> int:
    from .plan import load_plan
    from .rundir import default_dir
    from .runs import Seeded, run_record, write_run

    prob = _load(args.problem)
    settings = _settings(args, prob)
    if settings is None:
        return EXIT_INPUT
    seeded = [Seeded(load_plan(p, prob.arm.joint_names), "hand") for p in args.plan]
    out_dir = args.out or default_dir(prob.name, args.study)
    out = _console_for(prob)
    result = _run_and_show(out, prob, settings, seeded)
    names = write_run(out_dir, prob, result, run_record(prob, settings, result))
    names += _report_if(args, out, result, out_dir, prob)
    return _finish(out, result, out_dir, names, "search")


def _report_if(args, out, result, out_dir: Path, prob) -> list[str]:  # type: ignore[no-untyped-def]
    """With --figures: report.md and its PNGs in the results folder."""
    if not args.figures or not result.ranked:
        return []
    from .rundir import read_run
    from .runreport import write_report

    with out.status("drawing the report's figures…"):
        return write_report(read_run(out_dir), prob)


def _swap(args: argparse.Namespace) -> int:
    import hashlib

    from rich.markup import escape

    from .problem import load_problem
    from .report import fmt, swap_table, tier_moves
    from .rundir import RUN_JSON, default_dir, read_record
    from .runs import previous_plans, run_record, tier_depth, write_run

    from_dir: Path = args.from_dir
    if not from_dir.is_dir():
        print(
            f"tierplan: error: {from_dir}: --from needs a search's results folder", file=sys.stderr
        )
        return EXIT_INPUT
    prob = load_problem(args.problem, actuator_files=args.actuators)
    old_run = read_record(from_dir)
    old_study = str(old_run.get("study") or from_dir.name)
    if args.study is None:
        tag = hashlib.sha256(b"".join(a.read_bytes() for a in args.actuators)).hexdigest()[:6]
        args.study = f"{old_study}.swap-{args.actuators[-1].stem}-{tag}"
    if args.trials is None and old_run.get("trials"):
        args.trials = int(old_run["trials"])
    if args.baseline_trials is None and old_run.get("baseline_trials"):
        args.baseline_trials = int(old_run["baseline_trials"])
    if args.seed is None and old_run.get("seed") is not None:
        args.seed = int(old_run["seed"])
    old_storage = old_run.get("storage")
    if old_storage and "***" in str(old_storage) and not args.storage:
        raise InputError(
            from_dir / RUN_JSON,
            "storage",
            "the earlier run's storage URL is kept without its password: give --storage",
        )
    settings = _settings(args, prob, storage_default=old_storage)
    if settings is None:
        return EXIT_INPUT
    seeded = previous_plans(from_dir, prob, args.top)
    if not seeded:
        raise InputError(from_dir, "", "holds no ranked plan to carry over (plans/rank-NN.toml)")
    out_dir = args.out or default_dir(prob.name, args.study)
    if out_dir.resolve() == from_dir.resolve():
        print(
            "tierplan: error: --out must differ from --from (the old run is kept)", file=sys.stderr
        )
        return EXIT_INPUT
    out = _console_for(prob)
    names = prob.arm.joint_names
    changed = ", ".join(
        f"{a.joint} {a.model.bandwidth_hz():.3g} Hz"
        for a in prob.actuators
        if a.joint in prob.swapped_joints
    )
    out.print(
        f"swap: {escape(changed)} (from {', '.join(str(a) for a in args.actuators)}); "
        f"{len(seeded)} plans of {from_dir} re-scored and enqueued in study '{args.study}'"
    )
    result = _run_and_show(out, prob, settings, seeded)
    rows = [
        (s.plan.label, s.plan.compact(prob.arm.n), s.extra.get("previous_error_index"), d)
        for s, d in result.seeded_scores
        if s.source == "previous"
    ]
    out.print(swap_table(rows))
    old_best = seeded[0]
    new_best = next((e for e in result.ranked if e.kind == "plan"), None)
    moves: list[str] = []
    summary: dict = {"from": str(from_dir), "actuator_files": [str(a) for a in args.actuators]}
    before = old_best.extra.get("previous_error_index")
    if new_best is not None:
        moves = tier_moves(
            tier_depth(old_best.plan.to_toml(), names), tier_depth(new_best.plan_toml, names)
        )
        out.print(
            f"best plan before: {escape(old_best.plan.compact(prob.arm.n))} "
            f"(error idx {fmt(before)})"
        )
        out.print(
            f"best plan now:    {escape(new_best.plan_text)} "
            f"(error idx {fmt(new_best.error_index)}"
            + (
                f", {(new_best.error_index / before - 1) * 100:+.0f} %"
                if before and new_best.error_index is not None
                else ""
            )
            + ")"
        )
        out.print("joints that moved between tiers: " + ("; ".join(moves) if moves else "none"))
        summary.update(
            best_before=before,
            best_now=new_best.error_index,
            best_plan_before=old_best.plan.compact(prob.arm.n),
            best_plan_now=new_best.plan_text,
            moved=moves,
        )
    summary["previous_plans"] = [
        {"label": lab, "plan_text": txt, "error_index_before": b, "now": d.to_dict()}
        for lab, txt, b, d in rows
    ]
    names_written = write_run(
        out_dir, prob, result, run_record(prob, settings, result, swap=summary)
    )
    names_written += _report_if(args, out, result, out_dir, prob)
    return _finish(out, result, out_dir, names_written, "swap search")


def _sensitivity(args: argparse.Namespace) -> int:
    import json

    from rich.markup import escape

    from .advice import sensitivities
    from .outputs import write_atomic
    from .report import SAFETY_SHORT, sensitivity_table
    from .rundir import RANKING_JSON, SENSITIVITY, read_run, write_extra
    from .runreport import rebuild, roles, run_problem

    run = read_run(args.run)
    prob, notes = run_problem(run, args.problem)
    out = _console_for(prob)
    for n in notes:
        out.print(f"[yellow]warning:[/] {escape(n)}")
    best, _, _ = roles(run.ranking)
    if best is None:
        raise InputError(run.file(RANKING_JSON), "", "holds no ranked plan")
    label, text, make = rebuild(best, run, prob)
    with out.status("stepping each plant parameter…") as status:
        base, rows = sensitivities(
            prob,
            make,
            label,
            on_step=lambda i, n: status.update(f"stepping each plant parameter… {i}/{n}"),
        )
    out.print(sensitivity_table(base, rows, label))
    doc = {
        "label": label,
        "plan_text": text,
        "error_index": base.error_index,
        "rows": [r.to_dict() for r in rows],
    }
    body = json.dumps(doc, indent=2) + "\n"
    f = write_extra(run.path, SENSITIVITY, body)
    if args.json:
        write_atomic(args.json, body)
    out.print(f"wrote {f} (for 'tierplan report {run.path}')")
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    return EXIT_OK


def _upgrade(args: argparse.Namespace) -> int:
    import json

    from rich.markup import escape

    from .advice import upgrade_advice
    from .outputs import write_atomic
    from .report import SAFETY_SHORT, upgrade_table
    from .rundir import UPGRADE, write_extra
    from .runs import previous_plans

    if not args.factor > 1.0:
        print(f"tierplan: error: --factor must be > 1, got {args.factor}", file=sys.stderr)
        return EXIT_INPUT
    prob = _load(args.problem)
    out = _console_for(prob)
    if args.top < 1:
        print(f"tierplan: error: --top must be >= 1, got {args.top}", file=sys.stderr)
        return EXIT_INPUT
    plans = [s.plan for s in previous_plans(args.from_dir, prob, args.top)]
    if not plans:
        raise InputError(args.from_dir, "", "holds no ranked plan (plans/rank-NN.toml)")
    with out.status("upgrading each drive in turn…") as status:
        rows = upgrade_advice(
            prob,
            plans,
            args.factor,
            on_joint=lambda j: status.update(f"upgrading each drive in turn… {j}"),
        )
    out.print(upgrade_table(rows, args.factor))
    for r in rows[:3]:
        out.print(f"  {escape(r.joint)}: {escape(r.best_plan)}")
    out.print(
        f"candidates: the {len(plans)} ranked plans of {escape(str(args.from_dir))} and the "
        "gain ladder's plans of each upgraded problem, on the nominal plant and the "
        "problem's perturbed plants (robust error)"
    )
    body = json.dumps([r.to_dict() for r in rows], indent=2) + "\n"
    f = write_extra(args.from_dir, UPGRADE, body)
    if args.json:
        write_atomic(args.json, body)
    out.print(f"wrote {f} (for 'tierplan report {args.from_dir}')")
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    return EXIT_OK


def _validate(args: argparse.Namespace) -> int:
    import math

    import numpy as np
    from rich.markup import escape
    from rich.table import Table

    from .calibrate import calibrate
    from .evaluate import make_loop, plan_controller
    from .plan import load_plan
    from .report import SAFETY_SHORT, fmt
    from .rollout_log import position_error_mm, read_run_log, rotation_error_deg

    prob = _load(args.problem)
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
    out = _console_for(prob)

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
    from .figures import save, validation_figure

    save(validation_figure(prob.dt, m_p, p_p[settle:], c_p[settle:]), png)
    out.print(f"figure: {png}")
    if args.write:
        _write_calibration(args, prob, cal)
        out.print(f"wrote {escape(str(args.write))} (the calibrated problem; comments kept)")
    if args.from_dir:
        from .report import swap_table
        from .runs import previous_plans, score_robust

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
    import dataclasses
    import datetime
    import math

    from .actuator_file import write_calibrated
    from .problem import load_problem

    plant = {
        "payload_kg": round(cal.payload_kg, 4),
        "payload_offset_m": [round(x, 4) for x in cal.payload_offset_m],
    }
    joints = {}
    ms = prob.dt * 1e3
    for j, a in enumerate(prob.actuators):
        model = a.model
        params = {f.name: getattr(model, f.name) for f in dataclasses.fields(model)}
        vals: dict = {"model": model.kind}
        for k, v in params.items():
            vals[k] = float(f"{v * cal.bandwidth_scale[j]:.4g}") if k.endswith("_hz") else v
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


def _export(args: argparse.Namespace) -> int:
    from rich.markup import escape

    from .export import export_files
    from .outputs import write_atomic
    from .plan import load_plan
    from .report import SAFETY_SHORT

    prob = _load(args.problem)
    plan = load_plan(args.plan, prob.arm.joint_names)
    out = _console_for(prob)
    files = export_files(prob, plan)
    for name, text in files.items():
        write_atomic(args.out / name, text)
    out.print(
        f"wrote {escape(str(args.out))}/ ({', '.join(files)}): build and check with\n"
        f"  cd {escape(str(args.out))} && g++ -O2 -std=c++17 -I/usr/include/eigen3 check.cpp "
        "-o check && ./check"
    )
    out.print(f"[yellow]caution:[/] {SAFETY_SHORT}")
    return EXIT_OK


def _fit(args: argparse.Namespace) -> int:
    import json

    from rich.markup import escape
    from rich.table import Table

    from .fit import FrequencyLog, fit_auto, fit_model, read_log
    from .outputs import write_atomic
    from .report import console

    if args.write and not args.joint:
        print("tierplan: error: --write needs --joint NAME (the table to update)", file=sys.stderr)
        return EXIT_INPUT
    if not (args.phase_at > 0 and args.phase_at < float("inf")):
        print(
            f"tierplan: error: --phase-at must be a finite frequency > 0 Hz, got {args.phase_at}",
            file=sys.stderr,
        )
        return EXIT_INPUT
    to_stdout = args.json is not None and str(args.json) == "-"
    out = console(stderr=to_stdout)
    with out.status(f"reading {escape(str(args.log))}", spinner="line"):
        log = read_log(args.log)
    samples = len(log.f_hz) if isinstance(log, FrequencyLog) else len(log.t)
    with _fit_progress(out, samples) as progress:
        if args.model == "auto":
            fit, fits, why = fit_auto(log, progress)
        else:
            fit, fits = fit_model(log, args.model, progress), []
            why = f"{args.model} as asked (--model)"
    if isinstance(log, FrequencyLog):
        span = f"{len(log.f_hz)} points, {log.f_hz[0]:g}–{log.f_hz[-1]:g} Hz"
    else:
        span = f"{len(log.t)} samples at {1.0 / log.h:.4g} Hz over {log.t[-1] - log.t[0]:g} s"
    who = f" for joint {args.joint}" if args.joint else ""
    out.print(f"fit of {escape(str(args.log))}{who}: {log.domain} response, {span}")
    t = Table(show_header=True)
    for col in ("figure", "value", "± 1σ", "unit"):
        t.add_column(col, justify="right" if col != "figure" else "left")
    units = {"corner_hz": "Hz", "natural_hz": "Hz", "damping_ratio": "-", "delay_ms": "ms"}
    t.add_row("model", fit.model, "", "")
    for k, v in [*fit.params.items(), ("delay_ms", fit.delay_ms)]:
        sd = fit.sigma[k]
        t.add_row(k, f"{v:.4g}", f"{sd:.2g}" if sd == sd and sd != float("inf") else "–", units[k])
    t.add_row("bandwidth (−3 dB)", f"{fit.bandwidth_hz:.4g}", "", "Hz")
    lag = fit.phase_lag_deg(args.phase_at)
    t.add_row(f"phase lag at {args.phase_at:g} Hz", f"{lag:.3g}", "", "deg")
    if log.domain == "frequency":
        t.add_row("residual RMS", f"{fit.residual['rms_db']:.3g}", "", "dB")
        t.add_row("", f"{fit.residual['rms_deg']:.3g}", "", "deg")
    else:
        t.add_row("residual RMS", f"{fit.residual['rms_nm']:.3g}", "", "N·m")
    out.print(t)
    out.print(f"model choice: {why}")
    for other in fits:
        if other is not fit:
            out.print(
                f"  (other: {escape(other.actuator().describe())}, delay {other.delay_ms:.3g} ms, "
                f"BIC {other.bic:.1f})"
            )
    for w in fit.warnings:
        out.print(f"[yellow]warning:[/] {escape(w)}")
    if not args.no_plot:
        from .figures import fit_figure, save

        png = args.plot or Path("results") / "fits" / f"{args.log.stem}.png"
        save(fit_figure(log, fit, f"{args.log.name}{who}"), png)
        out.print(f"plot: {png}")
    record = {
        "log": str(args.log),
        "joint": args.joint,
        "domain": log.domain,
        **fit.to_dict(),
        "phase_at_hz": args.phase_at,
        "phase_lag_deg": lag,
        "chosen_by": why,
    }
    if args.json is not None:
        from .evaluate import finite

        text = json.dumps(finite(record), indent=2, allow_nan=False) + "\n"
        if to_stdout:
            sys.stdout.write(text)
        else:
            write_atomic(args.json, text)
            out.print(f"wrote {args.json}")
    if args.write:
        _write_fit(args, fit, out)
    return EXIT_OK


#: Logs with at least this many samples show a progress bar while they are fitted.
LONG_LOG_SAMPLES = 20_000


@contextlib.contextmanager
def _fit_progress(out, samples: int):  # type: ignore[no-untyped-def]
    """A progress bar (gone when done) for the fit of a long log; None for a short one."""
    if samples < LONG_LOG_SAMPLES:
        yield None
        return
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    bar = Progress(
        TextColumn(f"fitting {samples:,} samples"),
        BarColumn(),
        TextColumn("{task.description}"),
        TimeElapsedColumn(),
        console=out,
        transient=True,
    )
    with bar:
        task = bar.add_task("", total=None)

        def tell(done: int, total: int, what: str) -> None:
            bar.update(task, completed=done, total=total, description=what)

        yield tell


def _write_fit(args: argparse.Namespace, fit, out) -> None:  # type: ignore[no-untyped-def]
    import datetime

    from rich.markup import escape

    from .actuator_file import update_actuator
    from .tomlio import load_toml

    values = {k: float(f"{v:.4g}") for k, v in fit.params.items()}
    values["delay_ms"] = round(fit.delay_ms, 3)
    note = f"fitted from {args.log.name} on {datetime.date.today().isoformat()} by tierplan fit"
    validate = None
    target = Path(args.write)
    if target.is_file() and "arm" in load_toml(target, InputError, kind="actuator file"):

        def validate(p: Path) -> object:
            from .problem import load_problem

            prob = load_problem(p, check_reach=False)
            if args.joint not in prob.arm.joint_names:
                raise InputError(
                    p, f"actuators.{args.joint}", f"no joint '{args.joint}' in the arm"
                )
            return prob

    how = update_actuator(target, args.joint, fit.model, values, note, validate)
    shown = ", ".join(f"{k} = {v:g}" for k, v in values.items())
    out.print(escape(f"{how} {target}: [actuators.{args.joint}] model = {fit.model}, {shown}"))


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
