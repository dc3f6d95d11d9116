"""Compiled per-tick linear algebra of the control laws (numba). Pure functions on arrays,
no I/O. The plant's kernels (drives, friction, integration, logging) are in ``plant.py``.

The readable form of the same maths is in ``tiered.py``; tests check they agree.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from numba import njit

from ..jit import writable_cache

__all__ = [
    "OK",
    "SINGULAR",
    "bounded_qp",
    "cho_solve_vec",
    "cholesky",
    "joint_command",
    "log3",
    "tier_solve",
    "tiered_command",
]

writable_cache(Path(__file__).resolve().parent / "__pycache__")

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
    JMi: np.ndarray,
    rows: np.ndarray,
    joints: np.ndarray,
    a: np.ndarray,
    lam: float,
    tau: np.ndarray,
    ws: np.ndarray,
) -> int:
    """Add to ``tau`` this tier's τ = Sᵀ W⁻¹ Bᵀ (B W⁻¹ Bᵀ + λI)⁻¹ a (see tiered.py).

    ``rows`` index J's task rows, ``joints`` the tier's joints, ``a`` (len(rows),).
    ``JMi`` is J M⁻¹ (every row and joint), computed once per tick: B = S_rows J M⁻¹ Sᵀ
    is its block, the same sums in the same order as computing B here.
    When the tier has fewer joints than rows the equal form (BᵀB + λW)⁻¹ Bᵀ a is used.
    ``ws`` is scratch of at least 3·n² + 3·n + 36 floats (n = J.shape[1]).
    """
    m = rows.shape[0]
    s = joints.shape[0]
    big = max(m, s)
    o = 0
    B = ws[o : o + m * s].reshape((m, s))
    o += m * s
    W = ws[o : o + s * s].reshape((s, s))
    o += s * s
    X = ws[o : o + s * m].reshape((s, m))
    o += s * m
    G = ws[o : o + big * big]
    o += big * big
    col = ws[o : o + big]
    o += big
    y = ws[o : o + big]
    for i in range(m):
        r = rows[i]
        for c in range(s):
            B[i, c] = JMi[r, joints[c]]
    for i in range(s):
        for c in range(s):
            W[i, c] = Minv[joints[i], joints[c]]
    if s >= m:
        if not cholesky(W):
            return SINGULAR
        cs = col[:s]
        for c in range(m):  # X = W⁻¹ Bᵀ
            for i in range(s):
                cs[i] = B[c, i]
            cho_solve_vec(W, cs)
            for i in range(s):
                X[i, c] = cs[i]
        Gm = G[: m * m].reshape((m, m))
        for i in range(m):
            for c in range(m):
                acc = 0.0
                for r in range(s):
                    acc += B[i, r] * X[r, c]
                Gm[i, c] = acc
            Gm[i, i] += lam
        if not cholesky(Gm):
            return SINGULAR
        ym = y[:m]
        for i in range(m):
            ym[i] = a[i]
        cho_solve_vec(Gm, ym)
        for i in range(s):
            acc = 0.0
            for c in range(m):
                acc += X[i, c] * ym[c]
            tau[joints[i]] += acc
    else:
        # fewer joints than rows: least squares in the metric of Λ_rows = (J_r M⁻¹ J_rᵀ)⁻¹,
        # u = (Bᵀ Λ B + λW)⁻¹ Bᵀ Λ a, so that the directions the tier cannot reach are judged
        # by the arm's own inertia rather than by mixing metres with radians
        Lm = G[: m * m].reshape((m, m))
        for i in range(m):
            ri = rows[i]
            for c in range(i + 1):
                rc = rows[c]
                acc = 0.0
                for k in range(J.shape[1]):
                    jik = J[ri, k]
                    if jik != 0.0:
                        for q in range(J.shape[1]):
                            acc += jik * Minv[k, q] * J[rc, q]
                Lm[i, c] = acc
                Lm[c, i] = acc
            Lm[i, i] += 1e-12 * (1.0 + Lm[i, i])
        if not cholesky(Lm):
            return SINGULAR
        cm = col[:m]
        for c in range(s):  # X[c, :] = (Λ B)[:, c]
            for i in range(m):
                cm[i] = B[i, c]
            cho_solve_vec(Lm, cm)
            for i in range(m):
                X[c, i] = cm[i]
        Gs = G[: s * s].reshape((s, s))
        ys = y[:s]
        for i in range(s):
            acc = 0.0
            for r in range(m):
                acc += X[i, r] * a[r]
            ys[i] = acc
            for c in range(s):
                acc = 0.0
                for r in range(m):
                    acc += X[i, r] * B[r, c]
                Gs[i, c] = acc + lam * W[i, c]
        if not cholesky(Gs):
            return SINGULAR
        cho_solve_vec(Gs, ys)
        for i in range(s):
            tau[joints[i]] += ys[i]
    return OK


@njit(cache=True)
def tiered_command(
    H: np.ndarray,
    J6: np.ndarray,
    dJv6: np.ndarray,
    h: np.ndarray,
    Minv: np.ndarray,
    q: np.ndarray,
    vm: np.ndarray,
    refs: np.ndarray,
    k: int,
    ip: np.ndarray,
    fp: np.ndarray,
    ws: np.ndarray,
    out: np.ndarray,
) -> int:
    """One tick of the tiered law (see tiered.py); returns 0 or SINGULAR.

    ``H`` is the tip placement (4×4), ``refs[k]`` the packed reference row
    [p_d (3), R_d (9, row-major), ẋ_d (6), ẍ_d (6)]. ``ip``/``fp`` pack the plan
    (layout in ``TieredController.pack``). Writes into ``out``: the clipped command
    (n), the tip pose error e (6), each tier's torque (K·n), the command before clipping
    (n). Tier 0 carries ẍ_d − J̇v.
    """
    n = ip[0]
    m = ip[1]
    K = ip[2]
    axes = ip[3 : 3 + m]
    null_eps = fp[0]
    kn = fp[1 : 1 + n]
    dn = fp[1 + n : 1 + 2 * n]
    qhome = fp[1 + 2 * n : 1 + 3 * n]
    effort = fp[1 + 3 * n : 1 + 4 * n]
    tau = out[:n]
    e6 = out[n : n + 6]
    tier_tau = out[n + 6 : n + 6 + K * n].reshape((K, n))
    ref = refs[k]
    o = 0
    rv = ws[o : o + 3]
    o += 3
    RdRt = ws[o : o + 9].reshape((3, 3))
    o += 9
    J = ws[o : o + m * n].reshape((m, n))
    o += m * n
    e = ws[o : o + m]
    o += m
    ed = ws[o : o + m]
    o += m
    ff = ws[o : o + m]
    o += m
    a = ws[o : o + m]
    o += m
    u = ws[o : o + n]
    o += n
    z = ws[o : o + m]
    o += m
    JMi = ws[o : o + m * n].reshape((m, n))
    o += m * n
    Li = ws[o : o + m * m].reshape((m, m))
    o += m * m
    scratch = ws[o:]
    for i in range(3):
        for c in range(3):
            RdRt[i, c] = (
                ref[3 + 3 * i] * H[c, 0] + ref[4 + 3 * i] * H[c, 1] + ref[5 + 3 * i] * H[c, 2]
            )
    log3(RdRt, rv)
    for i in range(3):
        e6[i] = ref[i] - H[i, 3]
        e6[3 + i] = rv[i]
    for i in range(m):
        ax = axes[i]
        e[i] = e6[ax]
        acc = ref[12 + ax]
        for c in range(n):
            J[i, c] = J6[ax, c]
            acc -= J6[ax, c] * vm[c]
        ed[i] = acc
        ff[i] = ref[18 + ax] - dJv6[ax]
    for i in range(m):  # J M⁻¹: every tier's B is a block of it, the null space uses it
        for c in range(n):
            acc = 0.0
            for r in range(n):
                acc += J[i, r] * Minv[r, c]
            JMi[i, c] = acc
    for i in range(n):
        tau[i] = 0.0
    pi = 3 + m
    pf = 1 + 4 * n
    for t in range(K):
        nj = ip[pi]
        joints = ip[pi + 1 : pi + 1 + nj]
        nr = ip[pi + 1 + nj]
        rows = ip[pi + 2 + nj : pi + 2 + nj + nr]
        pi += 2 + nj + nr
        lam = fp[pf]
        kp = fp[pf + 1 : pf + 1 + m]
        kd = fp[pf + 1 + m : pf + 1 + 2 * m]
        pf += 1 + 2 * m
        at = a[:nr]
        for i in range(nr):
            r = rows[i]
            at[i] = kp[r] * e[r] + kd[r] * ed[r]
            if t == 0:
                at[i] += ff[r]
        tk = tier_tau[t]
        for i in range(n):
            tk[i] = 0.0
        status = tier_solve(Minv, J, JMi, rows, joints, at, lam, tk, scratch)
        if status != OK:
            return status
        for i in range(n):
            tau[i] += tk[i]
    # dynamically consistent null-space posture: Nᵀ u, Nᵀ = I − Jᵀ Λ J M⁻¹
    for i in range(n):
        u[i] = kn[i] * (qhome[i] - q[i]) - dn[i] * vm[i]
    for i in range(m):
        acc = 0.0
        for r in range(n):
            acc += JMi[i, r] * u[r]
        z[i] = acc
        for c in range(m):
            acc = 0.0
            for r in range(n):
                acc += JMi[i, r] * J[c, r]
            Li[i, c] = acc
        Li[i, i] += null_eps
    if not cholesky(Li):
        return SINGULAR
    cho_solve_vec(Li, z)
    raw = out[n + 6 + K * n : n + 6 + K * n + n]
    for i in range(n):
        tn = u[i]
        for r in range(m):
            tn -= J[r, i] * z[r]
        t_ = tau[i] + tn + h[i]
        raw[i] = t_
        lim = effort[i]
        if t_ > lim:
            t_ = lim
        elif t_ < -lim:
            t_ = -lim
        tau[i] = t_
    return OK


@njit(cache=True)
def joint_command(
    H: np.ndarray,
    M: np.ndarray,
    h: np.ndarray,
    q: np.ndarray,
    vm: np.ndarray,
    refs: np.ndarray,
    jref: np.ndarray,
    k: int,
    gp: np.ndarray,
    out: np.ndarray,
) -> None:
    """One tick of the joint-space baseline (see joint_space.py).

    ``H`` is the tip placement (4×4), ``refs[k]`` the packed task reference row
    [p_d (3), R_d (9, row-major), ...], ``jref[k]`` the joint reference [q_d, v_d, a_d]
    (3n), ``gp`` = [kp (n), kd (n), effort (n)]. Writes into ``out``: the clipped command
    (n), the tip pose error e (6), the PD part M w (n). The matrix products are numba's
    (BLAS) products, the same calls numpy makes: the results equal the numpy form's bit
    for bit (tests check it).
    """
    n = q.shape[0]
    tau = out[:n]
    e6 = out[n : n + 6]
    pd = out[n + 6 : 2 * n + 6]
    ref = refs[k]
    Rd = ref[3:12].reshape((3, 3))
    Rt = np.empty((3, 3))
    for i in range(3):
        e6[i] = ref[i] - H[i, 3]
        for c in range(3):
            Rt[i, c] = H[c, i]
    rv = np.empty(3)
    log3(Rd @ Rt, rv)
    for i in range(3):
        e6[3 + i] = rv[i]
    jr = jref[k]
    w = np.empty(n)
    for j in range(n):
        w[j] = jr[2 * n + j] + gp[j] * (jr[j] - q[j]) + gp[n + j] * (jr[n + j] - vm[j])
    Mw = M @ w
    for j in range(n):
        t = Mw[j] + h[j]
        pd[j] = t - h[j]
        lim = gp[2 * n + j]
        if t < -lim:  # as np.minimum(np.maximum(t, -lim), lim): nan stays nan
            t = -lim
        elif t > lim:
            t = lim
        tau[j] = t


@njit(cache=True)
def bounded_qp(
    Minv: np.ndarray,
    J6: np.ndarray,
    ip: np.ndarray,
    lams: np.ndarray,
    tier_tau: np.ndarray,
    priority: float,
    P: np.ndarray,
    A: np.ndarray,
    xstar: np.ndarray,
    ws: np.ndarray,
) -> int:
    """The bounded law's QP (see ``bounded.py``): P = blockdiag(c_k H_k), A = [S_kᵀ],
    x* = (u_k*). ``ip`` = [K, per tier: nj, joints(nj), nr, rows(nr) of J6]; ``ws``
    scratch of at least 3·36 + 12·n floats. Returns N, the number of variables, or −1 when a
    tier's task inertia is singular."""
    K = ip[0]
    n = Minv.shape[0]
    o = 1
    col0 = 0
    for i in range(P.shape[0]):
        for j in range(P.shape[1]):
            P[i, j] = 0.0
    for i in range(A.shape[0]):
        for j in range(A.shape[1]):
            A[i, j] = 0.0
    c = 1.0
    for k in range(K):
        nj = ip[o]
        joints = ip[o + 1 : o + 1 + nj]
        nr = ip[o + 1 + nj]
        rows = ip[o + 2 + nj : o + 2 + nj + nr]
        o += 2 + nj + nr
        lam = lams[k]
        # B = J_r Minv S^T  (nr x nj) in ws
        B = ws[: nr * nj].reshape((nr, nj))
        for r in range(nr):
            for a in range(nj):
                acc = 0.0
                for q in range(n):
                    acc += J6[rows[r], q] * Minv[q, joints[a]]
                B[r, a] = acc
        X = ws[nr * nj : 2 * nr * nj].reshape((nr, nj))  # Q B
        if nj < nr:
            L = ws[2 * nr * nj : 2 * nr * nj + nr * nr].reshape((nr, nr))
            for r in range(nr):
                for s in range(r + 1):
                    acc = 0.0
                    for q in range(n):
                        jq = J6[rows[r], q]
                        if jq != 0.0:
                            for p in range(n):
                                acc += jq * Minv[q, p] * J6[rows[s], p]
                    L[r, s] = acc
                    L[s, r] = acc
                L[r, r] += 1e-12 * (1.0 + L[r, r])
            if not cholesky(L):
                return -1
            colv = ws[2 * nr * nj + nr * nr : 2 * nr * nj + nr * nr + nr]
            for a in range(nj):
                for r in range(nr):
                    colv[r] = B[r, a]
                cho_solve_vec(L, colv)
                for r in range(nr):
                    X[r, a] = colv[r]
        else:
            for r in range(nr):
                for a in range(nj):
                    X[r, a] = B[r, a]
        tr = 0.0
        for a in range(nj):
            for b in range(nj):
                acc = 0.0
                for r in range(nr):
                    acc += B[r, a] * X[r, b]
                acc += lam * Minv[joints[a], joints[b]]
                P[col0 + a, col0 + b] = acc
                if a == b:
                    tr += acc
            A[joints[a], col0 + a] = 1.0
            xstar[col0 + a] = tier_tau[k, joints[a]]
        ck = c / max(tr / nj, 1e-300)
        for a in range(nj):
            for b in range(nj):
                P[col0 + a, col0 + b] *= ck
        for a in range(nj):  # symmetrise against round-off
            for b in range(a):
                m_ = 0.5 * (P[col0 + a, col0 + b] + P[col0 + b, col0 + a])
                P[col0 + a, col0 + b] = m_
                P[col0 + b, col0 + a] = m_
        col0 += nj
        c /= priority
    return col0
