"""Perturbed plants, the robust statistics, and compare side by side."""

from __future__ import annotations

import dataclasses
import json
import math
from types import SimpleNamespace as S

import numpy as np
import pytest
from problems import PLANAR, PLANAR_PLANS

from optimizer.cli import main
from optimizer.compare import compare
from optimizer.evaluate import osc_plan, plan_controller
from optimizer.plan import load_plan
from optimizer.robust import RobustScore, evaluate_robust, perturbed, plant_set, statistic
from optimizer.stability import MarginLimits


def test_perturbed_plants_stay_within_the_spreads(planar) -> None:
    """Bandwidths, delays, payload mass and position and friction move, but only within the
    [perturb] spreads; each plant gets its own noise seed and plant model."""
    rng = np.random.default_rng(0)
    sp = planar.perturb
    for i in range(10):
        p = perturbed(planar, rng, i)
        for a0, a1 in zip(planar.actuators, p.actuators, strict=True):
            r = a1.model.bandwidth_hz() / a0.model.bandwidth_hz()
            assert 1 - sp.bandwidth_rel - 1e-12 <= r <= 1 + sp.bandwidth_rel + 1e-12
            assert abs(a1.delay_ticks - a0.delay_ticks) <= sp.delay_ticks
            assert a1.delay_ticks >= 0
            assert 1 - sp.friction_rel <= a1.coulomb_nm / a0.coulomb_nm <= 1 + sp.friction_rel
        m = p.arm.deviation.payload_kg / planar.arm.deviation.payload_kg
        assert 1 - sp.payload_rel <= m <= 1 + sp.payload_rel
        off = np.subtract(p.arm.deviation.payload_offset_m, planar.arm.deviation.payload_offset_m)
        assert np.all(np.abs(off) <= sp.payload_offset_m)
        assert p.sim.seed != planar.sim.seed
        assert p.arm.plant_model is not planar.arm.plant_model


def test_the_corner_plant_sits_at_the_worst_edge_of_every_spread(planar) -> None:
    """The search's own set starts with the worst corner for stability (slowest drives, one
    more delay period, heaviest payload, least friction); a check drawn with another seed
    has no corner, only random plants."""
    sp = planar.perturb
    own = plant_set(planar, 3)
    c = own[0]
    for a0, a1 in zip(planar.actuators, c.actuators, strict=True):
        assert a1.model.bandwidth_hz() == pytest.approx(a0.model.bandwidth_hz() * (1 - sp.bandwidth_rel))
        assert a1.delay_ticks == a0.delay_ticks + sp.delay_ticks
        assert a1.coulomb_nm == pytest.approx(a0.coulomb_nm * (1 - sp.friction_rel))
    assert c.arm.deviation.payload_kg == pytest.approx(
        planar.arm.deviation.payload_kg * (1 + sp.payload_rel)
    )
    other = plant_set(planar, 3, seed=sp.seed + 1)
    assert all(
        any(a1.delay_ticks != a0.delay_ticks + sp.delay_ticks
            for a0, a1 in zip(planar.actuators, p.actuators, strict=True))
        or p.arm.deviation.payload_kg != c.arm.deviation.payload_kg
        for p in other
    )


def test_the_plant_set_is_fixed_by_its_seed(planar) -> None:
    """The same seed gives the same plants (common random numbers for every candidate);
    another seed gives others."""
    a, b, c = plant_set(planar, 3), plant_set(planar, 3), plant_set(planar, 3, seed=99)
    bw = [[x.model.bandwidth_hz() for x in p.actuators] for p in a]
    assert bw == [[x.model.bandwidth_hz() for x in p.actuators] for p in b]
    assert bw != [[x.model.bandwidth_hz() for x in p.actuators] for p in c]


def test_zero_spread_only_changes_the_noise(planar) -> None:
    """With every spread 0 a perturbed run differs from the nominal only by its noise seed."""
    flat = dataclasses.replace(
        planar,
        perturb=dataclasses.replace(
            planar.perturb, bandwidth_rel=0.0, delay_ticks=0, payload_rel=0.0, friction_rel=0.0,
            payload_offset_m=0.0, damping_rel=0.0,
        ),
    )
    plan = load_plan(PLANAR_PLANS / "two-tier.toml", planar.arm.joint_names)
    (res,) = compare(flat, [("p", "", lambda pr: plan_controller(pr, plan))], 2)
    assert isinstance(res, RobustScore)
    assert res.feasible_share == 1.0
    for d in res.draws:
        assert d.error_index == pytest.approx(res.nominal.error_index, rel=0.15)
        assert d.error_index != res.nominal.error_index


def test_statistics_count_failures() -> None:
    """p90 interpolates linearly between order statistics (numpy's default percentile, an
    independent reference); a failed plant counts as inf in every statistic, so worst and
    mean become inf at the first failure and p90 once more than a tenth fail."""
    vals = [1.0, 2.0, 3.0, 4.0, 10.0]
    assert statistic(vals, "p90") == pytest.approx(np.percentile(vals, 90))
    assert statistic(vals, "worst") == 10.0 and statistic(vals, "mean") == 4.0
    eleven = [float(i) for i in range(10)] + [math.inf]
    assert statistic(eleven, "p90") == pytest.approx(9.0)  # one failure in eleven
    assert statistic(eleven, "worst") == math.inf and statistic(eleven, "mean") == math.inf
    assert statistic([*eleven[:-2], math.inf, math.inf], "p90") == math.inf
    nominal = S(feasible=True, error_index=1.0)
    draws = tuple(S(feasible=f, error_index=e, reason="r") for f, e in [(True, 2.0), (False, 2.0)])
    r = RobustScore(nominal, draws, plants=3, how="p90", min_share=0.5)  # type: ignore[arg-type]
    assert r.errors == [1.0, 2.0, math.inf, math.inf]  # the plant not run counts as failed
    assert r.feasible_share == pytest.approx(1 / 3)
    assert not r.feasible and "1 of 3" in (r.reason or "")


def test_the_robust_optimum_differs_from_the_fragile_nominal_one(planar) -> None:
    """Single-tier OSC on the planar arm (6 Hz shoulder), minimum margins lowered to 1×:
    the stiffest gain still stable on the nominal plant has the lowest nominal error but
    fails on perturbed plants (slower drives, more delay); the robust statistic counts
    those failures (inf) and picks a softer gain that holds on every plant."""
    prob = dataclasses.replace(
        planar,
        scoring=dataclasses.replace(planar.scoring, margins=MarginLimits(1.0, 0.0, 1.0)),
        perturb=dataclasses.replace(planar.perturb, bandwidth_rel=0.3, delay_ticks=1),
    )
    plants = plant_set(prob, 8)
    res = {}
    for kp in (1000.0, 1500.0, 2500.0):
        plan = osc_plan(prob, kp, kp, 0.8)
        res[kp] = evaluate_robust(
            prob, plants, lambda p, plan=plan: plan_controller(p, plan), f"kp {kp:g}"
        )
    feasible_nominal = {k: r for k, r in res.items() if r.nominal.feasible}
    nominal_best = min(feasible_nominal, key=lambda k: feasible_nominal[k].nominal.error_index)
    robust_best = min(res, key=lambda k: res[k].robust_error)
    assert nominal_best == 2500.0
    assert res[2500.0].plants_feasible < 8 and res[2500.0].robust_error == math.inf
    assert robust_best == 1000.0
    assert res[1000.0].feasible and res[1000.0].plants_feasible == 8


def test_compare_command_writes_json(tmp_path, capsys) -> None:
    """compare --perturb --seed prints the table and writes per-plan robust figures, with
    the seed of the plants."""
    out = tmp_path / "cmp.json"
    rc = main(
        [
            "compare",
            str(PLANAR),
            str(PLANAR_PLANS / "osc.toml"),
            str(PLANAR_PLANS / "two-tier.toml"),
            "--perturb",
            "3",
            "--seed",
            "5",
            "--json",
            str(out),
        ]
    )
    assert rc == 0
    doc = json.loads(out.read_text())
    assert doc["seed"] == 5 and doc["plants"] == 3
    rows = doc["entries"]
    assert [r["label"] for r in rows] == ["single-tier OSC kp 1000", "two tiers"]
    for r in rows:
        assert r["plants"] == 3 and len(r["draws"]) == 3
        assert 0.0 <= r["feasible_share"] <= 1.0
        for key in ("stiffness_margin", "delay_margin_ms", "bandwidth_margin", "p90_error"):
            assert key in r
    assert rows[1]["p90_error"] < rows[0]["p90_error"]
    text = capsys.readouterr().out
    assert "perturbed plants" in text and "Simulation only" in text and "plants ok" in text
