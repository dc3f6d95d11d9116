"""The report of a run, its figures, and ``score --from`` / ``compare --from`` on a run folder."""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
from problems import PLANAR, PLANAR_PLANS

from optimizer import figures as fg
from optimizer.cli import main
from optimizer.report import SAFETY_FULL


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """A small planar search with --figures (report written at the end)."""
    root = tmp_path_factory.mktemp("run")
    out = root / "planar-run"
    rc = main(
        ["search", str(PLANAR), "--trials", "12", "--baseline-trials", "6", "--seed", "3",
         "--storage", str(root / "s.journal"), "--out", str(out), "--figures",
         "--plan", str(PLANAR_PLANS / "two-tier.toml")]
    )  # fmt: skip
    assert rc == 0
    return out


def _md_rows(text: str) -> list[list[str]]:
    part = text.split("## Ranking", 1)[1].split("\n\n", 2)[1]
    rows = [ln.strip("|").split("|") for ln in part.splitlines() if ln.startswith("| ")]
    return [[c.strip() for c in r] for r in rows[1:]]  # without the header


def test_report_embeds_existing_pngs_and_the_safety_text(run):
    """report.md exists, every image it embeds is a PNG file beside it, the cautions are whole."""
    text = (run / "report.md").read_text()
    images = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", text)
    assert {"fig-error.png", "fig-torque.png", "fig-spectrum.png", "fig-history.png",
            "fig-margin.png"} <= set(images)  # fmt: skip
    for name in images:
        assert (run / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", name
    assert SAFETY_FULL in text and "Simulation only" in text
    assert "## Problem" in text and "planar3" in text


def test_report_table_has_the_numbers_of_ranking_json(run):
    """Each row of the report's table carries the ranking.json numbers (3 significant digits)."""
    ranking = json.loads((run / "ranking.json").read_text())
    rows = _md_rows((run / "report.md").read_text())
    assert len(rows) == len(ranking)
    cols = {"p90_error": (5, 5e-3), "worst_error": (6, 5e-3), "error_index": (7, 5e-3),
            "pos_rms_mm": (8, 5e-3), "rot_rms_deg": (9, 5e-3), "stiffness_margin": (10, 5e-2),
            "bandwidth_margin": (12, 5e-2), "peak_torque_ratio": (13, 5e-3)}  # fmt: skip
    for row, e in zip(rows, ranking, strict=True):
        assert row[0] == str(e["rank"]) and row[1] == e["label"]
        for key, (i, rel) in cols.items():
            assert float(row[i].lstrip("≥")) == pytest.approx(e[key], rel=rel), (key, row)
    best = next(e for e in ranking if e["kind"] == "plan")
    pct = round(abs(best["vs_tuned_osc"]) * 100)
    side = "below" if best["vs_tuned_osc"] < 0 else "above"
    text = (run / "report.md").read_text()
    assert f"{pct} % {side} tuned single-tier OSC" in text or pct == 0
    assert "Its margins: every stiffness may grow" in text


def test_score_from_reproduces_the_run_exactly(run, capsys):
    """score --from re-simulates every ranked entry and finds the ranking.json numbers."""
    capsys.readouterr()
    assert main(["score", "--from", str(run)]) == 0
    assert "reproduced" in capsys.readouterr().out


def test_score_from_notices_a_changed_number(run, tmp_path, capsys):
    """A ranking.json whose number was edited is reported as not reproduced, exit code 1."""
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(run, copy)
    ranking = json.loads((copy / "ranking.json").read_text())
    ranking[0]["error_index"] *= 1.0 + 1e-9
    (copy / "ranking.json").write_text(json.dumps(ranking))
    capsys.readouterr()
    assert main(["score", "--from", str(copy)]) == 1
    assert f"rank 1 {ranking[0]['label']} differs" in capsys.readouterr().out


def test_compare_from_adds_robustness_to_the_report(run, capsys):
    """compare --from writes robustness.json into the run; the report then shows its table."""
    text = (run / "report.md").read_text()
    assert "has not been checked on plants drawn after the search" in text
    assert main(["compare", str(PLANAR), "--from", str(run), "--perturb", "2", "--seed", "9"]) == 0
    rob = json.loads((run / "robustness.json").read_text())
    assert rob["seed"] == 9 and rob["plants"] == 2
    assert {r["kind"] for r in rob["entries"]} >= {"plan", "osc", "joint_space"}
    assert main(["report", str(run)]) == 0
    text = (run / "report.md").read_text()
    assert "2 perturbed plants" in text and (run / "fig-robustness.png").is_file()
    assert "drawn after the search (seed 9) it stays feasible on" in text


def test_report_bad_folder_is_one_line(tmp_path, capsys):
    """A folder without run.json gives one line naming the file."""
    assert main(["report", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "run.json" in err and "Traceback" not in err


# -- figure functions on matplotlib objects ------------------------------------------
@pytest.fixture(scope="module")
def rollouts(planar):
    from optimizer.evaluate import score_joint_baseline, score_osc_baseline, score_plan
    from optimizer.plan import load_plan

    plan = load_plan(PLANAR_PLANS / "two-tier.toml", planar.arm.joint_names)
    out = {}
    for label, fn in (
        ("two-tier", lambda kw: score_plan(planar, plan, **kw)),
        ("osc", lambda kw: score_osc_baseline(planar, **kw)),
        ("joint", lambda kw: score_joint_baseline(planar, **kw)),
    ):
        keep: list = []
        fn({"keep_rollouts": keep, "compute_margin": False})
        out[label] = keep
    return out


def _labelled(ax) -> bool:
    return bool(ax.get_xlabel()) and bool(ax.get_ylabel())


def test_error_figure_one_line_per_plan(planar, rollouts):
    """A row per trajectory, a position and an orientation panel, one labelled line per plan."""
    colors = fg.plan_colors(list(rollouts), {"two-tier": "best", "osc": "osc", "joint": "joint"})
    fig = fg.error_figure(list(rollouts.items()), colors)
    axes = fig.get_axes()
    assert len(axes) == 2 * len(planar.references)
    for ax in axes:
        assert _labelled(ax)
        assert [ln.get_label() for ln in ax.get_lines()] == list(rollouts)
    assert axes[0].get_lines()[1].get_color() == fg.OSC  # the same colour in every figure


def test_torque_figure_tiers_command_and_limits(planar, rollouts):
    """One panel per joint: a line per tier, the command, and ± limit lines where in range."""
    ro = rollouts["two-tier"][0]
    limits = [a.effort_nm for a in planar.actuators]
    fig = fg.torque_figure(ro, planar.arm.joint_names, limits)
    axes = fig.get_axes()
    assert len(axes) == planar.arm.n
    n_tiers = ro.tier_tau.shape[1]
    for j, ax in enumerate(axes):
        labels = [ln.get_label() for ln in ax.get_lines()]
        assert labels[: n_tiers + 1] == [f"tier {k + 1}" for k in range(n_tiers)] + [
            "command (tiers + model terms, limited)"
        ]
        assert ax.get_ylabel().endswith("[N·m]")
        lo, hi = ax.get_ylim()
        peak = max(np.abs(ro.tau_cmd[:, j]).max(), np.abs(ro.tier_tau[:, :, j]).max())
        assert hi >= peak and lo <= -peak  # nothing drawn off the panel
    assert axes[-1].get_xlabel() == "time [s]"


def test_spectrum_figure_marks_bandwidth(planar, rollouts):
    """A PSD line per plan in each joint's panel and that actuator's bandwidth marked."""
    series = [("two-tier", rollouts["two-tier"]), ("osc", rollouts["osc"])]
    bws = [a.model.bandwidth_hz() for a in planar.actuators]
    fig = fg.spectrum_figure(series, fg.plan_colors(["two-tier", "osc"]), planar.arm.joint_names,
                             bws, planar.dt)  # fmt: skip
    visible = [ax for ax in fig.get_axes() if ax.get_visible()]
    assert len(visible) == planar.arm.n
    for ax, bw in zip(visible, bws, strict=True):
        lines = ax.get_lines()
        assert [ln.get_label() for ln in lines[:2]] == ["two-tier", "osc"]
        assert lines[2].get_xdata()[0] == pytest.approx(bw)
        assert _labelled(ax)


def test_psd_of_a_sine_peaks_at_its_frequency():
    """Welch PSD (scipy.signal.welch) of a 37 Hz command peaks within one bin of 37 Hz."""
    from optimizer.simulate import Rollout

    t = np.arange(0, 2.0, 1e-3)
    tau = np.sin(2 * np.pi * 37.0 * t)[:, None]
    ro = Rollout(name="s", t=t, e=np.zeros((t.size, 6)), tau_cmd=tau, tau_del=tau,
                 tier_tau=np.zeros((t.size, 1, 1)), q=tau, v=tau, p=tau, p_ref=tau, v_ref=tau,
                 diverged=False, reason=None, steps=t.size)  # fmt: skip
    f, P = fg.torque_psd([ro], 1e-3)
    assert abs(f[np.argmax(P[:, 0])] - 37.0) <= f[1] - f[0]


def test_history_margin_and_pareto_figures():
    """Search history: one step line per study; margins: one bar per entry; Pareto: pick marked."""
    rows = [
        {"kind": k, "number": i, "value": v, "value_2": v2, "feasible": f}
        for k, i, v, v2, f in [
            ("plan", 0, 3.0, 10.0, True), ("plan", 1, 2.0, 12.0, True),
            ("plan", 2, 1e6, None, False), ("plan", 3, 2.5, 9.0, True),
            ("osc", 0, 4.0, None, True), ("joint_space", 0, 6.0, None, True),
        ]
    ]  # fmt: skip
    kinds = {"plan": fg.BEST, "osc": fg.OSC, "joint_space": fg.JOINT}
    ax = fg.history_figure(rows, kinds).get_axes()[0]
    assert len(ax.get_lines()) == 3 and _labelled(ax)
    plan_line = ax.get_lines()[0]
    assert list(plan_line.get_ydata()) == [3.0, 2.0, 2.0, 2.0]  # best so far, infeasible skipped
    from optimizer.stability import MarginLimits

    entries = [
        {"rank": 1, "label": "a", "stiffness_margin": 3.0, "delay_margin_ms": 4.0,
         "bandwidth_margin": 1.8},
        {"rank": 2, "label": "b", "stiffness_margin": 2.1, "delay_margin_ms": 1.5,
         "bandwidth_margin": 1.3},
    ]  # fmt: skip
    axes = fg.margin_figure(
        [e["label"] for e in entries],
        [(e["stiffness_margin"], e["delay_margin_ms"], e["bandwidth_margin"]) for e in entries],
        {"a": fg.BEST}, MarginLimits(),
    ).get_axes()
    assert len(axes) == 3
    for a in axes:
        assert len(a.patches) == 2 and a.get_xlabel()
        assert len(a.get_lines()) == 1  # the minimum
    ax = fg.pareto_figure(rows, "effort", chosen_trial=1).get_axes()[0]
    labels = [ln.get_label() for ln in ax.get_lines()]
    assert labels == ["feasible trials", "Pareto front", "chosen (trial 1)"]
    front = ax.get_lines()[1]
    assert list(front.get_xdata()) == [2.0, 2.5]  # (3, 10) is dominated by (2.5, 9)


def test_two_objective_report_has_the_pareto_figure(tmp_path):
    """A two-objective run's report embeds the Pareto figure and marks the front in its table."""
    out = tmp_path / "pareto-run"
    rc = main(
        ["search", str(PLANAR), "--trials", "10", "--baseline-trials", "4", "--seed", "4",
         "--objectives", "error,effort", "--storage", str(tmp_path / "s.journal"),
         "--out", str(out), "--figures"]
    )  # fmt: skip
    assert rc == 0
    text = (out / "report.md").read_text()
    assert "(fig-pareto.png)" in text and (out / "fig-pareto.png").is_file()
    assert "| Pareto |" in text
