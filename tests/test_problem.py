"""Problem files: what a valid file becomes (defaults, inheritance, units, efforts), the
one model build, actuator files, the digest. One-line refusals are in test_cli.py and
the generated ones in test_fuzz_inputs.py."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from problems import planar_variant

from optimizer import arm as arm_module
from optimizer.exceptions import ProblemError
from optimizer.problem import load_problem
from optimizer.robust import plant_set

PLANAR = Path(__file__).resolve().parents[1] / "problems" / "planar3" / "problem.toml"


def test_the_planar_problem_as_loaded() -> None:
    p = load_problem(PLANAR)
    assert p.name == "planar3" and p.arm.joint_names == ("shoulder", "elbow", "wrist")
    # home is written in degrees for revolute joints
    assert np.allclose(p.arm.home, np.radians([30.0, -60.0, 20.0]), atol=1e-15)
    # [actuators.shoulder] overrides [actuators.default] key by key
    by = {a.joint: a for a in p.actuators}
    assert by["shoulder"].model.bandwidth_hz() == pytest.approx(6.0)
    assert by["elbow"].model.bandwidth_hz() == pytest.approx(60.0)
    assert by["shoulder"].coulomb_nm == 1.0 and by["elbow"].coulomb_nm == 0.2
    assert all(a.delay_ticks == 1 for a in p.actuators)  # 1 ms at 1 kHz
    # armature goes into the model (and the plant); efforts come from the URDF when absent
    assert np.allclose(p.arm.model.armature, [0.2, 0.005, 0.005])
    assert [a.effort_nm for a in p.actuators] == [60.0, 30.0, 10.0]
    assert list(p.arm.effort) == [60.0, 30.0, 10.0]
    # the task axes and unset defaults
    assert p.control.task_axes == (0, 2, 4) and p.control.dt == pytest.approx(1e-3)
    assert p.sim.substeps == 1 and p.scoring.aggregate == "mean"
    assert p.perturb.statistic == "p90" and p.perturb.min_feasible_share == 1.0
    assert [r.name for r in p.references] == ["reach", "wave"]
    assert p.arm.deviation.payload_kg == 0.3


def test_a_joint_with_its_own_model_does_not_inherit_the_default_parameters(
    tmp_path: Path,
) -> None:
    f = planar_variant(
        tmp_path,
        ("[actuators.shoulder]\ncorner_hz = 6.0",
         '[actuators.shoulder]\nmodel = "second_order"\nnatural_hz = 8.0\ndamping_ratio = 0.7'),
    )
    p = load_problem(f, check_reach=False)
    sh = next(a for a in p.actuators if a.joint == "shoulder")
    assert type(sh.model).__name__ == "SecondOrder"
    assert sh.coulomb_nm == 1.0  # friction is not a model parameter: still inherited
    bad = planar_variant(
        tmp_path, ("[actuators.shoulder]\ncorner_hz = 6.0",
                   '[actuators.shoulder]\nmodel = "second_order"\ncorner_hz = 6.0'),
    )
    with pytest.raises(ProblemError, match=r"actuators\.shoulder"):
        load_problem(bad, check_reach=False)


def test_the_arm_model_is_built_once_per_problem_and_never_for_perturbed_plants(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    calls = []
    real = arm_module.build_model

    def counted(xml: str, source: object):  # type: ignore[no-untyped-def]
        calls.append(source)
        return real(xml, source)

    monkeypatch.setattr(arm_module, "build_model", counted)
    import optimizer.problem as problem_module

    monkeypatch.setattr(problem_module, "build_model", counted)
    p = load_problem(PLANAR, check_reach=False)
    assert len(calls) == 1
    plants = plant_set(p, 5)
    assert len(calls) == 1 and len(plants) == 5  # the corner plant and four draws
    # a perturbed plant's arm is an independent copy: the nominal model is untouched
    assert plants[-1].arm.model is not p.arm.model
    assert np.allclose(p.arm.model.armature, [0.2, 0.005, 0.005])


def test_home_outside_the_limits_is_shown_in_degrees(tmp_path: Path) -> None:
    f = planar_variant(tmp_path, ("home = [30.0, -60.0, 20.0]", "home = [30.0, -60.0, 170.0]"))
    with pytest.raises(ProblemError) as err:
        load_problem(f, check_reach=False)
    # the URDF's ±2.8 rad limit shown as degrees (common practice, no source: 2.8 rad = 160.4°)
    assert err.value.key == "arm.home" and f"{math.degrees(2.8):.1f}" in err.value.reason


def test_an_actuator_file_changes_the_named_joints_and_the_digest(tmp_path: Path) -> None:
    base = load_problem(PLANAR, check_reach=False)
    acts = tmp_path / "faster-shoulder.toml"
    acts.write_text("[actuators.shoulder]\ncorner_hz = 12.0\n")
    p = load_problem(PLANAR, check_reach=False, actuator_files=[acts])
    assert p.swapped_joints == ("shoulder",) and p.actuator_files == (acts,)
    sh = next(a for a in p.actuators if a.joint == "shoulder")
    assert sh.model.bandwidth_hz() == pytest.approx(12.0)
    assert sh.coulomb_nm == 1.0  # kept from the problem file
    assert p.digest != base.digest and len(p.digest) == 64
    assert load_problem(PLANAR, check_reach=False).digest == base.digest  # same files, same


def test_kinds_that_read_their_own_table(tmp_path: Path) -> None:
    """A pose CSV beside the problem file and a combined trajectory, through the loader."""
    (tmp_path / "poses.csv").write_text(
        "time_s,x_m,y_m,z_m,rx_rad,ry_rad,rz_rad\n0,0,0,0,0,0,0\n0.5,0.01,0,0.02,0,0.05,0\n"
        "1.0,0.02,0,0.0,0,0,0\n"
    )
    poses = '[[trajectory]]\nname = "poses"\nkind = "csv"\nduration_s = 1.2\nfile = "poses.csv"\n'
    f = planar_variant(tmp_path, ("[search]", poses + "\n[search]"))
    p = load_problem(f, check_reach=False)
    assert [t.kind.kind for t in p.trajectories] == ["line", "combined", "csv"]
    ref = p.references[2]
    p0, _ = p.arm.tip_pose(p.arm.home)
    assert np.allclose(ref.p[0], p0) and np.allclose(ref.p[500], p0 + [0.01, 0.0, 0.02])
    assert p.trajectories[1].kind.rotation.kind == "rotate"
    (tmp_path / "poses.csv").write_text("time_s,x_m\n0,0\n")
    with pytest.raises(ProblemError) as err:
        load_problem(f, check_reach=False)
    assert err.value.key == "trajectory[2].file"
    bad = planar_variant(tmp_path, ('kind = "rotate"\naxis', 'kind = "sine"\naxis'))
    with pytest.raises(ProblemError) as err:
        load_problem(bad, check_reach=False)
    assert err.value.key == "trajectory[1].rotation.kind" and "rotate" in err.value.reason
