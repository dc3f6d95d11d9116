r"""Calibrate the plant's deviation from the controller's model against a run's log.

Equation error, period by period: from the logged commands the actuator model (with a
common extra delay of d periods and a bandwidth scale per joint) gives the delivered
torque τ_del,k; from the logged q_k, v_k and a_k = (v_{k+1} − v_k)/T_s the plant without
its payload gives the torque the motion needed, RNEA(q_k, v_k, a_k), and the payload adds
Y_p(q_k, v_k, a_k) π_p(m, c), linear in its inertial parameters (π_p of a sphere of mass m
centred at c in the tip frame). The residual per joint and period is

    r_k = τ_del,k − τ_c tanh(v_k / v_ε) − b v_k − RNEA(q_k, v_k, a_k) − Y_p π_p(m, c),

and ``scipy.optimize.least_squares`` fits m, c, the Coulomb τ_c and viscous b of every
joint and every joint's bandwidth scale, for each whole d in a small range (the best d
wins). 1σ comes from the Jacobian at the solution (residual variance × (JᵀJ)⁻¹); a
parameter whose 1σ passes half its value, or that sits at a bound, is flagged as not
identifiable from this log.

Pure library code: no printing.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pinocchio as pin
import scipy.optimize
import scipy.signal

from .actuators import discretize
from .problem import Problem
from .rollout_log import RunLog
from .simulate import V_EPS

__all__ = [
    "Calibration",
    "calibrate",
]


@dataclass(frozen=True)
class Calibration:
    """The fitted plant deviation and how well the log determines it."""

    payload_kg: float
    """Payload mass [kg]."""
    payload_offset_m: tuple[float, float, float]
    """Payload centre of mass in the tip frame [m]."""
    coulomb_nm: tuple[float, ...]
    """Coulomb friction per joint [N·m]."""
    viscous_nms: tuple[float, ...]
    """Viscous friction per joint [N·m·s/rad]."""
    bandwidth_scale: tuple[float, ...]
    """Each drive's frequencies × this [-]."""
    extra_delay_ticks: int
    """Delay added to every joint's [periods] (may be negative)."""
    sigma: dict[str, float]
    """1σ of each fitted parameter, by name."""
    values: dict[str, float]
    """Each fitted parameter, by name (the same names)."""
    residual_rms_nm: float
    """RMS torque residual at the solution [N·m]."""
    warnings: tuple[str, ...]
    """Parameters the log does not determine, in words."""

    def apply(self, problem: Problem) -> Problem:
        """``problem`` with this plant deviation (the controller's model unchanged)."""
        acts = []
        for j, a in enumerate(problem.actuators):
            acts.append(dataclasses.replace(
                a,
                model=a.model.scaled(self.bandwidth_scale[j]),
                delay_ticks=max(0, a.delay_ticks + self.extra_delay_ticks),
                coulomb_nm=self.coulomb_nm[j],
                viscous_nms=self.viscous_nms[j],
            ))
        dev = dataclasses.replace(
            problem.arm.deviation, payload_kg=self.payload_kg,
            payload_offset_m=self.payload_offset_m,
        )
        arm = problem.arm.with_deviation(dev)
        return dataclasses.replace(problem, arm=arm, actuators=tuple(acts))


def _delivered(problem: Problem, log: RunLog, scales: np.ndarray, extra: int) -> np.ndarray:
    """Mean delivered torque per period (K, n) from the logged commands."""
    K, n = log.tau_cmd.shape
    out = np.empty((K, n))
    for j, a in enumerate(problem.actuators):
        act = dataclasses.replace(a, model=a.model.scaled(float(scales[j])))
        bank = discretize([act], problem.dt)
        b, den = scipy.signal.ss2tf(bank.Ad, bank.Bd, bank.Cm, bank.Dm)
        b = np.atleast_1d(np.squeeze(b))
        den = np.atleast_1d(den)
        u = log.tau_cmd[:, j]
        d = max(0, a.delay_ticks + extra)
        ud = np.concatenate([np.full(d, u[0]), u[: K - d]]) if d else u
        zi = scipy.signal.lfilter_zi(b, den) * ud[0]
        out[:, j] = scipy.signal.lfilter(b, den, ud, zi=zi)[0]
    return out


def _payload_params(m: float, c: np.ndarray, radius: float, tip: pin.SE3) -> np.ndarray:
    """Dynamic parameters (pinocchio order) of the payload in its joint's frame."""
    inertia = pin.Inertia.FromSphere(max(m, 0.0), radius) if m > 0 else pin.Inertia.Zero()
    local = pin.Inertia(inertia.mass, np.asarray(c, dtype=float), inertia.inertia)
    return np.asarray(tip.act(local).toDynamicParameters())


def calibrate(
    problem: Problem, log: RunLog, delays: Sequence[int] = (-1, 0, 1, 2, 3),
    skip_s: float = 0.05,
) -> Calibration:
    """Fit the plant deviation to ``log`` (see the module docstring)."""
    arm = problem.arm
    n = arm.n
    K = len(log.t) - 1
    h = problem.dt
    start = min(int(round(skip_s / h)), max(K - 10, 0))
    q, v = log.q[:K], log.v[:K]
    a = (log.v[1:] - log.v[:-1]) / h
    bare = arm.with_deviation(dataclasses.replace(arm.deviation, payload_kg=0.0)).plant_model
    data = bare.createData()
    tip = bare.frames[arm.tip_id]
    jl = tip.parentJoint
    rnea = np.empty((K, n))
    Y = np.empty((K, n, 10))
    for k in range(K):
        rnea[k] = pin.rnea(bare, data, q[k], v[k], a[k])
        Yk = pin.computeJointTorqueRegressor(bare, data, q[k], v[k], a[k])
        Y[k] = Yk[:, 10 * (jl - 1) : 10 * jl]
    radius = arm.deviation.payload_radius_m
    withp = bare.copy()
    wdata = withp.createData()
    home = np.array(arm.home)

    def minv_diag(m: float, c: np.ndarray) -> np.ndarray:
        """diag(M⁻¹) at home with the payload: the simulator's Coulomb smoothing uses it."""
        inertia = pin.Inertia.FromSphere(max(m, 0.0), radius) if m > 0 else pin.Inertia.Zero()
        local = pin.Inertia(inertia.mass, np.asarray(c, dtype=float), inertia.inertia)
        withp.inertias[jl] = bare.inertias[jl] + tip.placement.act(local)
        return np.diag(pin.computeMinverse(withp, wdata, home)).copy()
    sl = slice(start, K)

    def unpack(x: np.ndarray) -> tuple[float, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        return x[0], x[1:4], x[4 : 4 + n], x[4 + n : 4 + 2 * n], x[4 + 2 * n : 4 + 3 * n]

    def residual(x: np.ndarray, extra: int) -> np.ndarray:
        m, c, tc, b, s = unpack(x)
        tdel = _delivered(problem, log, s, extra)[:K]
        v_eps = np.maximum(V_EPS, 2.0 * h * np.abs(tc) * minv_diag(m, c) * 1.5)
        fric = tc * np.tanh(v / v_eps) + b * v
        pay = Y @ _payload_params(m, c, radius, tip.placement)
        return (tdel - fric - rnea - pay)[sl].ravel()

    dev = arm.deviation
    x0 = np.concatenate([
        [max(dev.payload_kg, 0.1)], np.asarray(dev.payload_offset_m, dtype=float),
        [a_.coulomb_nm for a_ in problem.actuators],
        [a_.viscous_nms for a_ in problem.actuators], np.ones(n),
    ])
    lo = np.concatenate([[0.0], [-1.0] * 3, [0.0] * n, [0.0] * n, [0.2] * n])
    hi = np.concatenate([[100.0], [1.0] * 3, [1e3] * n, [1e3] * n, [5.0] * n])
    x0 = np.clip(x0, lo + 1e-9, hi - 1e-9)
    best = None
    for extra in delays:
        if min(act.delay_ticks for act in problem.actuators) + extra < 0:
            continue
        res = scipy.optimize.least_squares(
            residual, x0, bounds=(lo, hi), args=(extra,), x_scale="jac", max_nfev=200
        )
        if best is None or res.cost < best[0].cost:
            best = (res, extra)
    assert best is not None
    res, extra = best
    m, c, tc, b, s = unpack(res.x)
    names = ["payload_kg", "payload_x_m", "payload_y_m", "payload_z_m"]
    names += [f"coulomb:{j}" for j in arm.joint_names] + [f"viscous:{j}" for j in arm.joint_names]
    names += [f"bandwidth_scale:{j}" for j in arm.joint_names]
    dof = max(1, res.fun.size - res.x.size)
    var = 2.0 * res.cost / dof
    try:
        cov = np.linalg.pinv(res.jac.T @ res.jac) * var
        sig = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    except np.linalg.LinAlgError:
        sig = np.full(res.x.size, math.inf)
    warns = []
    floor = {"payload_kg": 0.05, "payload": 0.005, "coulomb": 0.02, "viscous": 0.005,
             "bandwidth_scale": 0.05}
    for name, x, sd, l_, h_ in zip(names, res.x, sig, lo, hi):
        at_bound = x <= l_ + 1e-6 * (1 + abs(l_)) or x >= h_ - 1e-6 * (1 + abs(h_))
        at_bound = at_bound and not name.startswith(("coulomb", "viscous"))  # 0 is fine
        fl = floor.get(name, floor.get(name.split(":")[0], floor["payload"]))
        if at_bound or sd > 0.5 * max(abs(x), fl) or not math.isfinite(sd):
            why = "sits at a bound" if at_bound else f"1σ {sd:.2g} against {x:.3g}"
            warns.append(f"{name}: not determined by this log ({why}); excite that joint more")
    return Calibration(
        payload_kg=float(m),
        payload_offset_m=(float(c[0]), float(c[1]), float(c[2])),
        coulomb_nm=tuple(float(x) for x in tc),
        viscous_nms=tuple(float(x) for x in b),
        bandwidth_scale=tuple(float(x) for x in s),
        extra_delay_ticks=int(extra),
        sigma=dict(zip(names, (float(x) for x in sig))),
        values=dict(zip(names, (float(x) for x in res.x))),
        residual_rms_nm=float(math.sqrt(2.0 * res.cost / max(res.fun.size, 1))),
        warnings=tuple(warns),
    )
