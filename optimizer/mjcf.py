"""MJCF arm models, read as untrusted XML and turned into the URDF the rest of the tool uses.

A problem names its arm by ``[arm] mjcf = "arm.xml"`` instead of ``urdf``. The file gets
the URDF's handling (bounded reader, declarations refused, no file it names is opened)
and is then converted, element by element, into URDF text that passes the URDF checks
(positive masses, physical inertias, non-zero axes, a tree). Tests compare the result
with pinocchio's own MJCF reader (mass matrix, gravity torques, frame placements).

What is converted: ``<compiler angle eulerseq>`` (lower-case, moving-axis sequences);
the ``<worldbody>`` tree of ``<body>`` elements (``pos``; orientation by ``quat``,
``axisangle``, ``euler``, ``xyaxes`` or ``zaxis``), each with at most one ``<joint>``
(``hinge`` or ``slide``; ``axis``, ``range``, ``limited``, ``actuatorfrcrange``) at the
body origin, and an explicit ``<inertial>`` (``pos``, orientation, ``mass``,
``diaginertia`` or ``fullinertia``); ``<site>`` elements become massless frames (a tool
frame can be a site); efforts from ``<actuator><motor joint gear ctrlrange|forcerange>``.
What is refused, with the reason: ``<include>`` (it opens other files), ``<equality>``
and ``<tendon>`` (couplings), joints other than hinge/slide, several joints in one body,
a joint away from its body's origin or with a non-zero ``ref``, joint settings in
``<default>``, a body with geoms but no ``<inertial>`` (MuJoCo would infer its inertia
from the geoms), ``inertiafromgeom="true"``, upper-case (fixed-axis) Euler sequences.
Joint damping, armature and friction loss are not taken: the problem file's
``[actuators]`` set those; each one found is reported as a warning. Geoms, meshes,
cameras, lights, sensors, contacts and options are ignored (the tool needs no geometry).
"""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np

from .arm import MAX_LINKS, MAX_XML_DEPTH, refuse_declarations, sanitize_urdf, xml_depth
from .exceptions import ProblemError

__all__ = [
    "BODY_CHILDREN_IGNORED",
    "IGNORED_TOP",
    "REFUSED_TOP",
    "UNLIMITED",
    "WORLD",
    "mjcf_to_urdf",
    "read_mjcf",
]

#: Name of the URDF root link that stands for MJCF's world body.
WORLD = "world"
#: Limit written for a joint without a range [rad or m]: in effect none.
UNLIMITED = 1e6
#: Top-level elements that carry nothing the tool uses.
IGNORED_TOP = {
    "option",
    "size",
    "visual",
    "statistic",
    "asset",
    "contact",
    "sensor",
    "keyframe",
    "custom",
    "extension",
    "default",
    "actuator",
    "compiler",
    "worldbody",
}
#: Top-level elements refused, and why.
REFUSED_TOP = {
    "include": "opens other files; paste the included model into this one",
    "equality": "couples joints or bodies; the tool simulates a tree of independent joints",
    "tendon": "couples joints; the tool simulates a tree of independent joints",
    "deformable": "is not a rigid body",
    "flexcomp": "is not a rigid body",
}
BODY_CHILDREN_IGNORED = {"geom", "camera", "light", "composite", "plugin", "attach", "frame"}


class _RefusedError(ValueError):
    """A reason the MJCF cannot be converted (wrapped into a ProblemError)."""


def _floats(el: ET.Element, attr: str, count: int | None, where: str) -> list[float] | None:
    raw = el.get(attr)
    if raw is None:
        return None
    try:
        vals = [float(x) for x in raw.split()]
    except ValueError:
        raise _RefusedError(f"{where} {attr}='{raw[:40]}' is not a list of numbers") from None
    if (count is not None and len(vals) != count) or not all(math.isfinite(v) for v in vals):
        n = f"{count} " if count is not None else ""
        raise _RefusedError(f"{where} {attr}='{raw[:40]}' needs {n}finite number(s)")
    return vals


def _axis_rotation(axis: np.ndarray, angle: float) -> np.ndarray:
    n = float(np.linalg.norm(axis))
    if n < 1e-12:
        raise _RefusedError("a rotation axis is zero")
    k = axis / n
    K = np.array([[0, -k[2], k[1]], [k[2], 0, -k[0]], [-k[1], k[0], 0]])
    return np.eye(3) + math.sin(angle) * K + (1 - math.cos(angle)) * (K @ K)


def _rotation(el: ET.Element, where: str, degrees: bool, eulerseq: str) -> np.ndarray:
    """The frame orientation an MJCF element gives (identity when it gives none)."""
    given = [a for a in ("quat", "axisangle", "euler", "xyaxes", "zaxis") if el.get(a)]
    if len(given) > 1:
        raise _RefusedError(f"{where} gives its orientation twice ({', '.join(given)})")
    if not given:
        return np.eye(3)
    kind = given[0]
    unit = math.pi / 180.0 if degrees else 1.0
    if kind == "quat":
        w, x, y, z = _floats(el, "quat", 4, where) or []
        n = math.sqrt(w * w + x * x + y * y + z * z)
        if n < 1e-12:
            raise _RefusedError(f"{where} quat is zero")
        w, x, y, z = w / n, x / n, y / n, z / n
        return np.array(
            [
                [1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y)],
                [2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x)],
                [2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y)],
            ]
        )
    if kind == "axisangle":
        v = _floats(el, "axisangle", 4, where) or []
        return _axis_rotation(np.array(v[:3]), v[3] * unit)
    if kind == "euler":
        angles = _floats(el, "euler", 3, where) or []
        R = np.eye(3)
        basis = {"x": np.array([1.0, 0, 0]), "y": np.array([0, 1.0, 0]), "z": np.array([0, 0, 1.0])}
        for ch, a in zip(eulerseq, angles):
            step = _axis_rotation(basis[ch.lower()], a * unit)
            R = R @ step  # about the moving (already rotated) axes
        return R
    if kind == "xyaxes":
        xy = np.array(_floats(el, "xyaxes", 6, where) or [])
        ex = xy[:3] / max(float(np.linalg.norm(xy[:3])), 1e-300)
        ey = xy[3:] - ex * float(ex @ xy[3:])
        if np.linalg.norm(ey) < 1e-12 or np.linalg.norm(xy[:3]) < 1e-12:
            raise _RefusedError(f"{where} xyaxes are parallel or zero")
        ey = ey / np.linalg.norm(ey)
        return np.column_stack([ex, ey, np.cross(ex, ey)])
    zv = np.array(_floats(el, "zaxis", 3, where) or [])
    if np.linalg.norm(zv) < 1e-12:
        raise _RefusedError(f"{where} zaxis is zero")
    zv = zv / np.linalg.norm(zv)
    ez = np.array([0.0, 0.0, 1.0])
    c = float(ez @ zv)
    axis = np.cross(ez, zv)
    if np.linalg.norm(axis) < 1e-12:
        return np.eye(3) if c > 0 else np.diag([1.0, -1.0, -1.0])
    return _axis_rotation(axis, math.atan2(float(np.linalg.norm(axis)), c))


def _rpy(R: np.ndarray) -> list[float]:
    """URDF roll-pitch-yaw (fixed X, then Y, then Z) of a rotation matrix."""
    pitch = math.atan2(-R[2, 0], math.hypot(R[0, 0], R[1, 0]))
    if abs(math.cos(pitch)) < 1e-12:  # gimbal lock: put it all in yaw
        return [0.0, pitch, math.atan2(-R[0, 1], R[1, 1])]
    return [math.atan2(R[2, 1], R[2, 2]), pitch, math.atan2(R[1, 0], R[0, 0])]


def _origin(pos: list[float], R: np.ndarray) -> str:
    xyz = " ".join(repr(float(v)) for v in pos)
    rpy = " ".join(repr(float(v)) for v in _rpy(R))
    return f'<origin xyz="{xyz}" rpy="{rpy}"/>'


def _efforts(root: ET.Element) -> dict[str, float]:
    """Joint name -> largest torque its motors can apply (``gear`` times the larger end of
    ``forcerange`` or ``ctrlrange``)."""
    out: dict[str, float] = {}
    for acts in root.findall("actuator"):
        for m in acts:
            joint = m.get("joint")
            if m.tag not in ("motor", "general") or not joint:
                continue
            gear = (_floats(m, "gear", None, f"<{m.tag}>") or [1.0])[0]
            rng = _floats(m, "forcerange", 2, f"<{m.tag}>")
            scale = 1.0
            if rng is None:
                rng = _floats(m, "ctrlrange", 2, f"<{m.tag}>")
                scale = abs(gear)
            if rng is not None:
                out[joint] = max(out.get(joint, 0.0), scale * max(abs(rng[0]), abs(rng[1])))
    return out


def read_mjcf(path: Path, key: str, problem_path: object) -> tuple[str, list[str]]:
    """Read an MJCF file as untrusted XML; return URDF text (checked as any URDF is) and
    warnings for what the conversion leaves out. Refusals name ``problem_path``, ``key``
    and the file."""
    from .inputs import read_text

    text = read_text(path, "MJCF", ProblemError, key, problem_path)
    what = f"MJCF file {path}"
    refuse_declarations(text, what, key, problem_path)
    urdf, warnings = mjcf_to_urdf(text, what, key, problem_path)
    return sanitize_urdf(urdf, what, key, problem_path), warnings


def mjcf_to_urdf(text: str, what: str, key: str, problem_path: object) -> tuple[str, list[str]]:
    """URDF text for an MJCF document, and warnings for what it leaves out.

    ``text`` has already passed the declaration check and size cap. Raises ProblemError
    naming ``problem_path`` and ``key`` with ``what`` and the reason.
    """
    try:
        return _convert(text)
    except _RefusedError as err:
        raise ProblemError(problem_path, key, f"{what}: {err}") from err
    except ET.ParseError as err:
        raise ProblemError(problem_path, key, f"{what} is not well-formed XML: {err}") from err


def _convert(text: str) -> tuple[str, list[str]]:
    root = ET.fromstring(text)
    if root.tag != "mujoco":
        raise _RefusedError(f"the root element is <{root.tag}>, not <mujoco>")
    for child in root:
        if child.tag in REFUSED_TOP:
            raise _RefusedError(f"<{child.tag}> {REFUSED_TOP[child.tag]}")
        if child.tag not in IGNORED_TOP:
            raise _RefusedError(f"<{child.tag}> is not an MJCF element this tool knows")
    degrees, eulerseq = True, "xyz"  # MJCF's defaults
    for comp in root.findall("compiler"):
        angle = comp.get("angle")
        if angle is not None:
            if angle not in ("degree", "radian"):
                raise _RefusedError(f"<compiler> angle='{angle[:20]}' must be degree or radian")
            degrees = angle == "degree"
        seq = comp.get("eulerseq")
        if seq is not None:
            if len(seq) == 3 and any(c in "XYZ" for c in seq):
                raise _RefusedError(
                    f"<compiler> eulerseq='{seq}': fixed-axis (upper-case) sequences are not "
                    "converted (readers disagree on them); use lower case or give quat"
                )
            if len(seq) != 3 or any(c not in "xyz" for c in seq):
                raise _RefusedError(f"<compiler> eulerseq='{seq[:20]}' needs 3 of x, y, z")
            eulerseq = seq
        if comp.get("inertiafromgeom") == "true":
            raise _RefusedError(
                "<compiler> inertiafromgeom='true' takes inertias from geoms; give "
                "each body an <inertial> and drop the attribute"
            )
    for default in root.iter("default"):
        if default.find("joint") is not None:
            raise _RefusedError("<default> sets joint attributes; write them on each <joint>")
    depth = xml_depth(root)
    if depth > MAX_XML_DEPTH:
        raise _RefusedError(f"elements nest {depth} deep; at most {MAX_XML_DEPTH} are read")

    n_bodies = sum(1 for _ in root.iter("body")) + sum(1 for _ in root.iter("site"))
    if n_bodies > MAX_LINKS:
        raise _RefusedError(
            f"has {n_bodies} bodies and sites; an arm model here has at most {MAX_LINKS}"
        )
    worlds = root.findall("worldbody")
    if len(worlds) != 1:
        raise _RefusedError(f"needs exactly one <worldbody>, found {len(worlds)}")
    efforts = _efforts(root)
    name = root.get("model", "mjcf")
    out = [f'<robot name="{_attr(name)}">', f'<link name="{WORLD}"/>']
    warnings: list[str] = []
    names: set[str] = {WORLD}
    joints_seen: set[str] = set()

    def new_name(raw: str | None, fallback: str) -> str:
        n = raw if raw else fallback
        if n in names:
            raise _RefusedError(f"the name '{n[:40]}' is used twice (bodies and sites share names)")
        names.add(n)
        return n

    def walk(parent_el: ET.Element, parent: str, counter: list[int]) -> None:
        for el in parent_el:
            if el.tag in BODY_CHILDREN_IGNORED or el.tag in ("inertial", "joint", "freejoint"):
                if el.tag == "freejoint":
                    raise _RefusedError(
                        f"body '{parent}' has a <freejoint>: the arm's base is fixed"
                    )
                continue
            counter[0] += 1
            if el.tag == "site":
                sname = new_name(el.get("name"), f"site{counter[0]}")
                where = f"site '{sname}'"
                pos = _floats(el, "pos", 3, where) or [0.0, 0.0, 0.0]
                R = _rotation(el, where, degrees, eulerseq)
                out.append(f'<link name="{_attr(sname)}"/>')
                out.append(_fixed(f"{sname}_site", parent, sname, pos, R))
                continue
            if el.tag != "body":
                raise _RefusedError(f"<{el.tag}> inside a body is not an element this tool knows")
            bname = new_name(el.get("name"), f"body{counter[0]}")
            where = f"body '{bname}'"
            if el.get("childclass"):
                raise _RefusedError(
                    f"{where} childclass: classes are not converted; write the "
                    "attributes on each element"
                )
            pos = _floats(el, "pos", 3, where) or [0.0, 0.0, 0.0]
            R = _rotation(el, where, degrees, eulerseq)
            if el.find("freejoint") is not None:
                raise _RefusedError(f"{where} has a <freejoint>: the arm's base is fixed")
            joints = [j for j in el if j.tag == "joint"]
            if len(joints) > 1:
                raise _RefusedError(f"{where} has {len(joints)} joints; give each its own body")
            inertial = _inertial(el, where, degrees, eulerseq)
            out.append(f'<link name="{_attr(bname)}">{inertial}</link>')
            if not joints:
                out.append(_fixed(f"{bname}_fixed", parent, bname, pos, R))
            else:
                out.append(
                    _joint(
                        joints[0], bname, parent, pos, R, degrees, efforts, joints_seen, warnings
                    )
                )
            walk(el, bname, counter)

    walk(worlds[0], WORLD, [0])
    unknown = sorted(set(efforts) - joints_seen)
    if unknown:
        raise _RefusedError(
            f"<actuator> names joint '{unknown[0][:40]}', which is not in the model"
        )
    out.append("</robot>")
    return "\n".join(out), warnings


def _fixed(name: str, parent: str, child: str, pos: list[float], R: np.ndarray) -> str:
    return (
        f'<joint name="{_attr(name)}" type="fixed"><parent link="{_attr(parent)}"/>'
        f'<child link="{_attr(child)}"/>{_origin(pos, R)}</joint>'
    )


def _attr(s: str) -> str:
    return s.replace("&", "&amp;").replace('"', "&quot;").replace("<", "&lt;")


def _inertial(body: ET.Element, where: str, degrees: bool, eulerseq: str) -> str:
    inertials = body.findall("inertial")
    if not inertials:
        if body.find("geom") is not None:
            raise _RefusedError(
                f"{where} has geoms but no <inertial>: MuJoCo would infer its mass "
                "from them; give the body an <inertial> (mass, diaginertia)"
            )
        return ""
    if len(inertials) > 1:
        raise _RefusedError(f"{where} has {len(inertials)} <inertial> elements")
    el = inertials[0]
    w = f"{where} <inertial>"
    pos = _floats(el, "pos", 3, w)
    if pos is None:
        raise _RefusedError(f"{w} needs pos")
    mass = _floats(el, "mass", 1, w)
    if mass is None:
        raise _RefusedError(f"{w} needs mass")
    R = _rotation(el, w, degrees, eulerseq)
    diag = _floats(el, "diaginertia", 3, w)
    full = _floats(el, "fullinertia", 6, w)
    if (diag is None) == (full is None):
        raise _RefusedError(f"{w} needs exactly one of diaginertia and fullinertia")
    if diag is not None:
        I = {"ixx": diag[0], "iyy": diag[1], "izz": diag[2], "ixy": 0.0, "ixz": 0.0, "iyz": 0.0}
    else:
        f = full or []
        I = {"ixx": f[0], "iyy": f[1], "izz": f[2], "ixy": f[3], "ixz": f[4], "iyz": f[5]}
    inertia = " ".join(f'{k}="{v!r}"' for k, v in I.items())
    return f'<inertial>{_origin(pos, R)}<mass value="{mass[0]!r}"/><inertia {inertia}/></inertial>'


def _joint(
    j: ET.Element,
    child: str,
    parent: str,
    pos: list[float],
    R: np.ndarray,
    degrees: bool,
    efforts: dict[str, float],
    seen: set[str],
    warnings: list[str],
) -> str:
    jname = j.get("name")
    where = f"joint '{jname}'" if jname else f"the joint of body '{child}'"
    jtype = j.get("type", "hinge")
    if jtype not in ("hinge", "slide"):
        raise _RefusedError(
            f"{where} has type '{jtype[:20]}'; only hinge and slide "
            "joints are supported (the base is fixed)"
        )
    if not jname:
        raise _RefusedError(f"{where} has no name; the problem file names joints")
    if jname in seen:
        raise _RefusedError(f"{where} is defined twice")
    seen.add(jname)
    if j.get("class"):
        raise _RefusedError(f"{where} class: classes are not converted; write the attributes here")
    jpos = _floats(j, "pos", 3, where) or [0.0, 0.0, 0.0]
    if any(abs(v) > 1e-12 for v in jpos):
        raise _RefusedError(
            f"{where} pos is not the body's origin; move the body frame onto the "
            "joint (the tool's joints sit at their child's origin)"
        )
    if abs((_floats(j, "ref", 1, where) or [0.0])[0]) > 0:
        raise _RefusedError(f"{where} ref is not 0; the tool measures joints from the body frame")
    for attr, goes in (
        ("damping", "viscous_nms_per_rad"),
        ("armature", "armature_kgm2"),
        ("frictionloss", "coulomb_nm"),
        ("stiffness", None),
    ):
        v = _floats(j, attr, None, where)
        if v and any(x != 0 for x in v):
            if goes is None:
                raise _RefusedError(f"{where} {attr} (a joint spring) is not simulated; remove it")
            warnings.append(
                f"MJCF {where} {attr}={v[0]:g} is not taken: set {goes} in the "
                f"problem file's [actuators.{jname}]"
            )
    axis = _floats(j, "axis", 3, where) or [0.0, 0.0, 1.0]
    kind = "revolute" if jtype == "hinge" else "prismatic"
    limited = j.get("limited", "auto")
    if limited not in ("true", "false", "auto"):
        raise _RefusedError(f"{where} limited='{limited[:20]}' must be true, false or auto")
    rng = _floats(j, "range", 2, where)
    attrs = []
    if rng is not None and limited != "false":
        unit = math.pi / 180.0 if (degrees and kind == "revolute") else 1.0
        lo, hi = rng[0] * unit, rng[1] * unit
        if not lo < hi:
            raise _RefusedError(f"{where} range must have its lower end first")
        attrs += [f'lower="{lo!r}"', f'upper="{hi!r}"']
    elif limited == "true":
        raise _RefusedError(f"{where} is limited but has no range")
    else:  # no range: in effect unlimited (a URDF continuous joint is not 1-DoF in q)
        attrs += [f'lower="{-UNLIMITED!r}"', f'upper="{UNLIMITED!r}"']
    frc = _floats(j, "actuatorfrcrange", 2, where)
    effort = max(abs(frc[0]), abs(frc[1])) if frc else efforts.get(jname, 0.0)
    # 0 when the model gives no torque limit: the problem file's effort_nm must then say
    attrs += [f'effort="{effort!r}"', 'velocity="1e9"']  # MJCF has no speed limit
    limit = f"<limit {' '.join(attrs)}/>"
    ax = " ".join(repr(float(v)) for v in axis)
    return (
        f'<joint name="{_attr(jname)}" type="{kind}"><parent link="{_attr(parent)}"/>'
        f'<child link="{_attr(child)}"/>{_origin(pos, R)}<axis xyz="{ax}"/>{limit}</joint>'
    )
