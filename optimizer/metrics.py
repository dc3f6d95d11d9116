"""Tracking and effort figures of a rollout, and path accuracy in the style of ISO 9283."""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numba import njit

from .jit import writable_cache
from .simulate import Rollout

__all__ = [
    "TrackMetrics",
    "iso_path_figures",
    "plane_crossings",
    "plane_crossings_numpy",
    "track_metrics",
]

writable_cache(Path(__file__).resolve().parent / "__pycache__")


@dataclass(frozen=True)
class TrackMetrics:
    """Figures of one rollout after the settle time."""

    pos_rms_mm: float
    """RMS tip position error [mm]."""
    pos_max_mm: float
    """Largest tip position error [mm]."""
    rot_rms_deg: float
    """RMS tip orientation error [deg]."""
    rot_max_deg: float
    """Largest tip orientation error [deg]."""
    tau_rms_nm: float
    """RMS of the commanded joint torques over time and joints [N·m]."""
    peak_torque_ratio: float
    """Largest |command| / effort limit over time and joints [-]."""
    path_at_mm: float | None
    """Path accuracy AT_p (ISO 9283 style, one cycle) [mm]; None where the tip barely moves."""


def iso_path_figures(commanded: np.ndarray, attained: np.ndarray) -> tuple[float, float]:
    """Path accuracy AT_p and repeatability RT_p.

    Args:
        commanded: commanded points (P, 3), one per normal plane.
        attained: attained points (P, C, 3): where each of C cycles crossed the plane.

    AT_p = maxᵢ ‖x̄ᵢ − cᵢ‖ with x̄ᵢ the barycentre of the cycles' points in plane i;
    RT_p = maxᵢ (l̄ᵢ + 3 Sₗᵢ), lᵢⱼ = ‖xᵢⱼ − x̄ᵢ‖, Sₗᵢ their sample deviation.
    """
    bary = attained.mean(axis=1)
    at = np.linalg.norm(bary - commanded, axis=1)
    lij = np.linalg.norm(attained - bary[:, None, :], axis=2)
    C = attained.shape[1]
    s = lij.std(axis=1, ddof=1) if C > 1 else np.zeros(len(lij))
    rt = lij.mean(axis=1) + 3.0 * s
    return float(at.max()), float(rt.max())


def plane_crossings(
    p_ref: np.ndarray, v_ref: np.ndarray, p: np.ndarray, window: int, idx: np.ndarray
) -> np.ndarray:
    """Where the attained path ``p`` crosses the plane normal to the path at each ``idx``.

    Searches ticks within ``window`` of i, takes the crossing closest to p_ref[i] and
    interpolates linearly; falls back to the nearest attained point when none crosses.
    Compiled; equal bit for bit to ``plane_crossings_numpy`` (the readable form; tests
    check it).
    """
    out = np.empty((len(idx), 3))
    _crossings(
        np.ascontiguousarray(p_ref, dtype=float), np.ascontiguousarray(v_ref, dtype=float),
        np.ascontiguousarray(p, dtype=float), int(window),
        np.ascontiguousarray(idx, dtype=np.int64), out,
    )
    return out


@njit(cache=True)
def _crossings(
    p_ref: np.ndarray, v_ref: np.ndarray, p: np.ndarray, window: int, idx: np.ndarray,
    out: np.ndarray,
) -> None:
    # the same operations as plane_crossings_numpy: norms as sqrt(x·x) and the plane
    # distances as one matrix-vector product (numba's BLAS calls are numpy's), sums of
    # three squares left to right as numpy's reduction adds them
    N = p.shape[0]
    for r in range(idx.shape[0]):
        i = idx[r]
        c = p_ref[i]
        vr = v_ref[i]
        u = vr / math.sqrt(np.dot(vr, vr))
        lo, hi = max(0, i - window), min(N, i + window + 1)
        rel = p[lo:hi] - c
        d = rel @ u
        best = math.inf
        found = False
        for j in range(hi - lo - 1):
            if np.signbit(d[j]) == np.signbit(d[j + 1]):
                continue
            w = d[j] / (d[j] - d[j + 1]) if d[j] != d[j + 1] else 0.0
            x = p[lo + j] + w * (p[lo + j + 1] - p[lo + j])
            xc = x - c
            dist = math.sqrt(np.dot(xc, xc))
            if not found or dist < best:
                best, found = dist, True
                out[r] = x
        if not found:
            k_best, best = 0, math.inf
            for j in range(hi - lo):
                s2 = rel[j, 0] * rel[j, 0] + rel[j, 1] * rel[j, 1] + rel[j, 2] * rel[j, 2]
                dn = math.sqrt(s2)
                if dn < best or j == 0:
                    k_best, best = j, dn
            out[r] = p[lo + k_best]


def plane_crossings_numpy(
    p_ref: np.ndarray, v_ref: np.ndarray, p: np.ndarray, window: int, idx: np.ndarray
) -> np.ndarray:
    """``plane_crossings`` written with numpy (the readable form the kernel compiles)."""
    out = np.empty((len(idx), 3))
    N = len(p)
    for r, i in enumerate(idx):
        c = p_ref[i]
        u = v_ref[i] / np.linalg.norm(v_ref[i])
        lo, hi = max(0, i - window), min(N, i + window + 1)
        seg = p[lo:hi]
        d = (seg - c) @ u
        sgn = np.flatnonzero(np.signbit(d[:-1]) != np.signbit(d[1:]))
        if sgn.size == 0:
            out[r] = seg[np.argmin(np.linalg.norm(seg - c, axis=1))]
            continue
        best = None
        for j in sgn:
            w = d[j] / (d[j] - d[j + 1]) if d[j] != d[j + 1] else 0.0
            x = seg[j] + w * (seg[j + 1] - seg[j])
            dist = float(np.linalg.norm(x - c))
            if best is None or dist < best[0]:
                best = (dist, x)
        out[r] = best[1] if best else seg[0]
    return out


def track_metrics(
    ro: Rollout, effort: np.ndarray, settle_s: float, dt: float, path_accuracy: bool = True
) -> TrackMetrics:
    """Figures of ``ro`` from ``settle_s`` on (all ticks when it stopped before that).

    ``path_accuracy=False`` skips AT_p (None), the costliest figure and not part of any
    objective (perturbed plants).
    """
    keep = ro.t >= settle_s
    if not np.any(keep):
        keep = np.ones_like(ro.t, dtype=bool)
    ep = np.linalg.norm(ro.e[keep, :3], axis=1) * 1e3
    er = np.rad2deg(np.linalg.norm(ro.e[keep, 3:], axis=1))
    tc = ro.tau_cmd[keep]
    speed = np.linalg.norm(ro.v_ref, axis=1)
    at: float | None = None
    if path_accuracy and speed.size and speed.max() > 1e-3:
        moving = np.flatnonzero(keep & (speed > 0.05 * speed.max()))
        if moving.size:
            idx = moving[:: max(1, moving.size // 400)]
            window = max(2, int(round(0.2 / dt)))
            att = plane_crossings(ro.p_ref, ro.v_ref, ro.p, window, idx)
            at = iso_path_figures(ro.p_ref[idx], att[:, None, :])[0] * 1e3
    return TrackMetrics(
        pos_rms_mm=float(np.sqrt(np.mean(ep**2))),
        pos_max_mm=float(ep.max()),
        rot_rms_deg=float(np.sqrt(np.mean(er**2))),
        rot_max_deg=float(er.max()),
        tau_rms_nm=float(np.sqrt(np.mean(tc**2))),
        peak_torque_ratio=float(np.max(np.abs(tc) / effort)),
        path_at_mm=at,
    )
