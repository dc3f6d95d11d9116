"""Compiled per-tick kernels of the simulated plant (numba): the command's saturation,
rate limit and delay, the drives' exact ZOH state update with friction, semi-implicit
Euler, and the per-tick log with its stop checks. Pure functions on arrays, no I/O; the
simulator (``simulate.py``) calls them around pinocchio's dynamics.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from numba import njit

from .jit import writable_cache

__all__ = [
    "STOP_ERROR_BOUND",
    "STOP_JOINT_LIMIT",
    "STOP_NONFINITE",
    "STOP_PINNED",
    "STOP_SINGULAR",
    "actuate",
    "actuate_drive",
    "drive_packed",
    "integrate",
    "record",
    "settle",
]

writable_cache(Path(__file__).resolve().parent / "__pycache__")

#: Why ``record`` stops a rollout (0: it goes on); a joint limit is STOP_JOINT_LIMIT + j.
STOP_SINGULAR = 1
STOP_NONFINITE = 2
STOP_ERROR_BOUND = 3
STOP_PINNED = 4
STOP_JOINT_LIMIT = 10


@njit(cache=True)
def actuate(
    tau_cmd: np.ndarray,
    u_prev: np.ndarray,
    rate_step: np.ndarray,
    hist: np.ndarray,
    delay: np.ndarray,
    effort: np.ndarray,
    pinned: np.ndarray,
    u_d: np.ndarray,
) -> int:
    """Saturate, rate-limit and delay the command; returns the joint pinned longest.

    ``hist[i]`` holds the command of i+1 ticks ago; joint j is delayed ``delay[j]``
    ticks. ``pinned[j]`` counts consecutive ticks at the effort limit. Writes the
    command that reaches the actuator this tick into ``u_d``.
    """
    n = tau_cmd.shape[0]
    D = hist.shape[0]
    worst = 0
    for j in range(n):
        u = min(effort[j], max(-effort[j], tau_cmd[j]))
        du = u - u_prev[j]
        if du > rate_step[j]:
            u = u_prev[j] + rate_step[j]
        elif du < -rate_step[j]:
            u = u_prev[j] - rate_step[j]
        u_prev[j] = u
        if abs(u) >= effort[j] * (1.0 - 1e-9):
            pinned[j] += 1
        else:
            pinned[j] = 0
        if pinned[j] > pinned[worst]:
            worst = j
        dj = delay[j]
        u_d[j] = u if dj == 0 else hist[dj - 1, j]
        for i in range(D - 1, 0, -1):
            hist[i, j] = hist[i - 1, j]
        if D > 0:
            hist[0, j] = u
    return worst


@njit(cache=True)
def integrate(q: np.ndarray, v: np.ndarray, a: np.ndarray, h: float) -> None:
    """Semi-implicit Euler: v ← v + h a, then q ← q + h v."""
    for j in range(q.shape[0]):
        v[j] += h * a[j]
        q[j] += h * v[j]


@njit(cache=True)
def record(
    k: int,
    q: np.ndarray,
    v: np.ndarray,
    e6: np.ndarray,
    u: np.ndarray,
    tau_del: np.ndarray,
    tier_tau: np.ndarray,
    E: np.ndarray,
    TC: np.ndarray,
    TD: np.ndarray,
    TT: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    max_err2: float,
    pinned: np.ndarray,
    pinned_ticks: int,
    status: int,
) -> int:
    """Log tick ``k`` (error, commanded, delivered and per-tier torque) and check for
    divergence.

    Returns 0, or a STOP_* code: singular solve, non-finite state, tip error over the bound,
    a command pinned at its limit too long, STOP_JOINT_LIMIT + j for joint j outside its
    limits.
    """
    n = q.shape[0]
    for i in range(6):
        E[k, i] = e6[i]
    for j in range(n):
        TC[k, j] = u[j]
        TD[k, j] = tau_del[j]
        for t in range(tier_tau.shape[0]):
            TT[k, t, j] = tier_tau[t, j]
    if status != 0:
        return STOP_SINGULAR
    finite = True
    for j in range(n):
        if not (math.isfinite(q[j]) and math.isfinite(v[j])):
            finite = False
    if not finite:
        return STOP_NONFINITE
    if e6[0] * e6[0] + e6[1] * e6[1] + e6[2] * e6[2] > max_err2:
        return STOP_ERROR_BOUND
    for j in range(n):
        if pinned[j] >= pinned_ticks:
            return STOP_PINNED
    for j in range(n):
        if q[j] < lower[j] or q[j] > upper[j]:
            return STOP_JOINT_LIMIT + j
    return 0


@njit(cache=True)
def drive_packed(
    xa: np.ndarray,
    u_d: np.ndarray,
    ABd: np.ndarray,
    CDm: np.ndarray,
    fr: np.ndarray,
    v: np.ndarray,
    tau_net: np.ndarray,
    tau_del: np.ndarray,
) -> None:
    """One tick of every drive: the delayed command ``u_d`` through the drives' exact ZOH
    ([Ad Bd] and [Cm Dm] side by side, state ``xa`` advanced in place) gives the delivered
    torque ``tau_del``; minus friction (rows [τ_c; v_ε; b]: τ_c tanh(v/v_ε) + b v) it is
    ``tau_net``."""
    nx = xa.shape[0]
    n = v.shape[0]
    for j in range(n):
        y = 0.0
        for i in range(nx):
            y += CDm[j, i] * xa[i]
        for i in range(n):
            y += CDm[j, nx + i] * u_d[i]
        tau_del[j] = y
        tau_net[j] = y - fr[0, j] * math.tanh(v[j] / fr[1, j]) - fr[2, j] * v[j]
    xn = np.empty(nx)
    for i in range(nx):
        acc = 0.0
        for c in range(nx):
            acc += ABd[i, c] * xa[c]
        for c in range(n):
            acc += ABd[i, nx + c] * u_d[c]
        xn[i] = acc
    for i in range(nx):
        xa[i] = xn[i]


@njit(cache=True)
def actuate_drive(
    tau_cmd: np.ndarray,
    u_prev: np.ndarray,
    rate_step: np.ndarray,
    hist: np.ndarray,
    delay: np.ndarray,
    effort: np.ndarray,
    pinned: np.ndarray,
    u_d: np.ndarray,
    xa: np.ndarray,
    ABd: np.ndarray,
    CDm: np.ndarray,
    fr: np.ndarray,
    v: np.ndarray,
    tau_net: np.ndarray,
    tau_del: np.ndarray,
) -> int:
    """``actuate`` then the first substep's ``drive_packed``, in one call (the hot loop
    pays one dispatch for both); returns the joint pinned longest."""
    worst = actuate(tau_cmd, u_prev, rate_step, hist, delay, effort, pinned, u_d)
    drive_packed(xa, u_d, ABd, CDm, fr, v, tau_net, tau_del)
    return worst


@njit(cache=True)
def settle(
    k: int,
    q: np.ndarray,
    v: np.ndarray,
    e6: np.ndarray,
    u: np.ndarray,
    tau_del: np.ndarray,
    tier_tau: np.ndarray,
    Q: np.ndarray,
    V: np.ndarray,
    E: np.ndarray,
    TC: np.ndarray,
    TD: np.ndarray,
    TT: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    max_err2: float,
    pinned: np.ndarray,
    pinned_ticks: int,
    status: int,
    noise: np.ndarray,
    vm: np.ndarray,
) -> int:
    """The end of tick ``k`` in one call: ``record``, and the start of tick k + 1 — its
    logged state Q[k+1], V[k+1] and its measured velocity ``vm`` = v + noise[k+1].
    Returns ``record``'s code."""
    code = record(k, q, v, e6, u, tau_del, tier_tau, E, TC, TD, TT, lower, upper,
                  max_err2, pinned, pinned_ticks, status)
    k1 = k + 1
    if k1 < Q.shape[0]:
        n = q.shape[0]
        for j in range(n):
            Q[k1, j] = q[j]
            V[k1, j] = v[j]
            vm[j] = v[j] + noise[k1, j]
    return code
