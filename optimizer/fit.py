"""Actuator models fitted from bench logs: a frequency response or a time response.

Frequency response (swept sine): the model is

    H(jω) = G(jω) e^{−jωT},   G = 1/(jω/ωc + 1)  or  ωn²/((jω)² + 2ζωn jω + ωn²),

fitted by least squares on the complex logarithm, ln H = ln|H| + j∠H: the residual
stacks ln|H_model| − ln|H_data| [Np] and ∠H_model − ∠H_data [rad] (unwrapped), so
magnitude and phase are weighed on one natural scale (1 dB = 0.115 Np; 1° = 0.017 rad).

Time response (step or chirp of commanded torque, measured delivered torque), uniform
sampling h: the command is held between samples (ZOH, as a digital controller sends
it) and delayed by T = (k + φ)h. Over one sample the held input is u[i−k−1] for the
first φh and u[i−k] after, so with Γ(τ) = ∫₀^τ e^{As} ds B the exact update is

    x[i+1] = e^{Ah} x[i] + (Γ(h) − Γ((1−φ)h)) u[i−k−1] + Γ((1−φ)h) u[i−k],   y = C x,

smooth in φ, so a fractional delay is fitted like any other parameter. The log must
start at rest (delivered = commanded); the model runs on u − u[0] from zero state.

Uncertainty: covariance s²(JᵀJ)⁻¹ at the solution, s² = 2·cost/(m − p)
(common practice for nonlinear least squares, no single source). Model choice:
Bayesian information criterion BIC = m ln(RSS/m) + p ln m; the second-order model is
taken only when it lowers BIC by more than 2 ("positive evidence" on the scale of
Kass & Raftery, JASA 1995, value from memory).
"""

from __future__ import annotations

import csv
import dataclasses
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import scipy.linalg
import scipy.optimize
import scipy.signal

from .actuators import ActuatorModel, make_model
from .exceptions import InputError

__all__ = [
    "BIC_MARGIN",
    "FIT_MODELS",
    "FREQUENCY_COLUMNS",
    "MIN_EXPLAINED",
    "MIN_POINTS",
    "REFINEMENTS",
    "REFINE_UNITS",
    "TIME_COLUMNS",
    "VALUE_BOUNDS",
    "ActuatorFit",
    "FrequencyLog",
    "Log",
    "LogError",
    "Progress",
    "TimeLog",
    "fit_auto",
    "fit_model",
    "fit_work",
    "lag_phase_deg",
    "lag_response",
    "read_log",
    "simulate_time",
]

FREQUENCY_COLUMNS = ("frequency_hz", "magnitude_db", "phase_deg")
TIME_COLUMNS = ("time_s", "commanded_nm", "measured_nm")
FIT_MODELS = ("first_order", "second_order")
MIN_POINTS = 5
#: BIC drop the second-order model must bring to be chosen over the first-order one.
BIC_MARGIN = 2.0
_DB_PER_NP = 20.0 / math.log(10.0)


class LogError(InputError):
    """A bench log (CSV) is wrong."""


@dataclass(frozen=True)
class FrequencyLog:
    """A measured frequency response, delivered/commanded torque."""

    path: str
    """Source file."""
    f_hz: np.ndarray
    """Frequencies (m,), strictly increasing [Hz]."""
    mag_db: np.ndarray
    """Magnitude (m,) [dB]."""
    phase_deg: np.ndarray
    """Phase (m,), unwrapped, first point in (−180, 180] [deg]."""

    domain = "frequency"


@dataclass(frozen=True)
class TimeLog:
    """A measured time response at uniform sampling."""

    path: str
    """Source file."""
    t: np.ndarray
    """Sample times (N,) [s]."""
    commanded: np.ndarray
    """Commanded torque (N,) [N·m]."""
    measured: np.ndarray
    """Measured delivered torque (N,) [N·m]."""

    domain = "time"

    @property
    def h(self) -> float:
        """Sampling step [s]."""
        return float((self.t[-1] - self.t[0]) / (len(self.t) - 1))


Log = FrequencyLog | TimeLog


# -- reading -------------------------------------------------------------------------
def read_log(path: Path) -> Log:
    """Read a bench log; the header says whether it is a frequency or a time log.

    Lines starting with ``#`` are comments. Raises LogError naming the file, the column
    (and row) and what is wrong.
    """
    from .inputs import read_text

    text = read_text(path, "bench log", LogError)
    lines = [(i + 1, ln) for i, ln in enumerate(text.splitlines())]
    lines = [(i, ln) for i, ln in lines if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise LogError(path, "", "is empty: expected a header line and data rows")
    header = [h.strip().lower() for h in next(csv.reader([lines[0][1]]))]
    if all(c in header for c in FREQUENCY_COLUMNS):
        cols = FREQUENCY_COLUMNS
    elif all(c in header for c in TIME_COLUMNS):
        cols = TIME_COLUMNS
    else:
        raise LogError(
            path,
            "header",
            f"has columns {', '.join(header) or '(none)'}; expected "
            f"'{','.join(FREQUENCY_COLUMNS)}' (frequency response) or "
            f"'{','.join(TIME_COLUMNS)}' (time response)",
        )
    idx = [header.index(c) for c in cols]
    data = _parse_fast(lines[1:], idx, len(header))
    if data is None:  # some cell is odd: the careful reader says which one
        data = _parse_rows(path, lines[1:], cols, idx)
    if len(data) < MIN_POINTS:
        raise LogError(path, "", f"has {len(data)} data rows; a fit needs at least {MIN_POINTS}")
    for c, name in enumerate(cols):
        bound = VALUE_BOUNDS.get(name)
        if bound is not None and np.any(np.abs(data[:, c]) > bound[0]):
            r = int(np.argmax(np.abs(data[:, c]) > bound[0]))
            raise LogError(
                path,
                f"line {lines[r + 1][0]}, column {name}",
                f"{data[r, c]:g} is beyond ±{bound[0]:g} {bound[1]}: not a bench measurement "
                "(wrong unit or column?)",
            )
    x = data[:, 0]
    steps = np.diff(x)
    if np.any(steps <= 0.0):
        bad = int(np.argmax(steps <= 0.0))
        raise LogError(
            path,
            cols[0],
            f"must increase strictly; line {lines[bad + 2][0]} ({x[bad + 1]:g}) "
            f"follows {x[bad]:g}",
        )
    if cols is FREQUENCY_COLUMNS:
        if x[0] < MIN_FREQUENCY_HZ or x[-1] > MAX_FREQUENCY_HZ:
            raise LogError(
                path, cols[0], f"must lie within {MIN_FREQUENCY_HZ:g}–{MAX_FREQUENCY_HZ:g} Hz, "
                f"got {x[0]:g}–{x[-1]:g}"
            )
        ph = np.rad2deg(np.unwrap(np.deg2rad(data[:, 2])))
        ph -= 360.0 * np.round(ph[0] / 360.0)  # first point in (−180, 180]
        if np.ptp(data[:, 1]) < 0.5 and np.ptp(ph) < 5.0:
            raise LogError(
                path, "", "the response is flat (magnitude within 0.5 dB, phase within 5°): "
                "the sweep does not reach the drive's corner; sweep to higher frequencies"
            )
        return FrequencyLog(str(path), _ro(x), _ro(data[:, 1]), _ro(ph))
    med = float(np.median(steps))
    if not MIN_STEP_S <= med <= MAX_STEP_S:
        raise LogError(
            path, cols[0], f"the sampling step {med:g} s is outside {MIN_STEP_S:g}–{MAX_STEP_S:g} s"
        )
    for c, name in ((1, "commanded_nm"), (2, "measured_nm")):
        col = data[:, c]
        if np.ptp(col) <= 1e-9 * (1.0 + float(np.max(np.abs(col)))):
            what = ("no step or chirp excites the drive" if c == 1
                    else "the drive did not respond (or the column is another signal)")
            raise LogError(path, name, f"does not vary: {what}")
    if np.max(np.abs(steps - med)) > 0.01 * med:
        raise LogError(
            path,
            cols[0],
            f"sampling must be uniform: the step varies from {steps.min():g} to {steps.max():g} s",
        )
    return TimeLog(str(path), _ro(x), _ro(data[:, 1]), _ro(data[:, 2]))


def _parse_fast(rows: list[tuple[int, str]], idx: list[int], width: int) -> np.ndarray | None:
    """The columns ``idx`` of plain numeric CSV rows, all finite, by numpy's C reader; None
    when any row is not plain (quotes, blanks, missing or extra cells, words, non-finite
    numbers), so that the careful row-by-row reader can name the culprit."""
    if not rows:
        return None
    import io
    import warnings

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            data = np.loadtxt(
                io.StringIO("\n".join(ln for _, ln in rows)),
                delimiter=",",
                dtype=float,
                ndmin=2,
                comments=None,
            )
    except (ValueError, Warning):
        return None
    if data.shape != (len(rows), width) or not np.all(np.isfinite(data)):
        return None
    return np.ascontiguousarray(data[:, idx])


def _parse_rows(
    path: Path, rows: list[tuple[int, str]], cols: tuple[str, ...], idx: list[int]
) -> np.ndarray:
    """The columns ``idx`` of every row, cell by cell; LogError names line and column."""
    data = np.empty((len(rows), len(cols)))
    for r, (lineno, ln) in enumerate(rows):
        cells = next(csv.reader([ln]))
        for c, (name, j) in enumerate(zip(cols, idx)):
            where = f"line {lineno}, column {name}"
            if j >= len(cells) or not cells[j].strip():
                raise LogError(path, where, "is missing")
            try:
                v = float(cells[j])
            except ValueError as err:
                raise LogError(path, where, "is not a number") from err
            if not math.isfinite(v):
                raise LogError(path, where, f"must be finite, got {cells[j].strip()}")
            data[r, c] = v
    return data


#: Largest magnitude a measured column may hold, and its unit: beyond these a column
#: holds something else (another unit, a counter, a corrupt export), and the fit would
#: overflow.
VALUE_BOUNDS = {
    "commanded_nm": (1e6, "N·m"),
    "measured_nm": (1e6, "N·m"),
    "magnitude_db": (400.0, "dB"),
    "phase_deg": (1e6, "deg"),
}

#: What a bench log may hold: frequencies [Hz] and time steps [s].
MIN_FREQUENCY_HZ, MAX_FREQUENCY_HZ = 1e-3, 1e5
MIN_STEP_S, MAX_STEP_S = 1e-6, 1.0
#: A fit must explain at least this share of the measured signal's variation [-].
MIN_EXPLAINED = 0.5


def _ro(a: np.ndarray) -> np.ndarray:
    out = np.array(a, dtype=float)
    out.setflags(write=False)
    return out


# -- models --------------------------------------------------------------------------
def lag_response(model: str, params: Sequence[float], f_hz: np.ndarray) -> np.ndarray:
    """Complex response G(j2πf) of the lag alone (no delay)."""
    s = 2j * math.pi * np.asarray(f_hz, dtype=float)
    if model == "first_order":
        return 1.0 / (s / (2.0 * math.pi * params[0]) + 1.0)
    w = 2.0 * math.pi * params[0]
    return w * w / (s * s + 2.0 * params[1] * w * s + w * w)


def lag_phase_deg(model: str, params: Sequence[float], f_hz: np.ndarray) -> np.ndarray:
    """Continuous (unwrapped) phase of the lag alone [deg]: in (−90, 0] or (−180, 0]."""
    f = np.asarray(f_hz, dtype=float)
    if model == "first_order":
        return -np.rad2deg(np.arctan(f / params[0]))
    r = f / params[0]
    return -np.rad2deg(np.arctan2(2.0 * params[1] * r, 1.0 - r * r))


def _model_params(model: str, theta: np.ndarray) -> tuple[list[float], float]:
    """(lag parameters, delay [s]) from the search vector (log frequency, log ζ, delay ms)."""
    if model == "first_order":
        return [math.exp(theta[0])], theta[1] * 1e-3
    return [math.exp(theta[0]), math.exp(theta[1])], theta[2] * 1e-3


@dataclass(frozen=True)
class ActuatorFit:
    """One fitted model with its figures."""

    model: str
    """``first_order`` or ``second_order``."""
    params: dict[str, float]
    """``corner_hz`` or ``natural_hz`` and ``damping_ratio``."""
    delay_ms: float
    """Transport delay [ms]."""
    sigma: dict[str, float]
    """1-σ uncertainty of each parameter and of ``delay_ms`` (inf when not identifiable)."""
    residual: dict[str, float]
    """RMS residual: ``rms_db`` and ``rms_deg`` (frequency log) or ``rms_nm`` (time log)."""
    bic: float
    """Bayesian information criterion of the fit [-] (lower is better)."""
    n_residuals: int
    """Residuals in the fit (2 per frequency point, 1 per sample) [-]."""
    domain: str
    """``frequency`` or ``time``."""
    warnings: tuple[str, ...] = field(default=())
    """What the data do not support (coverage)."""

    def actuator(self) -> ActuatorModel:
        """The lag as the simulator's actuator model."""
        return make_model(self.model, **self.params)

    @property
    def bandwidth_hz(self) -> float:
        """−3 dB frequency of the lag (delay leaves the magnitude alone) [Hz]."""
        return self.actuator().bandwidth_hz()

    @property
    def characteristic_hz(self) -> float:
        """Corner or natural frequency [Hz]."""
        return self.params["corner_hz" if self.model == "first_order" else "natural_hz"]

    def phase_lag_deg(self, f_hz: float) -> float:
        """Phase lag of lag and delay at ``f_hz`` [deg], positive."""
        lag = -float(lag_phase_deg(self.model, list(self.params.values()), np.array([f_hz]))[0])
        return lag + 360.0 * f_hz * self.delay_ms * 1e-3

    def response(self, f_hz: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(magnitude [dB], phase [deg]) of lag and delay at ``f_hz``."""
        p = list(self.params.values())
        mag = 20.0 * np.log10(np.abs(lag_response(self.model, p, f_hz)))
        ph = lag_phase_deg(self.model, p, f_hz) - 360.0 * np.asarray(f_hz) * self.delay_ms * 1e-3
        return mag, ph

    def to_dict(self) -> dict[str, object]:
        """The ``--json`` fields."""
        d: dict[str, object] = {"model": self.model, **self.params, "delay_ms": self.delay_ms}
        d["bandwidth_hz"] = self.bandwidth_hz
        d["residual"] = dict(self.residual)
        d["uncertainty"] = {k: (v if math.isfinite(v) else None) for k, v in self.sigma.items()}
        d["bic"] = self.bic
        d["warnings"] = list(self.warnings)
        return d


# -- residuals -----------------------------------------------------------------------
def _freq_residual(log: FrequencyLog, model: str) -> Callable[[np.ndarray], np.ndarray]:
    ln_mag = log.mag_db / _DB_PER_NP
    ph = np.deg2rad(log.phase_deg)

    def res(theta: np.ndarray) -> np.ndarray:
        p, T = _model_params(model, theta)
        G = lag_response(model, p, log.f_hz)
        ph_m = np.deg2rad(lag_phase_deg(model, p, log.f_hz)) - 2.0 * math.pi * log.f_hz * T
        return np.concatenate([np.log(np.abs(G)) - ln_mag, ph_m - ph])

    return res


def simulate_time(
    model: str, params: Sequence[float], delay_s: float, h: float, u: np.ndarray
) -> np.ndarray:
    """Delivered torque of the model for a held command ``u`` sampled at ``h``, from rest."""
    A, B, C = make_model(model, **_named(model, params)).continuous()
    steps = delay_s / h
    k = math.floor(steps + 1e-9)
    phi = min(max(steps - k, 0.0), 1.0)
    Phi = scipy.linalg.expm(A * h)
    G_full = _gamma(A, h) @ B
    G_b = _gamma(A, (1.0 - phi) * h) @ B
    G_a = G_full - G_b
    u0 = float(u[0])
    du = np.asarray(u, dtype=float) - u0
    pad = np.zeros(k + 1)
    d_k = np.concatenate([pad[:k], du])[: len(du)]  # u[i−k]
    d_k1 = np.concatenate([pad, du])[: len(du)]  # u[i−k−1]
    y = np.zeros(len(du))
    for Gin, seq in ((G_b, d_k), (G_a, d_k1)):
        if not np.any(Gin):
            continue
        num, den = scipy.signal.ss2tf(Phi, Gin, C, np.zeros((1, 1)))
        # y[i] = C x[i] and x[i] depends on inputs up to i−1: ss2tf's leading zero says so
        y += scipy.signal.lfilter(num[0], den, seq)
    return u0 + y


def _gamma(A: np.ndarray, tau: float) -> np.ndarray:
    """∫₀^τ e^{As} ds by one block exponential (Van Loan)."""
    nx = A.shape[0]
    if tau <= 0.0:
        return np.zeros((nx, nx))
    big = np.zeros((2 * nx, 2 * nx))
    big[:nx, :nx] = A
    big[:nx, nx:] = np.eye(nx)
    return scipy.linalg.expm(big * tau)[:nx, nx:]


def _named(model: str, params: Sequence[float]) -> dict[str, float]:
    if model == "first_order":
        return {"corner_hz": float(params[0])}
    return {"natural_hz": float(params[0]), "damping_ratio": float(params[1])}


def _time_residual(log: TimeLog, model: str) -> Callable[[np.ndarray], np.ndarray]:
    h = log.h

    def res(theta: np.ndarray) -> np.ndarray:
        p, T = _model_params(model, theta)
        return simulate_time(model, p, T, h, log.commanded) - log.measured

    return res


# -- fitting -------------------------------------------------------------------------
def _bounds(log: Log, model: str) -> tuple[np.ndarray, np.ndarray]:
    if isinstance(log, FrequencyLog):
        f_lo, f_hi = log.f_hz[0] / 100.0, log.f_hz[-1] * 100.0
        t_max = 1e3 * 0.5 / log.f_hz[0]  # half a period of the lowest frequency [ms]
    else:
        f_lo, f_hi = 1.0 / (log.t[-1] - log.t[0]) / 10.0, 0.45 / log.h
        t_max = 1e3 * 0.25 * (log.t[-1] - log.t[0])
    lo = [math.log(f_lo)]
    hi = [math.log(f_hi)]
    if model == "second_order":
        lo.append(math.log(0.05))
        hi.append(math.log(10.0))
    lo.append(0.0)
    hi.append(t_max)
    return np.array(lo), np.array(hi)


def _starts(log: Log, model: str, lo: np.ndarray, hi: np.ndarray) -> list[np.ndarray]:
    if isinstance(log, FrequencyLog):
        f0 = _crossing_hz(log)
        freqs = [f0 / 2.0, f0, f0 * 2.0]
        T0 = _delay_guess_ms(log, f0)
        delays = sorted({0.0, T0})
    else:
        h = log.h
        freqs = list(np.geomspace(math.exp(lo[0]) * 3.0, 0.3 / h, 6))
        delays = [0.0, 2.0 * h * 1e3, 10.0 * h * 1e3]
    zetas = [0.3, 0.7, 1.5] if model == "second_order" else [None]
    out = []
    for f in freqs:
        for z in zetas:
            for T in delays:
                th = [math.log(f)] + ([math.log(z)] if z is not None else []) + [T]
                out.append(np.clip(np.array(th), lo + 1e-9, hi - 1e-9))
    return out


def _crossing_hz(log: FrequencyLog) -> float:
    """First frequency where the magnitude falls 3 dB below its low-frequency level."""
    below = np.nonzero(log.mag_db - log.mag_db[0] <= -3.0)[0]
    if len(below) == 0:
        return float(log.f_hz[-1] * 2.0)
    i = int(below[0])
    if i == 0:
        return float(log.f_hz[0] / 2.0)
    return float(np.sqrt(log.f_hz[i - 1] * log.f_hz[i]))


def _delay_guess_ms(log: FrequencyLog, f0: float) -> float:
    """Phase left unexplained by a first-order lag at the top frequencies, as a delay."""
    extra = log.phase_deg - lag_phase_deg("first_order", [f0], log.f_hz)
    top = slice(max(0, len(log.f_hz) - 3), None)
    T = -np.mean(extra[top] / (360.0 * log.f_hz[top]))
    return float(max(T, 0.0) * 1e3)


#: ``progress(done, total, what)``: work done of ``total`` units (one start evaluated, or
#: one least-squares refinement), and what is being done, for a caller's progress bar.
Progress = Callable[[int, int, str], None]

#: Least-squares refinements per model, from the best starts.
REFINEMENTS = 4
#: A refinement's share of ``Progress`` units: it evaluates the model about as often as
#: this many starts do (measured on a 1,000,000-sample step log: 18 starts ~1.5 s, one
#: refinement ~1.5 s).
REFINE_UNITS = 18


def fit_work(log: Log, models: Sequence[str]) -> int:
    """Units of work (for ``Progress``) that fitting ``models`` to ``log`` takes."""
    total = 0
    for m in models:
        lo, hi = _bounds(log, m)
        n = len(_starts(log, m, lo, hi))
        total += n + REFINE_UNITS * min(REFINEMENTS, n)
    return total


def fit_model(
    log: Log, model: str, progress: Progress | None = None, offset: int = 0, total: int = 0
) -> ActuatorFit:
    """Least-squares fit of one model kind (with delay) to a log.

    ``progress`` (optional) is told after each start and each refinement; ``offset`` and
    ``total`` place this model's work within a larger job (``fit_auto``)."""
    if model not in FIT_MODELS:
        raise KeyError(f"unknown model '{model}'; known: {', '.join(FIT_MODELS)}, auto")
    if isinstance(log, FrequencyLog):
        res = _freq_residual(log, model)
    else:
        res = _time_residual(log, model)
    lo, hi = _bounds(log, model)
    starts = _starts(log, model, lo, hi)
    total = total or fit_work(log, [model])
    costs = []
    for k, st in enumerate(starts):
        costs.append(float(np.sum(res(st) ** 2)))
        if progress:
            progress(offset + k + 1, total, f"{model}: start {k + 1}/{len(starts)}")
    best = None
    order = np.argsort(costs)[:REFINEMENTS]
    for k, i in enumerate(order):
        if progress:  # said before it runs: a refinement is the long part
            done = offset + len(starts) + REFINE_UNITS * k
            progress(done, total, f"{model}: refinement {k + 1}/{len(order)}")
        try:
            sol = scipy.optimize.least_squares(res, starts[i], bounds=(lo, hi), x_scale="jac")
        except (ValueError, np.linalg.LinAlgError) as err:  # non-finite residuals
            raise LogError(
                log.path, "", f"the {model} fit failed numerically ({err}); check the columns' "
                "units and that the log is one bench run"
            ) from err
        if best is None or sol.cost < best.cost:
            best = sol
    if progress:
        progress(offset + len(starts) + REFINE_UNITS * len(order), total, f"{model}: done")
    if best is None:  # pragma: no cover - starts is never empty
        raise RuntimeError("no start")
    fit = _summarise(log, model, best)
    _refuse_noise(log, fit, best.fun)
    return fit


def _refuse_noise(log: Log, fit: ActuatorFit, r: np.ndarray) -> None:
    """Refuse a fit that explains too little of the measured signal to mean anything."""
    if isinstance(log, TimeLog):
        meas = np.asarray(log.measured)
        spread = float(np.var(meas))
        explained = 1.0 - float(np.mean(r**2)) / spread if spread > 0 else 0.0
    else:
        half = len(r) // 2
        spread = float(np.var(np.asarray(log.mag_db) / _DB_PER_NP))
        explained = 1.0 - float(np.mean(r[:half] ** 2)) / spread if spread > 0 else 0.0
    if explained < MIN_EXPLAINED:
        raise LogError(
            log.path, "", f"the {fit.model} fit explains {max(explained, 0.0):.0%} of the measured "
            f"signal (needs {MIN_EXPLAINED:.0%}): the measurement is mostly noise or another "
            "signal; excite the drive more"
        )


def _summarise(log: Log, model: str, sol: scipy.optimize.OptimizeResult) -> ActuatorFit:
    theta = sol.x
    r = sol.fun
    m, p = len(r), len(theta)
    rss = float(np.sum(r**2))
    s2 = rss / max(m - p, 1)
    try:
        cov = s2 * np.linalg.inv(sol.jac.T @ sol.jac)
        sd = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    except np.linalg.LinAlgError:
        sd = np.full(p, math.inf)
    lag, T = _model_params(model, theta)
    params = _named(model, lag)
    names = list(params)
    sigma = {nm: params[nm] * float(sd[i]) for i, nm in enumerate(names)}  # d e^x = e^x dx
    sigma["delay_ms"] = float(sd[-1])
    if isinstance(log, FrequencyLog):
        half = m // 2
        residual = {
            "rms_db": float(np.sqrt(np.mean(r[:half] ** 2)) * _DB_PER_NP),
            "rms_deg": float(np.rad2deg(np.sqrt(np.mean(r[half:] ** 2)))),
        }
    else:
        residual = {"rms_nm": float(np.sqrt(np.mean(r**2)))}
    bic = m * math.log(max(rss, 1e-300) / m) + p * math.log(m)
    fit = ActuatorFit(model, params, float(T * 1e3), sigma, residual, bic, m, log.domain)
    return _with_warnings(log, fit)


def _with_warnings(log: Log, fit: ActuatorFit) -> ActuatorFit:
    fc = fit.characteristic_hz
    out = []
    if isinstance(log, FrequencyLog):
        f0, f1 = float(log.f_hz[0]), float(log.f_hz[-1])
        if not (f0 <= 0.5 * fc and f1 >= 2.0 * fc):
            out.append(
                f"the log spans {f0:g}–{f1:g} Hz and does not cover the fitted "
                f"{'corner' if fit.model == 'first_order' else 'natural frequency'} "
                f"{fc:.3g} Hz (needs about {0.5 * fc:.3g}–{2.0 * fc:.3g} Hz): the fit extrapolates"
            )
    else:
        fs = 1.0 / log.h
        span = float(log.t[-1] - log.t[0])
        if fs < 10.0 * fc:
            out.append(
                f"sampling at {fs:.4g} Hz is under 10× the fitted {fc:.3g} Hz: "
                "the lag is poorly resolved"
            )
        if span < 5.0 / (2.0 * math.pi * fc):
            out.append(f"the log ({span:g} s) is shorter than 5 time constants of {fc:.3g} Hz")
        if float(np.ptp(log.commanded)) == 0.0:
            out.append("the command never changes: nothing excites the actuator")
    bad = [k for k, v in fit.sigma.items() if not math.isfinite(v)]
    if bad:
        out.append(f"not identifiable from these data: {', '.join(bad)}")
    return dataclasses.replace(fit, warnings=tuple(out))


def fit_auto(
    log: Log, progress: Progress | None = None
) -> tuple[ActuatorFit, list[ActuatorFit], str]:
    """Fit both models; choose by BIC. Returns (chosen, all fits, why in one sentence)."""
    total = fit_work(log, FIT_MODELS)
    fits, offset = [], 0
    for m in FIT_MODELS:
        fits.append(fit_model(log, m, progress, offset, total))
        offset += fit_work(log, [m])
    first, second = fits
    gain = first.bic - second.bic
    if gain > BIC_MARGIN:
        chosen = second
        why = (
            f"second_order lowers BIC by {gain:.1f} (from {first.bic:.1f} to {second.bic:.1f}; "
            f"more than {BIC_MARGIN:g} is positive evidence for the extra parameter)"
        )
    else:
        chosen = first
        why = (
            f"first_order kept: second_order changes BIC by {-gain:+.1f} "
            f"(needs a drop of more than {BIC_MARGIN:g} to justify the extra parameter)"
        )
    return chosen, fits, why
