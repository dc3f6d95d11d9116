"""Perturbed plants and robustness figures."""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
from problems import PLANAR, PLANAR_PLANS

from optimizer.cli import main
from optimizer.compare import Robustness, compare, perturbed
from optimizer.evaluate import plan_controller
from optimizer.plan import load_plan


def test_perturbed_plants_stay_within_the_spreads(planar) -> None:
    """Bandwidths, delays, payload and friction move, but only within the [perturb] spreads."""
    rng = np.random.default_rng(0)
    sp = planar.perturb
    for i in range(10):
        p = perturbed(planar, rng, i)
        for a0, a1 in zip(planar.actuators, p.actuators, strict=True):
            r = a1.model.bandwidth_hz() / a0.model.bandwidth_hz()
            assert 1 - sp.bandwidth_rel - 1e-12 <= r <= 1 + sp.bandwidth_rel + 1e-12
            assert abs(a1.delay_ticks - a0.delay_ticks) <= sp.delay_ticks
            assert a1.delay_ticks >= 0
        m = p.arm.deviation.payload_kg / planar.arm.deviation.payload_kg
        assert 1 - sp.payload_rel <= m <= 1 + sp.payload_rel
        assert p.sim.seed != planar.sim.seed
        assert p.arm.model is not None and p.arm.plant_model is not planar.arm.plant_model


def test_zero_spread_only_changes_the_noise(planar) -> None:
    """With every spread 0 a perturbed run differs from the nominal only by its noise seed."""
    flat = dataclasses.replace(
        planar,
        perturb=dataclasses.replace(
            planar.perturb, bandwidth_rel=0.0, delay_ticks=0, payload_rel=0.0, friction_rel=0.0
        ),
    )
    plan = load_plan(PLANAR_PLANS / "two-tier.toml", planar.arm.joint_names)
    (res,) = compare(flat, [("p", "", lambda pr: plan_controller(pr, plan))], 2)
    assert isinstance(res, Robustness)
    assert res.feasible_fraction == 1.0
    for d in res.draws:
        assert d.error_index == pytest.approx(res.nominal.error_index, rel=0.15)
        assert d.error_index != res.nominal.error_index


def test_robustness_statistics() -> None:
    """Mean over feasible draws; p90 and worst count an infeasible draw as inf."""
    from types import SimpleNamespace as S

    draws = tuple(S(feasible=f, error_index=e) for f, e in [(True, 1.0), (True, 3.0), (False, 2.0)])
    r = Robustness(nominal=None, draws=draws)  # type: ignore[arg-type]
    assert r.feasible_fraction == pytest.approx(2 / 3)
    assert r.mean_error == pytest.approx(2.0)
    assert r.worst_error == float("inf")
    assert r.p90_error == float("inf")


def test_compare_command_writes_json(tmp_path, capsys) -> None:
    """compare --perturb prints the table and writes per-plan robustness figures."""
    out = tmp_path / "cmp.json"
    rc = main(
        [
            "compare",
            str(PLANAR),
            str(PLANAR_PLANS / "osc.toml"),
            str(PLANAR_PLANS / "two-tier.toml"),
            "--perturb",
            "3",
            "--json",
            str(out),
        ]
    )
    assert rc == 0
    rows = json.loads(out.read_text())
    assert [r["label"] for r in rows] == ["single-tier OSC kp 1000", "two tiers"]
    for r in rows:
        assert r["perturbed"] == 3 and len(r["draws"]) == 3
        assert 0.0 <= r["feasible_fraction"] <= 1.0
    assert rows[1]["mean_error"] < rows[0]["mean_error"]
    text = capsys.readouterr().out
    assert "perturbed plants" in text and "Simulation only" in text
