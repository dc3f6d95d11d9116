"""The command line: every bad input gives one line naming file, key and reason, exit code 2."""

from __future__ import annotations

import json

import pytest
from problems import PLANAR, PLANAR_PLANS, planar_variant

from optimizer.cli import main

BAD = [
    (
        "toml-syntax",
        [("rate_hz = 1000.0", "rate_hz = = 1000.0")],
        "TOML syntax error",
        "at line 19",
    ),
    (
        "unknown-key",
        [("payload_kg = 0.3", "payload_kgs = 0.3")],
        "plant.payload_kgs: unknown key",
        "did you mean 'payload_kg'",
    ),
    (
        "misspelt-required",
        [("rate_hz = 1000.0", "rate_hx = 1000.0")],
        "control.rate_hz: is required",
        "found 'rate_hx'",
    ),
    (
        "unknown-joint",
        [("[actuators.shoulder]", "[actuators.sholder]")],
        "actuators.sholder",
        "did you mean 'shoulder'",
    ),
    (
        "no-actuator",
        [
            ("[actuators.default]", "[actuators.elbow]"),
            ("[actuators.shoulder]\n", "[actuators.wrist]\n"),
        ],
        "actuators.shoulder: joint 'shoulder' has no actuator",
        "add an [actuators.shoulder] table",
    ),
    (
        "zero-bandwidth",
        [("corner_hz = 6.0", "corner_hz = 0.0")],
        "actuators.shoulder.corner_hz",
        "must be > 0",
    ),
    (
        "inf-bandwidth",
        [("corner_hz = 6.0", "corner_hz = inf")],
        "actuators.shoulder.corner_hz",
        "must be finite",
    ),
    (
        "nyquist",
        [("corner_hz = 60.0", "corner_hz = 500.0")],
        "actuators.elbow.corner_hz",
        "at or above the Nyquist frequency 500 Hz",
    ),
    (
        "home-length",
        [("home = [30.0, -60.0, 20.0]", "home = [30.0, -60.0]")],
        "arm.home",
        "needs 3 values",
    ),
    (
        "home-limits",
        [("home = [30.0, -60.0, 20.0]", "home = [30.0, -170.0, 20.0]")],
        "arm.home",
        "elbow = -170 is outside its URDF limits",
    ),
    (
        "tip-frame",
        [('tip_frame = "tip"', 'tip_frame = "tool"')],
        "arm.tip_frame",
        "frame 'tool' not in the URDF; frames: base_link",
    ),
    (
        "unreachable",
        [("delta_m = [0.06, 0.0, 0.04]", "delta_m = [0.9, 0.0, 0.04]")],
        "trajectory[0]",
        "'reach' is out of reach at t=",
    ),
    (
        "urdf-missing",
        [('urdf = "arm.urdf"', 'urdf = "nope.urdf"')],
        "arm.urdf",
        "URDF file not found",
    ),
    ("bad-kind", [('kind = "line"', 'kind = "lime"')], "trajectory[0].kind", "did you mean 'line'"),
    ("dup-name", [('name = "wave"', 'name = "reach"')], "trajectory[1].name", "used twice"),
    (
        "axis-name",
        [('task_axes = ["x", "z", "ry"]', 'task_axes = ["x", "z", "pitch"]')],
        "control.task_axes",
        "'pitch' is not an axis",
    ),
    ("name-path", [('name = "planar3"', 'name = "../../x"')], "name", "cannot name a results"),
    ("name-abs", [('name = "planar3"', 'name = "/tmp/x"')], "name", "cannot name a results"),
    (
        "weights-zero",
        [("rot_scale_deg = 0.1", "rot_scale_deg = 0.1\npos_weight = 0.0\nrot_weight = 0.0")],
        "scoring.pos_weight",
        "every plan would score 0",
    ),
    ("settle-too-long", [("settle_s = 0.1", "settle_s = 5.0")], "simulation.settle_s",
     "nothing would be scored"),
    (
        "payload-offset-huge",
        [("payload_offset_m = [0.02, 0.0, 0.0]", "payload_offset_m = [1e200, 0.0, 0.0]")],
        "plant.payload_offset_m",
        "must be <= 10",
    ),
    (
        "old-min-margin",
        [("margin_samples = 2", "margin_samples = 2\nmin_margin = 0.0")],
        "simulation.min_margin",
        "was replaced by min_stiffness_margin",
    ),
]


@pytest.mark.parametrize(("case", "edits", "where", "why"), BAD, ids=[b[0] for b in BAD])
def test_bad_problem_gives_one_line_and_exit_2(tmp_path, capsys, case, edits, where, why) -> None:
    """Each bad problem file: exit 2, one stderr line with file, key and reason, no traceback."""
    path = planar_variant(tmp_path, *edits)
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err
    assert "Traceback" not in err
    assert err.startswith(f"tierplan: error: {path}")
    assert where in err
    assert why in err


def test_plan_label_with_control_characters_is_refused(tmp_path, capsys) -> None:
    """A plan label holding an escape sequence or a newline never reaches the terminal."""
    plan = tmp_path / "p.toml"
    text = (PLANAR_PLANS / "osc.toml").read_text()
    plan.write_text(text.replace('label = "single-tier OSC kp 1000"',
                                 'label = "x\\u001b[2Jfake\\nline"'))
    assert main(["score", str(PLANAR), "--plan", str(plan)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "label" in err and "control characters" in err
    assert "\x1b" not in err


def test_unwritable_results_file_is_one_line(tmp_path, capsys) -> None:
    """--json into a folder that cannot be written: one line, exit 1, no traceback."""
    import os

    locked = tmp_path / "locked"
    locked.mkdir()
    (locked / "sub").write_text("a file where a folder should be")
    rc = main(["score", str(PLANAR), "--plan", str(PLANAR_PLANS / "osc.toml"), "--no-margin",
               "--json", str(locked / "sub" / "x.json")])
    err = capsys.readouterr().err
    assert rc == 1 and err.count("\n") == 1 and "could not write" in err
    assert "Traceback" not in err
    assert os.path.isfile(locked / "sub")


def test_missing_problem_file(tmp_path, capsys) -> None:
    """A missing problem file is named, exit 2."""
    assert main(["check", str(tmp_path / "none.toml")]) == 2
    assert (
        capsys.readouterr().err.strip()
        == f"tierplan: error: {tmp_path / 'none.toml'}: file not found"
    )


def test_debug_shows_the_traceback(tmp_path) -> None:
    """With --debug the error propagates (a traceback for developers)."""
    from optimizer.exceptions import ProblemError

    with pytest.raises(ProblemError):
        main(["--debug", "check", str(tmp_path / "none.toml")])


def test_bad_plan_via_score(tmp_path, capsys) -> None:
    """An unknown joint in a plan file: exit 2, the plan file and key named."""
    plan = tmp_path / "p.toml"
    plan.write_text('[[tier]]\njoints = ["elbow", "wirst"]\nkp_t = 1.0\nkp_r = 1.0\n')
    assert main(["score", str(PLANAR), "--plan", str(plan), "--no-margin"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith(f"tierplan: error: {plan}: tier[0].joints: unknown joint 'wirst'")
    assert "did you mean 'wrist'" in err


def test_delay_rounding_warns(tmp_path, capsys) -> None:
    """A delay that is not whole periods is rounded with a warning, and the check passes."""
    path = planar_variant(tmp_path, ("delay_ms = 1.0", "delay_ms = 1.4"))
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert "1.4 ms is not a whole number of 1 ms periods; using 1 (1 ms)" in " ".join(out.split())


def test_check_prints_the_summary(capsys) -> None:
    """check lists joints with their actuators and the trajectories."""
    assert main(["check", str(PLANAR)]) == 0
    out = capsys.readouterr().out
    for word in ("shoulder", "1st order 6 Hz", "reach", "wave", "is valid"):
        assert word in out


def test_score_json_has_the_documented_fields(tmp_path, capsys) -> None:
    """score --json writes label, kind, tiers, feasible, reason, errors, the three margins,
    the robust figures and the trajectories."""
    out = tmp_path / "res" / "score.json"
    rc = main(
        [
            "score",
            str(PLANAR),
            "--plan",
            str(PLANAR_PLANS / "two-tier.toml"),
            "--baselines",
            "--json",
            str(out),
        ]
    )
    assert rc == 0
    rows = json.loads(out.read_text())
    assert [r["kind"] for r in rows] == ["plan", "osc", "joint_space"]
    for r in rows:
        for key in (
            "label",
            "kind",
            "tiers",
            "feasible",
            "reason",
            "pos_rms_mm",
            "rot_rms_deg",
            "stiffness_margin",
            "delay_margin_ms",
            "bandwidth_margin",
            "slowest_mode_s",
            "plants",
            "feasible_share",
            "p90_error",
            "worst_error",
            "robust_error",
            "trajectories",
        ):
            assert key in r
        assert r["stiffness_margin"] is None or r["stiffness_margin"] > 0
        assert [t["name"] for t in r["trajectories"]] == ["reach", "wave"]
    assert rows[0]["tiers"] == 2 and rows[0]["feasible"] is True and rows[0]["reason"] is None
    assert "Simulation only" in capsys.readouterr().out
