"""Tiers with fewer joints than the task has axes, on an invented non-redundant 6-joint arm
with one slow wrist drive (problems/inspect6)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from problems import ROOT
from test_stability import _hold_problem, _scaled

from optimizer import ladder
from optimizer.evaluate import make_loop, plan_controller, score_plan
from optimizer.plan import load_plan
from optimizer.problem import load_problem
from optimizer.stability import LinearLoop

INSPECT = ROOT / "problems" / "inspect6"


@pytest.fixture(scope="module")
def inspect6():
    return load_problem(INSPECT / "problem.toml")


@pytest.mark.parametrize("plan_file", ["five-joint.toml", "wrist-orientation.toml"])
def test_short_tiers_are_feasible_and_beat_single_tier_osc(inspect6, plan_file) -> None:
    """A stiff tier through the five fast joints (six task axes), or through the two fast
    wrist joints on orientation (three rotation axes), on top of every joint at the gain
    the slow wrist_pitch holds: feasible with the minimum margins, and both position and
    orientation errors below single-tier OSC at that same gain."""
    plan = load_plan(INSPECT / "plans" / plan_file, inspect6.arm.joint_names)
    assert len(plan.tiers[1].joints) < 6
    osc = score_plan(inspect6, load_plan(INSPECT / "plans" / "osc.toml", inspect6.arm.joint_names))
    s = score_plan(inspect6, plan)
    assert s.feasible, s.reason
    assert s.pos_rms_mm < osc.pos_rms_mm and s.rot_rms_deg < 0.5 * osc.rot_rms_deg


@pytest.mark.parametrize("plan_file", ["five-joint.toml", "wrist-orientation.toml"])
def test_short_tier_margin_predicts_the_simulation(inspect6, plan_file) -> None:
    """Holding the home pose (Coulomb friction off, as in test_stability): every stiffness
    at 0.9× the stiffness margin holds; at 1.1× a mode grows until it saturates. The run
    lasts until the 1.1× loop's spectral radius would grow a disturbance 10⁴ times."""
    plan = load_plan(INSPECT / "plans" / plan_file, inspect6.arm.joint_names)
    short = _hold_problem(inspect6, 1.0)
    loop = make_loop(short, plan_controller(short, plan))
    k, st = loop.rollout(short.references[0]).snapshots[-1]
    margin = LinearLoop(loop, k, st).stiffness_margin()
    up = make_loop(short, plan_controller(short, _scaled(plan, 1.1 * margin)))
    up.controller.bind(short.references[0])
    rho = LinearLoop(up, k, st).radius()
    assert rho > 1.0
    prob = _hold_problem(inspect6, max(3.0, math.log(1e4) / math.log(rho) * inspect6.dt))
    late = {}
    for s in (0.9, 1.1):
        r = make_loop(prob, plan_controller(prob, _scaled(plan, s * margin))).rollout(
            prob.references[0]
        )
        err = np.maximum(
            np.linalg.norm(r.e[:, :3], axis=1) / 1e-3,
            np.linalg.norm(r.e[:, 3:], axis=1) / math.radians(0.1),
        )
        late[s] = math.inf if r.diverged else float(err[-int(0.5 / inspect6.dt) :].max())
    assert late[0.9] < 5.0
    assert late[1.1] > 10.0 * late[0.9]


def test_the_ladder_finds_the_five_joint_tier(inspect6) -> None:
    """The ladder's second rung is every joint but the slow wrist_pitch and carries a far
    stiffer loop; the suggested plan uses it and beats single-tier OSC at its own tier-1
    gains. (It does not beat the best single-tier OSC there: three parallel pitch axes let
    OSC carry a stiff orientation loop without leaning on wrist_pitch; see the README.)"""
    rungs = ladder.gain_ladder(inspect6)
    names = inspect6.arm.joint_names
    assert "wrist_pitch" not in {names[j] for j in rungs[1].joints}
    assert len(rungs[1].joints) == 5 and rungs[1].limit > 4 * rungs[0].limit
    plan = ladder.suggested_plan(inspect6, rungs)
    from optimizer.evaluate import osc_plan

    t1 = plan.tiers[0]
    mine = score_plan(inspect6, plan)
    osc = score_plan(inspect6, osc_plan(inspect6, t1.kp_t, t1.kp_r, t1.zeta))
    assert len(plan.tiers) >= 2 and mine.feasible and osc.feasible
    assert mine.error_index < 0.7 * osc.error_index
