"""The gain ladder, its suggested plan, and informed and tuned baselines."""

from __future__ import annotations

import itertools
import math
from pathlib import Path

import pytest
from problems import ROOT, write_slider_problem

from optimizer import ladder
from optimizer.evaluate import osc_plan, plan_controller
from optimizer.problem import load_problem
from optimizer.robust import evaluate_robust, plant_set


def test_the_second_rung_drops_the_one_slow_joint(planar) -> None:
    """Planar arm, 6 Hz shoulder and 60 Hz elbow and wrist: rung 1 is every joint (capped by
    the shoulder), rung 2 exactly the elbow and wrist, and it carries a far stiffer loop."""
    rungs = ladder.gain_ladder(planar)
    names = planar.arm.joint_names
    assert [tuple(names[j] for j in r.joints) for r in rungs] == [
        ("shoulder", "elbow", "wrist"),
        ("elbow", "wrist"),
    ]
    assert rungs[0].slowest == "shoulder" and rungs[1].slowest_hz == pytest.approx(60.0)
    assert rungs[1].limit > 5 * rungs[0].limit > 0
    plan = ladder.suggested_plan(planar, rungs)
    assert plan is not None and len(plan.tiers) == 2
    assert plan.tiers[0].kp_t == pytest.approx(ladder.FRACTION * rungs[0].limit)


def test_a_single_axis_rung_matches_routh_hurwitz(tmp_path) -> None:
    """Unit mass, task PD through a first-order actuator τ = 1/(2π·10 Hz), ζ = 0.8: the loop
    is stable up to kp = (2ζ/τ)² (Routh–Hurwitz on τs³ + s² + kd s + kp; tests/REFERENCES.md
    §5, checked). With the default minimum stiffness margin of 2× the rung's limit is half
    that, 5053 1/s² (the bandwidth margin of 1.25× allows (2ζ/(1.25τ))² = 6468, and one
    20 µs period of delay costs well under 1 %), within the ladder's 3 % resolution."""
    prob = load_problem(write_slider_problem(tmp_path, corner_hz=10.0, rate_hz=50000.0))
    tau = 1.0 / (2 * math.pi * 10.0)
    boundary = (2 * ladder.ZETA / tau) ** 2
    assert boundary / 2 == pytest.approx(5053.0, rel=1e-3)
    (rung,) = ladder.gain_ladder(prob)
    assert rung.limit == pytest.approx(boundary / 2, rel=0.03)
    assert rung.limit <= boundary / 2 * 1.005  # the bisection keeps the side that holds


def test_the_suggested_demo_plan_is_robust_and_beats_the_untuned_osc(demo) -> None:
    """On the demo the ladder suggests three tiers (every joint; the 25 and 80 Hz joints;
    the 80 Hz wrist on orientation); the plan is feasible on the demo's perturbed plants and
    its robust error is below that of the problem's untuned [baseline] OSC gains."""
    plan = ladder.suggested_plan(demo)
    assert plan is not None and len(plan.tiers) == 3
    assert plan.tiers[2].kp_t == 0.0 and plan.tiers[2].kp_r > 0.0
    plants = plant_set(demo, demo.perturb.plants)
    mine = evaluate_robust(demo, plants, lambda p: plan_controller(p, plan), "ladder")
    b = demo.baseline
    base = osc_plan(demo, b.osc_kp_t, b.osc_kp_r, b.osc_zeta)
    theirs = evaluate_robust(
        demo, plants, lambda p: plan_controller(p, base, kind="osc"), "baseline"
    )
    assert mine.feasible
    assert mine.robust_error < 0.5 * theirs.robust_error


def test_informed_joint_gains_follow_the_bandwidths(demo) -> None:
    """Informed joint-space stiffness grows with each drive's bandwidth (the rule
    (2ζ/(τ+d))²) and holds the minimum margins at the home pose."""
    kp, zeta = ladder.informed_joint_gains(demo)
    bw = [a.model.bandwidth_hz() for a in demo.actuators]
    order = sorted(range(demo.arm.n), key=lambda j: bw[j])
    assert all(kp[a] <= kp[b] + 1e-9 for a, b in itertools.pairwise(order))
    dev, frac = ladder.joint_to_coords(demo, kp, zeta)
    assert frac == pytest.approx(ladder.FRACTION, rel=1e-6)
    again = ladder.joint_from_coords(demo, zeta, dev, frac)
    assert again == pytest.approx(kp, rel=1e-9)


@pytest.mark.parametrize(
    "problem_file", sorted(str(p) for p in Path(ROOT / "problems").glob("*/problem.toml"))
)
def test_tuned_baselines_are_never_worse_than_the_baseline_gains(problem_file, tmp_path) -> None:
    """Whatever the budget, a tuned baseline's robust error is no worse than that of the
    problem's own [baseline] gains (they are evaluated first), for every problem shipped."""
    from optimizer import search as srch
    from optimizer.runs import baseline_seeds

    prob = load_problem(problem_file)
    for kind in ("osc", "joint_space"):
        seeds = baseline_seeds(prob, kind)
        assert seeds[0][1]["source"] == "baseline"
        study = srch.run_search(
            prob, str(tmp_path / "b.journal"), f"t.{kind}", kind, len(seeds) + 1, seed=0,
            enqueue=seeds,
        )
        first = next(t for t in study.trials if t.user_attrs.get("source") == "baseline")
        best = srch.best_value(study)
        if srch.feasible(first):
            assert best is not None and best <= first.values[0]


@pytest.mark.parametrize("kind", ["osc", "joint_space"])
def test_one_linearisation_finds_the_same_boundary_as_one_per_gain(demo, kind) -> None:
    """A single-tier baseline's gains scale as k (stiffness) and √k (damping), so its
    boundary search linearises once and scales (``highest_scaled``); it must give the
    boundary the per-k linearisation gives, bit for bit (48 of 48 random baselines on
    four problems did when it was written)."""
    import numpy as np

    from optimizer.evaluate import joint_controller
    from optimizer.plan import Plan, Tier

    prob = demo
    n = prob.arm.n
    rng = np.random.default_rng(11)
    for _ in range(2):
        zeta = float(rng.uniform(0.5, 1.0))
        if kind == "osc":
            ratio = float(rng.uniform(0.2, 5.0))

            def make(k: float, zeta=zeta, ratio=ratio):  # type: ignore[no-untyped-def]
                tier = Tier(tuple(range(n)), k, ratio * k, zeta)
                return plan_controller(prob, Plan((tier,), joint_names=prob.arm.joint_names),
                                       kind="osc")

            lo, hi = ladder.K_RANGE
        else:
            shape = ladder.joint_gain_shape(prob) * np.exp(rng.uniform(-1.0, 1.0, n))
            shape = shape / shape.max()

            def make(c: float, zeta=zeta, shape=shape):  # type: ignore[no-untyped-def]
                return joint_controller(prob, c * shape, zeta)

            lo, hi = 1e-3, 1e6
        a = ladder.highest_stiffness(prob, make, lo, hi)
        assert a > 0
        assert ladder.highest_scaled(prob, make, lo, hi) == a
