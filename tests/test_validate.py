"""Rollout logs, validating a plan against a measured run, and calibrating the plant."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from problems import DEMO, DEMO_PLANS

from optimizer.calibrate import calibrate
from optimizer.cli import main
from optimizer.evaluate import make_loop, plan_controller
from optimizer.plan import load_plan
from optimizer.problem import load_problem
from optimizer.rollout_log import columns, read_run_log, rollout_csv


@pytest.fixture(scope="module")
def hidden_log(tmp_path_factory, demo):
    """A "measured" run made by the simulator from a hidden plant: payload 1.0 kg instead
    of 0.6, one more period of delay on every drive, friction × 1.5."""
    plan = load_plan(DEMO_PLANS / "three-tier.toml", demo.arm.joint_names)
    dev = dataclasses.replace(demo.arm.deviation, payload_kg=1.0)
    acts = tuple(
        dataclasses.replace(a, delay_ticks=a.delay_ticks + 1, coulomb_nm=a.coulomb_nm * 1.5,
                            viscous_nms=a.viscous_nms * 1.5)
        for a in demo.actuators
    )
    hidden = dataclasses.replace(demo, arm=demo.arm.with_deviation(dev), actuators=acts)
    ref = demo.references[2]
    ro = make_loop(hidden, plan_controller(hidden, plan)).rollout(ref)
    path = tmp_path_factory.mktemp("log") / "measured.csv"
    path.write_text(rollout_csv(ro, ref, demo.arm.joint_names))
    return path


def test_a_log_reads_back_as_written(hidden_log, demo) -> None:
    """The CSV has the documented columns and reads back to the same numbers."""
    text = hidden_log.read_text()
    assert text.splitlines()[0].split(",") == columns(demo.arm.joint_names)
    log = read_run_log(hidden_log, demo.arm.joint_names)
    assert log.dt == pytest.approx(demo.dt)
    assert log.q.shape == (len(demo.references[2].t), demo.arm.n)


def test_calibration_recovers_the_hidden_plant(hidden_log, demo) -> None:
    """Payload and friction within 10 %, the delay exact in periods, and the calibrated
    problem predicts the log's tip error to within 5 %."""
    log = read_run_log(hidden_log, demo.arm.joint_names)
    cal = calibrate(demo, log)
    assert cal.payload_kg == pytest.approx(1.0, rel=0.1)
    assert cal.extra_delay_ticks == 1
    np.testing.assert_allclose(
        cal.coulomb_nm, [1.5 * a.coulomb_nm for a in demo.actuators], rtol=0.1
    )
    np.testing.assert_allclose(
        cal.viscous_nms, [1.5 * a.viscous_nms for a in demo.actuators], rtol=0.1
    )
    plan = load_plan(DEMO_PLANS / "three-tier.toml", demo.arm.joint_names)
    ro = make_loop(cal.apply(demo), plan_controller(demo, plan)).rollout(demo.references[2])
    from optimizer.rollout_log import position_error_mm

    pred = np.linalg.norm(ro.e[:, :3], axis=1) * 1e3
    meas = position_error_mm(log)
    rms = lambda x: float(np.sqrt(np.mean(x[100:] ** 2)))  # noqa: E731
    assert rms(pred) == pytest.approx(rms(meas), rel=0.05)


def test_validate_command_writes_a_calibrated_problem(hidden_log, tmp_path, capsys) -> None:
    """validate prints measured against predicted error and the fit, writes the calibrated
    problem (which loads, with its comments kept) and the figure."""
    out = tmp_path / "calibrated.toml"
    png = tmp_path / "v.png"
    rc = main(["validate", str(DEMO), "--plan", str(DEMO_PLANS / "three-tier.toml"),
               "--log", str(hidden_log), "--trajectory", "sweep-and-tilt",
               "--write", str(out), "--figure", str(png)])
    assert rc == 0
    text = capsys.readouterr().out
    assert "measured (log)" in text and "calibrated plant" in text and "payload_kg" in text
    assert png.read_bytes()[:4] == b"\x89PNG"
    prob = load_problem(out, check_reach=False)
    assert prob.arm.deviation.payload_kg == pytest.approx(1.0, rel=0.1)
    assert prob.actuators[0].delay_ticks == 2
    assert "polishing head, unknown to the controller" in out.read_text()


def _with_value(line: str, i: int, value: str) -> str:
    parts = line.split(",")
    parts[i] = value
    return ",".join(parts)


def _bad(tmp_path, hidden_log, edit) -> object:
    lines = hidden_log.read_text().splitlines()
    lines = edit(lines)
    f = tmp_path / "bad.csv"
    f.write_text("\n".join(lines) + "\n")
    return f


@pytest.mark.parametrize(
    ("case", "edit", "where", "why"),
    [
        ("missing-column", lambda ls: [",".join(ls[0].split(",")[1:])] + ls[1:], "header",
         "column 'time_s' is missing"),
        ("extra-column", lambda ls: [ls[0] + ",q_elbo"] + [x + ",0" for x in ls[1:]], "header",
         "unknown column 'q_elbo'"),
        ("unknown-joint", lambda ls: [ls[0].replace("q_elbow", "q_knee", 1)] + ls[1:], "header",
         "column 'q_elbow' is missing"),
        ("not-monotonic", lambda ls: ls[:3] + [ls[2]] + ls[4:], "row 4, column time_s",
         "time does not increase"),
        ("non-uniform", lambda ls: ls[:3] + ls[4:], "column time_s", "not uniform"),
        ("nan", lambda ls: ls[:5] + [_with_value(ls[5], 1, "nan")] + ls[6:], "row 6",
         "not finite"),
        ("short", lambda ls: ls[:400], "rows", "before the trajectory"),
    ],
    ids=lambda x: x if isinstance(x, str) else "",
)
def test_bad_logs_are_one_line(tmp_path, hidden_log, capsys, case, edit, where, why) -> None:
    """Each bad log: exit 2, one line naming the log, the column or row, and what is wrong."""
    f = _bad(tmp_path, hidden_log, edit)
    rc = main(["validate", str(DEMO), "--plan", str(DEMO_PLANS / "three-tier.toml"),
               "--log", str(f), "--trajectory", "sweep-and-tilt"])
    err = capsys.readouterr().err
    assert rc == 2, err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert str(f) in err and where in err and why in err, err


def test_a_huge_log_is_refused_without_reading(tmp_path, capsys) -> None:
    """A log over the size cap is refused from its size alone (a sparse file)."""
    f = tmp_path / "huge.csv"
    with open(f, "wb") as fh:
        fh.truncate(65 * 2**20)
    rc = main(["validate", str(DEMO), "--plan", str(DEMO_PLANS / "three-tier.toml"),
               "--log", str(f), "--trajectory", "tilt"])
    err = capsys.readouterr().err
    assert rc == 2 and "the limit for a bench log is 64 MiB" in err
