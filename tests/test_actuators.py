"""Actuator bank: exact ZOH, step and frequency response, delay, saturation, rate limit."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal as sg
from scipy.integrate import quad_vec
from scipy.linalg import expm

from optimizer import plant
from optimizer.actuators import FirstOrder, JointActuator, SecondOrder, discretize

# scipy converts the state space to a transfer function whose leading numerator
# coefficients are zero and warns about it; the response it returns is exact.
_TF_WARNING = pytest.mark.filterwarnings("ignore:Badly conditioned filter coefficients")


def _bank(*models, **kw):
    return [JointActuator(f"j{i}", m, **kw) for i, m in enumerate(models)]


@pytest.mark.parametrize("model", [FirstOrder(10.0), SecondOrder(30.0, 0.4), SecondOrder(5.0, 1.3)])
def test_zoh_equals_scipy_cont2discrete(model) -> None:
    """Ad and Bd equal scipy.signal.cont2discrete(method='zoh') (reference library)."""
    A, B, C = model.continuous()
    Ad, Bd, _, _, _ = sg.cont2discrete((A, B, C, np.zeros((1, 1))), 1e-3, method="zoh")
    bank = discretize(_bank(model), 1e-3)
    np.testing.assert_allclose(bank.Ad, Ad, atol=1e-13)
    np.testing.assert_allclose(bank.Bd, Bd, atol=1e-13)


def test_first_order_zoh_golden() -> None:
    """a/(s+a), a = 2π·10, T = 1 ms: pole 0.9391013674, numerator 0.0608986326 (tests/REFERENCES.md §5)."""
    bank = discretize(_bank(FirstOrder(10.0)), 1e-3)
    assert bank.Ad[0, 0] == pytest.approx(0.9391013674, abs=1e-10)
    assert bank.Bd[0, 0] == pytest.approx(0.0608986326, abs=1e-10)


def test_mean_output_equals_integral_of_the_response() -> None:
    """Cm x + Dm u is the mean of y over the hold interval (numerical quadrature)."""
    model = SecondOrder(40.0, 0.3)
    A, B, C = model.continuous()
    h = 2e-3
    bank = discretize(_bank(model), h)
    x0, u = np.array([0.4, -3.0]), 1.7

    def y(t: float) -> np.ndarray:
        x = expm(A * t) @ x0 + quad_vec(lambda s: expm(A * s) @ B[:, 0] * u, 0, t)[0]
        return C @ x

    mean = quad_vec(y, 0, h)[0] / h
    np.testing.assert_allclose(bank.Cm @ x0 + bank.Dm @ [u], mean, rtol=1e-9)


@_TF_WARNING
def test_first_order_corner_is_minus_3db_and_minus_45deg() -> None:
    """At ω = ωc the first-order lag is −3.0103 dB and −45.000° (tests/REFERENCES.md §5, scipy.signal)."""
    m = FirstOrder(10.0)
    A, B, C = m.continuous()
    _, H = sg.freqresp(sg.StateSpace(A, B, C, np.zeros((1, 1))), w=[2 * math.pi * 10.0])
    assert 20 * np.log10(abs(H[0])) == pytest.approx(-3.0103, abs=1e-4)
    assert math.degrees(np.angle(H[0])) == pytest.approx(-45.0, abs=1e-6)
    assert m.bandwidth_hz() == 10.0


@_TF_WARNING
@pytest.mark.parametrize(
    ("zeta", "overshoot", "bw"),
    [(0.5, 16.303353, 1.272020), (0.7, 4.598791, 1.010049), (1 / math.sqrt(2), 4.321392, 1.0)],
)
def test_second_order_overshoot_and_bandwidth(zeta, overshoot, bw) -> None:
    """Step overshoot exp(−ζπ/√(1−ζ²)) and the −3 dB bandwidth formula, ωn = 1 rad/s.

    Overshoot: Ogata, Modern Control Engineering, 5th ed., §5-3 (equation number from
    memory); bandwidth: Nise, Control Systems Engineering (from memory); values [checked]
    in tests/REFERENCES.md §5. The step is simulated with the discrete bank itself.
    """
    m = SecondOrder(1.0 / (2 * math.pi), zeta)
    assert m.bandwidth_hz() * 2 * math.pi == pytest.approx(bw, abs=1e-6)
    assert 100 * math.exp(-zeta * math.pi / math.sqrt(1 - zeta**2)) == pytest.approx(
        overshoot, abs=1e-5
    )
    bank = discretize(_bank(m), 1e-3)
    x = np.zeros(2)
    peak = 0.0
    for _ in range(20000):
        x = bank.Ad @ x + bank.Bd @ [1.0]
        peak = max(peak, float((bank.C @ x)[0]))
    assert 100 * (peak - 1.0) == pytest.approx(overshoot, abs=1e-3)
    A, B, C = m.continuous()
    _, H = sg.freqresp(sg.StateSpace(A, B, C, np.zeros((1, 1))), w=[bw])
    assert 20 * np.log10(abs(H[0])) == pytest.approx(-3.0103, abs=1e-3)


def test_first_order_step_matches_closed_form_at_every_sample() -> None:
    """ZOH is exact: the discrete step equals 1 − e^(−ωc t) at the samples."""
    bank = discretize(_bank(FirstOrder(8.0)), 1e-3)
    x = np.zeros(1)
    for k in range(1, 200):
        x = bank.Ad @ x + bank.Bd @ [1.0]
        assert x[0] == pytest.approx(1 - math.exp(-2 * math.pi * 8.0 * k * 1e-3), abs=1e-12)


@pytest.mark.parametrize("delays", [(0, 1, 3), (2, 2, 0), (5, 0, 1)])
def test_delay_is_exact_in_samples(delays) -> None:
    """An impulse commanded at tick 0 reaches joint j's actuator exactly delay_j ticks later."""
    n = 3
    d = np.array(delays, dtype=np.int64)
    hist = np.zeros((int(d.max()), n))
    u_prev, pinned, ud = np.zeros(n), np.zeros(n, dtype=np.int64), np.zeros(n)
    rate, effort = np.full(n, np.inf), np.full(n, 1e9)
    arrivals = {}
    for k in range(10):
        cmd = np.ones(n) if k == 0 else np.zeros(n)
        plant.actuate(cmd, u_prev, rate, hist, d, effort, pinned, ud)
        for j in np.flatnonzero(ud):
            arrivals.setdefault(int(j), k)
    assert arrivals == {j: delays[j] for j in range(n)}


def test_saturation_rate_limit_and_pinned_counter() -> None:
    """Commands clip at the effort limit, change at most rate·Ts per tick, and pinned ticks count."""
    n = 1
    hist = np.zeros((0, n))
    u_prev, pinned, ud = np.zeros(n), np.zeros(n, dtype=np.int64), np.zeros(n)
    rate = np.array([0.5])  # [N·m per tick]
    effort = np.array([2.0])
    seen = []
    for _ in range(8):
        plant.actuate(
            np.array([10.0]), u_prev, rate, hist, np.zeros(1, np.int64), effort, pinned, ud
        )
        seen.append(float(ud[0]))
    assert seen == [0.5, 1.0, 1.5, 2.0, 2.0, 2.0, 2.0, 2.0]
    assert pinned[0] == 5


def test_bad_actuator_values_are_rejected() -> None:
    """Non-positive or non-finite bandwidths fail in the constructor with the value."""
    for bad in (0.0, -3.0, math.inf, math.nan):
        with pytest.raises(ValueError, match="corner_hz must be a positive finite number"):
            FirstOrder(bad)
    with pytest.raises(ValueError, match="damping_ratio"):
        SecondOrder(10.0, 0.0)


def test_a_bank_is_discretised_once_per_actuators_and_step(demo) -> None:
    """discretize remembers its result (loops for every trial, plant and margin factor ask
    for the same banks); the shared arrays are read-only, and other actuators or another
    step give another bank."""
    import dataclasses

    from optimizer.actuators import discretize

    acts = demo.actuators
    b = discretize(acts, 1e-3)
    assert discretize(list(acts), 1e-3) is b
    assert not b.Ad.flags.writeable and not b.Dm.flags.writeable
    slower = [dataclasses.replace(a, model=a.model.scaled(0.5)) for a in acts]
    assert discretize(slower, 1e-3) is not b
    assert discretize(acts, 5e-4) is not b
    assert not np.array_equal(discretize(slower, 1e-3).Ad, b.Ad)
