"""Rigid-body dynamics against closed forms, and the plant deviation."""

from __future__ import annotations

import math

import numpy as np
import pinocchio as pin
import pytest
from problems import pendulum_urdf, two_link_urdf

from optimizer import plant
from optimizer.arm import Arm, PlantDeviation

# Golden values: planar elbow manipulator (Spong, Hutchinson & Vidyasagar, "Robot Modeling
# and Control", planar elbow manipulator example — section number from memory), recomputed
# with numpy in tests/REFERENCES.md §1 [checked]; g = 9.81.
GOLDEN_POINT = [
    (
        (0.3, -1.1),
        (1.2, 0.7),
        [[3.9071922429, 1.4535961214], [1.4535961214, 1.0]],
        [1.9339199713, -1.2833385985],
        [25.5783947353, 6.8346928187],
    ),
    (
        (math.pi / 6, math.pi / 3),
        (0.5, -0.3),
        [[4.0, 1.5], [1.5, 1.0]],
        [0.1818653348, 0.2165063509],
        [16.991418422, 0.0],
    ),
]


@pytest.mark.parametrize(("q", "qd", "M", "Cqd", "g"), GOLDEN_POINT)
def test_two_link_point_masses_match_closed_form(q, qd, M, Cqd, g) -> None:
    """M(q), C(q, q̇)q̇ and g(q) of the point-mass 2R URDF equal the textbook closed form."""
    model = pin.buildModelFromXML(two_link_urdf())
    data = model.createData()
    q, qd = np.array(q), np.array(qd)
    np.testing.assert_allclose(pin.crba(model, data, q), M, atol=1e-8)
    grav = pin.computeGeneralizedGravity(model, data, q)
    np.testing.assert_allclose(grav, g, atol=1e-8)
    np.testing.assert_allclose(pin.nonLinearEffects(model, data, q, qd) - grav, Cqd, atol=1e-8)


def test_two_link_home_and_rods_match_closed_form() -> None:
    """At q = 0 M = [[5,2],[2,1]], g = (29.43, 9.81); uniform rods match tests/REFERENCES.md §1."""
    model = pin.buildModelFromXML(two_link_urdf())
    data = model.createData()
    np.testing.assert_allclose(pin.crba(model, data, np.zeros(2)), [[5, 2], [2, 1]], atol=1e-8)
    np.testing.assert_allclose(
        pin.computeGeneralizedGravity(model, data, np.zeros(2)), [29.43, 9.81], atol=1e-8
    )
    rods = pin.buildModelFromXML(two_link_urdf(rods=True))
    d2 = rods.createData()
    q, qd = np.array([math.pi / 6, math.pi / 3]), np.array([0.5, -0.3])
    np.testing.assert_allclose(
        pin.crba(rods, d2, q),
        [[2.1666666667, 0.5833333333], [0.5833333333, 0.3333333333]],
        atol=1e-8,
    )
    g = pin.computeGeneralizedGravity(rods, d2, q)
    np.testing.assert_allclose(g, [12.743563817, 0.0], atol=1e-8)
    np.testing.assert_allclose(
        pin.nonLinearEffects(rods, d2, q, qd) - g, [0.0909326674, 0.1082531755], atol=1e-8
    )


def _pendulum_energy_drift(method: str, seconds: float) -> float:
    model = pin.buildModelFromXML(pendulum_urdf())
    data = model.createData()
    q, v, h = np.array([1.0]), np.zeros(1), 1e-3
    zero = np.zeros(1)

    # energy with q from the horizontal: height = sin q (axis -y lifts the bob)
    def energy(q: np.ndarray, v: np.ndarray) -> float:
        return 0.5 * v[0] ** 2 + 9.81 * math.sin(q[0])

    e0 = energy(q, v)
    scale = 9.81 * (1.0 - math.cos(1.0))
    worst = 0.0
    for _ in range(int(seconds / h)):
        a = pin.aba(model, data, q, v, zero)
        if method == "semi-implicit":
            plant.integrate(q, v, a, h)
        else:
            q, v = q + h * v, v + h * a
        worst = max(worst, abs(energy(q, v) - e0) / scale)
    return worst


def test_pendulum_energy_bounded_with_semi_implicit_euler() -> None:
    """Unforced pendulum: semi-implicit Euler keeps the energy error bounded, explicit does not.

    Values [checked] in tests/REFERENCES.md §2 (θ0 = 1 rad, 1 ms): semi-implicit ≈ 1.5e-3 at 20 s
    and 200 s; explicit 0.18 at 20 s. Bounded energy of symplectic methods: Hairer, Lubich &
    Wanner, Acta Numerica 2003. (The angle here is from the horizontal, which changes only
    the starting phase of the swing, so the bound's size is compared loosely.)
    """
    short = _pendulum_energy_drift("semi-implicit", 5.0)
    long = _pendulum_energy_drift("semi-implicit", 20.0)
    assert long < 5e-3
    assert long < 1.5 * short + 1e-4  # does not grow with time
    assert _pendulum_energy_drift("explicit", 20.0) > 20 * long


def test_plant_payload_adds_mass_and_gravity() -> None:
    """The plant carries the payload the controller's model lacks; kinematics are shared."""
    dev = PlantDeviation(payload_kg=0.5, payload_offset_m=(0.0, 0.0, 0.0), mass_scale=1.1)
    arm = Arm(two_link_urdf(rods=True), "tip", home=[0.0, 0.0], deviation=dev)
    m_model = sum(i.mass for i in arm.model.inertias)
    m_plant = sum(i.mass for i in arm.plant_model.inertias)
    assert m_plant == pytest.approx(1.1 * m_model + 0.5)
    gp = pin.computeGeneralizedGravity(arm.plant_model, arm.plant_model.createData(), np.zeros(2))
    # payload at the tip, 2 m out: adds 0.5·9.81·2 N·m at the shoulder
    assert gp[0] - 1.1 * arm.gravity(np.zeros(2))[0] == pytest.approx(0.5 * 9.81 * 2.0, rel=1e-9)


def test_link_mass_scale_scales_only_that_link() -> None:
    """A per-link scale changes that link's mass alone."""
    dev = PlantDeviation(link_mass_scale={"l2": 2.0})
    arm = Arm(two_link_urdf(rods=True), "tip", deviation=dev)
    assert arm.plant_model.inertias[2].mass == pytest.approx(2.0)
    assert arm.plant_model.inertias[1].mass == pytest.approx(1.0)
