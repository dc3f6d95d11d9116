r"""The bounded tier law: the tiers' torques kept within the effort and rate limits by a
small convex quadratic program, earlier tiers first.

Each tier's summed-law torque u_k* (on the joints of S_k) is the minimiser of its own
convex cost (see ``tiered.py``):

    f_k(u) = (B_k u − a_k)ᵀ Q_k (B_k u − a_k) + λ_k uᵀ W_k u,
    Q_k = I (|S_k| ≥ rows) or Λ_k (fewer joints than rows),

so f_k(u) = f_k(u_k*) + (u − u_k*)ᵀ H_k (u − u_k*) with H_k = B_kᵀ Q_k B_k + λ_k W_k.
The bounded law solves, every tick where the summed command would pass a bound,

    minimise   Σ_k c_k · ½ (u_k − u_k*)ᵀ H_k (u_k − u_k*)
    subject to τ_lo − p ≤ Σ_k S_kᵀ u_k ≤ τ_hi − p,

where p is the posture torque plus h, τ_lo = max(−τ_max, τ_prev − r T_s) and
τ_hi = min(τ_max, τ_prev + r T_s) (r: the torque-rate limit, where the problem sets one).
When no bound binds the minimiser is u_k = u_k* for every tier: the summed law exactly
(the QP is then not even solved). Priority: c_k = PRIORITY^−(k−1) / h̄_k, h̄_k the mean
diagonal of H_k (so every tier's cost has the same scale before its priority), so moving
an earlier tier's torque away from its own optimum costs PRIORITY times more than moving
the next one's, and a binding limit is met by the later tiers first (more joints, lower gains
keep their task); within a tier, directions its task does not see (B_k's null space)
cost only λ_k and are used first. A tick where the solver fails falls back to the
clipped summed command and is counted.

Solvers are registered in ``QP_SOLVERS`` (``bench/qp_solvers.py`` measures them on this
problem's sizes); every one is a dense solver from the package index.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

__all__ = [
    "DEFAULT_SOLVER",
    "PRIORITY",
    "QP_SOLVERS",
    "BoundedQP",
    "TierBlock",
    "build_qp",
    "kkt_residuals",
    "multipliers",
    "solve_qp",
    "tier_hessian",
]

#: Cost ratio between consecutive tiers (earlier tiers kept first).
PRIORITY = 1e3


@dataclass(frozen=True)
class TierBlock:
    """One tier's part of the QP."""

    joints: np.ndarray
    """Joint indices of the tier (|S_k|,)."""
    H: np.ndarray
    """Hessian of its cost around its own optimum (|S_k|, |S_k|)."""
    u_star: np.ndarray
    """Its summed-law torque on its joints (|S_k|,) [N·m]."""


def tier_hessian(
    Minv: np.ndarray, J_rows: np.ndarray, joints: np.ndarray, lam: float
) -> np.ndarray:
    """H_k = B_kᵀ Q_k B_k + λ_k W_k of a tier with task rows ``J_rows`` (module docstring)."""
    B = J_rows @ Minv[:, joints]
    W = Minv[np.ix_(joints, joints)]
    if len(joints) < J_rows.shape[0]:
        Q = np.linalg.inv(J_rows @ Minv @ J_rows.T)
        return B.T @ Q @ B + lam * W
    return B.T @ B + lam * W


@dataclass(frozen=True)
class BoundedQP:
    """min ½ xᵀ P x + qᵀ x  s.t.  lo ≤ A x ≤ hi, x = (u_1, …, u_K)."""

    P: np.ndarray
    q: np.ndarray
    A: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    x_star: np.ndarray
    """The summed-law solution (the minimiser without constraints)."""


def build_qp(
    blocks: Sequence[TierBlock], n: int, lo: np.ndarray, hi: np.ndarray,
    priority: float = PRIORITY,
) -> BoundedQP:
    """The QP of the module docstring; ``lo``/``hi`` bound Σ S_kᵀ u_k (posture and h
    already taken off)."""
    sizes = [len(b.joints) for b in blocks]
    N = sum(sizes)
    P = np.zeros((N, N))
    A = np.zeros((n, N))
    x_star = np.zeros(N)
    i = 0
    for k, (b, s) in enumerate(zip(blocks, sizes)):
        c = priority ** (-k) / max(float(np.trace(b.H)) / s, 1e-300)
        P[i : i + s, i : i + s] = c * b.H
        A[b.joints, np.arange(i, i + s)] = 1.0
        x_star[i : i + s] = b.u_star
        i += s
    P = 0.5 * (P + P.T)
    return BoundedQP(P, -P @ x_star, A, lo.copy(), hi.copy(), x_star)


def _daqp(qp: BoundedQP, warm: np.ndarray | None = None) -> tuple[np.ndarray, bool]:
    import daqp

    kw = {"primal_start": warm} if warm is not None and len(warm) == len(qp.q) else {}
    x, _, flag, _ = daqp.solve(
        qp.P, qp.q, qp.A, qp.hi, qp.lo, np.zeros(len(qp.lo), dtype=np.int32), **kw
    )
    return np.asarray(x), flag in (1, 2)


def _proxsuite(qp: BoundedQP, warm: np.ndarray | None = None) -> tuple[np.ndarray, bool]:
    import proxsuite

    n = len(qp.q)
    res = proxsuite.proxqp.dense.solve(
        qp.P, qp.q, None, None, qp.A, qp.lo, qp.hi, eps_abs=1e-10, eps_rel=0.0,
        initial_guess=proxsuite.proxqp.InitialGuess.NO_INITIAL_GUESS,
    )
    ok = res.info.status == proxsuite.proxqp.QPSolverOutput.PROXQP_SOLVED
    return (np.array(res.x) if len(res.x) == n else np.zeros(n)), ok


def _quadprog(qp: BoundedQP, warm: np.ndarray | None = None) -> tuple[np.ndarray, bool]:
    import quadprog

    C = np.vstack([qp.A, -qp.A]).T
    b = np.concatenate([qp.lo, -qp.hi])
    try:
        x = quadprog.solve_qp(qp.P, -qp.q, C, b, 0)[0]
    except ValueError:
        return np.zeros(len(qp.q)), False
    return np.asarray(x), True


#: Dense QP solvers by name: (solve function, package to install).
QP_SOLVERS: dict[
    str, tuple[Callable[[BoundedQP, np.ndarray | None], tuple[np.ndarray, bool]], str]
] = {
    "daqp": (_daqp, "daqp"),
    "proxsuite": (_proxsuite, "proxsuite"),
    "quadprog": (_quadprog, "quadprog"),
}
#: The solver the bounded law uses (see bench/qp_solvers.py).
DEFAULT_SOLVER = "daqp"


def solve_qp(
    qp: BoundedQP, solver: str = DEFAULT_SOLVER, warm: np.ndarray | None = None
) -> tuple[np.ndarray, bool]:
    """Solve ``qp`` with a registered solver, warm-started from ``warm`` (the previous
    tick's solution) where the solver can; (x, ok). An unknown name lists the known."""
    if solver not in QP_SOLVERS:
        raise ValueError(f"unknown QP solver '{solver}'; known: {', '.join(QP_SOLVERS)}")
    fn, _ = QP_SOLVERS[solver]
    try:
        x, ok = fn(qp, warm)
    except Exception:  # a solver's own error is a failed tick, counted by the caller
        return np.zeros(len(qp.q)), False
    ok = ok and bool(np.all(np.isfinite(x)))
    if ok:  # a solution must meet the bounds (solver tolerances aside)
        s = qp.A @ x
        tol = 1e-7 * (1.0 + np.abs(qp.hi - qp.lo).max())
        ok = bool(np.all(s >= qp.lo - tol) and np.all(s <= qp.hi + tol))
    return x, ok


def kkt_residuals(qp: BoundedQP, x: np.ndarray, mu: np.ndarray) -> dict[str, float]:
    """Karush–Kuhn–Tucker residuals of (x, μ) for the QP, μ the multipliers of A x (μ > 0
    at the upper bound, < 0 at the lower): stationarity ‖P x + q + Aᵀ μ‖, primal
    feasibility (largest bound violation), complementary slackness (largest |μ_i| times
    the distance to the bound it pushes on), sign (largest multiplier of the wrong sign)."""
    s = qp.A @ x
    stat = float(np.abs(qp.P @ x + qp.q + qp.A.T @ mu).max())
    prim = float(max(0.0, (qp.lo - s).max(), (s - qp.hi).max()))
    up, dn = np.maximum(mu, 0.0), np.maximum(-mu, 0.0)
    comp = float(max((up * np.abs(qp.hi - s)).max(initial=0.0),
                     (dn * np.abs(s - qp.lo)).max(initial=0.0)))
    return {"stationarity": stat, "primal": prim, "complementarity": comp}


def multipliers(qp: BoundedQP, x: np.ndarray, tol: float = 1e-7) -> np.ndarray:
    """Multipliers μ of the constraints at a solution x: least squares of the stationarity
    condition over the constraints active there (the others get 0)."""
    s = qp.A @ x
    active = (np.abs(s - qp.hi) <= tol * (1 + np.abs(qp.hi))) | (
        np.abs(s - qp.lo) <= tol * (1 + np.abs(qp.lo))
    )
    mu = np.zeros(len(s))
    if active.any():
        g = -(qp.P @ x + qp.q)
        sol = np.linalg.lstsq(qp.A[active].T, g, rcond=None)[0]
        mu[active] = sol
    return mu
