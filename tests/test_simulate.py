"""The simulator's plant step against physical identities (no controller in the loop).

The planar arm with its plant made equal to the model (no payload, no friction, no
armature): commanded torques go through the actuators and the delay line to the plant's
ABA and the semi-implicit Euler step, tick by tick (``ClosedLoop.advance``).
"""

from __future__ import annotations

import numpy as np
import pinocchio as pin
import pytest
from problems import PLANAR

from optimizer.evaluate import make_loop, osc_plan, plan_controller
from optimizer.problem import load_problem


@pytest.fixture(scope="module")
def ideal(tmp_path_factory):
    """The planar problem with the plant equal to the model and no losses."""
    d = tmp_path_factory.mktemp("ideal")
    for f in PLANAR.parent.iterdir():
        if f.is_file():
            (d / f.name).write_bytes(f.read_bytes())
    text = (d / PLANAR.name).read_text()
    for old, new in [
        ("payload_kg = 0.3", "payload_kg = 0.0"),
        ("coulomb_nm = 0.2", "coulomb_nm = 0.0"),
        ("coulomb_nm = 1.0", "coulomb_nm = 0.0"),
        ("viscous_nms_per_rad = 0.05", "viscous_nms_per_rad = 0.0"),
        ("viscous_nms_per_rad = 0.3", "viscous_nms_per_rad = 0.0"),
        ("armature_kgm2 = 0.005", "armature_kgm2 = 0.0"),
        ("armature_kgm2 = 0.2", "armature_kgm2 = 0.0"),
    ]:
        assert old in text, old
        text = text.replace(old, new)
    (d / PLANAR.name).write_text(text)
    prob = load_problem(d / PLANAR.name)
    loop = make_loop(prob, plan_controller(prob, osc_plan(prob, 100.0, 100.0, 0.8)))
    return prob, loop


def test_gravity_torque_holds_the_arm_still(ideal) -> None:
    """Commanding the model's gravity torque g(q0) at rest keeps q at q0 for 2 s: the
    equilibrium of M q'' + h(q, q') = tau with tau = g(q0), q' = 0 (common practice, no
    source). Checks that actuators, delay line, ABA and integrator add nothing."""
    _, loop = ideal
    st = loop.initial_state()
    q0 = st.q.copy()
    g0 = loop.arm.gravity(q0)
    for _ in range(2000):
        loop.advance(st, g0)
    np.testing.assert_allclose(st.q, q0, atol=1e-9)
    np.testing.assert_allclose(st.v, 0.0, atol=1e-9)


def test_work_of_the_applied_torque_equals_the_change_of_energy(ideal) -> None:
    """Work-energy theorem (common practice, no source): with no losses, the kinetic plus
    potential energy of the plant changes by the work of the torque the integrator applied,
    sum of tau . v h. The command drops from g(q0) to 0.9 g(q0), so the actuators' lag
    lets the arm sag and swing for 0.5 s (2.5 J). Semi-implicit Euler at 1 ms closes the
    balance to 0.08 % here; the test allows 0.5 % (a torque applied twice, or a
    mismatched plant, is off by tens of %)."""
    _, loop = ideal
    model, data = loop.plant, loop.plant.createData()

    def energy(q: np.ndarray, v: np.ndarray) -> float:
        return float(
            pin.computeKineticEnergy(model, data, q, v) + pin.computePotentialEnergy(model, data, q)
        )

    st = loop.initial_state()
    e0, work = energy(st.q, st.v), 0.0
    command = 0.9 * loop.arm.gravity(st.q)
    for _ in range(500):
        loop.advance(st, command)
        work += float(loop._net @ st.v) * loop.h  # the torque ABA used this tick
    change = energy(st.q, st.v) - e0
    assert change < -1.0  # the arm did sag (joules)
    assert change == pytest.approx(work, rel=0.005)
