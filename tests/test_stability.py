"""Stability margins of the sampled loop against closed forms (Routh–Hurwitz, delay margin)
and against long simulations of the demo arm."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from problems import DEMO_PLANS, write_slider_problem

from optimizer.evaluate import make_loop, plan_controller
from optimizer.plan import Plan, Tier, load_plan
from optimizer.problem import Problem, load_problem
from optimizer.stability import (
    LinearLoop,
    MarginLimits,
    home_check,
    jacobian_fd,
    spectral_radius,
    unstable_instant,
)
from optimizer.trajectories import Hold, sample


def test_jacobian_fd_of_a_linear_map_is_exact() -> None:
    """Central differences recover a linear map's matrix (to round-off)."""
    rng = np.random.default_rng(0)
    A = rng.standard_normal((5, 5))
    np.testing.assert_allclose(jacobian_fd(lambda x: A @ x, rng.standard_normal(5)), A, atol=1e-8)
    assert spectral_radius(np.diag([0.5, -0.9, 0.2])) == pytest.approx(0.9)


@pytest.mark.parametrize("plan_file", ["three-tier.toml", "osc-2000.toml"])
def test_assembled_matrix_equals_the_whole_step_differentiated(demo, plan_file) -> None:
    """The one-tick matrix built from its pieces (controller, saturation, delay line,
    actuator bank, plant) equals central differences of the whole simulator step.

    Derivation in ``stability.py``: the step is the composition of those maps, so its
    Jacobian is the product of theirs (chain rule); only the controller and the plant are
    differentiated numerically, the rest is exactly linear.
    """
    plan = load_plan(DEMO_PLANS / plan_file, demo.arm.joint_names)
    loop = make_loop(demo, plan_controller(demo, plan))
    ro = loop.rollout(demo.references[2])
    for k, st in ro.snapshots[:2]:
        A = LinearLoop(loop, k, st, coulomb_slope=True, limits_active=True).matrix()
        A_fd = jacobian_fd(lambda x, k=k, st=st: loop.step_map(k, x, st), loop.pack(st))
        assert A.shape == A_fd.shape
        np.testing.assert_allclose(A, A_fd, rtol=0, atol=1e-7 * np.abs(A_fd).max())


def _slider(tmp_path, wn: float, zeta: float, rate_hz: float, corner_hz: float,
            delay_ms: float = 0.0) -> tuple[Problem, LinearLoop]:
    prob = load_problem(
        write_slider_problem(tmp_path, corner_hz=corner_hz, rate_hz=rate_hz, delay_ms=delay_ms)
    )
    plan = Plan((Tier((0,), wn**2, 0.0, zeta, damping=0.0),))
    loop = make_loop(prob, plan_controller(prob, plan))
    loop.controller.bind(prob.references[0])
    return prob, LinearLoop(loop, 0, loop.initial_state())


@pytest.mark.parametrize(("factor", "stable"), [(0.99, True), (1.01, False)])
def test_radius_matches_routh_hurwitz_boundary(tmp_path, factor, stable) -> None:
    """Unit mass, task PD kp = ωn², kd = 2ζωn, through a first-order actuator 1/(τs + 1).

    τs³ + s² + kd s + kp = 0 is stable iff kd > τ kp, i.e. ωn < 2ζ/τ (Routh–Hurwitz
    criterion; the values are in tests/REFERENCES.md §5, checked by hand):
    τ = 1/(2π·10 Hz), ζ = 0.7 gives 87.96 rad/s. At 50 kHz sampling moves the boundary far
    less than 1 %, so 0.99× must be stable and 1.01× unstable, with a discrete pole modulus
    e^(σT), |σ| ≈ 0.208 1/s (tests/REFERENCES.md §5).
    """
    tau, zeta = 1.0 / (2 * math.pi * 10.0), 0.7
    assert 2 * zeta / tau == pytest.approx(87.96, abs=0.01)
    prob, ll = _slider(tmp_path, factor * 2 * zeta / tau, zeta, 50000.0, 10.0)
    rho = ll.radius()
    assert (rho < 1.0) is stable
    sigma = math.log(rho) / prob.dt
    assert abs(sigma) == pytest.approx(0.208, rel=0.2)


def test_stiffness_and_bandwidth_margins_match_routh_hurwitz(tmp_path) -> None:
    """At ωn = 40 rad/s, ζ = 0.7 and τ = 1/(2π·10 Hz): holding ζ, the largest stiffness is
    kp = (2ζ/τ)², a stiffness margin of 4.836× (13.7 dB); a slower actuator τ' = bτ moves
    the boundary to ωn = 2ζ/(bτ), so the bandwidth margin is 2ζ/(τ ωn) = √4.836 = 2.199
    (Routh–Hurwitz on τs³ + s² + kd s + kp; tests/REFERENCES.md §5, checked)."""
    _, ll = _slider(tmp_path, 40.0, 0.7, 50000.0, 10.0)
    assert ll.stiffness_margin() == pytest.approx(4.836, rel=0.01)
    assert ll.bandwidth_margin() == pytest.approx(2.199, rel=0.01)
    assert ll.stiffness_margin() == pytest.approx(ll.bandwidth_margin() ** 2, rel=0.02)


def test_delay_margin_is_within_one_period_of_the_closed_form(tmp_path) -> None:
    """Unit mass under PD with a pure delay T: crossover ωc² = (kd² + √(kd⁴ + 4kp²))/2,
    phase margin φ = atan(kd ωc / kp), delay margin T* = φ/ωc = 18.428 ms at ωn = 40 rad/s,
    ζ = 0.7 (closed form of the continuous loop; tests/REFERENCES.md §5, checked).

    The discrete loop differs: the command is computed from the state at the start of a
    tick and held over it (zero-order hold, about half a period of extra delay; common
    practice, no source), and the fastest actuator the 2 kHz loop allows (900 Hz,
    τ = 0.18 ms) lags like another 0.18 ms at the crossover. So the margin sits a little
    below T*, and must be within one control period (0.5 ms) of it.
    """
    wn, zeta = 40.0, 0.7
    kp, kd = wn**2, 2 * zeta * wn
    wc = math.sqrt((kd**2 + math.sqrt(kd**4 + 4 * kp**2)) / 2)
    t_star = math.atan(kd * wc / kp) / wc
    assert t_star == pytest.approx(18.428e-3, rel=1e-4)
    prob, ll = _slider(tmp_path, wn, zeta, 2000.0, 900.0)
    margin_s = ll.delay_margin_ticks(cap=64) * prob.dt
    assert abs(margin_s - t_star) < prob.dt
    assert margin_s < t_star  # hold and lag only ever add delay


def test_margins_are_not_set_by_the_posture_loop(demo) -> None:
    """Posture gains ten times lower make the null-space posture loop the slowest mode (its
    time constant grows several times) but leave the stiffness, delay and bandwidth margins
    of the task loop within 5 %."""
    plan = load_plan(DEMO_PLANS / "osc-2000.toml", demo.arm.joint_names)
    out = []
    for scale in (1.0, 0.1):
        ctl = dataclasses.replace(
            demo.control,
            null_stiffness=tuple(scale * x for x in demo.control.null_stiffness),
            null_damping=tuple(scale * x for x in demo.control.null_damping),
        )
        prob = dataclasses.replace(demo, control=ctl)
        loop = make_loop(prob, plan_controller(prob, plan))
        loop.controller.bind(prob.references[0])
        out.append(LinearLoop(loop, 0, loop.initial_state()).margins())
    assert out[1].slowest_mode_s > 2.0 * out[0].slowest_mode_s
    assert out[1].stiffness == pytest.approx(out[0].stiffness, rel=0.05)
    assert out[1].delay_ms == pytest.approx(out[0].delay_ms, rel=0.05)
    assert out[1].bandwidth == pytest.approx(out[0].bandwidth, rel=0.05)


def _hold_problem(demo: Problem, seconds: float) -> Problem:
    """The demo holding its home pose, without Coulomb friction: at rest the smoothed
    friction is a stiff damper that the margins deliberately leave out (see
    ``LinearLoop``), so with it the simulation would be more stable than any margin says."""
    p0, R0 = demo.arm.tip_pose(demo.arm.home)
    ref = sample("hold", Hold(), seconds, demo.control.rate_hz, p0, R0)
    acts = tuple(dataclasses.replace(a, coulomb_nm=0.0) for a in demo.actuators)
    return dataclasses.replace(demo, references=(ref,), actuators=acts)


def _scaled(plan: Plan, s: float) -> Plan:
    return dataclasses.replace(
        plan,
        tiers=tuple(dataclasses.replace(t, kp_t=t.kp_t * s, kp_r=t.kp_r * s) for t in plan.tiers),
    )


def test_stiffness_margin_predicts_the_simulation(demo) -> None:
    """The three-tier demo plan, holding its pose: with every stiffness at 0.9× its margin
    the loop stays at the noise level; at 1.1× a mode grows until the flange drive
    saturates (a limit cycle), leaving an error many times larger.

    The run lasts as long as the linearised 1.1× loop needs to grow a disturbance 10⁴
    times (ρ^N = 10⁴ from its spectral radius ρ), and at least 3 s: long enough that
    growth cannot hide, short enough for the default test run. Error here is the larger
    of position / 1 mm and orientation / 0.1° (the demo's error scales).
    """
    plan = load_plan(DEMO_PLANS / "three-tier.toml", demo.arm.joint_names)
    short = _hold_problem(demo, 1.0)
    loop = make_loop(short, plan_controller(short, plan))
    ro = loop.rollout(short.references[0])
    k, st = ro.snapshots[-1]  # settled under the unmodelled payload
    margin = LinearLoop(loop, k, st).stiffness_margin()
    assert 1.5 < margin < 10.0

    def linear(s: float) -> LinearLoop:
        lp = make_loop(short, plan_controller(short, _scaled(plan, s * margin)))
        lp.controller.bind(short.references[0])
        return LinearLoop(lp, k, st)

    assert linear(0.9).radius() < 1.0
    rho_up = linear(1.1).radius()
    assert rho_up > 1.0
    seconds = max(3.0, math.log(1e4) / math.log(rho_up) * demo.dt)
    assert seconds < 60.0
    prob = _hold_problem(demo, seconds)
    early, late = {}, {}
    for s in (0.9, 1.1):
        lp = make_loop(prob, plan_controller(prob, _scaled(plan, s * margin)))
        r = lp.rollout(prob.references[0])
        err = np.maximum(
            np.linalg.norm(r.e[:, :3], axis=1) / 1e-3,
            np.linalg.norm(r.e[:, 3:], axis=1) / math.radians(0.1),
        )
        early[s] = err[int(0.2 / demo.dt) : int(0.4 / demo.dt)].max()
        late[s] = err[-int(0.5 / demo.dt) :].max() if not r.diverged else math.inf
    assert late[0.9] < 3.0 * early[0.9]  # no growth
    assert late[1.1] > 10.0 * late[0.9]  # grew to a limit cycle (or diverged)


def test_home_check_and_unstable_instant(planar) -> None:
    """The pre-check passes a modest plan and refuses a far too stiff one; the rollout's
    stability check finds the unstable instant of the stiff one."""
    from optimizer.evaluate import osc_plan

    ok = make_loop(planar, plan_controller(planar, osc_plan(planar, 200.0, 200.0, 0.8)))
    assert home_check(ok, planar.references[0], MarginLimits(1.5, 1.0, 1.1))
    stiff = make_loop(planar, plan_controller(planar, osc_plan(planar, 8e3, 8e3, 0.8)))
    assert not home_check(stiff, planar.references[0], MarginLimits(1.5, 1.0, 1.1))
    stiff.controller.bind(planar.references[0])
    assert unstable_instant(stiff, [(0, stiff.initial_state())]) == 0


def test_the_worst_over_instants_is_the_same_with_floors_and_costs_fewer_solves(demo) -> None:
    """loop_margins passes the worst margins so far as a floor to the next instant, which
    then stops locating a margin once it is known to be at least the floor. The worst is
    the minimum over the instants either way (a located margin is never below a lower
    bound the search has already passed), so it must equal the minimum of the fully
    located margins exactly, with fewer spectral radii computed."""
    from optimizer.stability import Margins, loop_margins

    plan = load_plan(DEMO_PLANS / "three-tier.toml", demo.arm.joint_names)
    loop = make_loop(demo, plan_controller(demo, plan))
    ref = demo.references[0]
    ro = loop.rollout(ref)
    assert len(ro.snapshots) >= 2
    limits = demo.scoring.margins
    calls = {"n": 0}
    real = LinearLoop.radius

    def counted(self, *a, **kw):  # type: ignore[no-untyped-def]
        calls["n"] += 1
        return real(self, *a, **kw)

    full = []
    LinearLoop.radius = counted  # type: ignore[method-assign]
    try:
        for k, st in ro.snapshots:
            full.append(LinearLoop(loop, k, st).margins(limits=limits))
        n_full = calls["n"]
        calls["n"] = 0
        worst = loop_margins(loop, ro.snapshots, limits)
        n_floor = calls["n"]
    finally:
        LinearLoop.radius = real  # type: ignore[method-assign]
    assert worst == Margins.worst(full)
    assert n_floor < n_full
