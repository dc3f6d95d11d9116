"""Scoring a controller over a problem's trajectories: the error index, aggregation,
feasibility and its reason, early stop, the JSON form."""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
from problems import planar_variant

from optimizer.evaluate import (
    evaluate,
    joint_gains_text,
    osc_plan,
    plan_controller,
    score_plan,
    trajectory_error,
)
from optimizer.metrics import TrackMetrics
from optimizer.plan import load_plan
from optimizer.problem import load_problem

ROOT = Path(__file__).resolve().parents[1]
PLANAR = ROOT / "problems" / "planar3" / "problem.toml"
TWO_TIER = ROOT / "problems" / "planar3" / "plans" / "two-tier.toml"


@pytest.fixture(scope="module")
def planar():
    return load_problem(PLANAR)


@pytest.fixture(scope="module")
def two_tier(planar):
    return score_plan(planar, load_plan(TWO_TIER, planar.arm.joint_names))


def test_the_error_index_of_a_trajectory_is_the_weighted_normalised_rms(planar) -> None:
    m = TrackMetrics(pos_rms_mm=2.0, pos_max_mm=5.0, rot_rms_deg=0.05, rot_max_deg=0.2,
                     tau_rms_nm=1.0, peak_torque_ratio=0.1, path_at_mm=None)
    s = planar.scoring  # 1 mm and 0.1° scales, unit weights
    assert trajectory_error(planar, m) == pytest.approx(2.0 / 1.0 + 0.05 / 0.1)
    heavy = dataclasses.replace(
        planar, scoring=dataclasses.replace(s, pos_weight=3.0, rot_weight=0.0)
    )
    assert trajectory_error(heavy, m) == pytest.approx(6.0)


def test_a_score_aggregates_its_trajectories(planar, two_tier) -> None:
    s = two_tier
    per = s.trajectories
    assert [t.name for t in per] == ["reach", "wave"] and s.feasible and s.reason is None
    for t in per:
        assert t.error_index == pytest.approx(trajectory_error(planar, t.metrics), rel=1e-12)
    assert s.error_index == pytest.approx(np.mean([t.error_index for t in per]), rel=1e-12)
    assert s.pos_rms_mm == pytest.approx(np.mean([t.metrics.pos_rms_mm for t in per]))
    assert s.pos_max_mm == max(t.metrics.pos_max_mm for t in per)
    assert s.steps == sum(t.steps for t in per) == 2 * 1201  # 1.2 s at 1 kHz, both ends
    # the set's margins are the worst trajectory's
    assert s.stiffness_margin == min(t.margins.stiffness for t in per)
    assert s.delay_margin_ms == min(t.margins.delay_ms for t in per)
    assert s.kind == "plan" and s.tiers == 2


def test_worst_aggregation(tmp_path: Path, two_tier) -> None:
    f = planar_variant(tmp_path, ("rot_scale_deg = 0.1", 'rot_scale_deg = 0.1\naggregate = "worst"'))
    worst = load_problem(f)
    s = score_plan(worst, load_plan(TWO_TIER, worst.arm.joint_names))
    assert s.error_index == pytest.approx(max(t.error_index for t in two_tier.trajectories),
                                          rel=1e-12)


def test_a_margin_below_the_minimum_makes_it_infeasible_and_says_where(tmp_path: Path) -> None:
    f = planar_variant(tmp_path, ("margin_samples = 2", "margin_samples = 2\nmin_stiffness_margin = 99.0"))
    strict = load_problem(f)
    s = score_plan(strict, load_plan(TWO_TIER, strict.arm.joint_names))
    assert not s.feasible and s.reason.startswith("on 'reach': ")
    assert "stiffness" in s.reason
    assert math.isfinite(s.error_index)  # it ran: the error is known, the plan is rejected


def test_a_diverging_plan_stops_early_when_asked(planar) -> None:
    plan = osc_plan(planar, 2e5, 2e5, 0.8)
    ctrl = plan_controller(planar, plan, kind="osc")
    s = evaluate(planar, ctrl, "stiff", compute_margin=False, stop_on_failure=True)
    assert len(s.trajectories) == 1 and s.trajectories[0].diverged
    assert not s.feasible and s.reason.startswith("on 'reach': ")
    assert s.error_index == math.inf
    full = evaluate(planar, plan_controller(planar, plan, kind="osc"), "stiff",
                    compute_margin=False)
    assert len(full.trajectories) == 2
    d = s.to_dict()  # JSON-ready: inf and nan become None
    assert d["error_index"] is None and d["stiffness_margin"] is None
    assert d["trajectories"][0]["diverged"] is True


def test_joint_gains_in_one_line() -> None:
    assert joint_gains_text((400.0, 400.0, 400.0), 0.8) == "joint PD kp 400 z0.8"
    assert joint_gains_text((513.0, 4130.0), 0.75) == "joint PD kp 513/4.13e+03 z0.75"
