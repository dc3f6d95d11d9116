"""``tierplan fit``."""

from __future__ import annotations

import argparse
import contextlib
import sys
from pathlib import Path

from ..exceptions import InputError
from .common import EXIT_INPUT, EXIT_OK

__all__ = [
    "LONG_LOG_SAMPLES",
    "add",
    "run",
]


def add(sub: argparse._SubParsersAction) -> None:
    """The command's options."""
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


def run(args: argparse.Namespace) -> int:
    import json

    from rich.markup import escape
    from rich.table import Table

    from ..fit import FrequencyLog, fit_auto, fit_model, read_log
    from ..outputs import write_atomic
    from ..report import console

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
    from ..actuators import parameter_units

    units = {**parameter_units(), "delay_ms": "ms"}
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
        from ..figures import fit_figure, save

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
        from ..evaluate import finite

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

    from ..actuator_file import update_actuator
    from ..tomlio import load_toml

    values = {k: float(f"{v:.4g}") for k, v in fit.params.items()}
    values["delay_ms"] = round(fit.delay_ms, 3)
    note = f"fitted from {args.log.name} on {datetime.date.today().isoformat()} by tierplan fit"
    validate = None
    target = Path(args.write)
    if target.is_file() and "arm" in load_toml(target, InputError, kind="actuator file"):

        def validate(p: Path) -> object:
            from ..problem import load_problem

            prob = load_problem(p, check_reach=False)
            if args.joint not in prob.arm.joint_names:
                raise InputError(
                    p, f"actuators.{args.joint}", f"no joint '{args.joint}' in the arm"
                )
            return prob

    how = update_actuator(target, args.joint, fit.model, values, note, validate)
    shown = ", ".join(f"{k} = {v:g}" for k, v in values.items())
    out.print(escape(f"{how} {target}: [actuators.{args.joint}] model = {fit.model}, {shown}"))
