"""Stability margin of the sampled loop against an analytic boundary (Routh–Hurwitz)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from problems import write_slider_problem

from optimizer.evaluate import make_loop, plan_controller
from optimizer.plan import Plan, Tier
from optimizer.problem import load_problem
from optimizer.stability import home_margin, jacobian_fd, spectral_radius


def test_jacobian_fd_of_a_linear_map_is_exact() -> None:
    """Central differences recover a linear map's matrix (to round-off)."""
    rng = np.random.default_rng(0)
    A = rng.standard_normal((5, 5))
    np.testing.assert_allclose(jacobian_fd(lambda x: A @ x, rng.standard_normal(5)), A, atol=1e-8)
    assert spectral_radius(np.diag([0.5, -0.9, 0.2])) == pytest.approx(0.9)


@pytest.mark.parametrize(("factor", "stable"), [(0.99, True), (1.01, False)])
def test_margin_matches_routh_hurwitz_boundary(tmp_path, factor, stable) -> None:
    """Unit mass, task PD kp = ωn², kd = 2ζωn, through a first-order actuator 1/(τs + 1).

    τs³ + s² + kd s + kp = 0 is stable iff kd > τ kp, i.e. ωn < 2ζ/τ (Routh–Hurwitz;
    REFERENCES §5 [checked]): τ = 1/(2π·10 Hz), ζ = 0.7 gives 87.96 rad/s. The whole
    simulator (task-space law, ZOH actuator, semi-implicit Euler) runs at 50 kHz, where
    sampling moves the boundary far less than 1 %; the margin must call 0.99× stable and
    1.01× unstable.
    """
    prob = load_problem(write_slider_problem(tmp_path, corner_hz=10.0, rate_hz=50000.0))
    tau, zeta = 1.0 / (2 * math.pi * 10.0), 0.7
    wn = factor * 2 * zeta / tau
    assert 2 * zeta / tau == pytest.approx(87.96, abs=0.01)
    plan = Plan((Tier((0,), wn**2, 0.0, zeta, damping=0.0),))
    loop = make_loop(prob, plan_controller(prob, plan))
    margin = home_margin(loop, prob.references[0])
    assert (margin > 0) is stable
    # the discrete pole modulus is e^(σ T): |σ| ≈ 0.208 1/s at these factors (REFERENCES §5)
    sigma = -math.log(1.0 - margin) / prob.dt
    assert abs(sigma) == pytest.approx(0.208, rel=0.2)
