"""The runtime law and the C++ export: the same law as the simulator, compiled and checked."""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from problems import DEMO_PLANS, ROOT

from optimizer.cli import main
from optimizer.evaluate import make_loop, plan_controller
from optimizer.export import export_files, plan_from_header
from optimizer.plan import load_plan
from optimizer.runtime import TierLaw

EIGEN = Path("/usr/include/eigen3")


def test_runtime_law_is_the_simulators_law(demo) -> None:
    """TierLaw on random states gives the simulator controller's command to 1e-12 (it runs
    the same code: one reference sample bound, one kernel call)."""
    plan = load_plan(DEMO_PLANS / "three-tier.toml", demo.arm.joint_names)
    law = TierLaw(demo, plan)
    loop = make_loop(demo, plan_controller(demo, plan))
    ref = demo.references[2]
    loop.controller.bind(ref)
    rng = np.random.default_rng(0)
    for k in rng.integers(0, len(ref.t), 10):
        q = demo.arm.home + rng.normal(0.0, 0.1, demo.arm.n)
        v = rng.normal(0.0, 0.3, demo.arm.n)
        loop.controller.command(int(k), q, v)
        tau = law.command(q, v, ref.p[k], ref.R[k], ref.twist[k], ref.acc[k])
        np.testing.assert_allclose(tau, loop.controller.tau, rtol=1e-12, atol=1e-12)


def test_exported_constants_are_the_plan(demo) -> None:
    """The header's constants re-import as the plan: joints, gains, ζ and the tier damping."""
    plan = load_plan(DEMO_PLANS / "three-tier.toml", demo.arm.joint_names)
    text = export_files(demo, plan, count=2)["tierplan_law.hpp"]
    back = plan_from_header(text, demo.arm.joint_names)
    assert len(back.tiers) == len(plan.tiers)
    for a, b in zip(plan.tiers, back.tiers, strict=True):
        assert a.joints == b.joints
        assert (a.kp_t, a.kp_r) == pytest.approx((b.kp_t, b.kp_r), rel=1e-15)
        assert a.zeta == pytest.approx(b.zeta, rel=1e-12)
        assert b.damping == demo.control.tier_damping


def test_a_bounded_plan_is_refused_in_one_line(demo, tmp_path, capsys) -> None:
    """The bounded law needs a QP solver in the loop: export says so and writes nothing."""
    plan = (DEMO_PLANS / "three-tier.toml").read_text().replace(
        "nested = true", 'nested = true\nlaw = "bounded"'
    )
    f = tmp_path / "b.toml"
    f.write_text(plan)
    rc = main(["export", str(ROOT / "problems/polish7/problem.toml"), "--plan", str(f),
               "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert rc == 2 and err.count("\n") == 1 and "only the summed law" in err
    assert not (tmp_path / "out").exists()


def _compiler_or_skip() -> str:
    gxx = shutil.which("g++")
    why = None
    if gxx is None:
        why = "no g++ on this machine"
    elif not (EIGEN / "Eigen" / "Dense").is_file():
        why = f"no Eigen 3 headers in {EIGEN} (Debian package libeigen3-dev)"
    if why:
        if os.environ.get("TIERPLAN_REQUIRE_CXX"):
            pytest.fail(f"C++ check required but {why}")
        pytest.skip(why)
    return str(gxx)


@pytest.mark.parametrize(
    "problem_rel, plan_rel",
    [("polish7", "polish7/plans/three-tier.toml")],  # its tier 2 has 5 joints for 6 rows
)
def test_the_exported_law_compiles_and_matches_python(tmp_path, problem_rel, plan_rel) -> None:
    """export writes the header, check.cpp and vectors; g++ builds check.cpp against Eigen
    and it finds the C++ law within 1e-9 of the Python law on every vector (it exits 1
    otherwise). The time per call it prints goes in the README."""
    gxx = _compiler_or_skip()
    out = tmp_path / "export"
    rc = main(["export", str(ROOT / "problems" / problem_rel / "problem.toml"),
               "--plan", str(ROOT / "problems" / plan_rel), "--out", str(out)])
    assert rc == 0
    build = subprocess.run(
        [gxx, "-O2", "-std=c++17", f"-I{EIGEN}", "check.cpp", "-o", "check"],
        cwd=out, capture_output=True, text=True, timeout=600,
    )
    assert build.returncode == 0, build.stderr[-2000:]
    run = subprocess.run(["./check"], cwd=out, capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stdout + run.stderr
    assert "max_relative_deviation=" in run.stdout
    dev = float(run.stdout.split("max_relative_deviation=")[1].split()[0])
    assert dev <= 1e-9


@pytest.mark.slow
def test_a_short_tier_plan_exports_too(tmp_path) -> None:
    """The inspect6 five-joint plan (5 joints for 6 rows: the Λ-weighted branch) passes the
    same C++ check."""
    gxx = _compiler_or_skip()
    out = tmp_path / "export"
    assert main(["export", str(ROOT / "problems/inspect6/problem.toml"), "--plan",
                 str(ROOT / "problems/inspect6/plans/five-joint.toml"), "--out", str(out)]) == 0
    assert subprocess.run([gxx, "-O2", "-std=c++17", f"-I{EIGEN}", "check.cpp", "-o", "check"],
                          cwd=out, timeout=600).returncode == 0
    assert subprocess.run(["./check"], cwd=out, timeout=120).returncode == 0
