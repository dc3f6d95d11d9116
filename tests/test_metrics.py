"""Tracking figures and ISO 9283-style path accuracy."""

from __future__ import annotations

import math

import numpy as np
import pytest

from optimizer.metrics import iso_path_figures, plane_crossings


def test_iso_path_figures_hand_check() -> None:
    """Commanded (0,0,0), attained (1,0,0), (−1,0,0), (0,0,0): AT_p = 0, RT_p = 2/3 + √3.

    Formulas: ISO 9283:1998 path accuracy and repeatability (from memory); the hand check
    is in tests/REFERENCES.md §6.
    """
    commanded = np.zeros((1, 3))
    attained = np.array([[[1.0, 0, 0], [-1.0, 0, 0], [0.0, 0, 0]]])
    at, rt = iso_path_figures(commanded, attained)
    assert at == pytest.approx(0.0)
    assert rt == pytest.approx(2 / 3 + math.sqrt(3), abs=1e-9)


def test_iso_constant_offset_gives_at_d_and_rt_zero() -> None:
    """A constant offset d on every cycle gives AT_p = d and RT_p = 0 (tests/REFERENCES.md §6)."""
    commanded = np.stack([np.linspace(0, 1, 20), np.zeros(20), np.zeros(20)], axis=1)
    d = np.array([0.0, 0.003, 0.004])
    attained = np.repeat((commanded + d)[:, None, :], 4, axis=1)
    at, rt = iso_path_figures(commanded, attained)
    assert at == pytest.approx(0.005)
    assert rt == pytest.approx(0.0, abs=1e-12)


def test_plane_crossings_find_a_lagging_path() -> None:
    """A path that lags in time but lies on an offset line crosses each normal plane at the offset."""
    t = np.linspace(0, 1, 1001)
    p_ref = np.stack([0.1 * t, np.zeros_like(t), np.zeros_like(t)], axis=1)
    v_ref = np.tile([0.1, 0.0, 0.0], (len(t), 1))
    p = np.stack([0.1 * (t - 0.02), np.full_like(t, 0.002), np.zeros_like(t)], axis=1)
    idx = np.arange(100, 900, 50)
    x = plane_crossings(p_ref, v_ref, p, 100, idx)
    np.testing.assert_allclose(x[:, 0], p_ref[idx, 0], atol=1e-12)
    np.testing.assert_allclose(x[:, 1], 0.002, atol=1e-12)


def test_compiled_plane_crossings_equal_the_numpy_form_bit_for_bit() -> None:
    """The compiled search (crossings, and the nearest point where none crosses) gives the
    numpy form's points bit for bit: path accuracy of runs made before reproduces."""
    from optimizer.metrics import plane_crossings_numpy

    rng = np.random.default_rng(5)
    N = 900
    t = np.linspace(0.0, 1.0, N)
    p_ref = np.column_stack([0.3 * np.sin(3 * t), 0.2 * t, 0.1 * np.cos(5 * t)])
    v_ref = np.gradient(p_ref, t, axis=0)
    fallbacks = 0
    for lag, window in ((3, 40), (25, 40), (60, 10), (0, 3)):
        p = np.roll(p_ref, lag, axis=0) + 1e-4 * rng.standard_normal((N, 3))
        idx = np.arange(5, N - 5, 3)
        a = plane_crossings_numpy(p_ref, v_ref, p, window, idx)
        b = plane_crossings(p_ref, v_ref, p, window, idx)
        assert np.array_equal(a, b)
        # points taken as the nearest attained point: no crossing within the window
        fallbacks += int(np.sum(np.all(np.isin(b, p), axis=1)))
    assert fallbacks > 0  # both branches ran
