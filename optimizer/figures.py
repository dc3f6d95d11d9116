"""Figures (matplotlib, no screen needed): each function returns a Figure; saving is the caller's.

Colours are fixed per role so a plan keeps its colour across figures: the best plan,
tuned single-tier OSC and tuned joint-space have their own; other plans take the
rest of the palette in rank order (``plan_colors``).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import matplotlib

matplotlib.use("Agg")  # files only; no display on the machines this runs on

import matplotlib.pyplot as plt
import numpy as np
import scipy.signal
from matplotlib.figure import Figure

from .fit import ActuatorFit, FrequencyLog, Log, TimeLog, simulate_time
from .simulate import Rollout

__all__ = [
    "BEST",
    "DATA",
    "JOINT",
    "OSC",
    "TIER_COLORS",
    "error_figure",
    "fit_figure",
    "history_figure",
    "margin_figure",
    "pareto_figure",
    "plan_colors",
    "robustness_figure",
    "save",
    "spectrum_figure",
    "tornado_figure",
    "torque_figure",
    "torque_psd",
    "upgrade_figure",
    "validation_figure",
]

BEST = "#1f5fa8"
OSC = "#c43c2f"
JOINT = "#6b6b6b"
DATA = "#222222"
_OTHERS = ("#2a9d5c", "#d08c1f", "#8a4fb0", "#1aa3b3", "#b5527e", "#7a8a2a", "#5a6fd6")
TIER_COLORS = ("#1f5fa8", "#2a9d5c", "#d08c1f", "#8a4fb0", "#1aa3b3", "#b5527e")


def plan_colors(labels: Sequence[str], roles: Mapping[str, str] | None = None) -> dict[str, str]:
    """A colour per label: role ``best``/``osc``/``joint`` get fixed ones, others in order."""
    roles = roles or {}
    fixed = {"best": BEST, "osc": OSC, "joint": JOINT}
    out: dict[str, str] = {}
    i = 0
    for lb in labels:
        if roles.get(lb) in fixed:
            out[lb] = fixed[roles[lb]]
        else:
            out[lb] = _OTHERS[i % len(_OTHERS)]
            i += 1
    return out


def _new(rows: int, cols: int, w: float, h: float, **kw: Any) -> tuple[Figure, np.ndarray]:
    fig, axes = plt.subplots(rows, cols, figsize=(w, h), squeeze=False, **kw)
    return fig, axes


# -- fit -----------------------------------------------------------------------------
def fit_figure(log: Log, fit: ActuatorFit, title: str = "") -> Figure:
    """Data against fit: Bode plot (frequency log) or time response (time log)."""
    if isinstance(log, FrequencyLog):
        fig, ax = _new(2, 1, 7.0, 6.0, sharex=True)
        f = np.geomspace(log.f_hz[0], log.f_hz[-1], 400)
        mag, ph = fit.response(f)
        ax[0, 0].semilogx(log.f_hz, log.mag_db, "o", ms=3, color=DATA, label="measured")
        ax[0, 0].semilogx(f, mag, color=BEST, label=f"fit: {fit.actuator().describe()}")
        ax[0, 0].axhline(-3.01, color=JOINT, ls=":", lw=1, label="−3 dB")
        ax[0, 0].axvline(
            fit.bandwidth_hz, color=OSC, ls="--", lw=1, label=f"bandwidth {fit.bandwidth_hz:.3g} Hz"
        )
        ax[0, 0].set_ylabel("magnitude [dB]")
        ax[1, 0].semilogx(log.f_hz, log.phase_deg, "o", ms=3, color=DATA, label="measured")
        ax[1, 0].semilogx(f, ph, color=BEST, label=f"fit, delay {fit.delay_ms:.3g} ms")
        ax[1, 0].set_ylabel("phase [deg]")
        ax[1, 0].set_xlabel("frequency [Hz]")
        for a in ax[:, 0]:
            a.grid(True, which="both", alpha=0.3)
            a.legend(loc="lower left", fontsize=8)
    else:
        if not isinstance(log, TimeLog):  # pragma: no cover - Log has two kinds
            raise TypeError(type(log))
        fig, ax = _new(2, 1, 7.0, 6.0, sharex=True, height_ratios=(3, 1))
        lag = list(fit.params.values())
        y = simulate_time(fit.model, lag, fit.delay_ms * 1e-3, log.h, log.commanded)
        ax[0, 0].plot(log.t, log.commanded, color=JOINT, lw=1, label="commanded")
        ax[0, 0].plot(log.t, log.measured, color=DATA, lw=1, label="measured")
        ax[0, 0].plot(
            log.t,
            y,
            color=BEST,
            lw=1.5,
            ls="--",
            label=f"fit: {fit.actuator().describe()}, delay {fit.delay_ms:.3g} ms",
        )
        ax[0, 0].set_ylabel("torque [N·m]")
        ax[0, 0].legend(fontsize=8)
        ax[1, 0].plot(log.t, log.measured - y, color=OSC, lw=1, label="measured − fit")
        ax[1, 0].set_ylabel("residual [N·m]")
        ax[1, 0].set_xlabel("time [s]")
        ax[1, 0].legend(fontsize=8)
        for a in ax[:, 0]:
            a.grid(True, alpha=0.3)
    fig.suptitle(title or "actuator fit")
    fig.tight_layout()
    return fig


# -- runs ----------------------------------------------------------------------------
def error_figure(
    series: Sequence[tuple[str, Sequence[Rollout]]], colors: Mapping[str, str]
) -> Figure:
    """Tip position and orientation error over time: a row per trajectory, a line per plan."""
    names = [ro.name for ro in series[0][1]]
    fig, ax = _new(len(names), 2, 11.0, 2.4 * len(names) + 0.8, sharex="row")
    for r, name in enumerate(names):
        for label, rollouts in series:
            ro = next((x for x in rollouts if x.name == name), None)
            if ro is None:
                continue
            c = colors.get(label)
            ax[r, 0].plot(
                ro.t, 1e3 * np.linalg.norm(ro.e[:, :3], axis=1), color=c, lw=1, label=label
            )
            ax[r, 1].plot(
                ro.t, np.rad2deg(np.linalg.norm(ro.e[:, 3:], axis=1)), color=c, lw=1, label=label
            )
        ax[r, 0].set_title(f"{name}: position error", fontsize=9)
        ax[r, 1].set_title(f"{name}: orientation error", fontsize=9)
        ax[r, 0].set_ylabel("|position error| [mm]")
        ax[r, 1].set_ylabel("|orientation error| [deg]")
        for a in ax[r]:
            a.set_xlabel("time [s]")
            a.grid(True, alpha=0.3)
    ax[0, 0].legend(fontsize=8)
    fig.tight_layout()
    return fig


def torque_figure(
    ro: Rollout,
    joint_names: Sequence[str],
    limits: Sequence[float],
    title: str = "",
) -> Figure:
    """Each tier's torque and the command per joint (one panel per joint), limits marked."""
    n = len(joint_names)
    fig, ax = _new(n, 1, 9.0, 1.5 * n + 1.0, sharex=True)
    n_tiers = ro.tier_tau.shape[1]
    for j, name in enumerate(joint_names):
        a = ax[j, 0]
        for k in range(n_tiers):
            a.plot(
                ro.t,
                ro.tier_tau[:, k, j],
                color=TIER_COLORS[k % len(TIER_COLORS)],
                lw=0.9,
                label=f"tier {k + 1}",
            )
        a.plot(
            ro.t,
            ro.tau_cmd[:, j],
            color=DATA,
            lw=1.2,
            label="command (tiers + model terms, limited)",
        )
        lim = float(limits[j])
        peak = float(max(np.abs(ro.tau_cmd[:, j]).max(), np.abs(ro.tier_tau[:, :, j]).max()))
        top = max(1.25 * peak, 1e-9)
        if math.isfinite(lim) and lim <= top:
            for s in (1.0, -1.0):
                a.axhline(
                    s * lim, color=OSC, ls="--", lw=0.8, label="effort limit" if s > 0 else None
                )
            top = 1.1 * lim
        a.set_ylim(-top, top)
        a.text(
            0.005,
            0.04,
            f"limit ±{lim:.4g} N·m; peak {peak:.3g} N·m ({peak / lim:.0%})",
            transform=a.transAxes,
            fontsize=7,
            color=OSC,
        )
        a.set_ylabel(f"{name}\n[N·m]", fontsize=8)
        a.grid(True, alpha=0.3)
    ax[-1, 0].set_xlabel("time [s]")
    ax[0, 0].legend(fontsize=7, ncol=n_tiers + 2, loc="upper right")
    fig.suptitle(title or f"torque per tier on '{ro.name}'")
    fig.tight_layout()
    return fig


def torque_psd(rollouts: Sequence[Rollout], dt: float) -> tuple[np.ndarray, np.ndarray]:
    """Welch PSD of each joint's command, averaged over trajectories: (f [Hz], P (m, n))."""
    seg = min(512, min(len(ro.t) for ro in rollouts))
    psds = []
    f = np.zeros(0)
    for ro in rollouts:
        f, P = scipy.signal.welch(ro.tau_cmd, fs=1.0 / dt, nperseg=seg, axis=0, detrend="linear")
        psds.append(P)
    return f, np.mean(psds, axis=0)


def spectrum_figure(
    series: Sequence[tuple[str, Sequence[Rollout]]],
    colors: Mapping[str, str],
    joint_names: Sequence[str],
    bandwidths_hz: Sequence[float],
    dt: float,
) -> Figure:
    """Spectrum of each joint's commanded torque, each actuator's bandwidth marked."""
    n = len(joint_names)
    cols = 2
    rows = math.ceil(n / cols)
    fig, ax = _new(rows, cols, 11.0, 2.3 * rows + 0.8)
    for label, rollouts in series:
        f, P = torque_psd(rollouts, dt)
        for j in range(n):
            a = ax[j // cols, j % cols]
            a.loglog(f[1:], P[1:, j], color=colors.get(label), lw=1, label=label)
    for j, name in enumerate(joint_names):
        a = ax[j // cols, j % cols]
        a.axvline(
            bandwidths_hz[j],
            color=DATA,
            ls="--",
            lw=0.9,
            label=f"bandwidth {bandwidths_hz[j]:.3g} Hz",
        )
        a.set_title(name, fontsize=9)
        a.set_xlabel("frequency [Hz]")
        a.set_ylabel("PSD [(N·m)²/Hz]")
        a.grid(True, which="both", alpha=0.3)
        a.legend(fontsize=7)
    for j in range(n, rows * cols):
        ax[j // cols, j % cols].set_visible(False)
    fig.suptitle("commanded torque spectrum (mean over trajectories)")
    fig.tight_layout()
    return fig


def history_figure(rows: Sequence[Mapping[str, Any]], colors: Mapping[str, str]) -> Figure:
    """Best feasible error index so far against trial number, a line per study kind.

    ``rows`` are trials.csv rows (``kind``, ``number``, ``value``, ``feasible``);
    ``colors`` maps the kinds (``plan``, ``osc``, ``joint_space``) to colours.
    """
    fig, ax = _new(1, 1, 8.0, 4.5)
    a = ax[0, 0]
    names = {"plan": "tier plans", "osc": "single-tier OSC", "joint_space": "joint-space CLIK + PD"}
    for kind in ("plan", "osc", "joint_space"):
        rs = sorted((r for r in rows if r.get("kind") == kind), key=lambda r: int(r["number"]))
        if not rs:
            continue
        xs, ys = [], []
        best = math.inf
        for r in rs:
            if _truthy(r.get("feasible")) and r.get("value") not in (None, ""):
                best = min(best, float(r["value"]))
            if math.isfinite(best):
                xs.append(int(r["number"]))
                ys.append(best)
        a.step(xs, ys, where="post", color=colors.get(kind), lw=1.5, label=names[kind])
    a.set_yscale("log")
    return _finish(fig, a, "trial [-]", "best feasible error index so far [-]", "search history")


def pareto_figure(
    rows: Sequence[Mapping[str, Any]], second: str, chosen_trial: int | None
) -> Figure:
    """Feasible plan trials in the (error, second objective) plane, the front and the pick."""
    fig, ax = _new(1, 1, 7.0, 5.0)
    a = ax[0, 0]
    pts = [
        (float(r["value"]), float(r["value_2"]), int(r["number"]))
        for r in rows
        if r.get("kind") == "plan"
        and _truthy(r.get("feasible"))
        and r.get("value_2") not in (None, "")
    ]
    from .objectives import SECOND_OBJECTIVES, pareto_front

    direction = SECOND_OBJECTIVES[second][0] if second in SECOND_OBJECTIVES else "minimize"
    if pts:
        front = pareto_front([(p[0], p[1]) for p in pts], ["minimize", direction])
        a.plot(
            [p[0] for p in pts],
            [p[1] for p in pts],
            "o",
            ms=4,
            color=JOINT,
            alpha=0.6,
            label="feasible trials",
        )
        fp = sorted((p for p, on in zip(pts, front) if on), key=lambda p: p[0])
        a.plot([p[0] for p in fp], [p[1] for p in fp], "o-", ms=5, color=BEST, label="Pareto front")
        pick = next((p for p in pts if p[2] == chosen_trial), None)
        if pick:
            a.plot([pick[0]], [pick[1]], "*", ms=14, color=OSC, label=f"chosen (trial {pick[2]})")
    unit = {"margin": "stiffness margin [×]", "effort": "RMS commanded torque [N·m]"}
    return _finish(
        fig, a, "error index [-]", unit.get(second, second), f"plans: error against {second}"
    )


def margin_figure(
    labels: Sequence[str],
    margins: Sequence[tuple[float | None, float | None, float | None]],
    colors: Mapping[str, str],
    limits: Any,
) -> Figure:
    """Stiffness, delay [ms] and bandwidth margins (``margins``, one triple per label;
    None: not computed) as horizontal bars, one panel each, the problem's minimums dashed
    (``limits``: a ``MarginLimits``)."""
    fig, ax = _new(1, 3, 12.0, 0.35 * len(labels) + 1.8, sharey=True)
    y = np.arange(len(labels))[::-1]
    panels = (
        (limits.stiffness, "stiffness margin [×], ζ held", "×"),
        (limits.delay_ms, "delay margin [ms]", " ms"),
        (limits.bandwidth, "bandwidth margin [×]", "×"),
    )
    for i, (low, xlabel, unit) in enumerate(panels):
        a = ax[0, i]
        vals = [
            0.0 if m[i] is None or not math.isfinite(m[i]) else float(m[i])  # type: ignore[arg-type]
            for m in margins
        ]
        a.barh(y, vals, color=[colors.get(lb, JOINT) for lb in labels])
        a.axvline(low, color=DATA, ls="--", lw=1, label=f"minimum {low:g}{unit}")
        if i == 0:
            a.set_yticks(y, labels, fontsize=8)
        a.set_xlabel(xlabel)
        a.grid(True, axis="x", alpha=0.3)
        a.legend(fontsize=7)
    fig.suptitle("margins of the linearised loop (worst sampled instant)")
    fig.tight_layout()
    return fig


def _finish(
    fig: Figure, a: Any, xlabel: str, ylabel: str, title: str, axis: str = "both"
) -> Figure:
    """Labels, grid, legend and title of a one-panel figure."""
    a.set_xlabel(xlabel)
    a.set_ylabel(ylabel)
    a.grid(True, which="both", axis=axis, alpha=0.3)
    a.legend(fontsize=8)
    a.set_title(title)
    fig.tight_layout()
    return fig


def _truthy(v: object) -> bool:
    return v is True or str(v).lower() in ("true", "1")


def save(fig: Figure, path: Any) -> None:
    """Save as PNG (150 dpi) by temporary file and rename, and free the figure."""
    import os
    import tempfile
    from pathlib import Path

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=".png", dir=path.parent)
    os.close(fd)
    try:
        fig.savefig(tmp, dpi=150, format="png")
        os.replace(tmp, path)
    finally:
        plt.close(fig)
        if os.path.exists(tmp):
            os.unlink(tmp)


def robustness_figure(results: Sequence[Mapping[str, Any]]) -> Figure:
    """Error index on each perturbed plant per entry (``compare`` dicts with ``draws``)."""
    fig, ax = _new(1, 1, 8.0, 0.45 * len(results) + 1.8)
    a = ax[0, 0]
    labels = [str(r["label"]) for r in results]
    finite = [
        float(d["error_index"])
        for r in results
        for d in r.get("draws", [])
        if d.get("feasible") and d.get("error_index") is not None
    ]
    top = max(finite, default=1.0) * 1.15
    first_plan = next((str(r["label"]) for r in results if r.get("kind") == "plan"), None)
    role = {
        str(r["label"]): {"osc": "osc", "joint_space": "joint"}.get(str(r.get("kind")), "")
        for r in results
    }
    if first_plan:
        role[first_plan] = "best"
    colors = plan_colors(labels, role)
    for i, r in enumerate(results):
        y = len(results) - 1 - i
        ok = [float(d["error_index"]) for d in r.get("draws", []) if d.get("feasible")]
        bad = sum(1 for d in r.get("draws", []) if not d.get("feasible"))
        a.plot(
            ok,
            [y] * len(ok),
            "o",
            ms=4,
            alpha=0.6,
            color=colors[labels[i]],
            label="feasible plant" if i == 0 else None,
        )
        if bad:
            a.annotate(
                f"{bad} infeasible",
                (top, y),
                xytext=(-6, 6),
                textcoords="offset points",
                ha="right",
                fontsize=7,
                color=OSC,
            )
            a.plot(
                [top] * bad,
                [y] * bad,
                "x",
                ms=6,
                color=OSC,
                label="infeasible plant"
                if not any(not d.get("feasible") for q in results[:i] for d in q.get("draws", []))
                else None,
            )
        if r.get("error_index") is not None:
            a.plot(
                [float(r["error_index"])],
                [y],
                "|",
                ms=16,
                mew=2,
                color=DATA,
                label="nominal plant" if i == 0 else None,
            )
    a.set_yticks(np.arange(len(results))[::-1], labels, fontsize=8)
    return _finish(fig, a, "error index [-]", "entry", "error on perturbed plants", axis="x")


def tornado_figure(doc: Mapping[str, Any], top: int = 14) -> Figure:
    """Change of the best plan's error index for each stepped plant parameter
    (``sensitivity.json``), largest first; a plant where the plan failed is marked."""
    rows = list(doc.get("rows") or [])[:top]
    fig, ax = _new(1, 1, 8.0, 0.32 * len(rows) + 1.8)
    a = ax[0, 0]
    y = np.arange(len(rows))[::-1]
    vals = [
        100.0 * float(r["error_change"]) if r.get("error_change") is not None else 0.0 for r in rows
    ]
    colors = [BEST if r.get("feasible") else OSC for r in rows]
    a.barh(y, vals, color=colors)
    a.set_yticks(y, [f"{r['parameter']} ({r['step']})" for r in rows], fontsize=8)
    a.axvline(0.0, color=DATA, lw=1)
    for yi, r in zip(y, rows):
        if not r.get("feasible"):
            a.annotate(
                "fails",
                (0.0, yi),
                xytext=(4, -3),
                textcoords="offset points",
                fontsize=7,
                color=OSC,
            )
    a.set_xlabel("change of the error index [%]")
    a.grid(True, axis="x", alpha=0.3)
    a.set_title(f"sensitivity of {doc.get('label')}")
    fig.tight_layout()
    return fig


def upgrade_figure(rows: Sequence[Mapping[str, Any]]) -> Figure:
    """Improvement of the best robust error with each joint's drive upgraded."""
    fig, ax = _new(1, 1, 8.0, 0.35 * len(rows) + 1.8)
    a = ax[0, 0]
    y = np.arange(len(rows))[::-1]
    vals = [
        100.0 * float(r["improvement"]) if r.get("improvement") is not None else 0.0 for r in rows
    ]
    a.barh(y, vals, color=BEST)
    a.set_yticks(
        y,
        [
            f"{r['joint']} ({r['bandwidth_hz']:.3g} → {r['upgraded_bandwidth_hz']:.3g} Hz)"
            for r in rows
        ],
        fontsize=8,
    )
    a.axvline(0.0, color=DATA, lw=1)
    a.set_xlabel("lower best robust error with this drive upgraded [%]")
    a.grid(True, axis="x", alpha=0.3)
    a.set_title("which drive to upgrade")
    fig.tight_layout()
    return fig


def validation_figure(
    dt: float, measured: np.ndarray, predicted: np.ndarray, calibrated: np.ndarray
) -> Figure:
    """Tip position error over time and its spectrum: the measured run against the
    prediction of the problem as given and of the calibrated plant."""
    from scipy.signal import welch

    fig, ax = _new(1, 2, 11.0, 3.6)
    t = np.arange(len(measured)) * dt
    for series, label, color in (
        (measured, "measured", DATA),
        (predicted, "predicted", OSC),
        (calibrated, "calibrated", BEST),
    ):
        k = min(len(series), len(t))
        ax[0, 0].plot(t[:k], series[:k], color=color, lw=1, label=label)
        f, P = welch(series - np.mean(series), fs=1.0 / dt, nperseg=min(256, len(series)))
        ax[0, 1].semilogy(f[1:], P[1:], color=color, lw=1, label=label)
    ax[0, 0].set_xlabel("time after the settling window [s]")
    ax[0, 0].set_ylabel("tip position error [mm]")
    ax[0, 1].set_xlabel("frequency [Hz]")
    ax[0, 1].set_ylabel("error spectrum [mm²/Hz]")
    for a in ax[0]:
        a.grid(True, alpha=0.3)
        a.legend(fontsize=8)
    fig.suptitle("measured against predicted tip error")
    fig.tight_layout()
    return fig
