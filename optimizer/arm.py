"""The arm: the controller's pinocchio model, the plant's (deliberately different) model, the tip.

The controller computes with the URDF as written. The simulated plant is the same
kinematic chain with the deviations the problem file states: an unmodelled payload
at the tip and mass scales per link. Their difference is one of the things that
makes tracking error honest (``DESIGN.md``, "What makes the simulation honest").
"""

from __future__ import annotations

import contextlib
import logging
import math
import os
import re
import sys
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pinocchio as pin

from .exceptions import ProblemError

__all__ = [
    "DECLARATION",
    "LWA",
    "MAX_LINKS",
    "MAX_URDF_BYTES",
    "MAX_XML_DEPTH",
    "URDF_JOINT_TYPES",
    "Arm",
    "PlantDeviation",
    "build_model",
    "check_urdf_content",
    "link_inertials",
    "read_urdf",
    "refuse_declarations",
    "sanitize_urdf",
    "xml_depth",
]

log = logging.getLogger(__name__)

LWA = pin.ReferenceFrame.LOCAL_WORLD_ALIGNED

#: Joint model short names pinocchio uses for the one-DoF joints this tool accepts.
_ONE_DOF = ("JointModelR", "JointModelP", "JointModelRevolute", "JointModelPrismatic")


@dataclass(frozen=True)
class PlantDeviation:
    """How the simulated plant differs from the controller's model."""

    payload_kg: float = 0.0
    """Point-like payload at the tip the controller does not know [kg]."""
    payload_offset_m: tuple[float, float, float] = (0.0, 0.0, 0.0)
    """Payload centre of mass in the tip frame [m]."""
    payload_radius_m: float = 0.03
    """Radius of the solid sphere used for the payload inertia [m]."""
    mass_scale: float = 1.0
    """Scale on every link's mass and inertia in the plant [-]."""
    link_mass_scale: Mapping[str, float] = field(default_factory=dict)
    """Extra scale per link name, multiplied with ``mass_scale`` [-]."""


@contextlib.contextmanager
def _stderr_caught() -> Iterator[Callable[[], list[str]]]:
    """Hold what C++ code writes to file descriptor 2 during the block (the URDF reader
    prints its complaints there); the yielded function returns those lines afterwards."""
    import tempfile

    lines: list[str] = []
    try:
        sys.stderr.flush()
        saved = os.dup(2)
    except (OSError, ValueError):  # no usable fd 2 (embedded, closed): nothing to hold
        yield lambda: lines
        return
    with tempfile.TemporaryFile() as tmp:
        os.dup2(tmp.fileno(), 2)
        try:
            yield lambda: lines
        finally:
            os.dup2(saved, 2)
            os.close(saved)
            tmp.seek(0)
            lines += tmp.read(20_000).decode("utf-8", "replace").splitlines()


def build_model(urdf_xml: str, source: object) -> pin.Model:
    """Build a fixed-base pinocchio model from URDF text; errors name ``source``."""
    with _stderr_caught() as noise:
        try:
            model = pin.buildModelFromXML(urdf_xml)
        except Exception as err:  # pinocchio raises ValueError/RuntimeError with C++ text
            failure: Exception | None = err
        else:
            failure = None
    if failure is not None:
        # the C++ reader's own reason (its "Error: ..." lines on stderr) beats the wrapper's
        said = [ln.strip().removeprefix("Error:").strip() for ln in noise() if "Error" in ln]
        first = said[0] if said else (str(failure).strip().splitlines() or [""])[0]
        raise ProblemError(
            source, "", f"URDF could not be read: {first or type(failure).__name__}"
        ) from failure
    if model.nv == 0:
        raise ProblemError(source, "", "URDF has no movable joint")
    for jid in range(1, model.njoints):
        short = model.joints[jid].shortname()
        if not short.startswith(_ONE_DOF) or model.joints[jid].nq != 1:
            raise ProblemError(
                source,
                "",
                f"joint '{model.names[jid]}' is of type {short}; only revolute and prismatic "
                "joints with limits are supported (continuous joints: give them limits)",
            )
    return model


class Arm:
    """Controller model, plant model and tip frame of one arm.

    Args:
        urdf_xml: the URDF document.
        tip_frame: name of the frame whose pose the task controls.
        home: home joint positions [rad or m], length n.
        deviation: plant deviation from the model.
        source: the URDF's file name, for messages.
        armature: reflected rotor inertia per joint [kg·m²], known to model and plant alike.
        model: the pinocchio model ``build_model`` made of ``urdf_xml`` (copied), to save
            building it again.
    """

    def __init__(
        self,
        urdf_xml: str,
        tip_frame: str,
        home: Sequence[float] | np.ndarray | None = None,
        deviation: PlantDeviation | None = None,
        source: object = None,
        armature: Sequence[float] | np.ndarray | None = None,
        model: pin.Model | None = None,
    ) -> None:
        self.source = source
        self.urdf_xml = urdf_xml
        self.model = build_model(urdf_xml, source) if model is None else model.copy()
        if not self.model.existFrame(tip_frame):
            names = [f.name for f in self.model.frames if f.name != "universe"]
            raise ProblemError(
                source,
                "tip_frame",
                f"frame '{tip_frame}' not in the URDF; frames: {', '.join(names)}",
            )
        if armature is not None:
            self.model.armature = np.asarray(armature, dtype=float).copy()
        self.tip_frame = tip_frame
        self.tip_id = self.model.getFrameId(tip_frame)
        self.n = self.model.nv
        self.joint_names: tuple[str, ...] = tuple(self.model.names[1:])
        self.effort = _ro(self.model.effortLimit)
        self.lower = _ro(self.model.lowerPositionLimit)
        self.upper = _ro(self.model.upperPositionLimit)
        self.velocity_limit = _ro(self.model.velocityLimit)
        self.link_names: tuple[str, ...] = tuple(
            f.name for f in self.model.frames if f.type == pin.FrameType.BODY
        )
        q0 = np.zeros(self.n) if home is None else np.asarray(home, dtype=float)
        self.home = _ro(q0)
        self._link_inertials = link_inertials(urdf_xml)
        self.deviation = deviation or PlantDeviation()
        self.plant_model = self._build_plant(self.deviation)
        self._data = self.model.createData()

    def _build_plant(self, dev: PlantDeviation) -> pin.Model:
        plant = self.model.copy()
        scale = np.ones(plant.njoints)
        scale[:] = dev.mass_scale
        for link, s in dev.link_mass_scale.items():
            if link not in self._link_inertials:
                raise ProblemError(
                    None,
                    f"plant.link_mass_scale.{link}",
                    f"no link with an inertial named '{link}'; links: "
                    + ", ".join(sorted(self._link_inertials)),
                )
            # A link's inertia is lumped into its parent joint; add the scaled difference.
            frame = plant.frames[plant.getFrameId(link)]
            own = self._link_inertials[link]
            jid = frame.parentJoint
            plant.inertias[jid] = plant.inertias[jid] + _scaled(frame.placement.act(own), s - 1.0)
        for jid in range(1, plant.njoints):
            plant.inertias[jid] = _scaled(plant.inertias[jid], float(scale[jid]))
        if dev.payload_kg > 0.0:
            tip = plant.frames[self.tip_id]
            sphere = pin.Inertia.FromSphere(dev.payload_kg, dev.payload_radius_m)
            offset = pin.SE3(np.eye(3), np.asarray(dev.payload_offset_m, dtype=float))
            plant.inertias[tip.parentJoint] = plant.inertias[tip.parentJoint] + (
                tip.placement * offset
            ).act(sphere)
        return plant

    def with_deviation(self, deviation: PlantDeviation) -> Arm:
        """The same arm and controller model with another plant deviation."""
        other = Arm(
            self.urdf_xml,
            self.tip_frame,
            self.home,
            deviation,
            self.source,
            armature=np.array(self.model.armature),
            model=self.model,
        )
        other.effort = self.effort
        return other

    def tip_pose(self, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Tip position [m] (3,) and rotation (3, 3) in the world, controller model."""
        pin.framesForwardKinematics(self.model, self._data, q)
        f = self._data.oMf[self.tip_id]
        return f.translation.copy(), f.rotation.copy()

    def tip_jacobian(self, q: np.ndarray) -> np.ndarray:
        """6×n tip Jacobian, world-aligned at the tip, rows [linear; angular]."""
        return pin.computeFrameJacobian(self.model, self._data, q, self.tip_id, LWA)

    def gravity(self, q: np.ndarray) -> np.ndarray:
        """Gravity torque of the controller model [N·m] (n,)."""
        return pin.computeGeneralizedGravity(self.model, self._data, q).copy()

    def mass_matrix(self, q: np.ndarray) -> np.ndarray:
        """Joint-space mass matrix of the controller model (n, n)."""
        return pin.crba(self.model, self._data, q).copy()


def _scaled(inertia: pin.Inertia, s: float) -> pin.Inertia:
    """Inertia with mass, first and second moments all scaled by ``s`` (linear parameters)."""
    return pin.Inertia.FromDynamicParameters(inertia.toDynamicParameters() * s)


def _ro(a: np.ndarray) -> np.ndarray:
    out = np.array(a, dtype=float, copy=True)
    out.setflags(write=False)
    return out


#: Largest URDF file read [bytes]; a kinematic model is a few hundred kB at most.
MAX_URDF_BYTES = 8 * 1024 * 1024
DECLARATION = re.compile(r"<!\s*(DOCTYPE|ENTITY)", re.IGNORECASE)


def read_urdf(path: Path, key: str, problem_path: object) -> str:
    """Read a URDF file as untrusted XML; return the text pinocchio may see.

    Refused before any parser runs: files over ``MAX_URDF_BYTES`` and any document type
    or entity declaration (entity expansion, external entities). ``<visual>`` and
    ``<collision>`` elements are dropped, so no mesh path the file names is ever opened
    (the tool needs no geometry). Every refusal is a ProblemError naming the file.
    """
    from .inputs import read_text

    text = read_text(path, "URDF", ProblemError, key, problem_path)
    return sanitize_urdf(text, f"URDF file {path}", key, problem_path)


def refuse_declarations(text: str, what: str, key: str, problem_path: object) -> None:
    """Any document type or entity declaration in untrusted XML (URDF, MJCF) is refused
    before a parser sees it (entity expansion, external entities)."""
    if DECLARATION.search(text):
        raise ProblemError(
            problem_path,
            key,
            f"{what} has a <!DOCTYPE> or <!ENTITY> declaration; these are refused "
            "(entity expansion, external entities): remove it",
        )


def sanitize_urdf(text: str, what: str, key: str, problem_path: object) -> str:
    """Refuse declarations, check well-formedness, drop visual/collision elements."""
    import xml.etree.ElementTree as ET

    refuse_declarations(text, what, key, problem_path)
    try:
        root = ET.fromstring(text)
    except ET.ParseError as err:
        raise ProblemError(problem_path, key, f"{what} is not well-formed XML: {err}") from err
    if root.tag != "robot":
        raise ProblemError(
            problem_path, key, f"{what}: the root element is <{root.tag}>, not <robot>"
        )
    depth = xml_depth(root)
    if depth > MAX_XML_DEPTH:
        raise ProblemError(
            problem_path, key, f"{what}: elements nest {depth} deep; a URDF needs a few levels "
            f"(at most {MAX_XML_DEPTH} are read)"
        )
    for parent in root.iter():
        for child in [c for c in parent if c.tag in ("visual", "collision")]:
            parent.remove(child)
    check_urdf_content(root, what, key, problem_path)
    return ET.tostring(root, encoding="unicode")


#: Most links (URDF) or bodies (MJCF) an arm model may have: far beyond any arm, and
#: below the depth at which a nested model would exhaust a recursive reader.
MAX_LINKS = 512

#: Deepest element nesting read in a URDF (its tree of links is flat: a handful of
#: levels) or an MJCF (bodies nest, one level per body, so up to MAX_LINKS + a few).
MAX_XML_DEPTH = MAX_LINKS + 16


def xml_depth(root: Any) -> int:
    """How deep the elements below ``root`` nest, counted without recursion (a deeply
    nested document must not exhaust the interpreter's stack)."""
    deepest, stack = 0, [(root, 1)]
    while stack:
        el, d = stack.pop()
        deepest = max(deepest, d)
        stack.extend((c, d + 1) for c in el)
    return deepest


#: The joint types of the URDF format (the tool then accepts the one-DoF ones).
URDF_JOINT_TYPES = ("revolute", "continuous", "prismatic", "fixed", "floating", "planar")


def _numbers(el: Any, attr: str, count: int, default: str | None, where: str) -> list[float]:
    raw = el.get(attr, default)
    if raw is None:
        raise ValueError(f"{where} has no {attr}")
    parts = raw.split()
    try:
        vals = [float(x) for x in parts]
    except ValueError:
        raise ValueError(f"{where} {attr}='{raw[:40]}' is not {count} number(s)") from None
    if len(vals) != count or not all(math.isfinite(v) for v in vals):
        raise ValueError(f"{where} {attr}='{raw[:40]}' needs {count} finite number(s)")
    return vals


def check_urdf_content(root: Any, what: str, key: str, problem_path: object) -> None:
    """Refuse physically meaningless or unsupported content before pinocchio sees it: link
    masses and inertias (positive mass, positive definite inertia obeying the triangle
    inequality), origins and axes (three finite numbers, a non-zero axis), mimic joints,
    and anything but a tree of links (a link with two parents, a loop, several roots)."""
    try:
        link_elements = root.findall("link")
        if len(link_elements) > MAX_LINKS:
            raise ValueError(
                f"has {len(link_elements)} links; an arm model here has at most {MAX_LINKS}"
            )
        links = {}
        for link in link_elements:
            name = link.get("name")
            if not name:
                raise ValueError("a <link> has no name")
            if name in links:
                raise ValueError(f"link '{name}' is defined twice")
            links[name] = link
            inertial = link.find("inertial")
            if inertial is None:
                continue
            where = f"link '{name}' <inertial>"
            origin = inertial.find("origin")
            if origin is not None:
                _numbers(origin, "xyz", 3, "0 0 0", f"{where} <origin>")
                _numbers(origin, "rpy", 3, "0 0 0", f"{where} <origin>")
            mass_el = inertial.find("mass")
            (mass,) = _numbers(mass_el, "value", 1, None, f"{where} <mass>") if (
                mass_el is not None) else (0.0,)
            inertia = inertial.find("inertia")
            I = np.zeros((3, 3))
            if inertia is not None:
                vals = {k: _numbers(inertia, k, 1, "0", f"{where} <inertia>")[0]
                        for k in ("ixx", "iyy", "izz", "ixy", "ixz", "iyz")}
                I = np.array([[vals["ixx"], vals["ixy"], vals["ixz"]],
                              [vals["ixy"], vals["iyy"], vals["iyz"]],
                              [vals["ixz"], vals["iyz"], vals["izz"]]])
            if mass < 0 or (mass == 0 and np.any(I != 0)):
                raise ValueError(f"{where} has mass {mass:g} kg: a link's mass must be > 0")
            if mass > 0:
                ev = np.linalg.eigvalsh(I)
                if ev[0] <= 0:
                    raise ValueError(f"{where}: the inertia is not positive definite "
                                     f"(principal moments {', '.join(f'{x:.3g}' for x in ev)})")
                if ev[0] + ev[1] < ev[2] * (1 - 1e-9):
                    raise ValueError(f"{where}: the principal moments {ev[0]:.3g}, {ev[1]:.3g},"
                                     f" {ev[2]:.3g} break the triangle inequality (no rigid "
                                     "body has them)")
        parent_of: dict[str, str] = {}
        joint_names: set[str] = set()
        for joint in root.findall("joint"):
            jname = joint.get("name")
            if not jname:
                raise ValueError("a <joint> has no name")
            if jname in joint_names:
                raise ValueError(f"joint '{jname}' is defined twice")
            joint_names.add(jname)
            where = f"joint '{jname}'"
            jtype = joint.get("type")
            if jtype not in URDF_JOINT_TYPES:
                raise ValueError(f"{where} has type '{str(jtype)[:40]}'; a URDF joint is one "
                                 f"of {', '.join(URDF_JOINT_TYPES)}")
            if joint.find("mimic") is not None:
                raise ValueError(f"{where} is a <mimic> joint; coupled joints are not "
                                 "supported (make it fixed, or model it as its own joint)")
            p_el, c_el = joint.find("parent"), joint.find("child")
            if p_el is None or c_el is None:
                raise ValueError(f"{where} needs a <parent> and a <child> link")
            parent, child = p_el.get("link", ""), c_el.get("link", "")
            for ln in (parent, child):
                if ln not in links:
                    raise ValueError(f"{where} names link '{ln}', which is not defined")
            if child in parent_of:
                raise ValueError(f"{where}: link '{child}' already has a parent joint (a "
                                 "closed loop or a second parent; only trees are supported)")
            parent_of[child] = parent
            origin = joint.find("origin")
            if origin is not None:
                _numbers(origin, "xyz", 3, "0 0 0", f"{where} <origin>")
                _numbers(origin, "rpy", 3, "0 0 0", f"{where} <origin>")
            axis = joint.find("axis")
            if axis is not None and joint.get("type") not in ("fixed", "floating"):
                ax = _numbers(axis, "xyz", 3, "1 0 0", f"{where} <axis>")
                if math.sqrt(sum(x * x for x in ax)) < 1e-9:
                    raise ValueError(f"{where} <axis> is zero: a joint needs a direction")
            limit = joint.find("limit")
            if limit is not None:
                for attr in ("effort", "velocity", "lower", "upper"):
                    if limit.get(attr) is not None:
                        _numbers(limit, attr, 1, None, f"{where} <limit>")
        for start in parent_of:  # a loop never reaches a root
            seen, cur = set(), start
            while cur in parent_of:
                if cur in seen:
                    raise ValueError(f"links form a closed loop through '{cur}'")
                seen.add(cur)
                cur = parent_of[cur]
        roots = [ln for ln in links if ln not in parent_of]
        if len(roots) != 1:
            raise ValueError(f"needs exactly one root link, found {len(roots)}: "
                             + ", ".join(roots[:5]))
    except ValueError as err:
        raise ProblemError(problem_path, key, f"{what}: {err}") from err


def link_inertials(urdf_xml: str) -> dict[str, pin.Inertia]:
    """Each link's own inertia in its link frame, read from the URDF ``<inertial>`` tags."""
    import xml.etree.ElementTree as ET

    root = ET.fromstring(urdf_xml)
    out: dict[str, pin.Inertia] = {}
    for link in root.findall("link"):
        inertial = link.find("inertial")
        if inertial is None:
            continue
        mass_el = inertial.find("mass")
        mass = float(mass_el.get("value", "0")) if mass_el is not None else 0.0
        origin = inertial.find("origin")
        xyz = np.zeros(3)
        rpy = np.zeros(3)
        if origin is not None:
            xyz = np.array([float(x) for x in origin.get("xyz", "0 0 0").split()])
            rpy = np.array([float(x) for x in origin.get("rpy", "0 0 0").split()])
        tens = inertial.find("inertia")
        I = np.zeros((3, 3))
        if tens is not None:
            g = {k: float(tens.get(k, "0")) for k in ("ixx", "iyy", "izz", "ixy", "ixz", "iyz")}
            I = np.array(
                [
                    [g["ixx"], g["ixy"], g["ixz"]],
                    [g["ixy"], g["iyy"], g["iyz"]],
                    [g["ixz"], g["iyz"], g["izz"]],
                ]
            )
        R = pin.rpy.rpyToMatrix(*rpy)
        out[link.get("name", "")] = pin.SE3(R, xyz).act(pin.Inertia(mass, np.zeros(3), I))
    return out
