"""Actuator fits: data made with scipy.signal from known parameters are fitted back."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.signal as sig
from problems import DEMO

from optimizer.cli import main
from optimizer.fit import (
    FIT_MODELS,
    FrequencyLog,
    LogError,
    TimeLog,
    fit_auto,
    fit_model,
    read_log,
    simulate_time,
)

BENCH = DEMO.parent / "bench-logs"


def first_order_log(fc: float, delay_s: float, noise_db: float, seed: int, n: int = 100):
    """Frequency response of 1/(s/ωc + 1) e^{−sT} by scipy.signal.freqs, plus seeded noise."""
    rng = np.random.default_rng(seed)
    f = np.geomspace(1.0, 200.0, n)
    w = 2 * np.pi * f
    _, H = sig.freqs([1.0], [1.0 / (2 * np.pi * fc), 1.0], worN=w)
    H = H * np.exp(-1j * w * delay_s)
    mag = 20 * np.log10(np.abs(H)) + rng.normal(0.0, noise_db, n)
    ph = np.rad2deg(np.unwrap(np.angle(H))) + rng.normal(0.0, noise_db, n)
    return FrequencyLog("gen", f, mag, ph)


def second_order_step(fn: float, zeta: float, k: int, noise: float, seed: int, h: float = 1e-3):
    """Held (ZOH) step through ωn²/(s² + 2ζωn s + ωn²), delayed k samples (cont2discrete)."""
    rng = np.random.default_rng(seed)
    wn = 2 * np.pi * fn
    num, den, _ = sig.cont2discrete(([wn * wn], [1.0, 2 * zeta * wn, wn * wn]), h, method="zoh")
    t = np.arange(0.0, 0.8, h)
    u = np.where(t >= 0.05, 3.0, 0.0)
    ud = np.concatenate([np.zeros(k), u])[: u.size]
    y = sig.lfilter(num[0], den, ud) + rng.normal(0.0, noise, u.size)
    return TimeLog("gen", t, u, y)


def test_first_order_noise_free_exact():
    """Noise-free first-order data with a 1.5 ms delay are fitted back to 1e-6."""
    fit = fit_model(first_order_log(25.0, 1.5e-3, 0.0, 0), "first_order")
    assert fit.params["corner_hz"] == pytest.approx(25.0, rel=1e-6)
    assert fit.delay_ms == pytest.approx(1.5, abs=1e-6)


@pytest.mark.parametrize("seed", range(5))
def test_first_order_corner_within_3_percent_with_1db_noise(seed):
    """With 1 dB (and 1°) noise on 100 points, 1–200 Hz, the corner is within 3 % and 3σ."""
    fit = fit_model(first_order_log(25.0, 1.0e-3, 1.0, seed), "first_order")
    err = fit.params["corner_hz"] - 25.0
    assert abs(err) < 0.03 * 25.0
    assert abs(err) < 3.0 * fit.sigma["corner_hz"]
    assert fit.residual["rms_db"] == pytest.approx(1.0, rel=0.25)


def test_first_order_bandwidth_is_closed_form():
    """The −3 dB figure of a first-order fit is its corner: |1/(j+1)| = −3.0103 dB.

    Source: tests/REFERENCES.md §5 (first order 1/(s+1): −3.0103 dB and −45° at ω = 1, checked).
    """
    fit = fit_model(first_order_log(40.0, 0.0, 0.3, 1), "first_order")
    mag, _ = fit.response(np.array([fit.bandwidth_hz]))
    assert fit.bandwidth_hz == fit.params["corner_hz"]
    assert mag[0] == pytest.approx(-3.0103, abs=1e-4)
    lag_only = fit.phase_lag_deg(fit.bandwidth_hz) - 360.0 * fit.bandwidth_hz * fit.delay_ms * 1e-3
    assert lag_only == pytest.approx(45.0, abs=1e-9)


def test_second_order_bandwidth_matches_nise_formula():
    """Second-order bandwidth: ωn = 1, ζ = 0.5 gives ωBW = 1.272020.

    Formula ωBW = ωn √(1 − 2ζ² + √(4ζ⁴ − 4ζ² + 2)): Nise, Control Systems Engineering
    (value from memory for the edition and section); the number is checked in
    tests/REFERENCES.md §5. The data come from scipy.signal.freqs (reference library).
    """
    wn = 2 * np.pi * 10.0
    f = np.geomspace(0.5, 100.0, 80)
    _, H = sig.freqs([wn * wn], [1.0, wn, wn * wn], worN=2 * np.pi * f)
    log = FrequencyLog("gen", f, 20 * np.log10(np.abs(H)), np.rad2deg(np.unwrap(np.angle(H))))
    fit = fit_model(log, "second_order")
    assert fit.params["damping_ratio"] == pytest.approx(0.5, rel=1e-6)
    assert fit.bandwidth_hz == pytest.approx(10.0 * 1.272020, rel=1e-5)


def test_simulate_time_matches_scipy_zoh():
    """The time model for a whole-sample delay equals scipy.signal's ZOH discretisation.

    Reference library: scipy.signal.cont2discrete (method "zoh") and scipy.signal.dlsim.
    """
    h, k = 1e-3, 4
    wn = 2 * np.pi * 12.0
    sysd = sig.cont2discrete(([wn * wn], [1.0, 2 * 0.3 * wn, wn * wn]), h, method="zoh")
    rng = np.random.default_rng(3)
    u = np.cumsum(rng.normal(0, 0.2, 500))
    u[0] = 0.0
    ud = np.concatenate([np.zeros(k), u])[: u.size]
    _, y = sig.dlsim((sysd[0], sysd[1], h), ud)
    ours = simulate_time("second_order", [12.0, 0.3], k * h, h, u)
    np.testing.assert_allclose(ours, y[:, 0], atol=1e-9)


@pytest.mark.parametrize("k", [0, 2, 5])
def test_delay_of_k_samples_recovered(k):
    """A delay of k samples is recovered: exactly without noise, within 0.3 samples with noise."""
    fit = fit_model(second_order_step(8.0, 0.7, k, 0.0, 0), "second_order")
    assert fit.delay_ms == pytest.approx(k * 1.0, abs=1e-4)
    assert fit.params["natural_hz"] == pytest.approx(8.0, rel=1e-5)
    noisy = fit_model(second_order_step(8.0, 0.7, k, 0.01, k), "second_order")
    assert noisy.delay_ms == pytest.approx(k * 1.0, abs=0.3)
    assert noisy.params["damping_ratio"] == pytest.approx(0.7, rel=0.02)


def test_auto_picks_the_generating_model():
    """BIC keeps first order for first-order data and picks second order for a resonant drive."""
    chosen, fits, why = fit_auto(first_order_log(25.0, 1e-3, 0.5, 2))
    assert chosen.model == "first_order" and len(fits) == 2 and "BIC" in why
    chosen, _, why = fit_auto(second_order_step(15.0, 0.4, 1, 0.01, 4))
    assert chosen.model == "second_order" and "lowers BIC" in why


def test_coverage_warning():
    """Data that stop far below the corner say the fit extrapolates."""
    log = first_order_log(25.0, 0.0, 0.0, 0)
    low = FrequencyLog("gen", log.f_hz[:30], log.mag_db[:30], log.phase_deg[:30])  # up to ~5 Hz
    fit = fit_model(low, "first_order")
    assert any("does not cover" in w for w in fit.warnings)
    assert not fit_model(log, "first_order").warnings


def _csv(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "log.csv"
    p.write_text(text)
    return p


GOOD_F = "frequency_hz,magnitude_db,phase_deg\n" + "".join(
    f"{f},{-f / 10:.3f},{-f:.1f}\n" for f in (1, 2, 4, 8, 16, 32)
)

BAD_CSV = [
    ("header", "freq,mag\n1,2\n", "header: has columns freq, mag; expected"),
    ("missing", GOOD_F.replace("4,-0.400,-4.0", "4,-0.400"), "line 4, column phase_deg: is missing"),
    ("non-numeric", GOOD_F.replace("-0.800", "abc"), "line 5, column magnitude_db: is not a number"),
    ("nan", GOOD_F.replace("-0.800", "nan"), "line 5, column magnitude_db: must be finite"),
    ("few", "\n".join(GOOD_F.splitlines()[:4]) + "\n", "has 3 data rows; a fit needs at least 5"),
    ("order", GOOD_F.replace("8,-0.800", "3,-0.800"), "frequency_hz: must increase strictly"),
    ("empty", "", "is empty"),
    (
        "time-uneven",
        "time_s,commanded_nm,measured_nm\n0,0,0\n0.001,1,0\n0.002,1,0.1\n0.004,1,0.2\n0.005,1,0.3\n",
        "sampling must be uniform",
    ),
    ("tiny-frequency", GOOD_F.replace("1,-0.100", "5e-324,-0.100"), "must lie within"),
    ("huge-frequency", GOOD_F.replace("32,-3.200", "1e307,-3.200"), "must lie within"),
    (
        "flat",
        "frequency_hz,magnitude_db,phase_deg\n" + "".join(f"{f},0,0\n" for f in (1, 2, 4, 8, 16)),
        "the response is flat",
    ),
    (
        "tiny-step",
        "time_s,commanded_nm,measured_nm\n"
        + "".join(f"{i * 1e-310!r},1,{i}\n" for i in range(6)),
        "sampling step",
    ),
    (
        "constant-command",
        "time_s,commanded_nm,measured_nm\n" + "".join(f"{i * 1e-3},1,{i}\n" for i in range(9)),
        "commanded_nm: does not vary",
    ),
    (
        "zero-response",
        "time_s,commanded_nm,measured_nm\n"
        + "".join(f"{i * 1e-3},{i % 2},0\n" for i in range(9)),
        "measured_nm: does not vary",
    ),
]


@pytest.mark.parametrize(("name", "text", "message"), BAD_CSV, ids=[b[0] for b in BAD_CSV])
def test_bad_csv_one_line_error(tmp_path, capsys, name, text, message):
    """A bad log gives one line naming the file, the column (and line) and what is wrong."""
    p = _csv(tmp_path, text)
    with pytest.raises(LogError, match=None) as info:
        read_log(p)
    assert message in str(info.value)
    assert main(["fit", str(p), "--no-plot"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and str(p) in err and message in err
    assert "Traceback" not in err


def test_pure_noise_is_refused_not_fitted(tmp_path, capsys):
    """A step command against a measured signal of pure noise: no fit is written, one line
    says the measurement is mostly noise (it used to be "fitted" at some frequency)."""
    rng = np.random.default_rng(0)
    t = np.arange(400) * 1e-3
    cmd = (t > 0.05).astype(float)
    meas = rng.normal(0.0, 1.0, t.size)
    p = _csv(tmp_path, "time_s,commanded_nm,measured_nm\n" + "".join(
        f"{float(a)!r},{float(b)!r},{float(c)!r}\n" for a, b, c in zip(t, cmd, meas)))
    out = tmp_path / "acts.toml"
    assert main(["fit", str(p), "--joint", "elbow", "--no-plot", "--write", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "mostly noise" in err and not out.exists()


def test_phase_at_infinity_is_refused(tmp_path, capsys):
    """--phase-at inf is one line, exit 2 (it used to write Infinity into the JSON)."""
    p = _csv(tmp_path, GOOD_F)
    assert main(["fit", str(p), "--no-plot", "--phase-at", "inf"]) == 2
    assert "finite frequency" in capsys.readouterr().err


def test_cli_json_fields(tmp_path, capsys):
    """--json writes model, corner_hz, delay_ms, bandwidth_hz, residual; the PNG is written."""
    out = tmp_path / "fit.json"
    png = tmp_path / "fit.png"
    log = BENCH / "elbow-sweep.csv"
    assert main(["fit", str(log), "--joint", "elbow", "--json", str(out), "--plot", str(png)]) == 0
    d = json.loads(out.read_text())
    assert d["model"] == "first_order"
    assert set(d) >= {"corner_hz", "delay_ms", "bandwidth_hz", "residual", "uncertainty"}
    # the bundled log was generated at 22 Hz, 1.5 ms (generate.py)
    assert d["corner_hz"] == pytest.approx(22.0, rel=0.03)
    assert d["delay_ms"] == pytest.approx(1.5, abs=0.1)
    assert png.stat().st_size > 10_000
    shown = capsys.readouterr().out
    assert "bandwidth (−3 dB)" in shown and "phase lag at 10 Hz" in shown


ACT_FILE = """\
# my drive notes: keep me
[actuators.wrist_pitch]
model = "first_order"   # old guess
corner_hz = 30.0
effort_nm = 12.0        # limit from the datasheet
coulomb_nm = 0.3

[actuators.elbow]
corner_hz = 25.0
"""


def test_write_keeps_everything_else(tmp_path):
    """--write changes only the joint's model keys; other keys, tables and comments stay."""
    f = tmp_path / "acts.toml"
    f.write_text(ACT_FILE)
    log = BENCH / "wrist_pitch-step.csv"
    args = ["fit", str(log), "--joint", "wrist_pitch", "--no-plot", "--write", str(f)]
    assert main(args) == 0
    text = f.read_text()
    import tomllib

    d = tomllib.loads(text)["actuators"]
    assert d["wrist_pitch"]["model"] == "second_order"
    assert "corner_hz" not in d["wrist_pitch"]  # the old model's parameter went with it
    assert d["wrist_pitch"]["natural_hz"] == pytest.approx(8.0, rel=0.02)
    assert d["wrist_pitch"]["effort_nm"] == 12.0 and d["wrist_pitch"]["coulomb_nm"] == 0.3
    assert d["elbow"] == {"corner_hz": 25.0}
    assert "# my drive notes: keep me" in text and "# limit from the datasheet" in text


def test_write_problem_file_validated(tmp_path, capsys):
    """Writing into a problem file loads the result first; a bad joint leaves the file as it was."""
    for name in ("problem.toml", "arm.urdf"):
        (tmp_path / name).write_bytes((DEMO.parent / name).read_bytes())
    prob = tmp_path / "problem.toml"
    before = prob.read_text()
    log = str(BENCH / "elbow-sweep.csv")
    assert main(["fit", log, "--joint", "elbw", "--no-plot", "--write", str(prob)]) == 2
    assert prob.read_text() == before
    assert "elbw" in capsys.readouterr().err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["arm.urdf", "problem.toml"]
    assert main(["fit", log, "--joint", "elbow", "--no-plot", "--write", str(prob)]) == 0
    after = prob.read_text()
    changed = [ln for ln in after.splitlines() if ln not in before.splitlines()]
    assert len(changed) == 3, changed  # corner_hz, model, delay_ms of [actuators.elbow]
    from optimizer.problem import load_problem

    p = load_problem(prob, check_reach=False)
    elbow = p.actuators[p.arm.joint_names.index("elbow")]
    assert math.isclose(elbow.model.corner_hz, 22.0, rel_tol=0.03)


def test_progress_is_told_in_order_and_ends_at_the_total():
    """fit_auto tells its progress: never backwards, both models named, done == total."""
    from optimizer.fit import fit_work

    log = second_order_step(8.0, 0.7, 2, 0.01, 1)
    seen: list[tuple[int, int, str]] = []
    fit_auto(log, lambda done, total, what: seen.append((done, total, what)))
    done = [d for d, _, _ in seen]
    assert done == sorted(done) and done[-1] == seen[-1][1] == fit_work(log, FIT_MODELS)
    assert {w.split(":")[0] for _, _, w in seen} == set(FIT_MODELS)
    assert any("refinement" in w for _, _, w in seen)


def _write_step_log(path: Path, log: TimeLog, bad_row: int | None = None) -> None:
    rows = [f"{t:.6f},{u:.6f},{y:.9f}" for t, u, y in zip(log.t, log.commanded, log.measured)]
    if bad_row is not None:
        rows[bad_row] = rows[bad_row].rsplit(",", 1)[0] + ",n/a"
    path.write_text("# generated\ntime_s,commanded_nm,measured_nm\n" + "\n".join(rows) + "\n")


def test_fast_and_careful_readers_agree(tmp_path):
    """The numpy fast path of read_log gives what the row-by-row reader gives, and a bad
    cell deep in the file still gets its line and column named (the careful reader)."""
    from optimizer.fit import FREQUENCY_COLUMNS, TIME_COLUMNS, _parse_fast, _parse_rows

    src = second_order_step(8.0, 0.7, 2, 0.01, 1)
    path = tmp_path / "step.csv"
    _write_step_log(path, src)
    log = read_log(path)
    lines = [(i + 1, ln) for i, ln in enumerate(path.read_text().splitlines())][2:]
    fast = _parse_fast(lines, [0, 1, 2], 3)
    assert fast is not None
    np.testing.assert_array_equal(fast, _parse_rows(path, lines, TIME_COLUMNS, [0, 1, 2]))
    np.testing.assert_array_equal(log.measured, fast[:, 2])
    _write_step_log(path, src, bad_row=700)
    with pytest.raises(LogError, match=r"line 703, column measured_nm: is not a number"):
        read_log(path)
    sweep = BENCH / "elbow-sweep.csv"
    rows = [(i + 1, ln) for i, ln in enumerate(sweep.read_text().splitlines())]
    rows = [(i, ln) for i, ln in rows if not ln.startswith("#")][1:]
    np.testing.assert_array_equal(
        _parse_fast(rows, [0, 1, 2], 3), _parse_rows(sweep, rows, FREQUENCY_COLUMNS, [0, 1, 2])
    )
