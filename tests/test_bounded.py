"""The bounded tier law: its QP, KKT conditions, limits, priority, and the solvers."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from problems import ROOT

from optimizer.control import bounded, kernels
from optimizer.evaluate import make_loop, plan_controller, score_plan
from optimizer.plan import load_plan
from optimizer.problem import load_problem

FAST = ROOT / "problems" / "polish7-fast"


def _random_case(seed: int):
    """A random SPD M⁻¹ (7 joints), a 6×7 Jacobian, three tiers like the demo's and their
    torques, and bounds that bind on some joints."""
    rng = np.random.default_rng(seed)
    n = 7
    R = rng.standard_normal((n, n))
    Minv = np.linalg.inv(R @ R.T + n * np.eye(n))
    J6 = rng.standard_normal((6, n))
    tiers = [
        (np.arange(7), np.arange(6), 1e-4),
        (np.array([2, 3, 4, 5, 6]), np.arange(6), 1e-4),
        (np.array([4, 5, 6]), np.array([3, 4, 5]), 1e-4),
    ]
    tier_tau = np.zeros((3, n))
    for k, (joints, _, _) in enumerate(tiers):
        tier_tau[k, joints] = rng.standard_normal(len(joints)) * (3.0 - k)
    total = tier_tau.sum(axis=0)
    hi = np.abs(total) * rng.uniform(0.6, 1.4, n) + 0.1
    return Minv, J6, tiers, tier_tau, -hi, hi


def _readable_qp(Minv, J6, tiers, tier_tau, lo, hi):
    blocks = [
        bounded.TierBlock(j, bounded.tier_hessian(Minv, J6[r], j, lam), tier_tau[k, j])
        for k, (j, r, lam) in enumerate(tiers)
    ]
    return bounded.build_qp(blocks, Minv.shape[0], lo, hi)


@pytest.mark.parametrize("seed", range(5))
def test_compiled_qp_equals_the_readable_one(seed) -> None:
    """The numba kernel builds the same P, A and x* as the readable numpy form."""
    Minv, J6, tiers, tier_tau, lo, hi = _random_case(seed)
    ref = _readable_qp(Minv, J6, tiers, tier_tau, lo, hi)
    ip = [3]
    for j, r, _ in tiers:
        ip += [len(j), *j, len(r), *r]
    N = sum(len(j) for j, _, _ in tiers)
    P, A, xs = np.zeros((N, N)), np.zeros((7, N)), np.zeros(N)
    got = kernels.bounded_qp(Minv, J6, np.array(ip), np.array([t[2] for t in tiers]),
                             tier_tau, bounded.PRIORITY, P, A, xs, np.zeros(400))
    assert got == N
    np.testing.assert_allclose(P, ref.P, rtol=1e-7, atol=1e-11 * np.abs(ref.P).max())
    np.testing.assert_array_equal(A, ref.A)
    np.testing.assert_array_equal(xs, ref.x_star)


@pytest.mark.parametrize("seed", range(8))
def test_solution_meets_the_kkt_conditions(seed) -> None:
    """Stationarity, primal feasibility and complementary slackness to 1e-8 (relative to
    the problem's scale), and multipliers of the right sign (Boyd & Vandenberghe, Convex
    Optimization, 2004, §5.5.3: KKT conditions of a convex problem)."""
    Minv, J6, tiers, tier_tau, lo, hi = _random_case(seed)
    qp = _readable_qp(Minv, J6, tiers, tier_tau, lo, hi)
    x, ok = bounded.solve_qp(qp)
    assert ok
    mu = bounded.multipliers(qp, x)
    res = bounded.kkt_residuals(qp, x, mu)
    scale = 1.0 + np.abs(qp.P @ qp.x_star).max()
    assert res["stationarity"] <= 1e-8 * scale, res
    assert res["primal"] <= 1e-8 * (1.0 + np.abs(hi).max()), res
    assert res["complementarity"] <= 1e-8 * scale * (1.0 + np.abs(hi).max()), res
    s = qp.A @ x
    at_hi = np.isclose(s, qp.hi, rtol=1e-7, atol=1e-9)
    at_lo = np.isclose(s, qp.lo, rtol=1e-7, atol=1e-9)
    assert np.all(mu[at_hi & ~at_lo] >= -1e-8 * scale)
    assert np.all(mu[at_lo & ~at_hi] <= 1e-8 * scale)
    assert (at_hi | at_lo).any()  # the case binds


def test_no_binding_bound_gives_the_summed_torques_exactly() -> None:
    """With bounds wide of the summed command the solution is every tier's own torque."""
    Minv, J6, tiers, tier_tau, lo, hi = _random_case(1)
    qp = _readable_qp(Minv, J6, tiers, tier_tau, lo * 100, hi * 100)
    x, ok = bounded.solve_qp(qp)
    assert ok
    np.testing.assert_allclose(x, qp.x_star, rtol=1e-9, atol=1e-9)


def test_one_joint_two_tiers_closed_form() -> None:
    """One joint, two tiers, a binding upper bound: minimising c1 h1 (u1−u1*)² + c2 h2
    (u2−u2*)² with u1 + u2 = hi splits the excess d in inverse proportion to c_k h_k
    (Lagrange; common practice, no source); each tier's cost is normalised to its mean
    curvature, so tier 2, a thousand times cheaper, takes 1000/1001 of it."""
    h1, h2, u1, u2, hi = 2.0, 0.5, 3.0, 2.0, 4.0
    blocks = [bounded.TierBlock(np.array([0]), np.array([[h1]]), np.array([u1])),
              bounded.TierBlock(np.array([0]), np.array([[h2]]), np.array([u2]))]
    qp = bounded.build_qp(blocks, 1, np.array([-10.0]), np.array([hi]))
    for name in bounded.QP_SOLVERS:
        x, ok = bounded.solve_qp(qp, name)
        assert ok, name
        d = u1 + u2 - hi  # c_k h_k = priority^-(k-1) once each h_k is normalised to 1
        w1, w2 = 1.0, 1e3
        np.testing.assert_allclose(x, [u1 - d * w1 / (w1 + w2), u2 - d * w2 / (w1 + w2)],
                                   rtol=1e-6, atol=1e-9)


def test_every_solver_gives_the_same_solution() -> None:
    """Contract of the solver registry: each registered solver solves the random cases to
    the same optimum (objective, and the command A x it gives the joints); the variables
    themselves may differ along directions the cost barely sees (a tier's λ-only
    directions); an unknown name lists the known ones."""
    for seed in range(3):
        qp = _readable_qp(*_random_case(seed))
        xs = [bounded.solve_qp(qp, name) for name in bounded.QP_SOLVERS]
        assert all(ok for _, ok in xs)
        f = [0.5 * x @ qp.P @ x + qp.q @ x for x, _ in xs]
        scale = 1.0 + abs(0.5 * qp.x_star @ qp.P @ qp.x_star)
        assert max(f) - min(f) <= 1e-8 * scale
        for x, _ in xs[1:]:
            np.testing.assert_allclose(qp.A @ x, qp.A @ xs[0][0], rtol=1e-4, atol=1e-3)
    with pytest.raises(ValueError, match="known: daqp"):
        bounded.solve_qp(qp, "nope")


@pytest.fixture(scope="module")
def fast():
    return load_problem(FAST / "problem.toml")


def test_bounded_law_keeps_tracking_where_the_summed_law_pins(fast) -> None:
    """On the weak-drive quick move the summed law with clipping pins a shoulder at its
    limit; the bounded law keeps every command inside the limits, keeps tier 1's task
    (lower position and orientation error than the summed law), and no QP fails."""
    summed = load_plan(FAST / "plans" / "three-tier-summed.toml", fast.arm.joint_names)
    bnd = load_plan(FAST / "plans" / "three-tier-bounded.toml", fast.arm.joint_names)
    assert bnd.law == "bounded" and summed.law == "summed"
    s = score_plan(fast, summed, compute_margin=False)
    b = score_plan(fast, bnd, compute_margin=False)
    assert not s.feasible and "pinned" in (s.reason or "")
    assert b.feasible, b.reason
    assert b.bounded_ticks > 50 and b.qp_failures == 0
    assert b.pos_rms_mm < 0.6 * s.pos_rms_mm and b.rot_rms_deg < s.rot_rms_deg
    keep: list = []
    loop = make_loop(fast, plan_controller(fast, bnd))
    ro = loop.rollout(fast.references[0])
    del keep
    lim = loop.effort
    assert np.all(np.abs(ro.tau_cmd) <= lim * (1 + 1e-9))


def test_rate_limits_are_kept_and_a_failed_solve_is_counted(fast, monkeypatch) -> None:
    """With a torque-rate limit the bounded law's commands change by at most rate·Ts per
    tick; when the solver fails, the tick falls back to the clipped sum and is counted."""
    acts = tuple(dataclasses.replace(a, rate_limit_nm_s=2000.0) for a in fast.actuators)
    prob = dataclasses.replace(fast, actuators=acts)
    bnd = load_plan(FAST / "plans" / "three-tier-bounded.toml", prob.arm.joint_names)
    ctrl = plan_controller(prob, bnd)
    ro = make_loop(prob, ctrl).rollout(prob.references[0])
    step = np.abs(np.diff(ro.tau_cmd, axis=0))
    assert step.max() <= 2000.0 * prob.dt * (1 + 1e-6)
    assert ctrl.bounded_ticks > 0
    monkeypatch.setattr(bounded, "solve_qp", lambda qp, solver="daqp", warm=None: (qp.x_star, False))
    b = score_plan(prob, bnd, compute_margin=False)
    assert b.qp_failures == b.bounded_ticks > 0


def test_the_search_space_carries_the_law(fast) -> None:
    """With [search] laws = ["summed", "bounded"] a plan's law is a search parameter: the
    bounded hand plan round-trips through the space, and its plan file keeps the law."""
    import optuna

    from optimizer import search as srch
    from optimizer.plan import parse_plan
    from optimizer.tomlio import tomllib

    assert fast.search.laws == ("summed", "bounded")
    plan = load_plan(FAST / "plans" / "three-tier-bounded.toml", fast.arm.joint_names)
    params = srch.plan_params(plan, fast)
    assert params is not None and params["law"] == "bounded"
    again = srch.suggest_plan(optuna.trial.FixedTrial(params), fast)
    assert again.law == "bounded" and again.tiers == plan.tiers
    back = parse_plan(tomllib.loads(plan.to_toml()), fast.arm.joint_names, "<text>")
    assert back.law == "bounded" and "(bounded)" in back.compact(fast.arm.n)
