"""Sensitivities of a plan and upgrade advice."""

from __future__ import annotations

import pytest
from problems import PLANAR_PLANS, ROOT

from optimizer.advice import sensitivities, stepped_plants, upgrade_advice, upgraded
from optimizer.evaluate import plan_controller
from optimizer.plan import load_plan
from optimizer.problem import load_problem


def test_stepped_plants_change_one_thing_each(planar) -> None:
    """One step for the payload and three per joint, each changing exactly what it names."""
    steps = stepped_plants(planar)
    assert len(steps) == 1 + 3 * planar.arm.n
    names = [s[0] for s in steps]
    assert names[0] == "payload" and "delay:shoulder" in names and "bandwidth:wrist" in names
    for name, _, p in steps[1:]:
        kind, joint = name.split(":")
        for a0, a1 in zip(planar.actuators, p.actuators, strict=True):
            if a0.joint != joint:
                assert a1 == a0
            elif kind == "delay":
                assert a1.delay_ticks == a0.delay_ticks + 1
            elif kind == "bandwidth":
                assert a1.model.bandwidth_hz() < a0.model.bandwidth_hz()
            else:
                assert a1.coulomb_nm > a0.coulomb_nm


def test_sensitivities_of_the_planar_two_tier_plan(planar) -> None:
    """A heavier payload raises the error; one more period of delay on some joint lowers
    the delay margin (of every joint at once) by a good part of that period; rows come
    largest change first."""
    plan = load_plan(PLANAR_PLANS / "two-tier.toml", planar.arm.joint_names)
    base, rows = sensitivities(planar, lambda p: plan_controller(p, plan), "two tiers")
    by = {r.parameter: r for r in rows}
    assert by["payload"].error_change > 0
    delays = [r.delay_margin_ms for r in rows if r.parameter.startswith("delay:")]
    assert min(delays) < base.delay_margin_ms - 0.3
    changes = [r.error_change for r in rows]
    assert changes == sorted(changes, reverse=True)


def test_upgrade_keeps_the_delay_and_stays_below_nyquist(planar) -> None:
    """An upgraded drive is faster by the factor (held below Nyquist); its delay stays."""
    up = upgraded(planar, "shoulder", 2.0)
    a0 = next(a for a in planar.actuators if a.joint == "shoulder")
    a1 = next(a for a in up.actuators if a.joint == "shoulder")
    assert a1.model.bandwidth_hz() == pytest.approx(2 * a0.model.bandwidth_hz())
    assert a1.delay_ticks == a0.delay_ticks
    fast = upgraded(planar, "elbow", 100.0)
    assert next(a for a in fast.actuators if a.joint == "elbow").model.fastest_hz() < 500.0


def test_the_slow_wrist_tops_the_upgrade_list() -> None:
    """On the 6-joint arm whose slowest drive is wrist_pitch (12 Hz; the others 60-120 Hz),
    upgrading wrist_pitch lowers the best error most (nominal plant only, to keep the
    default run short; the slow test below uses the robust objective on the demo)."""
    import dataclasses

    prob = load_problem(ROOT / "problems" / "inspect6" / "problem.toml")
    prob = dataclasses.replace(prob, perturb=dataclasses.replace(prob.perturb, plants=0))
    plans = [
        load_plan(ROOT / "problems" / "inspect6" / "plans" / f, prob.arm.joint_names)
        for f in ("osc.toml", "five-joint.toml")
    ]
    rows = upgrade_advice(prob, plans, 2.0)
    assert rows[0].joint == "wrist_pitch"
    assert rows[0].improvement > 0.1
    assert rows[0].upgraded_bandwidth_hz == pytest.approx(2 * rows[0].bandwidth_hz, rel=0.01)

