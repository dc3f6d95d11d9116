"""Operational-space identities, the tier law, its compiled kernel, DLS and CLIK."""

from __future__ import annotations

import math

import numpy as np
import pinocchio as pin
import pytest
from problems import two_link_urdf

from optimizer.arm import LWA
from optimizer.control import dls, kernels, null_projector_t, osc_torque, tier_torque


def _random_spd(rng: np.random.Generator, n: int) -> np.ndarray:
    A = rng.standard_normal((n, n))
    return A @ A.T + n * np.eye(n)


@pytest.fixture
def mj() -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(7)
    return _random_spd(rng, 7), rng.standard_normal((6, 7))


def test_osc_identities(mj) -> None:
    """Khatib 1987 identities hold: J J̄ = I, J N = 0, J M⁻¹ Nᵀ = 0, N² = N, trace N = n − 6.

    Source: Khatib, IEEE J. Robotics and Automation RA-3(1), 1987 (Λ, J̄, the null-space
    torque projector), as restated in tests/REFERENCES.md §3 [checked].
    """
    M, J = mj
    Minv = np.linalg.inv(M)
    Lam = np.linalg.inv(J @ Minv @ J.T)
    Jbar = Minv @ J.T @ Lam
    N = np.eye(7) - Jbar @ J
    Nt = null_projector_t(M, J)
    np.testing.assert_allclose(Nt, N.T, atol=1e-12)
    np.testing.assert_allclose(J @ Jbar, np.eye(6), atol=1e-10)
    np.testing.assert_allclose(J @ N, 0, atol=1e-10)
    np.testing.assert_allclose(J @ Minv @ Nt, 0, atol=1e-10)
    np.testing.assert_allclose(N @ N, N, atol=1e-10)
    np.testing.assert_allclose(Minv @ Nt, N @ Minv, atol=1e-10)
    np.testing.assert_allclose(N @ Jbar, 0, atol=1e-10)
    np.testing.assert_allclose(Nt @ J.T, 0, atol=1e-10)
    assert np.trace(N) == pytest.approx(1.0)


def test_dynamically_consistent_inverse_minimises_kinetic_energy(mj) -> None:
    """For a redundant arm, q̇ = J̄ẋ has less kinetic energy than q̇ = pinv(J) ẋ (tests/REFERENCES.md §3)."""
    M, J = mj
    Minv = np.linalg.inv(M)
    Jbar = Minv @ J.T @ np.linalg.inv(J @ Minv @ J.T)
    x = np.arange(1.0, 7.0)
    qa, qb = Jbar @ x, np.linalg.pinv(J) @ x
    np.testing.assert_allclose(J @ qa, J @ qb, atol=1e-10)
    assert qa @ M @ qa < qb @ M @ qb


def test_all_joint_tier_equals_khatib_osc(mj) -> None:
    """With S = all joints and λ = 0 the tier law is exactly Jᵀ Λ a."""
    M, J = mj
    a = np.array([0.3, -1.0, 2.0, 0.1, 0.0, -0.5])
    tau = tier_torque(np.linalg.inv(M), J, np.arange(7), a)
    np.testing.assert_allclose(tau, osc_torque(M, J, a), rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("joints", [(0, 1, 2, 3, 4, 5), (1, 2, 3, 4, 5, 6), (0, 2, 3, 4, 5, 6)])
def test_six_joint_subset_realises_the_acceleration(mj, joints) -> None:
    """A full-rank subset of six joints gives J M⁻¹ τ = a exactly and touches no other joint."""
    M, J = mj
    Minv = np.linalg.inv(M)
    a = np.array([1.0, 0.5, -0.2, 0.3, -0.7, 0.9])
    tau = tier_torque(Minv, J, np.array(joints), a)
    np.testing.assert_allclose(J @ Minv @ tau, a, atol=1e-9)
    others = sorted(set(range(7)) - set(joints))
    np.testing.assert_allclose(tau[others], 0.0, atol=1e-14)


@pytest.mark.parametrize("joints", [(0, 1, 2, 3, 4, 5, 6), (2, 3, 4, 5, 6), (4, 5, 6), (3,)])
@pytest.mark.parametrize("lam", [1e-4, 0.05])
def test_kernel_matches_numpy_reference(mj, joints, lam) -> None:
    """The compiled tier solve equals the readable formula (push-through form when |S| < 6)."""
    M, J = mj
    Minv = np.linalg.inv(M)
    a = np.array([0.2, -0.4, 1.0, 0.5, 0.1, -0.3])
    ref = tier_torque(Minv, J, np.array(joints), a, lam)
    out = np.zeros(7)
    status = kernels.tier_solve(
        Minv, J, J @ Minv, np.arange(6), np.array(joints), a, lam, out, np.zeros(400)
    )
    assert status == kernels.OK
    np.testing.assert_allclose(out, ref, rtol=1e-8, atol=1e-10)


@pytest.mark.parametrize("joints", [(2, 3, 4, 5, 6), (4, 5, 6)])
def test_a_short_tier_does_not_depend_on_the_task_units(mj, joints) -> None:
    """With fewer joints than task rows, the tier's torque is the same whether orientation
    is written in radians or milliradians (rows of J and a scaled by 1000): the Λ metric
    is unit-free, a plain least squares is not. Derivation: rows scaled by D turn
    Λ = (J M⁻¹ Jᵀ)⁻¹ into D⁻¹ Λ D⁻¹, so Bᵀ Λ B and Bᵀ Λ a do not change."""
    M, J = mj
    Minv = np.linalg.inv(M)
    a = np.array([0.2, -0.4, 1.0, 0.5, 0.1, -0.3])
    D = np.diag([1.0, 1.0, 1.0, 1e3, 1e3, 1e3])
    t1 = tier_torque(Minv, J, np.array(joints), a, 0.0)
    t2 = tier_torque(Minv, D @ J, np.array(joints), D @ a, 0.0)
    np.testing.assert_allclose(t2, t1, rtol=1e-7, atol=1e-9)
    S = np.eye(7)[list(joints)]
    B = J @ Minv @ S.T
    plain = S.T @ np.linalg.lstsq(B, a, rcond=None)[0]
    plain_mrad = S.T @ np.linalg.lstsq(D @ B, D @ a, rcond=None)[0]
    assert not np.allclose(plain, plain_mrad, rtol=1e-3)  # a plain least squares would move


def test_kernel_reports_singular_tier() -> None:
    """A tier whose joints cannot move the task at all and λ = 0 is reported, not NaN."""
    Minv = np.eye(3)
    J = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])
    out = np.zeros(3)
    status = kernels.tier_solve(
        Minv, J, J @ Minv, np.arange(2), np.array([2]), np.ones(2), 0.0, out, np.zeros(100)
    )
    assert status == kernels.SINGULAR


def test_log3_matches_pinocchio_including_near_pi() -> None:
    """The kernel's rotation logarithm equals pinocchio's log3, also within 1e-5 rad of π."""
    rng = np.random.default_rng(3)
    out = np.empty(3)
    axes = rng.standard_normal((40, 3))
    angles = np.concatenate(
        [
            rng.uniform(0, math.pi, 30),
            [0.0, 1e-9, 1e-7, math.pi - 1e-5, math.pi - 1e-3, 3.0, 2.5, 1.0, 0.5, 1e-4],
        ]
    )
    for ax, th in zip(axes, angles):
        w = ax / np.linalg.norm(ax) * th
        R = pin.exp3(w)
        kernels.log3(R, out)
        np.testing.assert_allclose(out, pin.log3(R), atol=1e-7)


def test_two_link_task_inertia_golden() -> None:
    """Λ of the point-mass 2R arm at (0, π/2) is diag(1, 2); at (0.3, −1.1) the tests/REFERENCES.md value.

    Values [checked] in tests/REFERENCES.md §3 (planar position task).
    """
    model = pin.buildModelFromXML(two_link_urdf())
    data = model.createData()
    fid = model.getFrameId("tip")
    cases = [
        ((0.0, math.pi / 2), [[1.0, 0.0], [0.0, 2.0]]),
        ((0.3, -1.1), [[1.6111424582, -0.6292558388], [-0.6292558388, 1.6479060739]]),
    ]
    for q, lam in cases:
        q = np.array(q)
        J = pin.computeFrameJacobian(model, data, q, fid, LWA)[[0, 2]]
        Minv = np.linalg.inv(pin.crba(model, data, q))
        L = np.linalg.inv(J @ Minv @ J.T)
        # x-z plane: the textbook's (x, y) is our (x, z)
        np.testing.assert_allclose(L, lam, atol=1e-8)


def test_damped_least_squares_bounded_near_singularity() -> None:
    """DLS with λ = 0.01 on J = diag(1, 1e-3), e = (0, 1) gives Δq₂ = 9.9009901 (pinv: 1000).

    Source: damped least squares (Wampler 1986; Nakamura & Hanafusa 1986), check value
    [checked] in tests/REFERENCES.md §4; per-direction gain σ/(σ² + λ²) ≤ 1/(2λ).
    """
    J = np.diag([1.0, 1e-3])
    dq = dls(J, 0.01) @ np.array([0.0, 1.0])
    assert dq[1] == pytest.approx(9.9009901, rel=1e-7)
    assert np.linalg.pinv(J)[1, 1] == pytest.approx(1000.0)
    assert abs(dq[1]) <= 1.0 / (2 * 0.01) + 1e-12


def test_tiered_command_single_tier_equals_osc_plus_null_and_h(demo) -> None:
    """One all-joint tier: τ = Jᵀ Λ (Kp e + Kd ė + ẍ_d − J̇v) + Nᵀ(K(q_h − q) − D v) + h."""
    from optimizer.evaluate import plan_controller
    from optimizer.plan import Plan, Tier

    prob = demo
    plan = Plan((Tier(tuple(range(7)), 900.0, 400.0, 0.7, damping=0.0),))
    ctrl = plan_controller(prob, plan)
    ref = prob.references[0]
    ctrl.bind(ref)
    rng = np.random.default_rng(1)
    q = np.array(prob.arm.home) + 0.05 * rng.standard_normal(7)
    v = 0.2 * rng.standard_normal(7)
    k = 700
    ctrl.effort = np.full(7, 1e9)  # no clipping in this check
    ctrl.pack()
    assert ctrl.command(k, q, v) == 0
    tau, e6 = ctrl.tau, ctrl.e6
    model, data = prob.arm.model, prob.arm.model.createData()
    fid = prob.arm.tip_id
    pin.forwardKinematics(model, data, q, v, np.zeros(7))
    pin.updateFramePlacements(model, data)
    f = data.oMf[fid]
    J = pin.computeFrameJacobian(model, data, q, fid, LWA)
    pin.forwardKinematics(model, data, q, v, np.zeros(7))
    dJv = pin.getFrameClassicalAcceleration(model, data, fid, LWA).vector
    e = np.concatenate([ref.p[k] - f.translation, pin.log3(ref.R[k] @ f.rotation.T)])
    ed = ref.twist[k] - J @ v
    kp = np.array([900.0] * 3 + [400.0] * 3)
    a = kp * e + 2 * 0.7 * np.sqrt(kp) * ed + ref.acc[k] - dJv
    M = pin.crba(model, data, q)
    h = pin.nonLinearEffects(model, data, q, v)
    u = 40.0 * (np.array(prob.arm.home) - q) - 4.0 * v
    expected = osc_torque(M, J, a) + null_projector_t(M, J) @ u + h
    np.testing.assert_allclose(e6, e, atol=1e-12)
    np.testing.assert_allclose(tau, expected, rtol=1e-6, atol=1e-6)


def test_joint_space_kernel_is_the_computed_torque_law_bit_for_bit(demo) -> None:
    """τ = M (a_d + Kp (q_d − q) + Kd (v_d − v)) + h, clipped to the efforts (computed-torque
    control: Siciliano et al., Robotics: Modelling, Planning and Control (2009) §8.5.2, from
    memory). The compiled kernel must equal the numpy form bit for bit (runs made before
    it reproduce exactly), and both the law written out here."""
    from optimizer.evaluate import joint_controller

    prob = demo
    n = prob.arm.n
    rng = np.random.default_rng(4)
    ctrl = joint_controller(prob, rng.uniform(50.0, 900.0, n), 0.8)
    model, data, fid = prob.arm.model, prob.arm.model.createData(), prob.arm.tip_id
    for ref in prob.references[:2]:
        ctrl.bind(ref)
        sol = ctrl.sol
        for i in range(40):
            k = int(rng.integers(len(ref.t)))
            q = np.array(prob.arm.home) + 0.2 * rng.standard_normal(n)
            v = rng.standard_normal(n)
            s, d = (1.0, 1.0) if i < 10 else rng.uniform(0.0, 3.0, 2)
            ctrl.set_gain_scale(s, d, clip=i % 4 != 3)
            assert ctrl.command(k, q, v) == 0
            expected, e6, pd = ctrl.command_numpy(k, q, v)
            assert np.array_equal(ctrl.tau, expected)
            assert np.array_equal(ctrl.e6, e6)
            assert np.array_equal(ctrl.tier_tau[0], pd)
            pin.framesForwardKinematics(model, data, q)
            f = data.oMf[fid]
            e = np.concatenate([ref.p[k] - f.translation, pin.log3(ref.R[k] @ f.rotation.T)])
            M = pin.crba(model, data, q)
            M = np.triu(M) + np.triu(M, 1).T
            h = pin.rnea(model, data, q, v, np.zeros(n))
            kp = ctrl.kp
            kd = ctrl.kd
            t = M @ (sol.a[k] + kp * (sol.q[k] - q) + kd * (sol.v[k] - v)) + h
            lim = np.array(prob.arm.effort) if i % 4 != 3 else np.full(n, np.inf)
            np.testing.assert_allclose(ctrl.tau, np.clip(t, -lim, lim), rtol=1e-12, atol=1e-9)
            np.testing.assert_allclose(ctrl.e6, e, atol=1e-12)
    ctrl.set_gain_scale()


@pytest.mark.parametrize("which", ["three-tier", "bounded", "joint"])
def test_commands_at_several_gain_factors_equal_one_command_each(demo, which) -> None:
    """``commands`` (the kinematics once, the law per factor pair) gives, bit for bit, what
    ``set_gain_scale(s, d, clip=False)`` then ``command`` gives, and restores the gains;
    the linearisation relies on it (a margin must not depend on how it was computed)."""
    import dataclasses
    from pathlib import Path

    from optimizer.evaluate import joint_controller, plan_controller
    from optimizer.plan import load_plan

    prob = demo
    n = prob.arm.n
    if which == "joint":
        ctrl = joint_controller(prob, np.full(n, 300.0), 0.8)
    else:
        plan = load_plan(
            Path(prob.path).parent / "plans" / "three-tier.toml", prob.arm.joint_names
        )
        if which == "bounded":
            plan = dataclasses.replace(plan, law="bounded")
        ctrl = plan_controller(prob, plan)
    ref = prob.references[0]
    ctrl.bind(ref)
    rng = np.random.default_rng(3)
    scales = ((1.0, 1.0), (1.0, 0.0), (0.0, 1.0), (2.5, math.sqrt(2.5)))
    for _ in range(10):
        k = int(rng.integers(len(ref.t)))
        q = np.array(prob.arm.home) + 0.1 * rng.standard_normal(n)
        v = rng.standard_normal(n)
        rows = ctrl.commands(k, q, v, scales)
        for (s, d), row in zip(scales, rows, strict=True):
            ctrl.set_gain_scale(s, d, clip=False)
            ctrl.command(k, q, v)
            assert np.array_equal(row, ctrl.tau)
        ctrl.set_gain_scale()
        plain = ctrl.commands(k, q, v, ((1.0, 1.0),))[0]
        ctrl.command(k, q, v)  # gains restored: clipped again
        lim = np.array(prob.arm.effort)
        assert np.array_equal(ctrl.tau, np.clip(plain, -lim, lim)) or which == "bounded"
