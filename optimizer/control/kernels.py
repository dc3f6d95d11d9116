"""Compiled per-tick linear algebra (numba). Pure functions on arrays, no I/O.

The readable form of the same maths is in ``tiered.py``; tests check they agree.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

OK = 0
SINGULAR = 1


@njit(cache=True)
def log3(R: np.ndarray, out: np.ndarray) -> None:
    """Rotation vector of ``R`` (the matrix logarithm, as a 3-vector) into ``out``."""
    tr = R[0, 0] + R[1, 1] + R[2, 2]
    vx = R[2, 1] - R[1, 2]
    vy = R[0, 2] - R[2, 0]
    vz = R[1, 0] - R[0, 1]
    c = min(1.0, max(-1.0, 0.5 * (tr - 1.0)))
    sn = 0.5 * math.sqrt(vx * vx + vy * vy + vz * vz)
    th = math.atan2(sn, c)
    if th < 1e-6:
        f = 0.5 * (1.0 + th * th / 6.0)
        out[0] = f * vx
        out[1] = f * vy
        out[2] = f * vz
    elif th > 3.0:
        # near π: a aᵀ = (sym(R) − cos θ I) / (1 − cos θ); take its largest column
        i = 0
        if R[1, 1] > R[i, i]:
            i = 1
        if R[2, 2] > R[i, i]:
            i = 2
        k = 1.0 - c
        d = math.sqrt(max((R[i, i] - c) / k, 1e-300))
        a0 = (0.5 * (R[0, i] + R[i, 0]) - (c if i == 0 else 0.0)) / (k * d)
        a1 = (0.5 * (R[1, i] + R[i, 1]) - (c if i == 1 else 0.0)) / (k * d)
        a2 = (0.5 * (R[2, i] + R[i, 2]) - (c if i == 2 else 0.0)) / (k * d)
        if a0 * vx + a1 * vy + a2 * vz < 0.0:
            a0, a1, a2 = -a0, -a1, -a2
        out[0] = th * a0
        out[1] = th * a1
        out[2] = th * a2
    else:
        f = th / (2.0 * math.sin(th))
        out[0] = f * vx
        out[1] = f * vy
        out[2] = f * vz


@njit(cache=True)
def cholesky(A: np.ndarray) -> bool:
    """In-place lower Cholesky factor of SPD ``A``; False when not positive definite."""
    n = A.shape[0]
    for j in range(n):
        s = A[j, j]
        for k in range(j):
            s -= A[j, k] * A[j, k]
        if not s > 0.0:
            return False
        d = math.sqrt(s)
        A[j, j] = d
        for i in range(j + 1, n):
            s = A[i, j]
            for k in range(j):
                s -= A[i, k] * A[j, k]
            A[i, j] = s / d
    return True


@njit(cache=True)
def cho_solve_vec(L: np.ndarray, b: np.ndarray) -> None:
    """Solve (L Lᵀ) x = b in place in ``b``."""
    n = L.shape[0]
    for i in range(n):
        s = b[i]
        for k in range(i):
            s -= L[i, k] * b[k]
        b[i] = s / L[i, i]
    for i in range(n - 1, -1, -1):
        s = b[i]
        for k in range(i + 1, n):
            s -= L[k, i] * b[k]
        b[i] = s / L[i, i]


@njit(cache=True)
def tier_solve(
    Minv: np.ndarray,
    J: np.ndarray,
    rows: np.ndarray,
    joints: np.ndarray,
    a: np.ndarray,
    lam: float,
    tau: np.ndarray,
) -> int:
    """Add to ``tau`` this tier's τ = Sᵀ W⁻¹ Bᵀ (B W⁻¹ Bᵀ + λI)⁻¹ a (see tiered.py).

    ``rows`` index J's task rows, ``joints`` the tier's joints, ``a`` (len(rows),).
    When the tier has fewer joints than rows the equal form (BᵀB + λW)⁻¹ Bᵀ a is used.
    """
    m = rows.shape[0]
    s = joints.shape[0]
    B = np.empty((m, s))
    for i in range(m):
        r = rows[i]
        for c in range(s):
            jc = joints[c]
            acc = 0.0
            for k in range(J.shape[1]):
                acc += J[r, k] * Minv[k, jc]
            B[i, c] = acc
    W = np.empty((s, s))
    for i in range(s):
        for c in range(s):
            W[i, c] = Minv[joints[i], joints[c]]
    if s >= m:
        if not cholesky(W):
            return SINGULAR
        X = np.empty((s, m))  # W⁻¹ Bᵀ
        col = np.empty(s)
        for c in range(m):
            for i in range(s):
                col[i] = B[c, i]
            cho_solve_vec(W, col)
            for i in range(s):
                X[i, c] = col[i]
        G = B @ X
        for i in range(m):
            G[i, i] += lam
        if not cholesky(G):
            return SINGULAR
        y = a.copy()
        cho_solve_vec(G, y)
        for i in range(s):
            acc = 0.0
            for c in range(m):
                acc += X[i, c] * y[c]
            tau[joints[i]] += acc
    else:
        G = B.T @ B
        for i in range(s):
            for c in range(s):
                G[i, c] += lam * W[i, c]
        if not cholesky(G):
            return SINGULAR
        y = B.T @ a
        cho_solve_vec(G, y)
        for i in range(s):
            tau[joints[i]] += y[i]
    return OK


@njit(cache=True)
def tiered_command(
    p: np.ndarray,
    R: np.ndarray,
    J6: np.ndarray,
    dJv6: np.ndarray,
    h: np.ndarray,
    Minv: np.ndarray,
    q: np.ndarray,
    vm: np.ndarray,
    pd: np.ndarray,
    Rd: np.ndarray,
    twd: np.ndarray,
    accd: np.ndarray,
    axes: np.ndarray,
    tier_joints: np.ndarray,
    tier_nj: np.ndarray,
    tier_rows: np.ndarray,
    tier_nr: np.ndarray,
    tier_kp: np.ndarray,
    tier_kd: np.ndarray,
    tier_lam: np.ndarray,
    kn: np.ndarray,
    dn: np.ndarray,
    qhome: np.ndarray,
    null_eps: float,
    effort: np.ndarray,
    tau: np.ndarray,
    tier_tau: np.ndarray,
    e6: np.ndarray,
) -> int:
    """One tick of the tiered law; writes the clipped command into ``tau``.

    ``tier_rows[k, :tier_nr[k]]`` index rows of the task (positions in ``axes``),
    ``tier_joints[k, :tier_nj[k]]`` the tier's joints; ``tier_kp``/``tier_kd`` are per
    task row (len(axes)). Tier 0 also carries the feed-forward ẍ_d − J̇v.
    """
    n = q.shape[0]
    m = axes.shape[0]
    RdRt = Rd @ R.T
    rv = np.empty(3)
    log3(RdRt, rv)
    for i in range(3):
        e6[i] = pd[i] - p[i]
        e6[3 + i] = rv[i]
    ed6 = twd - J6 @ vm
    J = np.empty((m, n))
    e = np.empty(m)
    ed = np.empty(m)
    ff = np.empty(m)
    for i in range(m):
        ax = axes[i]
        e[i] = e6[ax]
        ed[i] = ed6[ax]
        ff[i] = accd[ax] - dJv6[ax]
        for c in range(n):
            J[i, c] = J6[ax, c]
    for i in range(n):
        tau[i] = 0.0
    K = tier_nj.shape[0]
    tk = np.zeros(n)
    for k in range(K):
        nr = tier_nr[k]
        rows = tier_rows[k, :nr]
        a = np.empty(nr)
        for i in range(nr):
            r = rows[i]
            a[i] = tier_kp[k, r] * e[r] + tier_kd[k, r] * ed[r]
            if k == 0:
                a[i] += ff[r]
        for i in range(n):
            tk[i] = 0.0
        status = tier_solve(Minv, J, rows, tier_joints[k, : tier_nj[k]], a, tier_lam[k], tk)
        if status != OK:
            return status
        for i in range(n):
            tier_tau[k, i] = tk[i]
            tau[i] += tk[i]
    # dynamically consistent null-space posture: Nᵀ u, Nᵀ = I − Jᵀ Λ J M⁻¹
    u = np.empty(n)
    for i in range(n):
        u[i] = kn[i] * (qhome[i] - q[i]) - dn[i] * vm[i]
    JMi = J @ Minv
    Li = JMi @ J.T
    for i in range(m):
        Li[i, i] += null_eps
    if not cholesky(Li):
        return SINGULAR
    z = JMi @ u
    cho_solve_vec(Li, z)
    tn = u - J.T @ z
    for i in range(n):
        t = tau[i] + tn[i] + h[i]
        lim = effort[i]
        if t > lim:
            t = lim
        elif t < -lim:
            t = -lim
        tau[i] = t
    return OK


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
def drive(
    xa: np.ndarray,
    u_d: np.ndarray,
    Ad: np.ndarray,
    Bd: np.ndarray,
    Cm: np.ndarray,
    Dm: np.ndarray,
    v: np.ndarray,
    coulomb: np.ndarray,
    v_eps: np.ndarray,
    viscous: np.ndarray,
    tau_net: np.ndarray,
    tau_del: np.ndarray,
) -> None:
    """Mean delivered torque over the step, minus joint friction; advances ``xa``."""
    y = Cm @ xa + Dm @ u_d
    xn = Ad @ xa + Bd @ u_d
    for i in range(xa.shape[0]):
        xa[i] = xn[i]
    for j in range(v.shape[0]):
        tau_del[j] = y[j]
        tau_net[j] = y[j] - coulomb[j] * math.tanh(v[j] / v_eps[j]) - viscous[j] * v[j]


@njit(cache=True)
def integrate(q: np.ndarray, v: np.ndarray, a: np.ndarray, h: float) -> None:
    """Semi-implicit Euler: v ← v + h a, then q ← q + h v."""
    for j in range(q.shape[0]):
        v[j] += h * a[j]
        q[j] += h * v[j]
