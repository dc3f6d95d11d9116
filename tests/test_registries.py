"""One contract per registry that every entry must pass: a kind added to a registry gets
these checks without a new test.

Registries: ``ACTUATOR_MODELS`` (actuator lag models), ``TRAJECTORY_KINDS`` (task-space
test trajectories). ``bounded.QP_SOLVERS`` has its contract in ``test_bounded.py``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal as sig

from optimizer.actuators import ACTUATOR_MODELS, JointActuator, discretize, make_model
from optimizer.trajectories import TRAJECTORY_KINDS, TRANSLATION_KINDS, sample
from optimizer.trajectories.composite import Combined, CsvPoses
from optimizer.trajectories.simple import Circle, Hold, Line, Rotate, Sine

#: Parameters for each actuator model kind (a kind missing here fails the first test).
ACTUATOR_PARAMS = {
    "first_order": [{"corner_hz": 6.0}, {"corner_hz": 80.0}],
    "second_order": [{"natural_hz": 8.0, "damping_ratio": 0.3},
                     {"natural_hz": 25.0, "damping_ratio": 1.4}],
}  # fmt: skip


def _response(model, f_hz: float) -> complex:
    A, B, C = model.continuous()
    s = 2j * math.pi * f_hz
    return complex((C @ np.linalg.solve(s * np.eye(A.shape[0]) - A, B)).item())


def test_every_actuator_model_has_test_parameters() -> None:
    assert set(ACTUATOR_PARAMS) == set(ACTUATOR_MODELS)


@pytest.mark.parametrize(
    ("kind", "params"), [(k, p) for k, ps in ACTUATOR_PARAMS.items() for p in ps]
)
def test_actuator_model_contract(kind, params) -> None:
    """Unit DC gain (a drive delivers the torque it is asked for, in steady state); stable
    poles; |H| = 1/sqrt(2) at its bandwidth_hz (the -3 dB definition; common practice, no
    source); the bank's step is scipy.signal.cont2discrete's zero-order hold (reference
    library) of the same state space; a one-line description."""
    m = make_model(kind, **params)
    A, B, C = m.continuous()
    assert abs(_response(m, 0.0) - 1.0) < 1e-12
    assert np.all(np.linalg.eigvals(A).real < 0)
    assert abs(abs(_response(m, m.bandwidth_hz())) - 1 / math.sqrt(2)) < 1e-6
    h = 1e-3
    bank = discretize([JointActuator("j", m)], h)
    Ad, Bd, _, _, _ = sig.cont2discrete((A, B, C, np.zeros((1, 1))), h, method="zoh")
    np.testing.assert_allclose(bank.Ad, Ad, atol=1e-12)
    np.testing.assert_allclose(bank.Bd, Bd, atol=1e-12)
    text = m.describe()
    assert text and "\n" not in text
    # its parameters and their units are the registry's keys
    assert tuple(m.units) == ACTUATOR_MODELS[kind][1] and all(m.units.values())
    assert {k: getattr(m, k) for k in m.units} == params
    # scaled(f): the same shape f times faster, so H_f(j f w) = H(j w) at every frequency
    # (frequency scaling of a transfer function; common practice, no source)
    fast = m.scaled(2.5)
    assert fast.kind == m.kind and fast.bandwidth_hz() == pytest.approx(2.5 * m.bandwidth_hz())
    for f in (0.3, 1.0, 7.0, 40.0):
        assert abs(_response(fast, 2.5 * f) - _response(m, f)) < 1e-12
    zeta = m.damping()
    if zeta is None:
        with pytest.raises(ValueError):
            m.with_damping(0.5)
    else:
        assert m.with_damping(zeta) == m and m.with_damping(0.5).damping() == 0.5
        assert m.with_damping(0.5).scaled(1.0) == m.with_damping(0.5)


#: One instance per trajectory kind (a kind missing here fails the next test).
def _kinds() -> dict[str, object]:
    t = np.linspace(0.0, 1.0, 11)
    csv = CsvPoses(
        times=t, dp=np.column_stack([0.02 * t**2, 0.0 * t, -0.01 * t]),
        rotvec=np.column_stack([0.0 * t, 0.05 * t, 0.0 * t]),
    )  # fmt: skip
    return {
        "hold": Hold(),
        "line": Line(delta_m=(0.05, -0.02, 0.03), move_s=0.6, start_s=0.1),
        "circle": Circle(radius_m=0.03, frequency_hz=1.0, normal=(0.0, 0.0, 1.0), ramp_s=0.3),
        "sine": Sine(axis=(0.0, 1.0, 0.0), amplitude_m=0.02, frequency_hz=1.5, ramp_s=0.3),
        "rotate": Rotate(axis=(1.0, 0.0, 0.0), amplitude_deg=8.0, frequency_hz=1.0, ramp_s=0.3),
        "combined": Combined(
            translation=Sine(axis=(0.0, 0.0, 1.0), amplitude_m=0.02, frequency_hz=1.0),
            rotation=Rotate(axis=(0.0, 1.0, 0.0), amplitude_deg=5.0, frequency_hz=1.0),
        ),
        "csv": csv,
    }


def test_every_trajectory_kind_has_a_test_instance() -> None:
    assert set(_kinds()) == set(TRAJECTORY_KINDS)
    assert set(TRANSLATION_KINDS) <= set(TRAJECTORY_KINDS)


@pytest.mark.parametrize("kind", sorted(TRAJECTORY_KINDS))
def test_trajectory_kind_contract(kind) -> None:
    """Sampled at 1 kHz from a tilted start pose: finite; starts at the start pose; the
    rotations stay rotations; the twist is the time derivative of the pose and the
    acceleration that of the twist (central differences; common practice, no source)."""
    traj = _kinds()[kind]
    assert traj.kind == kind
    rate = 1000.0
    p0 = np.array([0.4, -0.1, 0.3])
    c, s = math.cos(0.3), math.sin(0.3)
    R0 = np.array([[c, 0.0, s], [0.0, 1.0, 0.0], [-s, 0.0, c]])
    ref = sample("t", traj, 1.0, rate, p0, R0)
    for a in (ref.p, ref.R, ref.twist, ref.acc):
        assert np.all(np.isfinite(a))
    np.testing.assert_allclose(ref.p[0], p0, atol=1e-12)
    np.testing.assert_allclose(ref.R[0], R0, atol=1e-9)
    RtR = np.einsum("kij,kil->kjl", ref.R, ref.R)
    np.testing.assert_allclose(RtR, np.broadcast_to(np.eye(3), RtR.shape), atol=1e-9)
    h = 1.0 / rate
    v_fd = (ref.p[2:] - ref.p[:-2]) / (2 * h)
    scale_v = max(1e-3, float(np.abs(ref.twist[:, :3]).max()))
    assert np.abs(v_fd - ref.twist[1:-1, :3]).max() < 2e-3 * scale_v + 1e-9
    # angular velocity from the rotations: skew(w) ~ (R(k+1) R(k-1)^T - I) / (2h)
    dR = np.einsum("kij,klj->kil", ref.R[2:], ref.R[:-2])
    w_fd = np.stack(
        [dR[:, 2, 1] - dR[:, 1, 2], dR[:, 0, 2] - dR[:, 2, 0], dR[:, 1, 0] - dR[:, 0, 1]], axis=1
    ) / (4 * h)
    scale_w = max(1e-3, float(np.abs(ref.twist[:, 3:]).max()))
    assert np.abs(w_fd - ref.twist[1:-1, 3:]).max() < 2e-3 * scale_w + 1e-9
    a_fd = (ref.twist[2:] - ref.twist[:-2]) / (2 * h)
    scale_a = max(1e-3, float(np.abs(ref.acc).max()))
    assert np.abs(a_fd - ref.acc[1:-1]).max() < 2e-2 * scale_a + 1e-9
