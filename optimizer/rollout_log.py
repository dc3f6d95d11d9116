"""Rollout logs: one CSV per rollout, the tool's measured-run format too.

Columns (per joint ``<j>`` in URDF order): ``time_s``; ``q_<j>`` [rad or m], ``v_<j>``
[rad/s or m/s] at the start of each control period; ``tau_cmd_<j>`` (the command after
saturation and rate limit) and ``tau_out_<j>`` (the delivered torque, mean over the
period) [N·m or N]; the tip pose ``x_m``, ``y_m``, ``z_m``, ``rx_rad``, ``ry_rad``,
``rz_rad`` (rotation vector of the tip's orientation in the world) and the reference pose
``x_ref_m`` … ``rz_ref_rad``. A measured run converted to these columns can be replayed
and calibrated by ``tierplan validate`` (``tau_out`` may then be left out).

Pure library code: texts and arrays, no printing.
"""

from __future__ import annotations

import io
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pinocchio as pin

from .exceptions import InputError
from .simulate import Rollout
from .trajectories import Reference

__all__ = [
    "POSE",
    "POSE_REF",
    "RunLog",
    "columns",
    "position_error_mm",
    "read_run_log",
    "rollout_csv",
    "rotation_error_deg",
    "safe_name",
]

POSE = ("x_m", "y_m", "z_m", "rx_rad", "ry_rad", "rz_rad")
POSE_REF = ("x_ref_m", "y_ref_m", "z_ref_m", "rx_ref_rad", "ry_ref_rad", "rz_ref_rad")


def columns(joint_names: Sequence[str], delivered: bool = True) -> list[str]:
    """The header of a log for these joints."""
    cols = ["time_s"]
    for prefix in ("q", "v", "tau_cmd") + (("tau_out",) if delivered else ()):
        cols += [f"{prefix}_{j}" for j in joint_names]
    return cols + list(POSE) + list(POSE_REF)


def rollout_csv(ro: Rollout, ref: Reference, joint_names: Sequence[str]) -> str:
    """The CSV text of one rollout (module docstring for the columns)."""
    K = ro.steps
    pose = np.zeros((K, 6))
    pref = np.zeros((K, 6))
    for k in range(K):
        Rd = ref.R[k]
        R = pin.exp3(ro.e[k, 3:]).T @ Rd  # e_rot = log3(R_d Rᵀ)
        pose[k, :3] = ro.p[k]
        pose[k, 3:] = pin.log3(R)
        pref[k, :3] = ref.p[k]
        pref[k, 3:] = pin.log3(Rd)
    data = np.hstack([ro.t[:K, None], ro.q, ro.v, ro.tau_cmd, ro.tau_del, pose, pref])
    buf = io.StringIO()
    buf.write(",".join(columns(joint_names)) + "\n")
    np.savetxt(buf, data, delimiter=",", fmt="%.10g")
    return buf.getvalue()


@dataclass(frozen=True)
class RunLog:
    """A run read back from a log (simulated or measured)."""

    t: np.ndarray
    """Times (K,) [s], uniform."""
    q: np.ndarray
    """Joint positions (K, n)."""
    v: np.ndarray
    """Joint velocities (K, n)."""
    tau_cmd: np.ndarray
    """Commands (K, n)."""
    pose: np.ndarray
    """Tip pose (K, 6): position [m], rotation vector [rad]."""
    pose_ref: np.ndarray
    """Reference pose (K, 6)."""

    @property
    def dt(self) -> float:
        """Sample period [s]."""
        return float(self.t[1] - self.t[0])


def read_run_log(path: Path, joint_names: Sequence[str]) -> RunLog:
    """Read a log; any problem is one InputError naming the file and the column or row."""
    from .inputs import read_text

    text = read_text(path, "bench log")
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise InputError(path, "header", "the file is empty: expected a header and rows")
    header = [h.strip() for h in lines[0].split(",")]
    need = columns(joint_names, delivered=False)
    missing = [c for c in need if c not in header]
    if missing:
        raise InputError(path, "header", f"column '{missing[0][:40]}' is missing "
                         f"({len(missing)} missing); expected {', '.join(need[:4])}, …")
    allowed = set(columns(joint_names, delivered=True))
    extra = [c for c in header if c not in allowed]
    if extra:
        joints = {c.split("_", 1)[1] for c in extra if c[:2] in ("q_", "v_")}
        what = f" (no joint named '{sorted(joints)[0][:40]}')" if joints else ""
        raise InputError(path, "header", f"unknown column '{extra[0][:40]}'{what}")
    idx = {c: i for i, c in enumerate(header)}
    rows = np.empty((len(lines) - 1, len(header)))
    for r, ln in enumerate(lines[1:], start=2):
        parts = ln.split(",")
        if len(parts) != len(header):
            raise InputError(path, f"row {r}", f"has {len(parts)} values, the header "
                             f"{len(header)}")
        try:
            rows[r - 2] = [float(x) for x in parts]
        except ValueError:
            raise InputError(path, f"row {r}", "a value is not a number") from None
        if not np.all(np.isfinite(rows[r - 2])):
            col = header[int(np.flatnonzero(~np.isfinite(rows[r - 2]))[0])]
            raise InputError(path, f"row {r}, column {col}", "is not finite (NaN or inf)")
    if len(rows) < 3:
        raise InputError(path, "rows", f"needs at least 3 rows, found {len(rows)}")
    t = rows[:, idx["time_s"]]
    dt = np.diff(t)
    if np.any(dt <= 0):
        r = int(np.flatnonzero(dt <= 0)[0]) + 3
        raise InputError(path, f"row {r}, column time_s", "time does not increase")
    if np.ptp(dt) > 1e-6 * max(dt.mean(), 1e-12) + 1e-9:
        r = int(np.argmax(np.abs(dt - dt[0]))) + 3
        raise InputError(path, f"row {r}, column time_s",
                         "sampling is not uniform (one row per control period is needed)")

    def block(prefix: str) -> np.ndarray:
        return rows[:, [idx[f"{prefix}_{j}"] for j in joint_names]]

    return RunLog(
        t=t, q=block("q"), v=block("v"), tau_cmd=block("tau_cmd"),
        pose=rows[:, [idx[c] for c in POSE]], pose_ref=rows[:, [idx[c] for c in POSE_REF]],
    )


def safe_name(text: str) -> str:
    """A file-name part from a label (letters, digits, '-', '_', '.')."""
    out = "".join(c if c.isalnum() or c in "-_." else "-" for c in text).strip("-.")
    return out[:60] or "rollout"


def position_error_mm(log: RunLog) -> np.ndarray:
    """Tip position error of a log (K,) [mm]."""
    return np.linalg.norm(log.pose_ref[:, :3] - log.pose[:, :3], axis=1) * 1e3


def rotation_error_deg(log: RunLog) -> np.ndarray:
    """Tip orientation error of a log (K,) [deg]."""
    out = np.empty(len(log.t))
    for k in range(len(log.t)):
        Rd = pin.exp3(log.pose_ref[k, 3:])
        R = pin.exp3(log.pose[k, 3:])
        out[k] = math.degrees(float(np.linalg.norm(pin.log3(Rd @ R.T))))
    return out
