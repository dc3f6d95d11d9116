"""A translation part plus a rotation part, and timed poses read from a CSV file."""

from __future__ import annotations

import csv
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from .simple import Offsets

__all__ = [
    "CSV_COLUMNS",
    "ROTATION_KINDS",
    "TRANSLATION_KINDS",
    "Combined",
    "CsvPoses",
    "ReadPart",
]

#: Kinds a ``combined`` trajectory may use for each of its parts.
TRANSLATION_KINDS = ("line", "circle", "sine")
ROTATION_KINDS = ("rotate",)

#: How a kind with parts reads one: (its table, the kinds allowed there) -> a kind.
ReadPart = Callable[[Any, Sequence[str]], Any]

#: Header a pose CSV must have, in this order.
CSV_COLUMNS = ("time_s", "x_m", "y_m", "z_m", "rx_rad", "ry_rad", "rz_rad")


@dataclass(frozen=True)
class Combined:
    """Translation of one kind (line, circle, sine) with a rotation (rotate) at once."""

    translation: Any
    """A translation trajectory kind."""
    rotation: Any
    """A rotation trajectory kind."""
    kind: ClassVar[str] = "combined"

    @classmethod
    def from_table(cls, t: Any, read_part: ReadPart, base: Path) -> Combined:
        """From its problem-file table: ``[trajectory.translation]`` and
        ``[trajectory.rotation]``, each read by ``read_part`` (a TableReader ``t``)."""
        tt = t.table("translation", required=True)
        tr = t.table("rotation", required=True)
        trans = read_part(tt, TRANSLATION_KINDS)
        rot = read_part(tr, ROTATION_KINDS)
        tt.done()
        tr.done()
        return cls(trans, rot)

    def offsets(self, t: np.ndarray, R0: np.ndarray) -> Offsets:
        dp, dv, da, _, _, _ = self.translation.offsets(t, R0)
        _, _, _, dR, w, dw = self.rotation.offsets(t, R0)
        return dp, dv, da, dR, w, dw


@dataclass(frozen=True)
class CsvPoses:
    """Timed poses relative to the start pose, interpolated by splines at rest at both ends.

    Row i gives time tᵢ, a position offset dpᵢ in world axes and a rotation vector
    rᵢ: the pose is p = p₀ + dpᵢ, R = exp(rᵢ) R₀. Positions use a clamped cubic
    spline, rotations scipy's RotationSpline; after the last row the pose holds.
    """

    times: np.ndarray = field(repr=False)
    """Row times (K,) [s], strictly increasing, first 0."""
    dp: np.ndarray = field(repr=False)
    """Position offsets (K, 3) [m]."""
    rotvec: np.ndarray = field(repr=False)
    """Rotation vectors (K, 3) [rad]."""
    kind: ClassVar[str] = "csv"

    @classmethod
    def from_table(cls, t: Any, read_part: ReadPart, base: Path) -> CsvPoses:
        """From its problem-file table: ``file``, a pose CSV relative to ``base``."""
        f = t.str("file")
        try:
            return cls.from_file((base / f).resolve())
        except ValueError as err:
            raise t.fail("file", str(err)) from err

    @classmethod
    def from_file(cls, path: Path) -> CsvPoses:
        """Read a pose CSV; raise ValueError with the line number for bad content."""
        from ..exceptions import InputError
        from ..inputs import read_text

        try:
            text = read_text(path, "trajectory CSV")
        except InputError as err:
            raise ValueError(err.reason) from err
        rows = list(csv.reader(line for line in text.splitlines() if line.strip()))
        if not rows or tuple(c.strip() for c in rows[0]) != CSV_COLUMNS:
            raise ValueError(f"{path}: the header must be {','.join(CSV_COLUMNS)}")
        data = []
        for i, row in enumerate(rows[1:], start=2):
            try:
                vals = [float(x) for x in row]
            except ValueError as err:  # the content is not quoted: the file may be anyone's
                raise ValueError(f"{path} line {i}: a value is not a number") from err
            if len(vals) != len(CSV_COLUMNS) or not np.all(np.isfinite(vals)):
                raise ValueError(f"{path} line {i}: needs {len(CSV_COLUMNS)} finite numbers")
            data.append(vals)
        if len(data) < 2:
            raise ValueError(f"{path}: needs at least 2 poses, found {len(data)}")
        arr = np.array(data)
        return cls(times=arr[:, 0], dp=arr[:, 1:4], rotvec=arr[:, 4:7])

    def __post_init__(self) -> None:
        if self.times[0] != 0.0 or np.any(np.diff(self.times) <= 0.0):
            raise ValueError("pose times must start at 0 and strictly increase")

    def offsets(self, t: np.ndarray, R0: np.ndarray) -> Offsets:
        tc = np.clip(t, 0.0, self.times[-1])
        after = (t > self.times[-1])[:, None]
        from scipy.interpolate import CubicSpline  # here: scipy.interpolate is slow to
        from scipy.spatial.transform import Rotation, RotationSpline  # import

        ps = CubicSpline(self.times, self.dp, bc_type="clamped")
        rs = RotationSpline(self.times, Rotation.from_rotvec(self.rotvec))
        Rrel = rs(tc).as_matrix()
        wb = rs(tc, 1)
        ab = rs(tc, 2)
        w = np.einsum("nij,nj->ni", Rrel, wb)  # body rate to world axes
        dw = np.einsum("nij,nj->ni", Rrel, ab)
        zero = np.zeros_like(w)
        return (
            ps(tc),
            np.where(after, zero, ps(tc, 1)),
            np.where(after, zero, ps(tc, 2)),
            Rrel,
            np.where(after, zero, w),
            np.where(after, zero, dw),
        )
