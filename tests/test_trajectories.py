"""Trajectory kinds: derivatives agree with finite differences, starts at rest, CSV input."""

from __future__ import annotations

import numpy as np
import pinocchio as pin
import pytest

from optimizer.trajectories import Circle, Combined, CsvPoses, Hold, Line, Rotate, Sine, sample

KINDS = [
    Hold(),
    Line((0.05, -0.02, 0.03), move_s=0.6, start_s=0.1),
    Circle(0.05, 1.0, (0.0, 0.3, 1.0), ramp_s=0.4),
    Sine((1.0, 1.0, 0.0), 0.03, 1.5, ramp_s=0.3),
    Rotate((0.0, 1.0, 0.2), 12.0, 1.2, ramp_s=0.3),
    Combined(Circle(0.04, 0.8), Rotate((1.0, 0.0, 0.0), 8.0, 1.0)),
]
R0 = pin.exp3(np.array([0.3, -0.2, 0.5]))
P0 = np.array([0.4, 0.1, 0.3])


@pytest.mark.parametrize("kind", KINDS, ids=lambda k: k.kind)
def test_twist_and_acceleration_are_derivatives_of_the_pose(kind) -> None:
    """Velocity and acceleration equal central differences of the sampled pose (world axes)."""
    dt = 1e-4
    ref = sample("t", kind, 1.0, 1.0 / dt, P0, R0)
    v_fd = (ref.p[2:] - ref.p[:-2]) / (2 * dt)
    np.testing.assert_allclose(ref.twist[1:-1, :3], v_fd, atol=2e-4)
    a_fd = (ref.twist[2:, :3] - ref.twist[:-2, :3]) / (2 * dt)
    np.testing.assert_allclose(ref.acc[1:-1, :3], a_fd, atol=2e-2)
    # world angular velocity from Ṙ Rᵀ
    W = (ref.R[2:] - ref.R[:-2]) / (2 * dt) @ np.transpose(ref.R[1:-1], (0, 2, 1))
    w_fd = np.stack([W[:, 2, 1], W[:, 0, 2], W[:, 1, 0]], axis=1)
    np.testing.assert_allclose(ref.twist[1:-1, 3:], w_fd, atol=2e-4)
    al_fd = (ref.twist[2:, 3:] - ref.twist[:-2, 3:]) / (2 * dt)
    np.testing.assert_allclose(ref.acc[1:-1, 3:], al_fd, atol=2e-2)


@pytest.mark.parametrize("kind", KINDS, ids=lambda k: k.kind)
def test_starts_at_the_start_pose_at_rest(kind) -> None:
    """Every kind starts at the start pose with zero twist, so the loop starts settled."""
    ref = sample("t", kind, 0.5, 1000.0, P0, R0)
    np.testing.assert_allclose(ref.p[0], P0, atol=1e-12)
    np.testing.assert_allclose(ref.R[0], R0, atol=1e-12)
    np.testing.assert_allclose(ref.twist[0], 0.0, atol=1e-12)


def test_circle_keeps_its_radius_and_speed() -> None:
    """Once up to speed the circle has the stated radius and speed 2π r f."""
    ref = sample("c", Circle(0.05, 1.0, (1.0, 0.0, 0.0), ramp_s=0.5), 3.0, 1000.0, P0, R0)
    late = (ref.t >= 0.6) & (ref.t < 2.6)  # two whole laps once up to speed
    centre = ref.p[late].mean(axis=0)
    np.testing.assert_allclose(np.linalg.norm(ref.p[late] - centre, axis=1), 0.05, atol=1e-3)
    assert ref.peak_speed == pytest.approx(2 * np.pi * 0.05, rel=1e-9)
    np.testing.assert_allclose(ref.p[late, 0], P0[0], atol=1e-12)  # stays in the y-z plane


def test_csv_poses_interpolate_and_hold(tmp_path) -> None:
    """CSV rows are met exactly; the pose holds after the last row; derivatives agree."""
    f = tmp_path / "poses.csv"
    f.write_text(
        "time_s,x_m,y_m,z_m,rx_rad,ry_rad,rz_rad\n0,0,0,0,0,0,0\n"
        "0.5,0.02,0,0.01,0,0.1,0\n1.0,0.03,0.01,0.0,0.05,0.1,0\n"
    )
    kind = CsvPoses.from_file(f)
    ref = sample("csv", kind, 1.5, 10000.0, P0, R0)
    np.testing.assert_allclose(ref.p[5000], P0 + [0.02, 0, 0.01], atol=1e-12)
    np.testing.assert_allclose(ref.R[5000], pin.exp3(np.array([0, 0.1, 0])) @ R0, atol=1e-12)
    np.testing.assert_allclose(ref.p[-1], ref.p[10000], atol=1e-12)
    np.testing.assert_allclose(ref.twist[-1], 0.0)
    W = (ref.R[2:] - ref.R[:-2]) / 2e-4 @ np.transpose(ref.R[1:-1], (0, 2, 1))
    w_fd = np.stack([W[:, 2, 1], W[:, 0, 2], W[:, 1, 0]], axis=1)
    np.testing.assert_allclose(ref.twist[1:9999, 3:], w_fd[:9998], atol=1e-4)


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("t,x\n0,0\n", "the header must be"),
        ("time_s,x_m,y_m,z_m,rx_rad,ry_rad,rz_rad\n0,0,0,0,0,0,0\n", "at least 2 poses"),
        (
            "time_s,x_m,y_m,z_m,rx_rad,ry_rad,rz_rad\n0,0,0,0,0,0,0\n1,a,0,0,0,0,0\n",
            "line 3: a value is not a number",
        ),
        (
            "time_s,x_m,y_m,z_m,rx_rad,ry_rad,rz_rad\n0,0,0,0,0,0,0\n1,nan,0,0,0,0,0\n",
            "line 3: needs 7 finite",
        ),
    ],
)
def test_bad_csv_is_rejected_with_the_line(tmp_path, text, message) -> None:
    """A bad pose CSV raises ValueError naming what and where."""
    f = tmp_path / "bad.csv"
    f.write_text(text)
    with pytest.raises(ValueError, match=message):
        CsvPoses.from_file(f)


def test_bad_trajectory_parameters_fail_in_the_constructor() -> None:
    """Invalid parameters fail where the object is built, with the value."""
    with pytest.raises(ValueError, match="radius_m must be a positive"):
        Circle(-0.1, 1.0)
    with pytest.raises(ValueError, match="axis must be a non-zero 3-vector"):
        Sine((0.0, 0.0, 0.0), 0.01, 1.0)
    with pytest.raises(ValueError, match="amplitude_deg must be below 180"):
        Rotate((1.0, 0.0, 0.0), 200.0, 1.0)
