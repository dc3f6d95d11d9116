"""MJCF arm models: converted to the same arm as the URDF, checked against pinocchio's own
MJCF reader, and refused in one line where the tool cannot take them."""

from __future__ import annotations

import shutil

import numpy as np
import pinocchio as pin
import pytest
from problems import PLANAR, PLANAR_MJCF

from optimizer.cli import main
from optimizer.exceptions import ProblemError
from optimizer.mjcf import mjcf_to_urdf
from optimizer.problem import load_problem


def _mjcf_problem(tmp_path, mjcf_text: str = PLANAR_MJCF):
    """The planar problem in tmp_path with ``[arm] mjcf = "arm.xml"`` instead of the URDF."""
    for f in PLANAR.parent.iterdir():
        if f.is_file():
            shutil.copy(f, tmp_path / f.name)
    prob = tmp_path / PLANAR.name
    text = prob.read_text().replace('urdf = "arm.urdf"', 'mjcf = "arm.xml"')
    assert 'mjcf = "arm.xml"' in text
    prob.write_text(text)
    (tmp_path / "arm.xml").write_text(mjcf_text)
    return prob, tmp_path / "arm.xml"


def test_mjcf_arm_equals_the_urdf_arm(tmp_path) -> None:
    """The MJCF version of the planar arm gives the URDF arm: mass matrix, gravity, tip
    pose and Jacobian at random postures to 1e-12, limits (degrees converted), efforts
    (actuatorfrcrange; motor gear x ctrlrange)."""
    prob, _ = _mjcf_problem(tmp_path)
    a = load_problem(prob).arm
    b = load_problem(PLANAR).arm
    assert a.joint_names == b.joint_names
    np.testing.assert_allclose(a.effort, b.effort)
    np.testing.assert_allclose(a.lower, b.lower, atol=1e-12)
    np.testing.assert_allclose(a.upper, b.upper, atol=1e-12)
    rng = np.random.default_rng(0)
    for _ in range(5):
        q = rng.uniform(-2.0, 2.0, a.n)
        np.testing.assert_allclose(a.mass_matrix(q), b.mass_matrix(q), atol=1e-12)
        np.testing.assert_allclose(a.gravity(q), b.gravity(q), atol=1e-12)
        for x, y in zip(a.tip_pose(q), b.tip_pose(q)):
            np.testing.assert_allclose(x, y, atol=1e-12)
        np.testing.assert_allclose(a.tip_jacobian(q), b.tip_jacobian(q), atol=1e-12)


def test_mjcf_problem_scores_as_the_urdf_problem(tmp_path, capsys) -> None:
    """End to end: `score` of the same plan on both problems prints the same table."""
    prob, _ = _mjcf_problem(tmp_path)
    plan = PLANAR.parent / "plans" / "two-tier.toml"
    assert main(["score", str(prob), "--plan", str(plan), "--no-margin"]) == 0
    mjcf_out = capsys.readouterr().out
    assert main(["score", str(PLANAR), "--plan", str(plan), "--no-margin"]) == 0
    urdf_out = capsys.readouterr().out
    rows = lambda out: [ln for ln in out.splitlines() if "│" in ln]  # noqa: E731
    assert rows(mjcf_out) and rows(mjcf_out) == rows(urdf_out)


#: An invented 5-joint arm that uses every orientation form the converter reads, both
#: angle units, a custom Euler sequence, a full inertia with its own frame, a slide joint
#: and a chain of fixed bodies.
SPATIAL = """<mujoco model="spatial5">
  <compiler angle="{angle}" eulerseq="{seq}"/>
  <worldbody>
    <body name="base_plate">
      <inertial pos="0 0 0" mass="3" diaginertia="0.02 0.02 0.03"/>
      <body name="turret" pos="0.01 0.02 0.05" quat="0.9238795 0 0 0.3826834">
        <joint name="yaw" axis="0 0 1"/>
        <inertial pos="0.01 0 0.04" quat="0.8 0.6 0 0" mass="1.5"
                  fullinertia="0.010 0.012 0.008 0.001 -0.0005 0.0008"/>
        <body name="arm1" pos="0 0 0.12" axisangle="1 0 0 {a90}">
          <joint name="pitch1" axis="0 0 1" range="{r1}"/>
          <inertial pos="0.15 0 0" mass="1.2" diaginertia="0.001 0.01 0.01"/>
          <body name="arm2" pos="0.3 0 0" xyaxes="0 1 0 -1 0 0">
            <joint name="pitch2" axis="0 0 1"/>
            <inertial pos="0.1 0.01 0" mass="0.8" diaginertia="0.0008 0.005 0.005"/>
            <body name="bracket" pos="0.1 0 0.02" euler="{e1}">
              <inertial pos="0.01 0 0" mass="0.1" diaginertia="0.0001 0.0001 0.0001"/>
              <body name="slider" pos="0.1 0 0" zaxis="1 0 0">
                <joint name="extend" type="slide" axis="0 0 1" range="0 0.1"/>
                <inertial pos="0 0 0.02" mass="0.3" diaginertia="0.0002 0.0002 0.0001"/>
                <body name="wrist" pos="0 0 0.05" euler="{e2}">
                  <joint name="roll" axis="0 0 1"/>
                  <inertial pos="0 0 0.03" mass="0.2" diaginertia="0.0001 0.0001 0.00005"/>
                  <site name="tool" pos="0 0 0.08" quat="0 1 0 0"/>
                </body>
              </body>
            </body>
          </body>
        </body>
      </body>
    </body>
  </worldbody>
</mujoco>
"""


def _spatial(angle: str, seq: str) -> str:
    deg = angle == "degree"
    return SPATIAL.format(
        angle=angle, seq=seq,
        e1="10 -20 30" if deg else "0.1745329 -0.3490659 0.5235988",
        e2="-15 25 40" if deg else "-0.2617994 0.4363323 0.6981317",
        a90="90" if deg else "1.5707963267948966",
        r1="-90 90" if deg else "-1.5707963 1.5707963",
    )  # fmt: skip


@pytest.mark.parametrize(
    ("angle", "seq"), [("degree", "xyz"), ("radian", "xyz"), ("degree", "zyx"), ("radian", "zxy")]
)
def test_conversion_matches_pinocchios_mjcf_reader(tmp_path, angle, seq) -> None:
    """Reference library: pinocchio.buildModelFromMJCF reads the same file; the model the
    converted URDF gives has the same joints, joint placements, mass matrix and gravity
    torques at random postures (1e-9)."""
    text = _spatial(angle, seq)
    path = tmp_path / "spatial.xml"
    path.write_text(text)
    ref = pin.buildModelFromMJCF(str(path))
    urdf, warnings = mjcf_to_urdf(text, "test", "", "test")
    ours = pin.buildModelFromXML(urdf)
    assert warnings == []
    assert list(ours.names) [1:] == list(ref.names)[1:]  # fmt: skip
    rd, od = ref.createData(), ours.createData()
    rng = np.random.default_rng(1)
    for _ in range(5):
        q = rng.uniform(-1.0, 1.0, ours.nq) * np.array([1, 1, 1, 0.05, 1])
        M_ref = pin.crba(ref, rd, q)
        M_ours = pin.crba(ours, od, q)
        np.testing.assert_allclose(np.triu(M_ours), np.triu(M_ref), atol=1e-9)
        np.testing.assert_allclose(
            pin.computeGeneralizedGravity(ours, od, q), pin.computeGeneralizedGravity(ref, rd, q),
            atol=1e-9,
        )  # fmt: skip
        for j in range(1, ours.njoints):
            np.testing.assert_allclose(od.oMi[j].homogeneous, rd.oMi[j].homogeneous, atol=1e-9)


def test_a_placed_top_body_and_euler_angles_match_scipy() -> None:
    """pinocchio's MJCF reader takes the first body as the model's root and drops its
    placement; MuJoCo places it in the world, and so does the converter. Reference
    library: scipy.spatial.transform.Rotation (its upper-case sequence is intrinsic, as
    MJCF's lower-case one is): the yaw joint's world placement is base then turret."""
    from scipy.spatial.transform import Rotation

    text = _spatial("degree", "xyz").replace(
        '<body name="base_plate">', '<body name="base_plate" pos="0 0 0.1" euler="10 -20 30">'
    )
    model = pin.buildModelFromXML(mjcf_to_urdf(text, "t", "", "t")[0])
    data = model.createData()
    pin.forwardKinematics(model, data, np.zeros(model.nq))
    R_base = Rotation.from_euler("XYZ", [10, -20, 30], degrees=True).as_matrix()
    R_turret = Rotation.from_quat([0, 0, 0.3826834, 0.9238795]).as_matrix()  # x y z w
    yaw = data.oMi[model.getJointId("yaw")]
    np.testing.assert_allclose(yaw.rotation, R_base @ R_turret, atol=1e-7)
    np.testing.assert_allclose(yaw.translation, [0, 0, 0.1] + R_base @ [0.01, 0.02, 0.05], atol=1e-12)


def test_the_site_is_a_tool_frame(tmp_path) -> None:
    """A site becomes a frame the problem can name as its tip (the planar arm's 'tip')."""
    urdf, _ = mjcf_to_urdf(PLANAR_MJCF, "t", "", "t")
    model = pin.buildModelFromXML(urdf)
    assert model.existFrame("tip")


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (("<worldbody>", '<include file="/etc/passwd"/><worldbody>'), "opens other files"),
        (("</worldbody>", '</worldbody><equality><joint joint1="elbow" joint2="wrist"/></equality>'), "couples joints"),
        (('type="hinge" axis="0 -1 0"', 'type="ball"'), "only hinge and slide"),
        (('<body name="upper">', '<body name="upper"><freejoint/>'), "freejoint"),
        (('<joint name="elbow" axis', '<joint name="elbow2"/><joint name="elbow" axis'), "2 joints"),
        (('<joint name="wrist" axis', '<joint name="wrist" pos="0.01 0 0" axis'), "not the body's origin"),
        (('<inertial pos="0.15 0 0" mass="1.0" diaginertia="0.0005 0.0077 0.0077"/>', '<geom size="0.1"/>'), "geoms but no <inertial>"),
        (('<default>', '<default><joint damping="1"/>'), "<default> sets joint attributes"),
        (('<option timestep="0.001"/>', '<spaceship/>'), "<spaceship> is not an MJCF element"),
        (('<mujoco model="planar3">', '<!DOCTYPE m [<!ENTITY a "b">]><mujoco model="planar3">'), "DOCTYPE"),
        (('<option timestep="0.001"/>', '<compiler inertiafromgeom="true"/>'), "inertiafromgeom"),
        (('mass="2.0"', 'mass="-2.0"'), "mass must be > 0"),
        (('diaginertia="0.001 0.0272 0.0272"', 'diaginertia="0.001 0.0272 0.1"'), "triangle inequality"),
        (('<site name="tip" pos="0.1 0 0"/>', '<site name="hand" pos="0.1 0 0"/>'), "used twice"),
        (('<motor joint="wrist"', '<motor joint="knee"'), "names joint 'knee'"),
        (("</mujoco>", ""), "not well-formed XML"),
        (('<option timestep="0.001"/>', '<compiler eulerseq="XYZ"/>'), "fixed-axis"),
        (('<option timestep="0.001"/>', "<asset>" + "<a>" * 3000 + "</a>" * 3000 + "</asset>"), "nest 3002 deep"),
        (('<site name="tip" pos="0.1 0 0"/>', "".join(f'<site name="s{i}"/>' for i in range(600))), "at most 512"),
    ],
    ids=["include", "equality", "ball", "freejoint", "two-joints", "joint-pos", "geom-mass",
         "default-joint", "unknown", "declaration", "inertiafromgeom", "negative-mass",
         "triangle", "duplicate-name", "unknown-motor-joint", "truncated", "fixed-axis-euler", "deep", "many-bodies"],
)  # fmt: skip
def test_unsupported_mjcf_is_refused_in_one_line(tmp_path, capsys, change, message) -> None:
    """Each unsupported or unphysical MJCF: exit 2, one line naming the MJCF file and why."""
    old, new = change
    assert old in PLANAR_MJCF
    prob, xml = _mjcf_problem(tmp_path, PLANAR_MJCF.replace(old, new, 1))
    with pytest.raises(ProblemError, match=message):
        load_problem(prob, check_reach=False)
    assert main(["check", str(prob)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and str(xml) in err and "Traceback" not in err, err


def test_joint_damping_and_armature_are_reported_not_taken(tmp_path, capsys) -> None:
    """Joint damping/armature/friction loss: a warning pointing at [actuators], printed
    whole by `check` (the table name is not taken for markup)."""
    text = PLANAR_MJCF.replace('<joint name="elbow" axis', '<joint name="elbow" damping="0.5" armature="0.01" axis')
    prob, _ = _mjcf_problem(tmp_path, text)
    warns = load_problem(prob, check_reach=False).warnings
    assert any("damping=0.5" in w and "viscous_nms_per_rad" in w for w in warns)
    assert any("armature=0.01" in w and "armature_kgm2" in w for w in warns)
    assert main(["check", str(prob)]) == 0
    assert "[actuators.elbow]" in capsys.readouterr().out


def test_urdf_and_mjcf_together_are_refused(tmp_path) -> None:
    prob, _ = _mjcf_problem(tmp_path)
    prob.write_text(prob.read_text().replace('mjcf = "arm.xml"', 'mjcf = "arm.xml"\nurdf = "arm.urdf"'))
    with pytest.raises(ProblemError, match="exactly one of urdf"):
        load_problem(prob, check_reach=False)


def test_a_calibrated_copy_elsewhere_still_finds_the_mjcf(tmp_path) -> None:
    """validate --write puts the problem copy in another folder: its mjcf path is made
    relative to that folder, and the copy loads."""
    from optimizer.actuator_file import write_calibrated

    (tmp_path / "a").mkdir()
    prob, _ = _mjcf_problem(tmp_path / "a")
    target = tmp_path / "elsewhere" / "calibrated.toml"
    target.parent.mkdir()
    write_calibrated(prob, target, {"payload_kg": 0.1}, {}, "calibrated in a test")
    text = target.read_text()
    assert 'mjcf = "../a/arm.xml"' in text
    assert load_problem(target, check_reach=False).arm.n == 3


def test_the_bundled_mjcf_problem_is_the_planar_problem() -> None:
    """problems/planar3/problem-mjcf.toml is problem.toml but for its name and arm line,
    and loads to the same joints, efforts and limits."""
    mj = PLANAR.parent / "problem-mjcf.toml"
    body = lambda p: [ln for ln in p.read_text().splitlines()  # noqa: E731
                      if not ln.startswith(("#", "name =", "urdf =", "mjcf ="))]  # fmt: skip
    assert body(mj) == body(PLANAR)
    a, b = load_problem(mj).arm, load_problem(PLANAR).arm
    assert a.joint_names == b.joint_names
    np.testing.assert_allclose(a.effort, b.effort)
    np.testing.assert_allclose(a.upper, b.upper, atol=1e-12)
